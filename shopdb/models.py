"""SQLModel tables: the records of shared/DESIGN.md.

Conventions: heights in nm, lateral sizes in mm, column names carry their unit; every
timestamp is timezone-aware UTC set by the shopdb server process (never by a client);
strings are bounded; constraints are named by the metadata naming convention.
Zernike coefficients live in the child table ``zernike_term`` keyed (result, n, m), with a
covering index on (n, m, result): see DEVELOPERS.md for why.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.types import TypeDecorator
from sqlmodel import Field, SQLModel

SQLModel.metadata.naming_convention = {
    "ix": "ix_%(table_name)s_%(column_0_N_name)s",
    "uq": "uq_%(table_name)s_%(column_0_N_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}

ROLES = ("operator", "lead", "qa", "metrology", "manager", "admin")
PART_STATUSES = ("in_process", "passed", "rework", "scrapped", "released", "rejected")
CLOSED_PART_STATUSES = ("scrapped", "released", "rejected")  # they take no new measurements
MEASUREMENT_STATUSES = ("valid", "rejected", "superseded")
LOT_STATUSES = ("open", "released", "rejected")
DECISIONS = ("accept", "reject", "rework", "accept_deviation")
SIGNATURE_MEANINGS = ("released", "reviewed", "rejected")


def utcnow() -> datetime:
    return datetime.now(UTC)


class UTCDateTime(TypeDecorator):
    """Timezone-aware UTC datetime on every backend (SQLite stores naive UTC)."""

    impl = sa.DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"timestamp {value!r} has no time zone; shopdb stores UTC-aware times")
        value = value.astimezone(UTC)
        return value.replace(tzinfo=None) if dialect.name == "sqlite" else value

    def process_result_value(self, value: datetime | None, dialect) -> datetime | None:
        if value is None:
            return None
        return value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)


def _in(column: str, values: tuple[str, ...]) -> str:
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


def created_at_field() -> Any:
    return Field(default_factory=utcnow, sa_type=UTCDateTime, nullable=False)


def time_field(*, nullable: bool = False, index: bool = False) -> Any:
    return Field(default=None, sa_type=UTCDateTime, nullable=nullable, index=index)


def json_field(*, nullable: bool = False) -> Any:
    return Field(default_factory=dict, sa_type=sa.JSON, nullable=nullable)


# --- people and places -----------------------------------------------------------------


class User(SQLModel, table=True):
    __tablename__ = "user_account"
    __table_args__ = (sa.CheckConstraint(_in("role", ROLES), name="role"),)

    id: int | None = Field(default=None, primary_key=True)
    username: str = Field(max_length=64, unique=True)
    display_name: str = Field(max_length=128)
    role: str = Field(max_length=16)
    password_hash: str | None = Field(default=None, max_length=255)
    active: bool = Field(default=True)
    failed_logins: int = Field(default=0)
    locked_until: datetime | None = time_field(nullable=True)
    created_at: datetime = created_at_field()


class Machine(SQLModel, table=True):
    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(max_length=64, unique=True)
    kind: str = Field(default="", max_length=64)
    notes: str = Field(default="", max_length=1000)
    created_at: datetime = created_at_field()


class Station(SQLModel, table=True):
    """A measurement station (interferometer set-up); ``profile`` holds its ingest defaults."""

    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(max_length=64, unique=True)
    instrument: str = Field(default="", max_length=128)
    wavelength_nm: float = Field(gt=0)
    requires_reference: bool = Field(default=True)
    profile: dict = json_field()
    created_at: datetime = created_at_field()


# --- what is made ----------------------------------------------------------------------


class Drawing(SQLModel, table=True):
    __table_args__ = (sa.UniqueConstraint("number", "revision"),)

    id: int | None = Field(default=None, primary_key=True)
    number: str = Field(max_length=64)
    revision: str = Field(max_length=16)
    title: str = Field(default="", max_length=200)
    surface_form_callout: str = Field(max_length=200)
    test_wavelength_nm: float = Field(gt=0)
    clear_aperture_mm: float = Field(gt=0)
    # None for a flat; signed radius in mm otherwise (negative = concave)
    nominal_radius_mm: float | None = Field(default=None)
    min_valid_fraction: float = Field(default=0.95)
    # how a measured value with its uncertainty is judged against a limit (shopdb.spc.decision):
    # simple, strict[:multiple] or lenient[:multiple]; set when the revision is made
    decision_rule: str = Field(default="simple", max_length=32)
    created_at: datetime = created_at_field()


class Lot(SQLModel, table=True):
    __table_args__ = (sa.CheckConstraint(_in("status", LOT_STATUSES), name="status"),)

    id: int | None = Field(default=None, primary_key=True)
    code: str = Field(max_length=64, unique=True)
    drawing_id: int = Field(foreign_key="drawing.id", index=True)
    status: str = Field(default="open", max_length=16)
    created_at: datetime = created_at_field()


class Part(SQLModel, table=True):
    __table_args__ = (sa.CheckConstraint(_in("status", PART_STATUSES), name="status"),)

    id: int | None = Field(default=None, primary_key=True)
    serial: str = Field(max_length=64, unique=True)
    drawing_id: int = Field(foreign_key="drawing.id", index=True)
    lot_id: int | None = Field(default=None, foreign_key="lot.id", index=True)
    status: str = Field(default="in_process", max_length=16)
    created_at: datetime = created_at_field()


class PolishingRun(SQLModel, table=True):
    __tablename__ = "polishing_run"
    __table_args__ = (sa.UniqueConstraint("part_id", "iteration"),)

    id: int | None = Field(default=None, primary_key=True)
    part_id: int = Field(foreign_key="part.id")
    iteration: int = Field(ge=0)
    machine_id: int | None = Field(default=None, foreign_key="machine.id", index=True)
    operator_id: int | None = Field(default=None, foreign_key="user_account.id")
    started_at: datetime = time_field(index=True)
    ended_at: datetime | None = time_field(nullable=True)
    params: dict = json_field()


# --- references --------------------------------------------------------------------------


class ReferenceOptic(SQLModel, table=True):
    __tablename__ = "reference_optic"

    id: int | None = Field(default=None, primary_key=True)
    name: str = Field(max_length=64, unique=True)
    kind: str = Field(default="flat", max_length=32)
    diameter_mm: float = Field(gt=0)
    notes: str = Field(default="", max_length=1000)
    created_at: datetime = created_at_field()


class ReferenceCalibration(SQLModel, table=True):
    __tablename__ = "reference_calibration"
    __table_args__ = (sa.Index(None, "reference_id", "calibrated_at"),)

    id: int | None = Field(default=None, primary_key=True)
    reference_id: int = Field(foreign_key="reference_optic.id")
    calibrated_at: datetime = time_field()
    valid_until: datetime = time_field()
    method: str = Field(max_length=64)
    uncertainty_nm: float = Field(ge=0)
    pv_nm: float | None = None
    rms_nm: float | None = None
    # {"n,m": coef_nm} orthonormal Zernike coefficients of the reference's surface error
    coefficients: dict = json_field()
    error_map_blob: str | None = Field(default=None, max_length=64)
    # method specifics: per-term uncertainty, undetermined terms, registration, repeatability
    details: dict = json_field()
    created_at: datetime = created_at_field()


# --- measurements and results ------------------------------------------------------------


class Measurement(SQLModel, table=True):
    __table_args__ = (
        sa.CheckConstraint(_in("status", MEASUREMENT_STATUSES), name="status"),
        sa.CheckConstraint("kind IN ('surface', 'wavefront')", name="kind"),
        sa.Index(None, "part_id", "measured_at"),
        sa.Index(None, "station_id", "measured_at"),
    )

    id: int | None = Field(default=None, primary_key=True)
    part_id: int = Field(foreign_key="part.id")
    run_id: int | None = Field(default=None, foreign_key="polishing_run.id", index=True)
    station_id: int = Field(foreign_key="station.id")
    reference_calibration_id: int | None = Field(
        default=None, foreign_key="reference_calibration.id", index=True
    )
    operator_id: int | None = Field(default=None, foreign_key="user_account.id")
    measured_at: datetime = time_field(index=True)
    wavelength_nm: float = Field(gt=0)
    dx_mm: float = Field(gt=0)
    kind: str = Field(default="surface", max_length=16)
    source_name: str = Field(default="", max_length=255)
    source_sha256: str = Field(max_length=64, unique=True)
    blob_key: str = Field(max_length=64, index=True)
    status: str = Field(default="valid", max_length=16)
    created_at: datetime = created_at_field()


class SurfaceResult(SQLModel, table=True):
    __tablename__ = "surface_result"
    __table_args__ = (
        sa.UniqueConstraint("measurement_id", "settings_hash", "software_version"),
        # the newest result of a measurement in one index probe (see queries._newest_result)
        sa.Index(None, "measurement_id", "id"),
    )

    id: int | None = Field(default=None, primary_key=True)
    measurement_id: int = Field(foreign_key="measurement.id")
    settings_hash: str = Field(max_length=64)
    settings: dict = json_field()
    software_version: str = Field(max_length=32)
    pv_nm: float
    rms_nm: float
    pvr_nm: float | None = None
    sag_nm: float | None = None
    irregularity_nm: float | None = None
    rsi_nm: float | None = None
    rmst_nm: float | None = None
    rmsi_nm: float | None = None
    rmsa_nm: float | None = None
    slope_rms_urad: float | None = None
    slope_max_urad: float | None = None
    valid_fraction: float
    # [{"low_per_mm", "high_per_mm", "rms_nm"}, ...]
    psd_bands: list = Field(default_factory=list, sa_type=sa.JSON, nullable=False)
    created_at: datetime = created_at_field()


class ZernikeTerm(SQLModel, table=True):
    """One orthonormal Zernike coefficient of a result; (n, m) per ANSI/ISO 24157."""

    __tablename__ = "zernike_term"
    __table_args__ = (sa.Index(None, "n", "m", "result_id", "coef_nm"),)

    result_id: int = Field(foreign_key="surface_result.id", primary_key=True)
    n: int = Field(primary_key=True, ge=0)
    m: int = Field(primary_key=True)
    coef_nm: float


class CalloutOutcome(SQLModel, table=True):
    """How a result meets its part's drawing callout, judged by the verdict owner
    (services/verdict.py) when the result is stored: per field the measured value (whole
    aperture, or the worst test-field sub-aperture), limit, margin and pass; write-once."""

    __tablename__ = "callout_outcome"

    result_id: int = Field(foreign_key="surface_result.id", primary_key=True)
    drawing_id: int = Field(foreign_key="drawing.id", index=True)
    conforms: bool  # every field passes
    passes: bool  # ... and nothing in the map blocks judging it (what the KPIs count)
    # some field lies inside its uncertainty range (ISO 14253-1): neither conformance nor
    # non-conformance is proven
    conditional: bool = Field(default=False)
    # callout fields that fail, comma-separated in the callout's order ("" when it conforms)
    failed_fields: str = Field(default="", max_length=255)
    # [{"field", "label", "unit", "measured", "limit", "passed", "margin"}, ...]
    fields: list = Field(default_factory=list, sa_type=sa.JSON, nullable=False)
    # {"diameter_mm", "sub_apertures", "worst_at_mm", "error"} when the callout has a test field
    test_field: dict | None = Field(default=None, sa_type=sa.JSON, nullable=True)
    # what in the map itself makes it unfit to judge (too few valid pixels, a test field that
    # cannot be evaluated): sentences; the KPIs count such a result as not passing
    blockers: list = Field(default_factory=list, sa_type=sa.JSON, nullable=False)
    created_at: datetime = created_at_field()


class GageStudy(SQLModel, table=True):
    """A gage R&R study of a station for one quantity (AIAG MSA, 4th ed.); its reproducibility
    enters the uncertainty of that station's later measurements of the quantity."""

    __tablename__ = "gage_study"
    __table_args__ = (sa.Index(None, "station_id", "quantity", "studied_at"),)

    id: int | None = Field(default=None, primary_key=True)
    station_id: int = Field(foreign_key="station.id")
    quantity: str = Field(max_length=32)  # a metric name of shopdb.quantities
    studied_at: datetime = created_at_field()
    method: str = Field(max_length=32)
    repeatability: float  # EV, in the quantity's unit (a standard deviation)
    reproducibility: float  # AV
    grr: float
    part_variation: float
    ndc: int
    tolerance: float | None = None
    source_name: str = Field(default="", max_length=255)
    recorded_by_id: int = Field(foreign_key="user_account.id")


