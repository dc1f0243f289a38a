"""Peak memory of the largest map shopdb accepts, per format (run by hand):

    python tests/bench/bench_memory.py [--n 4096] [--analyze]

For each writable format a map of n×n pixels (the default pixel cap, SHOPDB_MAX_PIXELS = 4096²)
is written once; a fresh Python process then reads it (and with --analyze also analyses it, as
ingest does) and reports its peak resident memory (VmHWM of /proc/self/status; ru_maxrss would include
the parent's at fork) above the same
process's baseline after importing shopdb's readers. Also one pixel over the cap per format:
refused from the header before any allocation (its peak is the baseline).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

CHILD = r"""
import sys, time
from shopdb.formats import read_map
from shopdb.surface.analysis import analyze
import shopdb.surface.psd, shopdb.surface.zernike

def hwm_kib():  # VmHWM: this process's peak resident set (not inherited across exec)
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM:"):
            return int(line.split()[1])

base = hwm_kib()
t0 = time.perf_counter()
try:
    s = read_map(sys.argv[1])
    if sys.argv[2] == "1":
        analyze(s)
    outcome = "read"
except Exception as exc:
    outcome = f"refused: {str(exc)[:60]}"
peak = hwm_kib()
print(f"{(peak - base) / 1024:.0f} {time.perf_counter() - t0:.2f} {outcome}")
"""


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--n", type=int, default=4096)
    ap.add_argument("--analyze", action="store_true")
    args = ap.parse_args()
    from shopdb.formats import write_map
    from shopdb.surface.maps import SurfaceMap

    n = args.n
    y, x = (np.mgrid[:n, :n] - (n - 1) / 2) / (n / 2)
    z = np.where(x * x + y * y <= 1, 50 * (2 * (x * x + y * y) - 1) + 3 * np.sin(40 * x), np.nan)
    out = []
    with tempfile.TemporaryDirectory() as tmp:
        for suffix in (".x3p", ".npz", ".h5", ".tif", ".csv"):
            for side, label in ((n, "at the cap"), (n + 1, "one row over")):
                path = Path(tmp) / f"m{side}{suffix}"
                grid = z if side == n else np.vstack([z, z[:1]])
                write_map(path, SurfaceMap(grid, 0.025, 632.8))
                r = subprocess.run(
                    [sys.executable, "-c", CHILD, str(path), "1" if args.analyze else "0"],
                    capture_output=True,
                    text=True,
                    check=True,
                )
                mib, secs, outcome = r.stdout.strip().split(" ", 2)
                out.append(
                    {
                        "format": suffix,
                        "map": f"{grid.shape[0]}x{grid.shape[1]}",
                        "case": label,
                        "file_MiB": round(path.stat().st_size / 2**20, 1),
                        "peak_above_baseline_MiB": int(mib),
                        "seconds": float(secs),
                        "outcome": outcome,
                    }
                )
                print(json.dumps(out[-1]), flush=True)
                path.unlink()


if __name__ == "__main__":
    main()
