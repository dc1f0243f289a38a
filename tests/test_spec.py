"""ISO 10110-5 surface-form callouts: parsing as drawings write them, and evaluation.

Notation and the fringe convention from ISO 10110-5:2015 §4 and ISO 14999-4 (one fringe = half
the test wavelength of surface deviation in reflection). Hand-computed values beside each case.
"""

from __future__ import annotations

import re

import pytest

from shopdb.spec import CalloutError, Limit, evaluate, parse, values_from_result

L = 632.8


@pytest.mark.parametrize(
    "text, limits, wavelength, test_field, extras",
    [
        # 3/A(B/C) in fringes at the stated wavelength
        ("3/2(0.5); λ = 632.8 nm", {"sag": (2, "fr"), "irregularity": (0.5, "fr")}, L, None, {}),
        (
            "3/5(1/0.5); λ = 546.1 nm",
            {"sag": (5, "fr"), "irregularity": (1, "fr"), "rsi": (0.5, "fr")},
            546.1,
            None,
            {},
        ),
        # a dash (hyphen or en dash) = no requirement for that field
        ("3/-(0.5); λ = 632.8 nm", {"irregularity": (0.5, "fr")}, L, None, {}),
        (
            "3/–(0.25/0.1); λ = 632.8 nm",
            {"irregularity": (0.25, "fr"), "rsi": (0.1, "fr")},
            L,
            None,
            {},
        ),
        # RMS forms
        (
            "3/0.5(0.1/0.05) RMSi < 0.02; λ = 632.8 nm",
            {
                "sag": (0.5, "fr"),
                "irregularity": (0.1, "fr"),
                "rsi": (0.05, "fr"),
                "rmsi": (0.02, "fr"),
            },
            L,
            None,
            {},
        ),
        ("3/-(-) RMSt <= 10 nm", {"rmst": (10, "nm")}, None, None, {}),
        # the 2015 nm form, per field or for the whole callout
        ("3/120 nm(30 nm)", {"sag": (120, "nm"), "irregularity": (30, "nm")}, None, None, {}),
        (
            "3/120(30/10) nm",
            {"sag": (120, "nm"), "irregularity": (30, "nm"), "rsi": (10, "nm")},
            None,
            None,
            {},
        ),
        # test field: the tolerance applies to every sub-aperture of that diameter
        (
            "3/1(0.25); λ = 632.8 nm; Ø 20",
            {"sag": (1, "fr"), "irregularity": (0.25, "fr")},
            L,
            20.0,
            {},
        ),
        # the shop's own extra limits
        (
            "3/1(0.5); λ = 632.8 nm; PVr < 80 nm; band2 < 1.5 nm; slope < 2 urad",
            {"sag": (1, "fr"), "irregularity": (0.5, "fr")},
            L,
            None,
            {"pvr": (80, "nm"), "band2": (1.5, "nm"), "slope": (2, "urad")},
        ),
    ],
)
def test_callouts_as_drawings_write_them(text, limits, wavelength, test_field, extras):
    c = parse(text)
    assert {lim.field: (lim.value, lim.unit) for lim in c.limits} == limits
    assert {lim.field: (lim.value, lim.unit) for lim in c.extras} == extras
    assert c.wavelength_nm == wavelength
    assert c.test_field_mm == test_field


def test_worked_example_fringes_to_nm():
    # issue worked example: 3/2(0.5) at 632.8 nm -> A = 2 x 316.4 = 632.8 nm, B = 158.2 nm of surface
    c = parse("3/2(0.5); λ = 632.8 nm")
    assert c.limit_nm("sag") == pytest.approx(632.8)
    assert c.limit_nm("irregularity") == pytest.approx(158.2)
    assert c.limit_nm("rsi") is None


def test_drawing_wavelength_applies_when_the_callout_states_none():
    assert parse("3/1(0.5)", default_wavelength_nm=546.1).limit_nm("sag") == pytest.approx(273.05)


@pytest.mark.parametrize(
    "text, where",
    [
        ("2/1(0.5)", "starts with '3/'"),
        ("3/x(0.5); λ = 632.8 nm", "character 3"),
        ("3/1 0.5; λ = 632.8 nm", "expected '('"),
        ("3/1(0.5; λ = 632.8 nm", "expected ')'"),
        ("3/1(0.5) RMSq < 2 nm", "RMSt/RMSi/RMSa"),
        ("3/1(0.5); λ = 632.8 nm; colour < 3", "unrecognised clause"),
        ("3/1(0.5)", "need 'λ = ... nm'"),
    ],
)
def test_malformed_callouts_point_at_the_problem(text, where):
    with pytest.raises(CalloutError, match=re.escape(where)):
        parse(text)


def test_evaluation_of_a_hand_computed_result():
    c = parse("3/2(0.5/0.2) RMSi < 20 nm; λ = 632.8 nm; PVr < 150 nm; band1 < 2 nm")
    result = {
        "sag_nm": -500.0,  # magnitude 500 <= 632.8: pass, margin 132.8
        "irregularity_nm": 170.0,  # > 158.2: fail, margin -11.8
        "rsi_nm": 60.0,  # <= 63.28: pass
        "rmsi_nm": 12.5,
        "pvr_nm": 140.0,
        "psd_bands": [{"low_per_mm": 0.0, "high_per_mm": 0.1, "rms_nm": 2.5}],
    }
    v = {f.field: f for f in evaluate(c, values_from_result(c, result))}
    assert v["sag"].passed and v["sag"].margin == pytest.approx(132.8)
    assert not v["irregularity"].passed and v["irregularity"].margin == pytest.approx(-11.8)
    assert v["rsi"].passed and v["rsi"].limit == pytest.approx(63.28)
    assert v["rmsi"].passed and v["pvr"].passed
    assert not v["band1"].passed and v["band1"].measured == 2.5


def test_a_missing_value_fails_its_field():
    c = parse("3/-(0.5) RMSa < 5 nm; λ = 632.8 nm")
    v = {f.field: f for f in evaluate(c, {"irregularity": 10.0, "rmsa": None})}
    assert v["irregularity"].passed and not v["rmsa"].passed and v["rmsa"].measured is None


def test_limit_in_fringes_without_wavelength_is_an_error():
    with pytest.raises(ValueError, match="no test wavelength"):
        Limit("sag", 1.0, "fr").nm(None)
