"""The typed station profile: defaults, validation with one sentence per bad key, and the two
decisions it owns (analysis settings, reference subtraction)."""

from __future__ import annotations

import pytest

from shopdb.errors import ShopdbError
from shopdb.profile import ProfileError, StationProfile
from shopdb.services import masterdata as md


def test_defaults_and_round_trip():
    p = StationProfile.from_dict({"reference": "TF-A", "check_standard": "CS-N"})
    assert p.flip == "none" and p.rotate_deg == 0 and p.check_max_age_days == 7
    assert p.as_dict() == {"reference": "TF-A", "check_standard": "CS-N"}
    assert StationProfile.from_dict(p.as_dict()) == p
    assert p.analysis_settings().zernike_order == 10
    assert not p.subtracts_reference() and p.subtracts_reference(True)
    q = StationProfile.from_dict({"reference": "TF-A", "subtract_reference": True})
    assert q.subtracts_reference() and not q.subtracts_reference(False)


@pytest.mark.parametrize(
    "profile, message",
    [
        ({"colour": "red"}, "unknown station profile keys: colour"),
        ({"flip": "x"}, "station flip 'x' is not one of none, lr, ud"),
        ({"rotate_deg": 45}, "station rotate_deg 45 is not 0, 90, 180 or 270"),
        ({"reference_rotate_deg": True}, "station reference_rotate_deg True is not 0, 90"),
        ({"check_max_age_days": 0}, "check_max_age_days 0 is not a number of days"),
        ({"units": "mm"}, "station units 'mm' are not one of nm, um, waves, fringes"),
        ({"kind": "mirror"}, "station kind 'mirror' is not surface or wavefront"),
        ({"dx_mm": -1}, "station dx_mm -1 is not a positive pixel pitch"),
        ({"subtract_reference": "yes"}, "subtract_reference 'yes' is not true or false"),
        ({"subtract_reference": True}, "subtract_reference needs a reference"),
        ({"serial_pattern": "^(W"}, "is not a regular expression"),
        ({"serial_pattern": "^W"}, "has no group named 'serial'"),
        ({"settings": {"zernike_order": 99}}, "station analysis settings: Zernike order"),
        ({"check_standard": ""}, "station check_standard '' is not a name"),
    ],
)
def test_bad_profiles_are_named(profile, message):
    with pytest.raises(ProfileError, match=message.replace("(", r"\(")):
        StationProfile.from_dict(profile)


def test_add_station_refuses_a_bad_profile_and_writes_nothing(shop, admin):
    from shopdb.models import Station

    with (
        pytest.raises(ShopdbError, match="unknown station profile keys: chek_standard"),
        shop.write() as s,
    ):
        md.add_station(
            session=s, actor=admin, name="B", wavelength_nm=632.8, profile={"chek_standard": "CS"}
        )
    import sqlalchemy as sa

    with shop.read() as s:
        assert s.exec(sa.select(sa.func.count()).select_from(Station)).one()[0] == 0
