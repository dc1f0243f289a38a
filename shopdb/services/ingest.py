"""Ingest: read -> validate -> analyse -> store blob + Measurement + SurfaceResult + audit event.

One file is one transaction. The blob is written (atomically) before the rows commit, so a
crash leaves at most an orphan blob, which ``shopdb check --fix`` removes. Ingest is idempotent
on the file's SHA-256: a second ingest of the same bytes writes nothing and names the existing
measurement (also when two processes race: the unique constraint decides).

Maps are stored as float32 (24-bit mantissa: 0.6 pm at 10 um of height) and analysed from that
same float32 map, so a re-analysis of the stored blob reproduces the stored result exactly.
"""

from __future__ import annotations

import hashlib
import math
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from datetime import datetime
from pathlib import Path

import numpy as np
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError
from sqlmodel import Session, select
from threadpoolctl import threadpool_limits

from shopdb.blobs import BlobStore, Encoded, Staged, encode
from shopdb.errors import NotFound, ShopdbError
from shopdb.formats import FormatError, Metadata, read_map
from shopdb.models import (
    CLOSED_PART_STATUSES,
    Measurement,
    Part,
    PolishingRun,
    ReferenceCalibration,
    ReferenceOptic,
    Station,
    SurfaceResult,
    User,
    ZernikeTerm,
    utcnow,
)
from shopdb.services.audit import record_event
from shopdb.services.masterdata import get_by
from shopdb.services.users import require
from shopdb.surface import zernike
from shopdb.surface.analysis import AnalysisSettings, analyze, resolve_aperture
from shopdb.surface.analysis import SurfaceResult as Analysis
from shopdb.surface.flats import oriented
from shopdb.surface.maps import SurfaceMap

MAX_FILE_BYTES = 1 * 2**30
AHEAD = 2  # files read ahead of a batch's ingest, each in its own thread


@dataclass(frozen=True)
class IngestOutcome:
    status: str  # "ingested" or "duplicate"
    file: str
    measurement_id: int
    message: str
    result_id: int | None = None
    summary: dict | None = None


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _checked_sha(p: Path) -> str:
    try:
        size = p.stat().st_size
    except OSError:
        raise ShopdbError(f"{p.name}: no such file") from None
    if size > MAX_FILE_BYTES:
        raise ShopdbError(f"{p.name}: file is {size / 2**30:.1f} GiB, over the 1 GiB limit")
    return file_sha256(p)


@dataclass(frozen=True)
class MapRead:
    """A measurement file read outside the transaction: its SHA-256, its map as it will be
    stored (surface, oriented, float32) and that map encoded for the blob store, or why it
    cannot be read. The error is raised by :func:`ingest` after its duplicate check, as when it
    reads the file itself."""

    path: Path
    station_id: int
    sha: str
    surface: SurfaceMap | None = None
    blob: Encoded | Staged | None = None
    error: ShopdbError | None = None

    def discard(self) -> None:
        """Remove the staged blob file unless ingest moved it into place."""
        if isinstance(self.blob, Staged):
            self.blob.discard()


def read_measurement(
    path: str | Path,
    station: Station,
    *,
    format: str | None = None,
    metadata: Metadata = Metadata(),
    sha: str | None = None,
    encode_blob: bool = True,
    blobs: BlobStore | None = None,
) -> MapRead:
    """Read a file as :func:`ingest` does, with the station profile's defaults for what the
    file and ``metadata`` leave open; ``encode_blob=False`` skips encoding the map for the blob
    store (a reference-subtracted map is stored instead); with ``blobs`` the encoded map is
    also staged there (written and fsynced, not yet in place: ingest moves it in or the read's
    :meth:`MapRead.discard` removes it). A missing or oversized file raises ShopdbError."""
    p = Path(path)
    sha = sha or _checked_sha(p)
    profile = station.profile
    meta = Metadata(
        dx_mm=metadata.dx_mm if metadata.dx_mm is not None else profile.get("dx_mm"),
        units=metadata.units or profile.get("units"),
        wavelength_nm=metadata.wavelength_nm or station.wavelength_nm,
        kind=metadata.kind or profile.get("kind"),
    )
    try:
        surface = read_map(p, format=format or profile.get("format"), metadata=meta)
    except FormatError as exc:
        return MapRead(p, station.id, sha, error=ShopdbError(str(exc)))
    surface = orient(
        surface.to_surface(),
        flip=profile.get("flip", "none"),
        rotate_deg=profile.get("rotate_deg", 0),
    )
    # what is stored is what is analysed: the float32 map
    stored = surface.height_nm.astype(np.float32)
    surface = replace(surface, height_nm=stored.astype(np.float64))
    blob = encode(stored) if encode_blob else None
    if blob is not None and blobs is not None:
        blob = blobs.stage(blob)
    return MapRead(p, station.id, sha, surface, blob)


