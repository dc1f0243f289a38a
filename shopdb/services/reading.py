"""Reading a measurement file as ingest stores it: SHA-256, format reader, the station's
profile for what the file leaves open, orientation to the part's datum, float32, blob encoding;
and the read-ahead of a batch.

Maps are stored as float32 (24-bit mantissa: 0.6 pm at 10 um of height) and analysed from that
same float32 map, so a re-analysis of the stored blob reproduces the stored result exactly.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from shopdb.blobs import BlobStore, Encoded, Staged, encode
from shopdb.errors import ShopdbError
from shopdb.formats import FormatError, Metadata, read_map
from shopdb.models import Station
from shopdb.services.lookups import profile_of
from shopdb.surface.maps import SurfaceMap
from shopdb.surface.orient import orient_map

MAX_FILE_BYTES = 1 * 2**30
AHEAD = 2  # files read ahead of a batch's ingest, each in its own thread


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with path.open("rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def checked_sha(p: Path) -> str:
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
    sha = sha or checked_sha(p)
    profile = profile_of(station)
    meta = Metadata(
        dx_mm=metadata.dx_mm if metadata.dx_mm is not None else profile.dx_mm,
        units=metadata.units or profile.units,
        wavelength_nm=metadata.wavelength_nm or station.wavelength_nm,
        kind=metadata.kind or profile.kind,
    )
    try:
        surface = read_map(p, format=format or profile.format, metadata=meta).to_surface()
    except FormatError as exc:
        return MapRead(p, station.id, sha, error=ShopdbError(str(exc)))
    # turned to the part's datum; what is stored is what is analysed: the float32 map
    stored = orient_map(surface.height_nm, flip=profile.flip, rotate_deg=profile.rotate_deg)
    stored = stored.astype(np.float32)
    surface = replace(surface, height_nm=stored.astype(np.float64), centre_rc=None, radius_px=None)
    encoded = encode(stored) if encode_blob else None
    if encoded is not None and blobs is not None:
        return MapRead(p, station.id, sha, surface, blobs.stage(encoded))
    return MapRead(p, station.id, sha, surface, encoded)


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
