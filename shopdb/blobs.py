"""Content-addressed store of height maps.

A map is serialised as a standard ``.npy`` byte stream (dtype and shape in its header,
float32 or float64) and keyed by the SHA-256 of those bytes. On disk, at
``<root>/<key[:2]>/<key>.map.zst``, is a zstd frame holding the ``.npy`` header unchanged followed
by the array's bytes "shuffled": byte 0 of every element, then byte 1 of every element, and so on
(the shuffle filter of HDF5 and Blosc). Shuffling puts the slowly varying exponent bytes
together: a 256x256 float32 map compresses to 57 % instead of 67 %. zstd level 1 takes about
1 ms for such a map (gzip level 1 was 20x slower for a worse ratio). :func:`unshuffle` restores
the ``.npy`` bytes. Writes go to
a temporary file in the same folder, are fsynced and renamed into place, so a crash leaves
either no blob or a whole one. Identical maps share one blob.

The interface (:class:`BlobStore`) is small on purpose: stage/put/get/exists/verify/keys/delete,
so an object-store backend can be added later.
"""

from __future__ import annotations

import hashlib
import io
import os
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import zstandard

from shopdb.errors import ShopdbError

SUFFIX = ".map.zst"
ZSTD_LEVEL = 1
ALLOWED_DTYPES = (np.dtype("float32"), np.dtype("float64"))


def _npy_bytes(array: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.ascontiguousarray(array), allow_pickle=False)
    return buf.getvalue()


def _header_length(npy: bytes) -> int:
    """Length of the .npy header (magic, version, header size field, header) — numpy format spec."""
    major = npy[6]
    if major == 1:
        return 10 + int.from_bytes(npy[8:10], "little")
    return 12 + int.from_bytes(npy[8:12], "little")


def _itemsize(npy: bytes) -> int:
    fh = io.BytesIO(npy)
    version = np.lib.format.read_magic(fh)
    read = (
        np.lib.format.read_array_header_1_0
        if version == (1, 0)
        else np.lib.format.read_array_header_2_0
    )
    _shape, _order, dtype = read(fh)
    return dtype.itemsize


def shuffle(npy: bytes) -> bytes:
    h = _header_length(npy)
    k = _itemsize(npy)
    body = np.frombuffer(npy, np.uint8, offset=h)
    return npy[:h] + body.reshape(-1, k).T.tobytes()


def unshuffle(stored: bytes) -> bytes:
    h = _header_length(stored)
    k = _itemsize(stored)
    body = np.frombuffer(stored, np.uint8, offset=h)
    return stored[:h] + body.reshape(k, -1).T.tobytes()


@dataclass(frozen=True)
class Encoded:
    """A map as the store keeps it: its key and the compressed frame (see :func:`encode`)."""

    key: str
    data: bytes


@dataclass
class Staged:
    """A map written to a temporary file of the store (see :meth:`BlobStore.stage`); ``tmp`` is
    None once it is in place, or if an equal map was already stored — then ``encoded`` keeps
    the map, so that it can still be written if that equal map is removed before :meth:`put`
    (``shopdb check --fix`` removing it as an orphan)."""

    key: str
    tmp: Path | None
    encoded: Encoded | None = None
    discarded: bool = False

    def discard(self) -> None:
        if self.tmp is not None:
            self.tmp.unlink(missing_ok=True)
            self.tmp = None
        self.discarded = True


def encode(array: np.ndarray) -> Encoded:
    """Key and compressed frame of a map, without touching the store (so it can be done ahead,
    e.g. in a batch's read-ahead thread)."""
    array = np.asarray(array)
    if array.dtype not in ALLOWED_DTYPES or array.ndim != 2:
        raise ShopdbError(
            f"blob store takes 2-D float32/float64 maps, got {array.ndim}-D {array.dtype}"
        )
    raw = _npy_bytes(array)
    return Encoded(
        hashlib.sha256(raw).hexdigest(),
        zstandard.ZstdCompressor(level=ZSTD_LEVEL).compress(shuffle(raw)),
    )


