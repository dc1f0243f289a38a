"""Station watch folder: ingest files as they appear, once they have stopped growing.

A file is taken when its size and modification time are unchanged between two polls, it is at
least ``settle_s`` old and no other process holds a lock on it (``flock``, where the platform
has it); if it changed while it was read, it is left for the next poll. It is then moved to
``done/`` (ingested, or already recorded) or to ``rejected/`` with ``<name>.reason.txt``.
Symbolic links and anything but a regular file are never opened: they go to ``rejected/``
as they are. Any failure of one file is that file's refusal; the watcher goes on (a database
that cannot be reached leaves the file where it is, to be taken again). After a restart,
files still in the folder are simply taken again: ingest is idempotent on the file's SHA-256,
so nothing is recorded twice. The part serial comes from the file name by a regular
expression with a group ``serial``.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import re
import stat
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from shopdb.errors import ShopdbError

DEFAULT_PATTERN = r"^(?P<serial>[A-Za-z0-9-]+)"
REASON = ".reason.txt"
NAME_MAX = 255  # bytes in one file name on common file systems (common practice)
NAME_ROOM = NAME_MAX - len(REASON)  # a moved file's reason file must fit beside it


def _fits(name: str, suffix: str = "") -> str:
    """``name`` + ``suffix`` as a file name of at most NAME_ROOM bytes: a long name keeps its
    start and gets a short digest of the whole, so two long names never collide."""
    if len((name + suffix).encode()) <= NAME_ROOM:
        return name + suffix
    tag = "~" + hashlib.sha256(name.encode()).hexdigest()[:12]
    room = NAME_ROOM - len((tag + suffix).encode())
    head = name.encode()[:room].decode(errors="ignore")
    return head + tag + suffix


def _locked_by_another(path: Path) -> bool:
    """True if another process holds a lock on the file (advisory ``flock``; where the
    platform has none, False)."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        return False
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0) | os.O_NONBLOCK)
    except OSError:
        return True
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return True
    else:
        fcntl.flock(fd, fcntl.LOCK_UN)
        return False
    finally:
        os.close(fd)


def _database_unreachable(exc: BaseException) -> bool:
    """The database is down or locked: not the file's fault, so the file waits."""
    from sqlalchemy.exc import InterfaceError, OperationalError

    return isinstance(exc, OperationalError | InterfaceError)