def read_ahead(
    paths: list[Path], station: Station | None, **read_options
) -> Iterator[tuple[Path, Callable[[], MapRead | None]]]:
    """A batch's files, each with a getter for its read, the next ``AHEAD`` files being read
    (and, with ``blobs=`` among the read options, their blobs staged) in background threads
    while the caller ingests the current one. Inflating, hashing, converting and writing a map
    release the GIL, so the reads use the core the analysis leaves; meanwhile BLAS is held to
    one thread. 1024^2 float64 X3P into SQLite: 11.6 maps/s with one file ahead and the blob
    written in the ingest, 13.4 with it staged ahead, 15.9 with two files ahead (an X3P read,
    ~55 ms of inflating and hashing, outweighs the analysis). With no station (unknown name)
    nothing is read ahead. The getter raises the read's ShopdbError (missing or oversized
    file); a read handed out is the caller's to pass to :func:`ingest` (which discards a staged
    blob it does not store), one not handed out when the batch stops is discarded here."""
    if station is None:
        for p in paths:
            yield p, lambda: None
        return
    with ThreadPoolExecutor(AHEAD) as pool, threadpool_limits(1, user_api="blas"):
        futures = [pool.submit(read_measurement, q, station, **read_options) for q in paths[:AHEAD]]
        try:
            for i, p in enumerate(paths):
                if i + AHEAD < len(paths):
                    futures.append(
                        pool.submit(read_measurement, paths[i + AHEAD], station, **read_options)
                    )
                getter, futures[i] = futures[i].result, None  # the read is the caller's now
                yield p, getter
        finally:  # the batch stopped early: the reads not handed out leave no staged file
            for f in futures:
                if f is not None and f.exception() is None:
                    f.result().discard()


