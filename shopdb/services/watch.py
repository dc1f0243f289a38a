"""Station watch folder: ingest files as they appear, once they have stopped growing.

A file is taken when its size and modification time are unchanged between two polls and it is
at least ``settle_s`` old. It is then moved to ``done/`` (ingested, or already recorded) or to
``rejected/`` with ``<name>.reason.txt``. After a restart, files still in the folder are simply
taken again: ingest is idempotent on the file's SHA-256, so nothing is recorded twice.
The part serial comes from the file name by a regular expression with a group ``serial``.
"""

from __future__ import annotations

import re
import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from shopdb.errors import ShopdbError

DEFAULT_PATTERN = r"^(?P<serial>[A-Za-z0-9-]+)"


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
        return sorted(
            p
            for p in self.folder.iterdir()
            if p.is_file() and not p.name.startswith(".") and not p.name.endswith(".reason.txt")
        )

    @staticmethod
    def _move(path: Path, target_dir: Path) -> Path:
        target = target_dir / path.name
        k = 1
        while target.exists():
            target = target_dir / f"{path.stem}.{k}{path.suffix}"
            k += 1
        shutil.move(str(path), target)
        return target

    def poll(self) -> list[tuple[str, str, str]]:
        """One pass: returns (file, "done" | "rejected", message) for each file taken."""
        taken = []
        now = time.time()
        current = set()
        for path in self._candidates():
            current.add(path)
            st = path.stat()
            sig = (st.st_size, st.st_mtime)
            if self.seen.get(path) != sig or now - st.st_mtime < self.settle_s:
                self.seen[path] = sig
                continue
            match = self.regex.search(path.name)
            try:
                if not match:
                    raise ShopdbError(
                        f"{path.name}: the file name does not match the serial pattern {self.pattern!r}"
                    )
                message = self.ingest_file(path, match.group("serial"))
            except ShopdbError as exc:
                moved = self._move(path, self.folder / "rejected")
                (moved.parent / f"{moved.name}.reason.txt").write_text(f"{exc}\n")
                taken.append((path.name, "rejected", str(exc)))
            else:
                self._move(path, self.folder / "done")
                taken.append((path.name, "done", message))
            self.seen.pop(path, None)
        for gone in set(self.seen) - current:
            self.seen.pop(gone, None)
        return taken

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
