"""The error every reader raises and the metadata a caller supplies (no numpy: the command
line's help imports this)."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


class FormatError(ValueError):
    """A file cannot be read as a height map; the message names the file and the problem."""

    def __init__(self, path: str | Path, problem: str) -> None:
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{Path(path).name}: {problem}")


@dataclass(frozen=True)
class Metadata:
    """Metadata a caller supplies (command-line options or a station profile); None = unknown."""

    dx_mm: float | None = None
    units: str | None = None
    wavelength_nm: float | None = None
    kind: str | None = None
