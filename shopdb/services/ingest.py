"""Ingest: read -> validate -> analyse -> judge -> store blob + Measurement + SurfaceResult +
CalloutOutcome + audit event.

One file is one transaction. The blob is written (atomically) before the rows commit, so a
crash leaves at most an orphan blob, which ``shopdb check --fix`` removes. Ingest is idempotent
on the file's SHA-256: a second ingest of the same bytes writes nothing and names the existing
measurement and its part (also when two processes race: the unique constraint decides).

:func:`ingest_files` is the one batch ingest the command line, the watch folder and the app's
Import page use: one transaction per file, the next files read ahead, and every per-file
failure a one-line refusal that does not stop the batch.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np
import sqlalchemy as sa
from sqlalchemy.exc import IntegrityError
from sqlmodel import Session, col, select

from shopdb import quantities
from shopdb.blobs import BlobStore
from shopdb.errors import NotFound, ShopdbError
from shopdb.formats import Metadata
from shopdb.models import (
    CLOSED_PART_STATUSES,
    Measurement,
    Part,
    PolishingRun,
    Station,
    SurfaceResult,
    User,
    ZernikeTerm,
    utcnow,
)
from shopdb.services import verdict
from shopdb.services.audit import record_event
from shopdb.services.health import guard_blob_references
from shopdb.services.lookups import get_by, latest_run, profile_of
from shopdb.services.reading import MapRead, checked_sha, read_ahead, read_measurement
from shopdb.services.reference import calibration_for, subtract_calibration
from shopdb.services.users import require
from shopdb.surface.analysis import SOFTWARE_VERSION, Analysis, analyze
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.settings import AnalysisSettings


@dataclass(frozen=True)
class IngestOutcome:
    status: str  # "ingested" or "duplicate"
    file: str
    measurement_id: int
    message: str
    result_id: int | None = None
    summary: dict | None = None
    conformance: verdict.Conformance | None = None


@dataclass
class BatchReport:
    """What a batch did: each stored or recognised file, and each refused one with its reason."""

    outcomes: list[IngestOutcome] = field(default_factory=list)
    refused: list[tuple[str, str]] = field(default_factory=list)  # (file name, one-line reason)

    @property
    def ingested(self) -> int:
        return sum(o.status == "ingested" for o in self.outcomes)

    @property
    def duplicates(self) -> int:
        return sum(o.status == "duplicate" for o in self.outcomes)

    def summary(self) -> str:
        return (
            f"{self.ingested} ingested, {self.duplicates} duplicate, {len(self.refused)} rejected"
        )


def result_rows(measurement_id: int, a: Analysis) -> tuple[SurfaceResult, list[dict]]:
    """The result row (one column per scalar quantity of the catalogue) and its Zernike rows."""
    stored = a.stored()
    row = SurfaceResult(
        measurement_id=measurement_id,
        settings_hash=a.settings_hash,
        settings=a.settings.as_dict(),
        software_version=a.software_version,
        psd_bands=stored["psd_bands"],
        **{q.name: stored[q.name] for q in quantities.SCALARS},
    )
    terms = [{"n": n, "m": m, "coef_nm": c} for n, m, c in a.zernike_nm]
    return row, terms


def store_result(
    session: Session, measurement: Measurement, a: Analysis, *, surface: SurfaceMap
) -> tuple[SurfaceResult, verdict.Conformance]:
    """Store a result with its Zernike terms and the verdict owner's judgement of it against the
    part's drawing (``surface`` is the map as stored, for a test field)."""
    row, terms = result_rows(measurement.id, a)
    session.add(row)
    session.flush()
    # one multi-row INSERT instead of 66 ORM objects
    session.execute(sa.insert(ZernikeTerm), [{"result_id": row.id, **t} for t in terms])
    conformance = verdict.judge_and_record(
        session,
        measurement=measurement,
        result=row,
        values=a.stored(),
        surface=surface,
        extrema=a.extrema,
    )
    return row, conformance