class SignalResponse(SQLModel, table=True):
    """What was found and done about an episode of control-chart signals (an out-of-control
    action record): the chart it is on, the episode's first and last point, the assignable
    cause and the action; write-once (a later record for the same episode supersedes it)."""

    __tablename__ = "signal_response"
    __table_args__ = (
        sa.Index(
            "ix_signal_response_episode", "metric", "grouping", "group_name", "first_measurement_id"
        ),
    )

    id: int | None = Field(default=None, primary_key=True)
    metric: str = Field(max_length=32)
    drawing: str | None = Field(default=None, max_length=64)
    grouping: str = Field(max_length=16)  # machine, station, drawing or all
    group_name: str = Field(max_length=64)
    first_measurement_id: int = Field(foreign_key="measurement.id")
    last_measurement_id: int = Field(foreign_key="measurement.id")
    cause: str = Field(max_length=1000)
    action: str = Field(max_length=1000)
    recorded_by_id: int = Field(foreign_key="user_account.id")
    recorded_at: datetime = created_at_field()


class ShopSetting(SQLModel, table=True):
    """A shop-wide setting a role may change (services/settings.py lists them); audited."""

    __tablename__ = "shop_setting"

    key: str = Field(primary_key=True, max_length=64)
    value: dict = json_field()  # {"value": ...}
    updated_at: datetime = created_at_field()
    updated_by: str = Field(max_length=64)