@dataclass
class Watcher:
    folder: Path
    ingest_file: Callable[
        [Path, str], str
    ]  # (path, serial) -> message; raises ShopdbError to reject
    pattern: str = DEFAULT_PATTERN
    settle_s: float = 1.0
    seen: dict[Path, tuple[int, float]] = field(default_factory=dict)

    def __post_init__(self) -> None:
        try:
            self.regex = re.compile(self.pattern)
        except re.error as exc:
            raise ShopdbError(
                f"serial pattern {self.pattern!r} is not a valid regular expression: {exc}"
            ) from None
        if "serial" not in self.regex.groupindex:
            raise ShopdbError(f"serial pattern {self.pattern!r} has no group named 'serial'")
        if not self.folder.is_dir():
            raise ShopdbError(f"watch folder {self.folder} does not exist")
        (self.folder / "done").mkdir(exist_ok=True)
        (self.folder / "rejected").mkdir(exist_ok=True)

    def _candidates(self) -> list[Path]:
        """Every entry but the done/ and rejected/ folders, hidden files and reasons (a symlink
        or a device is a candidate too: it is rejected, never opened)."""
        return sorted(
            p
            for p in self.folder.iterdir()
            if not p.name.startswith(".")
            and not p.name.endswith(REASON)
            and not (p.name in ("done", "rejected") and p.is_dir() and not p.is_symlink())
        )

    @staticmethod
    def _move(path: Path, target_dir: Path) -> Path:
        """Rename into ``target_dir`` (the same file system: a link is moved, not followed),
        numbered if the name is taken, shortened if it would be too long for its reason file."""
        suffix = path.suffix if len(path.suffix) <= 16 else ""
        stem = path.name.removesuffix(suffix) if suffix else path.name
        target = target_dir / _fits(stem, suffix)
        k = 1
        while target.exists() or target.is_symlink():
            target = target_dir / _fits(f"{stem}.{k}", suffix)
            k += 1
        os.replace(path, target)
        return target

    def _reject(self, path: Path, reason: str) -> None:
        moved = self._move(path, self.folder / "rejected")
        (moved.parent / f"{moved.name}{REASON}").write_text(f"{reason}\n", encoding="utf-8")

    def poll(self) -> list[tuple[str, str, str]]:
        """One pass: returns (file, "done" | "rejected" | "waiting", message) for each file
        taken (or, "waiting", left for a database that cannot be reached)."""
        taken = []
        now = time.time()
        current = set()
        for path in self._candidates():
            current.add(path)
            try:
                st = path.lstat()
            except FileNotFoundError:
                continue
            if stat.S_ISLNK(st.st_mode) or not stat.S_ISREG(st.st_mode):
                what = "a symbolic link" if stat.S_ISLNK(st.st_mode) else "not a regular file"
                self._reject(path, f"{path.name}: {what}; only regular files are taken")
                taken.append((path.name, "rejected", f"{path.name}: {what}"))
                continue
            sig = (st.st_size, st.st_mtime)
            if (
                self.seen.get(path) != sig
                or now - st.st_mtime < self.settle_s
                or _locked_by_another(path)
            ):
                self.seen[path] = sig
                continue
            item = self._take(path, sig)
            if item is not None:
                taken.append(item)
                if item[1] != "waiting":
                    self.seen.pop(path, None)
        for gone in set(self.seen) - current:
            self.seen.pop(gone, None)
        return taken

    def _take(self, path: Path, sig: tuple[int, float]) -> tuple[str, str, str] | None:
        match = self.regex.search(path.name)
        try:
            if not match:
                raise ShopdbError(
                    f"{path.name}: the file name does not match the serial pattern {self.pattern!r}"
                )
            message = self.ingest_file(path, match.group("serial"))
        except Exception as exc:  # one file's failure, whatever it is, never stops the watcher
            if _database_unreachable(exc):
                first = (str(getattr(exc, "orig", exc)).strip().splitlines() or [""])[0]
                return (path.name, "waiting", f"database: {first}; will try again")
            if self._changed(path, sig):
                return None  # written to while it was read: taken again once it is still
            reason = (
                str(exc)
                if isinstance(exc, ShopdbError)
                else (f"{path.name}: cannot be ingested ({type(exc).__name__}: {exc})")
            )
            reason = " ".join(reason.split())
            self._reject(path, reason)
            return (path.name, "rejected", reason)
        self._move(path, self.folder / "done")
        return (path.name, "done", message)

    @staticmethod
    def _changed(path: Path, sig: tuple[int, float]) -> bool:
        with contextlib.suppress(OSError):
            st = path.lstat()
            return (st.st_size, st.st_mtime) != sig
        return True

    def run(
        self,
        *,
        interval_s: float = 2.0,
        once: bool = False,
        report: Callable[[tuple[str, str, str]], None] = print,
    ) -> None:
        """Poll until interrupted; ``once`` polls until the files present now are all taken."""
        while True:
            for item in self.poll():
                report(item)
                if once and item[1] == "waiting":
                    raise ShopdbError(f"{item[0]}: not taken, {item[2]}")
            if once and not self._candidates():
                return
            time.sleep(interval_s if not once else min(interval_s, self.settle_s / 2 + 0.05))


def watcher_for(
    *,
    shop,
    actor,
    folder: Path,
    station: str,
    pattern: str | None = None,
    settle_s: float = 2.0,
) -> Watcher:
    """A watcher that ingests into ``station`` as ``actor``: the role is checked and the station
    looked up before any file is touched."""
    from shopdb.models import Station
    from shopdb.services.ingest import ingest_one
    from shopdb.services.lookups import get_by, profile_of
    from shopdb.services.users import require

    require(actor, "ingest")
    with shop.read() as session:
        st = get_by(session, Station, "name", station, "station")
        pattern = pattern or profile_of(st).serial_pattern or DEFAULT_PATTERN

    def take(path: Path, serial: str) -> str:
        return ingest_one(
            shop=shop, actor=actor, path=path, part_serial=serial, station_name=station
        ).message

    return Watcher(folder, take, pattern=pattern, settle_s=settle_s)