class BlobStore:
    """Height maps on a local (or shared network) folder."""

    def __init__(self, root: str | os.PathLike[str]) -> None:
        self.root = Path(root)

    def path(self, key: str) -> Path:
        if len(key) != 64 or any(c not in "0123456789abcdef" for c in key):
            raise ShopdbError(f"blob key {key!r} is not a SHA-256 hex digest")
        return self.root / key[:2] / f"{key}{SUFFIX}"

    def stage(self, blob: np.ndarray | Encoded) -> Staged:
        """Write a map to a fsynced temporary file in its folder, not yet in place (the slow
        part of :meth:`put`, which a batch's read-ahead thread does ahead): :meth:`put` moves it
        in, :meth:`Staged.discard` removes it."""
        if not isinstance(blob, Encoded):
            blob = encode(blob)
        target = self.path(blob.key)
        if target.exists():
            return Staged(blob.key, None, blob)
        target.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=".tmp-", dir=target.parent)
        try:
            with os.fdopen(fd, "wb") as fh:
                fh.write(blob.data)
                fh.flush()
                os.fsync(fh.fileno())
        except BaseException:
            Path(tmp).unlink(missing_ok=True)
            raise
        return Staged(blob.key, Path(tmp))

    def put(self, blob: np.ndarray | Encoded | Staged) -> str:
        """Store a map (2-D float32/float64, :func:`encode`-d or :meth:`stage`-d) and return
        its key; idempotent."""
        staged = blob if isinstance(blob, Staged) else self.stage(blob)
        if staged.discarded:
            raise ShopdbError(f"blob {staged.key} was discarded before it was stored")
        target = self.path(staged.key)
        if staged.tmp is not None:
            os.replace(staged.tmp, target)  # atomic; an equal blob may be there
            staged.tmp = None
        elif not target.exists():
            assert staged.encoded is not None  # an equal blob was there when it was staged
            return self.put(staged.encoded)  # ... and was removed since: write it again
        return staged.key

    def _raw(self, key: str) -> bytes:
        try:
            data = self.path(key).read_bytes()
        except FileNotFoundError:
            raise ShopdbError(f"blob {key} is missing from {self.root}") from None
        except OSError as exc:  # a folder shared by station accounts: not readable by this one
            raise ShopdbError(f"blob {key} cannot be read: {exc.strerror or exc}") from None
        try:
            return unshuffle(zstandard.ZstdDecompressor().decompress(data))
        except (zstandard.ZstdError, ValueError, IndexError) as exc:
            raise ShopdbError(f"blob {key} is unreadable: {exc}") from None

    def get(self, key: str) -> np.ndarray:
        return np.load(io.BytesIO(self._raw(key)), allow_pickle=False)

    def exists(self, key: str) -> bool:
        return self.path(key).exists()

    def verify(self, key: str) -> str | None:
        """None if the blob is present and matches its key, else the problem in words."""
        if not self.exists(key):
            return "missing"
        try:
            raw = self._raw(key)
        except ShopdbError as exc:
            return str(exc)
        return None if hashlib.sha256(raw).hexdigest() == key else "content does not match its key"

    def keys(self) -> Iterator[str]:
        if not self.root.is_dir():
            return
        for sub in sorted(self.root.iterdir()):
            if sub.is_dir() and len(sub.name) == 2:
                for f in sorted(sub.glob(f"*{SUFFIX}")):
                    yield f.name[: -len(SUFFIX)]

    def stray_temp_files(self) -> list[Path]:
        """Temporary files left by an interrupted write."""
        return sorted(self.root.glob("*/.tmp-*")) if self.root.is_dir() else []

    def delete(self, key: str) -> None:
        self.path(key).unlink(missing_ok=True)