def orient(surface: SurfaceMap, *, flip: str = "none", rotate_deg: int = 0) -> SurfaceMap:
    """Flip (lr: columns reversed, ud: rows reversed) then rotate counter-clockwise, to the part's datum."""
    h = surface.height_nm
    if flip == "lr":
        h = h[:, ::-1]
    elif flip == "ud":
        h = h[::-1, :]
    h = np.rot90(h, k=rotate_deg // 90)
    if h is surface.height_nm:
        return surface
    return replace(surface, height_nm=np.ascontiguousarray(h), centre_rc=None, radius_px=None)


def calibration_in_force(
    session: Session, reference_id: int, at: datetime
) -> ReferenceCalibration | None:
    """The latest calibration of the reference made at or before ``at`` (valid or not)."""
    return session.exec(
        select(ReferenceCalibration)
        .where(
            ReferenceCalibration.reference_id == reference_id,
            ReferenceCalibration.calibrated_at <= at,
        )
        .order_by(ReferenceCalibration.calibrated_at.desc())
    ).first()


def subtract_calibration(
    surface: SurfaceMap,
    cal: ReferenceCalibration,
    blobs: BlobStore,
    settings: AnalysisSettings,
    *,
    flip: str = "none",
    rotate_deg: int = 0,
) -> SurfaceMap:
    """Remove the reference's own error: its error map when it matches the grid, else its Zernike
    coefficients synthesised over the map's clear aperture.

    The calibration is in the reference's own coordinates; ``flip`` and ``rotate_deg`` (the
    station profile's ``reference_flip`` / ``reference_rotate_deg``) turn it the way it appears
    in the station's oriented maps — e.g. a station that flips its maps to bring the part to its
    datum shows the reference flipped too."""
    if cal.error_map_blob:
        err = blobs.get(cal.error_map_blob).astype(np.float64)
        if err.shape == surface.shape:
            err = orient(
                SurfaceMap(err, surface.dx_mm, surface.wavelength_nm),
                flip=flip,
                rotate_deg=rotate_deg,
            ).height_nm
            if err.shape == surface.shape:
                return replace(surface, height_nm=surface.height_nm - err)
    if not cal.coefficients:
        raise ShopdbError(
            f"reference calibration {cal.id} has neither a matching error map nor coefficients"
        )
    geom = resolve_aperture(surface, settings)
    rho, theta = geom.polar()
    ref = np.zeros(rho.shape)
    for key, c in oriented(cal.coefficients, flip=flip, rotate_deg=rotate_deg).items():
        n, m = (int(v) for v in key.split(","))
        ref += c * zernike.zernike(n, m, rho, theta)
    h = np.full(surface.shape, np.nan)
    h[geom.mask] = surface.height_nm[geom.mask] - ref
    return replace(surface, height_nm=h, centre_rc=geom.centre_rc, radius_px=geom.radius_px)


def result_rows(
    measurement_id: int, a: Analysis
) -> tuple[SurfaceResult, list[tuple[int, int, float]]]:
    def num(x: float) -> float | None:
        return None if x is None or not math.isfinite(x) else float(x)

    row = SurfaceResult(
        measurement_id=measurement_id,
        settings_hash=a.settings_hash,
        settings=a.settings.as_dict(),
        software_version=a.software_version,
        pv_nm=a.pv_nm,
        rms_nm=a.rms_nm,
        pvr_nm=num(a.pvr_nm),
        sag_nm=num(a.sag_nm),
        irregularity_nm=num(a.irregularity_nm),
        rsi_nm=num(a.rsi_nm),
        rmst_nm=num(a.rmst_nm),
        rmsi_nm=num(a.rmsi_nm),
        rmsa_nm=num(a.rmsa_nm),
        slope_rms_urad=num(a.slope_rms_urad),
        slope_max_urad=num(a.slope_max_urad),
        valid_fraction=a.valid_fraction,
        psd_bands=[b.as_dict() for b in a.psd_bands],
    )
    return row, list(a.zernike_nm)


def store_result(session: Session, measurement_id: int, a: Analysis) -> SurfaceResult:
    row, terms = result_rows(measurement_id, a)
    session.add(row)
    session.flush()
    # one multi-row INSERT instead of 66 ORM objects
    session.execute(
        sa.insert(ZernikeTerm),
        [{"result_id": row.id, "n": n, "m": m, "coef_nm": c} for n, m, c in terms],
    )
    return row


def station_settings(station: Station) -> AnalysisSettings:
    return (
        AnalysisSettings.from_dict(station.profile["settings"])
        if "settings" in station.profile
        else AnalysisSettings()
    )


def subtracts_reference(station: Station, given: bool | None) -> bool:
    """Whether an ingest at ``station`` subtracts the reference: as ``given``, else as the
    station profile says."""
    return bool(station.profile.get("subtract_reference", False)) if given is None else given


def ingest(*, prefetched: MapRead | None = None, **options) -> IngestOutcome:
    """Ingest one measurement file (see the module notes and :func:`_ingest` for the options).
    Raises ShopdbError naming the file. A staged blob of ``prefetched`` that is not stored
    (duplicate, rejected file) is removed: a refused file leaves nothing behind."""
    try:
        return _ingest(prefetched=prefetched, **options)
    finally:
        if prefetched is not None:
            prefetched.discard()


def _ingest(
    *,
    session: Session,
    blobs: BlobStore,
    actor: User,
    path: str | Path,
    part_serial: str,
    station_name: str,
    run_iteration: int | None = None,
    operator: User | None = None,
    measured_at: datetime | None = None,
    format: str | None = None,
    metadata: Metadata = Metadata(),
    subtract_reference: bool | None = None,
    settings: AnalysisSettings | None = None,
    prefetched: MapRead | None = None,
) -> IngestOutcome:
    """``prefetched``: the file already read by :func:`read_measurement` (see :func:`read_ahead`)
    with this call's ``format`` and ``metadata``; used if it is this path read for this
    station, else the file is read here."""
    require(actor, "ingest")
    p = Path(path)
    name = p.name
    if prefetched is not None and prefetched.path != p:
        prefetched = None
    sha = prefetched.sha if prefetched is not None else _checked_sha(p)
    existing = session.exec(select(Measurement.id).where(Measurement.source_sha256 == sha)).first()
    if existing is not None:
        return IngestOutcome(
            "duplicate", name, existing, f"{name}: already recorded as measurement {existing}"
        )
    try:
        part = get_by(session, Part, "serial", part_serial, "part serial")
        station = get_by(session, Station, "name", station_name, "station")
    except NotFound as exc:
        raise ShopdbError(f"{name}: {exc}") from None
    if part.status in CLOSED_PART_STATUSES:
        raise ShopdbError(
            f"{name}: part {part_serial} is {part.status}; it takes no new measurements"
        )
    profile = station.profile
    when = measured_at or utcnow()
    if when.tzinfo is None:
        raise ShopdbError(f"{name}: measured-at time {when.isoformat()} has no time zone")
    subtract_reference = subtracts_reference(station, subtract_reference)
    read = prefetched
    if read is None or read.station_id != station.id:  # the blob is encoded here only if stored
        read = read_measurement(
            p,
            station,
            format=format,
            metadata=metadata,
            sha=sha,
            encode_blob=not subtract_reference,
        )
    if read.error is not None:
        raise read.error
    surface = read.surface

    cal = None
    ref_name = profile.get("reference")
    if ref_name:
        ref = session.exec(select(ReferenceOptic).where(ReferenceOptic.name == ref_name)).first()
        if ref is None:
            raise ShopdbError(
                f"{name}: station {station_name} names reference {ref_name!r}, which does not exist"
            )
        cal = calibration_in_force(session, ref.id, when)
        if station.requires_reference and (cal is None or cal.valid_until < when):
            state = (
                "has no calibration"
                if cal is None
                else f"calibration expired {cal.valid_until:%Y-%m-%d}"
            )
            raise ShopdbError(f"{name}: reference {ref_name} {state} at {when:%Y-%m-%d %H:%M} UTC")
    elif station.requires_reference:
        raise ShopdbError(
            f"{name}: station {station_name} requires a reference but its profile names none"
        )

    settings = settings or station_settings(station)
    analysed = surface
    if subtract_reference:
        if cal is None:
            raise ShopdbError(
                f"{name}: --subtract-reference needs a reference calibration in force"
            )
        analysed = subtract_calibration(
            surface,
            cal,
            blobs,
            settings,
            flip=profile.get("reference_flip", "none"),
            rotate_deg=profile.get("reference_rotate_deg", 0),
        )
    try:
        result = analyze(analysed, settings)
    except ValueError as exc:
        raise ShopdbError(f"{name}: {exc}") from None

    run_id = None
    runs = select(PolishingRun).where(PolishingRun.part_id == part.id)
    if run_iteration is not None:
        run = session.exec(runs.where(PolishingRun.iteration == run_iteration)).first()
        if run is None:
            raise ShopdbError(f"{name}: part {part_serial} has no polishing run {run_iteration}")
        run_id = run.id
    else:
        run = session.exec(runs.order_by(PolishingRun.iteration.desc())).first()
        run_id = run.id if run else None

    stored = read.blob if analysed is surface else None  # None: not encoded (ahead)
    key = blobs.put(stored if stored is not None else analysed.height_nm.astype(np.float32))
    m = Measurement(
        part_id=part.id,
        run_id=run_id,
        station_id=station.id,
        reference_calibration_id=cal.id if cal else None,
        operator_id=(operator or actor).id,
        measured_at=when,
        wavelength_nm=surface.wavelength_nm,
        dx_mm=surface.dx_mm,
        kind="surface",
        source_name=name[:255],
        source_sha256=sha,
        blob_key=key,
    )
    try:
        with session.begin_nested():
            session.add(m)
            session.flush()
    except IntegrityError:
        other = session.exec(select(Measurement.id).where(Measurement.source_sha256 == sha)).first()
        if other is None:
            raise
        return IngestOutcome(
            "duplicate", name, other, f"{name}: already recorded as measurement {other}"
        )
    row = store_result(session, m.id, result)
    record_event(
        session=session,
        actor=actor.username,
        action="create",
        table_name="measurement",
        record_id=m.id,
        after={
            "part": part_serial,
            "station": station_name,
            "file": name,
            "sha256": sha,
            "blob": key,
            "result_id": row.id,
            "reference_calibration_id": m.reference_calibration_id,
            "reference_subtracted": subtract_reference,
            "measured_at": when.isoformat(),
        },
    )
    return IngestOutcome(
        "ingested",
        name,
        m.id,
        f"{name}: measurement {m.id}, RMS {result.rms_nm:.2f} nm",
        result_id=row.id,
        summary={
            "pv_nm": result.pv_nm,
            "rms_nm": result.rms_nm,
            "pvr_nm": result.pvr_nm,
            "valid_fraction": result.valid_fraction,
        },
    )


def reanalyze(
    *,
    session: Session,
    blobs: BlobStore,
    actor: User,
    settings: AnalysisSettings,
    measurement_ids: list[int] | None = None,
) -> tuple[int, int]:
    """Add a result with ``settings`` to stored maps that lack one; old results stay. Returns (added, skipped)."""
    require(actor, "ingest")
    q = select(Measurement).where(Measurement.status == "valid")
    if measurement_ids is not None:
        q = q.where(Measurement.id.in_(measurement_ids))
    added = skipped = 0
    from shopdb.surface.analysis import SOFTWARE_VERSION

    for m in session.exec(q.order_by(Measurement.id)).all():
        have = session.exec(
            select(SurfaceResult.id).where(
                SurfaceResult.measurement_id == m.id,
                SurfaceResult.settings_hash == settings.digest,
                SurfaceResult.software_version == SOFTWARE_VERSION,
            )
        ).first()
        if have is not None:
            skipped += 1
            continue
        surface = SurfaceMap(
            blobs.get(m.blob_key).astype(np.float64), m.dx_mm, m.wavelength_nm, m.kind
        )
        try:
            result = analyze(surface, settings)
        except ValueError as exc:
            raise ShopdbError(f"measurement {m.id}: {exc}") from None
        row = store_result(session, m.id, result)
        record_event(
            session=session,
            actor=actor.username,
            action="create",
            table_name="surface_result",
            record_id=row.id,
            after={"measurement_id": m.id, "settings_hash": settings.digest},
            reason="re-analysis",
        )
        added += 1
    return added, skipped