# --- quality records ---------------------------------------------------------------------


class Disposition(SQLModel, table=True):
    """QA's decision on one part of a lot; write-once (a later disposition supersedes it)."""

    __table_args__ = (sa.CheckConstraint(_in("decision", DECISIONS), name="decision"),)

    id: int | None = Field(default=None, primary_key=True)
    lot_id: int = Field(foreign_key="lot.id", index=True)
    part_id: int = Field(foreign_key="part.id", index=True)
    result_id: int | None = Field(default=None, foreign_key="surface_result.id")
    decision: str = Field(max_length=16)
    deviation_number: str | None = Field(default=None, max_length=64)
    reason: str = Field(default="", max_length=1000)
    decided_by_id: int = Field(foreign_key="user_account.id")
    decided_at: datetime = created_at_field()
    # the part's evidence and verdict as QA saw it when deciding (see services/release.py)
    verdict: dict = json_field()


class Signature(SQLModel, table=True):
    """An electronic signature of a lot; write-once."""

    __table_args__ = (sa.CheckConstraint(_in("meaning", SIGNATURE_MEANINGS), name="meaning"),)

    id: int | None = Field(default=None, primary_key=True)
    lot_id: int = Field(foreign_key="lot.id", index=True)
    user_id: int = Field(foreign_key="user_account.id")
    printed_name: str = Field(max_length=128)
    meaning: str = Field(max_length=16)
    evidence_sha256: str = Field(max_length=64)
    signed_at: datetime = created_at_field()
    # the dispositions this signature signs, one per part of the lot
    disposition_ids: list = Field(default_factory=list, sa_type=sa.JSON, nullable=False)