def _duplicate(session: Session, name: str, sha: str, part_serial: str) -> IngestOutcome | None:
    found = session.exec(
        select(Measurement.id, Part.serial)
        .join(Part, col(Part.id) == Measurement.part_id)
        .where(Measurement.source_sha256 == sha)
    ).first()
    if found is None:
        return None
    mid, serial = found
    where = "" if serial == part_serial else f" of part {serial}, not {part_serial}"
    return IngestOutcome(
        "duplicate", name, mid, f"{name}: already recorded as measurement {mid}{where}"
    )


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
    sha = prefetched.sha if prefetched is not None else checked_sha(p)
    dup = _duplicate(session, name, sha, part_serial)
    if dup is not None:
        return dup
    try:
        part = get_by(session, Part, "serial", part_serial, "part serial")
        station = get_by(session, Station, "name", station_name, "station")
    except NotFound as exc:
        raise ShopdbError(f"{name}: {exc}") from None
    if part.status in CLOSED_PART_STATUSES:
        raise ShopdbError(
            f"{name}: part {part_serial} is {part.status}; it takes no new measurements"
        )
    profile = profile_of(station)
    when = measured_at or utcnow()
    if when.tzinfo is None:
        raise ShopdbError(f"{name}: measured-at time {when.isoformat()} has no time zone")
    subtract = profile.subtracts_reference(subtract_reference)
    read = prefetched
    if read is None or read.station_id != station.id:  # the blob is encoded here only if stored
        read = read_measurement(
            p, station, format=format, metadata=metadata, sha=sha, encode_blob=not subtract
        )
    if read.error is not None:
        raise read.error
    surface = read.surface
    assert surface is not None  # a read without an error has its map

    try:
        cal = calibration_for(session, station, profile, when)
    except ShopdbError as exc:
        raise ShopdbError(f"{name}: {exc}") from None
    settings = settings or profile.analysis_settings()
    analysed = surface
    if subtract:
        if cal is None:
            raise ShopdbError(
                f"{name}: --subtract-reference needs a reference calibration in force"
            )
        analysed = subtract_calibration(
            surface,
            cal,
            blobs,
            settings,
            flip=profile.reference_flip,
            rotate_deg=profile.reference_rotate_deg,
        )
    try:
        result = analyze(analysed, settings)
    except ValueError as exc:
        raise ShopdbError(f"{name}: {exc}") from None

    if run_iteration is not None:
        run = session.exec(
            select(PolishingRun).where(
                PolishingRun.part_id == part.id, PolishingRun.iteration == run_iteration
            )
        ).first()
        if run is None:
            raise ShopdbError(f"{name}: part {part_serial} has no polishing run {run_iteration}")
    else:
        run = latest_run(session, part.id)

    stored = read.blob if analysed is surface else None  # None: not encoded (ahead)
    guard_blob_references(session)
    key = blobs.put(stored if stored is not None else analysed.height_nm.astype(np.float32))
    me = Measurement(
        part_id=part.id,
        run_id=run.id if run else None,
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
            session.add(me)
            session.flush()
    except IntegrityError:
        dup = _duplicate(session, name, sha, part_serial)
        if dup is None:
            raise
        return dup
    row, conformance = store_result(session, me, result, surface=analysed)
    record_event(
        session=session,
        actor=actor.username,
        action="create",
        table_name="measurement",
        record_id=me.id,
        after={
            "part": part_serial,
            "station": station_name,
            "file": name,
            "sha256": sha,
            "blob": key,
            "result_id": row.id,
            "reference_calibration_id": me.reference_calibration_id,
            "reference_subtracted": subtract,
            "measured_at": when.isoformat(),
        },
    )
    if run is not None:  # what the run removed, now that it has a map after it
        from shopdb.services.removal import record_run_removal

        record_run_removal(session, blobs, run)
    return IngestOutcome(
        "ingested",
        name,
        me.id,
        f"{name}: measurement {me.id}, RMS {result.rms_nm:.2f} nm, "
        + (
            "meets its drawing"
            if conformance.conforms
            else f"fails {', '.join(conformance.failed)}"
        ),
        result_id=row.id,
        summary={
            "pv_nm": result.pv_nm,
            "rms_nm": result.rms_nm,
            "pvr_nm": result.pvr_nm,
            "valid_fraction": result.valid_fraction,
        },
        conformance=conformance,
    )


def ingest_files(
    *,
    shop,
    actor: User,
    paths: Sequence[str | Path],
    part_serial: str,
    station_name: str,
    run_iteration: int | None = None,
    operator: User | None = None,
    measured_at: datetime | None = None,
    format: str | None = None,
    metadata: Metadata = Metadata(),
    subtract_reference: bool | None = None,
    on_file: Callable[[str, IngestOutcome | None, str | None], None] | None = None,
) -> BatchReport:
    """Ingest files for one part on one station, one transaction per file, the next files read
    ahead (see :func:`shopdb.services.reading.read_ahead`). ``shop`` is an opened
    :class:`shopdb.services.session.Shop`; ``actor`` an authenticated user. A file that cannot be
    read, analysed or stored — whatever the reason — is refused with a one-line reason and the
    batch goes on; ``on_file(name, outcome, refusal)`` is called after each file."""
    report = BatchReport()
    files = [Path(p) for p in paths]
    with shop.read() as session:
        station = session.exec(select(Station).where(Station.name == station_name)).first()
        subtract = station is not None and profile_of(station).subtracts_reference(
            subtract_reference
        )
    # a reference-subtracted map is stored instead of the file's: nothing to encode ahead then
    batch = read_ahead(
        files, station, format=format, metadata=metadata, blobs=shop.blobs, encode_blob=not subtract
    )
    for path, prefetched in batch:
        outcome, refusal = None, None
        try:
            read = prefetched()
            with shop.write() as session:
                outcome = ingest(
                    session=session,
                    blobs=shop.blobs,
                    actor=actor,
                    path=path,
                    part_serial=part_serial,
                    station_name=station_name,
                    run_iteration=run_iteration,
                    operator=operator,
                    measured_at=measured_at,
                    format=format,
                    metadata=metadata,
                    subtract_reference=subtract_reference,
                    prefetched=read,
                )
            report.outcomes.append(outcome)
        except ShopdbError as exc:
            refusal = str(exc)
        except (ValueError, TypeError, OverflowError, MemoryError, OSError) as exc:
            # a reader or the analysis met something it does not expect: still one line
            refusal = f"{path.name}: cannot be ingested ({type(exc).__name__}: {exc})"
        if refusal is not None:
            report.refused.append((path.name, " ".join(refusal.split())))
        if on_file is not None:
            on_file(path.name, outcome, refusal)
    return report


def _lacking_result(session: Session, settings: AnalysisSettings, ids: list[int] | None):
    """Valid measurements (of ``ids``, or all) without a result for ``settings`` and this
    software version, and the number that already have one."""
    q = select(Measurement).where(Measurement.status == "valid")
    if ids is not None:
        q = q.where(col(Measurement.id).in_(ids))
    have = set(
        session.exec(
            select(SurfaceResult.measurement_id).where(
                SurfaceResult.settings_hash == settings.digest,
                SurfaceResult.software_version == SOFTWARE_VERSION,
            )
        )
    )
    rows = session.exec(q.order_by(col(Measurement.id))).all()
    return [me for me in rows if me.id not in have], sum(me.id in have for me in rows)


def _analyse_stored(blobs: BlobStore, me: Measurement, settings: AnalysisSettings):
    surface = SurfaceMap(
        blobs.get(me.blob_key).astype(np.float64), me.dx_mm, me.wavelength_nm, me.kind
    )
    try:
        return surface, analyze(surface, settings)
    except ValueError as exc:
        raise ShopdbError(f"measurement {me.id}: {exc}") from None


def _store_reanalysis(
    session, actor: User, settings, me: Measurement, surface, result, *, blobs: BlobStore
) -> None:
    from shopdb.services.removal import refresh_for

    row, _ = store_result(session, me, result, surface=surface)
    record_event(
        session=session,
        actor=actor.username,
        action="create",
        table_name="surface_result",
        record_id=row.id,
        after={"measurement_id": me.id, "settings_hash": settings.digest},
        reason="re-analysis",
    )
    refresh_for(session, blobs, me)  # the runs it is the map before or after of


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
    todo, skipped = _lacking_result(session, settings, measurement_ids)
    for me in todo:
        _store_reanalysis(
            session, actor, settings, me, *_analyse_stored(blobs, me, settings), blobs=blobs
        )
    return len(todo), skipped


def ingest_one(*, shop, actor: User, path: str | Path, **options) -> IngestOutcome:
    """One file through :func:`ingest_files` (the watch folder, a single upload); its refusal
    raised as ShopdbError."""
    report = ingest_files(shop=shop, actor=actor, paths=[path], **options)
    if report.refused:
        raise ShopdbError(report.refused[0][1])
    return report.outcomes[0]


REANALYZE_BATCH = 50


def reanalyze_all(*, shop, actor: User, settings: AnalysisSettings) -> tuple[int, int]:
    """:func:`reanalyze` over every valid stored map in batches of ``REANALYZE_BATCH``: each
    batch is analysed outside any transaction and then written in one short one, so a long run
    holds the write lock a moment at a time (readers never wait on SQLite's WAL) and can be
    stopped and started again (maps that have the result are skipped, also one another run
    added meanwhile)."""
    require(actor, "ingest")
    with shop.read() as session:
        ids = list(
            session.exec(
                select(Measurement.id)
                .where(Measurement.status == "valid")
                .order_by(col(Measurement.id))
            )
        )
    added = skipped = 0
    for start in range(0, len(ids), REANALYZE_BATCH):
        batch = ids[start : start + REANALYZE_BATCH]
        with shop.read() as session:
            todo, done = _lacking_result(session, settings, batch)
        analysed = {me.id: _analyse_stored(shop.blobs, me, settings) for me in todo}
        with shop.write() as session:
            still, _ = _lacking_result(session, settings, list(analysed))
            for me in still:
                _store_reanalysis(session, actor, settings, me, *analysed[me.id], blobs=shop.blobs)
        added, skipped = added + len(still), skipped + done + len(analysed) - len(still)
    return added, skipped
