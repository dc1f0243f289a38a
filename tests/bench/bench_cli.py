"""Command-line speed on the full demo, wall time of a fresh process as a user meets it (run by
hand):

    python tests/bench/bench_cli.py [DEMO_HOME] [--repeat N]

DEMO_HOME defaults to the demo folder `shopdb demo` builds. Each read-only command runs N times
(3 by default) with no password; the median is reported beside the goal (1 s for a read-only
command, 0.3 s for --version and --help) and, where the issue measured it, the time before.
Also the import floor: `import shopdb.models` alone (SQLModel, pydantic and the table classes),
which every command that opens the database pays.
"""

from __future__ import annotations

import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

COMMANDS = [  # (arguments, goal s, time before the second wave s or None)
    (["--version"], 0.3, 2.2),
    (["--help"], 0.3, None),
    (["lot", "list"], 1.0, 8.3),
    (["lot", "show", "{lot}"], 1.0, 16.0),
    (["lot", "verify", "{signed}"], 1.0, None),
    (["spc", "chart", "--metric", "rms_nm", "--drawing", "KR-100-W", "--by", "machine"], 1.0, None),
    (["converge", "{part}"], 1.0, None),
    (["parts"], 1.0, None),
    (["drift", "TF-A"], 1.0, None),
    (["kpi"], 1.0, None),
    (["show", "{part}"], 1.0, None),
    (["check"], 1.0, None),
    (["removal", "machines"], 1.0, None),
    (["removal", "part", "{part}"], 1.0, None),
    (["removal", "plans"], 1.0, None),
    (["tif", "list"], 1.0, None),
]


def _run(args: list[str], env: dict) -> float:
    start = time.perf_counter()
    r = subprocess.run(
        [sys.executable, "-m", "shopdb.cli", *args], env=env, capture_output=True, text=True
    )
    took = time.perf_counter() - start
    if r.returncode != 0:
        raise SystemExit(f"shopdb {' '.join(args)} failed: {r.stderr.strip()[:300]}")
    return took


def main() -> None:
    argv = sys.argv[1:]
    repeat = 3
    if "--repeat" in argv:
        i = argv.index("--repeat")
        repeat = int(argv[i + 1])
        del argv[i : i + 2]
    from shopdb.config import load_settings
    from shopdb.seed_demo.build import default_demo_home

    home = Path(argv[0]) if argv else default_demo_home()
    env = {k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")}
    env["SHOPDB_HOME"] = str(home)
    from shopdb.services.session import open_shop

    shop = open_shop(load_settings(home))
    with shop.read() as s:
        import sqlalchemy as sa

        from shopdb import models as m

        lot = s.execute(sa.select(m.Lot.code).where(m.Lot.status == "open")).scalars().first()
        signed = s.execute(sa.select(m.Lot.code).where(m.Lot.status != "open")).scalars().first()
        part = (
            s.execute(
                sa.select(m.Part.serial)
                .where(m.Part.status.in_(["in_process", "rework"]))
                .order_by(m.Part.serial)
            )
            .scalars()
            .first()
        )
    shop.engine.dispose()
    names = {"lot": lot, "signed": signed, "part": part}
    floor = statistics.median(_run_python("import shopdb.models", env) for _ in range(repeat))
    print(f"shopdb CLI on {home} ({os.cpu_count()} CPUs), median of {repeat}")
    print(f"{'command':58s} {'median':>7s} {'goal':>5s} {'before':>7s}")
    for args, goal, before in COMMANDS:
        args = [a.format(**names) for a in args]
        took = statistics.median(_run(args, env) for _ in range(repeat))
        mark = "ok" if took <= goal else "over"
        was = f"{before:6.1f}s" if before else "      -"
        print(f"shopdb {' '.join(args):51s} {took:6.2f}s {goal:4.1f}s {was} {mark}")
    label = "import floor: python -c 'import shopdb.models'"
    print(f"{label:58s} {floor:6.2f}s")


def _run_python(code: str, env: dict) -> float:
    start = time.perf_counter()
    subprocess.run([sys.executable, "-c", code], env=env, check=True)
    return time.perf_counter() - start


if __name__ == "__main__":
    main()