class RunRemoval(SQLModel, table=True):
    """What one polishing run removed: the map before the run minus the map after it, registered
    on the aperture, piston removed (blob), with its summary; write-once, derived (a newer row
    for the run supersedes, e.g. after a later measurement of the same run)."""

    __tablename__ = "run_removal"

    id: int | None = Field(default=None, primary_key=True)
    run_id: int = Field(foreign_key="polishing_run.id", index=True)
    before_measurement_id: int = Field(foreign_key="measurement.id")
    after_measurement_id: int = Field(foreign_key="measurement.id")
    blob_key: str = Field(max_length=64)
    dx_mm: float
    pv_nm: float
    rms_nm: float
    # the depth removed where the run recorded it (a thickness gauge): maps carry no piston
    depth_nm: float | None = None
    bands: list = Field(default_factory=list, sa_type=sa.JSON, nullable=False)
    zernike: list = Field(default_factory=list, sa_type=sa.JSON, nullable=False)  # [n, m, nm]
    created_at: datetime = created_at_field()


class ToolInfluence(SQLModel, table=True):
    """A sub-aperture tool's influence function on one machine: a Gaussian model (``params``:
    sigma_mm, peak_nm_per_s) or a spot test's measured removal rate (blob, nm/s); write-once, a
    newer record of the same machine and name supersedes."""

    __tablename__ = "tool_influence"

    id: int | None = Field(default=None, primary_key=True)
    machine_id: int = Field(foreign_key="machine.id", index=True)
    name: str = Field(max_length=64)
    kind: str = Field(max_length=16)  # gaussian | spot
    params: dict = Field(default_factory=dict, sa_type=sa.JSON, nullable=False)
    blob_key: str | None = Field(default=None, max_length=64)
    dx_mm: float | None = None
    notes: str = Field(default="", max_length=1000)
    recorded_by_id: int = Field(foreign_key="user_account.id")
    recorded_at: datetime = created_at_field()


class DwellPlan(SQLModel, table=True):
    """A next-run plan: the dwell map (blob, seconds per grid point) for a measurement with a
    tool influence function, the settings and what it predicts; write-once. The run that
    follows names it (its ``params["plan_id"]``), so predicted and achieved can be compared."""

    __tablename__ = "dwell_plan"

    id: int | None = Field(default=None, primary_key=True)
    part_id: int = Field(foreign_key="part.id", index=True)
    measurement_id: int = Field(foreign_key="measurement.id")
    tool_influence_id: int = Field(foreign_key="tool_influence.id")
    settings: dict = Field(default_factory=dict, sa_type=sa.JSON, nullable=False)
    settings_sha256: str = Field(max_length=64)
    dwell_blob: str = Field(max_length=64)
    total_time_s: float
    predicted: dict = Field(default_factory=dict, sa_type=sa.JSON, nullable=False)
    predicted_verdict: str = Field(max_length=16)
    planned_by_id: int = Field(foreign_key="user_account.id")
    planned_at: datetime = created_at_field()


class SignatureSeal(SQLModel, table=True):
    """A signature sealed with the shop's key (held outside the database, see
    :mod:`shopdb.services.seal`): whoever can rewrite rows cannot make a new seal; write-once."""

    __tablename__ = "signature_seal"

    signature_id: int = Field(foreign_key="signature.id", primary_key=True)
    key_id: str = Field(max_length=16)  # which key: the start of the key's own SHA-256
    hmac_sha256: str = Field(max_length=64)


class AuditEvent(SQLModel, table=True):
    """Append-only hash chain: row_hash = SHA-256(prev_hash || canonical event)."""

    __tablename__ = "audit_event"
    __table_args__ = (sa.Index(None, "table_name", "record_id"),)

    id: int | None = Field(default=None, primary_key=True)
    occurred_at: datetime = created_at_field()
    actor: str = Field(max_length=64)
    action: str = Field(max_length=32)
    table_name: str = Field(max_length=64)
    record_id: str = Field(max_length=64)
    before: dict | None = Field(default=None, sa_type=sa.JSON, nullable=True)
    after: dict | None = Field(default=None, sa_type=sa.JSON, nullable=True)
    reason: str = Field(default="", max_length=1000)
    # unique: two events can never claim the same predecessor, so the chain cannot fork
    prev_hash: str = Field(max_length=64, unique=True)
    row_hash: str = Field(max_length=64, unique=True)
