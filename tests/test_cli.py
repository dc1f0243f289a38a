"""The command line as a user runs it: one-line errors, exit 2, help with examples."""

from __future__ import annotations

import os
import signal
import subprocess
import sys

import pytest

import shopdb


def run(
    *args: str, env: dict | None = None, input: str | None = None
) -> subprocess.CompletedProcess:
    full_env = {k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")}
    full_env.update(env or {})
    return subprocess.run(
        [sys.executable, "-m", "shopdb.cli", *args],
        capture_output=True,
        text=True,
        env=full_env,
        input=input,
        timeout=120,
    )


def test_version():
    r = run("--version")
    assert r.returncode == 0 and r.stdout.strip() == f"shopdb {shopdb.__version__}"


def test_init_then_check_is_healthy(tmp_path):
    home = tmp_path / "shop"
    r = run("init", "--home", str(home))
    assert r.returncode == 0, r.stderr
    assert (home / "shopdb.sqlite3").is_file() and (home / "blobs").is_dir()
    r = run("check", "--home", str(home))
    assert r.returncode == 0 and "healthy" in r.stdout
    r = run("db", "current", "--home", str(home))
    from shopdb.db import head_revision

    assert f"database at {head_revision()}" in r.stdout


@pytest.mark.parametrize(
    "args,env,message",
    [
        (["check", "--home", "/no/such/shop"], {}, "does not exist; run 'shopdb init' first"),
        (["check"], {"SHOPDB_DATABASE_URL": "not a url"}, "not a valid SQLAlchemy URL"),
        (
            ["check"],
            {"SHOPDB_DATABASE_URL": "postgresql+psycopg://nobody@127.0.0.1:1/x"},
            "cannot reach database",
        ),
        (
            ["db", "upgrade"],
            {"SHOPDB_DATABASE_URL": "oracle://x@y/z"},
            "only sqlite and postgresql",
        ),
    ],
)
def test_errors_are_one_line_and_exit_2(args, env, message):
    r = run(*args, env=env)
    assert r.returncode == 2
    assert r.stderr.count("\n") == 1 and message in r.stderr and "Traceback" not in r.stderr


def test_unmigrated_database_is_refused(tmp_path):
    (tmp_path / "shopdb.sqlite3").touch()
    r = run("check", "--home", str(tmp_path))
    assert r.returncode == 2 and "run 'shopdb db upgrade'" in r.stderr


def test_usage_error_exits_2():
    r = run("no-such-command")
    assert r.returncode == 2 and "No such command" in r.stderr


def _commands():
    from typer.main import get_command

    from shopdb.cli import app

    root = get_command(app)
    out = []
    for name, cmd in root.commands.items():
        if hasattr(cmd, "commands"):
            out += [[name, sub] for sub in cmd.commands]
        else:
            out.append([name])
    return out


@pytest.mark.parametrize("path", _commands(), ids=" ".join)
def test_every_command_has_help_with_an_example(path):
    r = run(*path, "--help")
    assert r.returncode == 0 and "Example:" in r.stdout


def _disk_map(tmp_path):
    import numpy as np

    from shopdb.formats.text import write_text
    from shopdb.surface.maps import SurfaceMap

    y, x = np.mgrid[-1:1:81j, -1:1:81j]
    r2 = x * x + y * y
    z = np.where(r2 <= 1, 30 * (2 * r2 - 1) + 4 * x * y, np.nan)
    np.save(tmp_path / "m.npy", z)
    write_text(tmp_path / "m.csv", SurfaceMap(z, 0.5, 632.8))
    return tmp_path / "m.npy", tmp_path / "m.csv"


def test_analyze_json_keys_are_the_documented_ones(tmp_path):
    import json

    npy, csv = _disk_map(tmp_path)
    r = run(
        "analyze", str(npy), str(csv), "--pixel-mm", "0.5", "--wavelength-nm", "632.8", "--json"
    )
    assert r.returncode == 0, r.stderr
    objs = [json.loads(line) for line in r.stdout.splitlines()]
    assert len(objs) == 2
    for o in objs:
        assert {
            "pv_nm",
            "rms_nm",
            "pvr_nm",
            "zernike",
            "iso10110",
            "slope_rms_urad",
            "psd_bands",
            "valid_fraction",
            "settings_hash",
        } <= set(o)
        assert set(o["iso10110"]) == {
            "sag_nm",
            "irregularity_nm",
            "rsi_nm",
            "rmst_nm",
            "rmsi_nm",
            "rmsa_nm",
        }
        assert set(o["zernike"][0]) == {"n", "m", "ansi", "noll", "name", "coef_nm"}
        assert len(o["zernike"]) == 66
        assert set(o["psd_bands"][0]) == {"low_per_mm", "high_per_mm", "rms_nm"}
    assert objs[0]["pv_nm"] == objs[1]["pv_nm"]  # same map through both readers


def test_analyze_bad_inputs(tmp_path):
    npy, csv = _disk_map(tmp_path)
    (tmp_path / "ragged.csv").write_text("1,2,3\n4,5\n")
    r = run("analyze", str(tmp_path / "ragged.csv"), str(csv), "--pixel-mm", "0.3")
    assert r.returncode == 2
    lines = r.stderr.splitlines()
    assert lines == [
        "shopdb: error: ragged.csv: ragged rows: line 2 has 2 values, the first row 3",
        "shopdb: error: m.csv: dx_mm is 0.5 in the file but 0.3 was given",
    ]
    r = run("analyze", str(npy), "--wavelength-nm", "632.8")
    assert r.returncode == 2 and "dx_mm not in the file and not given" in r.stderr
    r = run(
        "analyze", str(npy), "--pixel-mm", "0.5", "--wavelength-nm", "632.8", "--remove", "coma"
    )
    assert r.returncode == 2 and "cannot remove ['coma']" in r.stderr


def test_check_exits_1_when_unhealthy(tmp_path):
    home = tmp_path / "shop"
    assert run("init", "--home", str(home)).returncode == 0
    (home / "blobs" / "ab").mkdir()
    (home / "blobs" / "ab" / f"ab{'0' * 62}.map.zst").write_bytes(b"x")  # an orphan
    r = run("check", "--home", str(home))
    assert r.returncode == 1 and "orphan" in r.stdout


def test_ingest_batch_as_an_operator_runs_it(small_demo, tmp_path):
    """`shopdb ingest` on a batch: good files, a repeat and a malformed file give the summary,
    one line per refusal naming the file, exit 2, and nothing staged left behind; the station
    profile's reference subtraction applies unless the command line says otherwise (the demo's
    benches subtract their reference flat)."""
    import json
    import shutil
    import sqlite3

    from shopdb.formats import write_map
    from shopdb.seed_demo.factories import disk_map

    home = tmp_path / "shop"
    shutil.copytree(small_demo, home)
    db = home / "shopdb.sqlite3"
    with sqlite3.connect(db) as con:
        (calibrated,) = con.execute(
            "SELECT MAX(c.calibrated_at) FROM reference_calibration c "
            "JOIN reference_optic r ON r.id = c.reference_id WHERE r.name = 'TF-A'"
        ).fetchone()
    when = calibrated[:10] + "T12:00:00Z"
    maps = []
    for i in range(3):
        maps.append(tmp_path / f"op-cs{i}.x3p")
        write_map(maps[-1], disk_map({(2, 0): 5.0 + i, (2, 2): 1.0}, npix=64, noise_nm=0.3))
    (tmp_path / "broken.x3p").write_bytes(b"PK\x03\x04 not really")
    op = {"SHOPDB_USER": "operator", "SHOPDB_PASSWORD": "demo-operator-pw"}
    common = ["--part", "CS-N", "--station", "Bench North", "--measured-at", when]
    common += ["--home", str(home)]
    batch = [str(maps[0]), str(maps[1]), str(maps[0]), str(tmp_path / "broken.x3p")]
    r = run("ingest", *batch, *common, env=op)
    assert r.returncode == 2
    assert "2 ingested, 1 duplicate, 1 rejected" in r.stdout
    errors = [line for line in r.stderr.splitlines() if line.startswith("shopdb: error:")]
    assert len(errors) == 1 and "broken.x3p" in errors[0] and "not an X3P file" in errors[0]
    r = run("ingest", str(maps[2]), *common, "--no-subtract-reference", env=op)
    assert r.returncode == 0, r.stderr
    with sqlite3.connect(db) as con:
        rows = con.execute(
            "SELECT a.after FROM audit_event a JOIN measurement m ON a.record_id = "
            "CAST(m.id AS TEXT) WHERE a.table_name = 'measurement' AND m.source_name LIKE 'op-cs%' "
            "ORDER BY m.id"
        ).fetchall()
    subtracted = [json.loads(after)["reference_subtracted"] for (after,) in rows]
    assert subtracted == [True, True, False]
    assert not list((home / "blobs").glob("*/.tmp-*"))


def _examples() -> dict[str, str]:
    """Every command's help example: {command path: the example's arguments}."""
    import shlex

    import typer.main

    from shopdb.cli.main import app

    found: dict[str, str] = {}

    def walk(cmd, path):
        if hasattr(cmd, "commands"):  # a group
            for name, sub in cmd.commands.items():
                walk(sub, [*path, name])
        for line in (cmd.help or "").splitlines():
            if line.strip().startswith("Example: shopdb "):
                found[" ".join(path)] = line.strip().removeprefix("Example: shopdb ")

    walk(typer.main.get_command(app), [])
    assert all(shlex.split(v) for v in found.values())
    return found


# the examples that change nothing (no --as): run as written on the demo; the others name
# records of the full demo and need a password
READ_ONLY = (
    "show",
    "converge",
    "parts",
    "drift",
    "kpi",
    "spc chart",
    "spc capability",
    "lot list",
    "lot show",
    "lot verify",
    "certificate",
    "setting show",
    "db current",
    "audit export",
    "audit verify",
    "check",
    "plan",
    "removal part",
    "removal machines",
    "removal rank",
    "removal plans",
    "tif list",
)


@pytest.mark.slow
def test_every_read_only_help_example_runs_on_the_demo(small_demo, tmp_path):
    """What the help shows works when typed: each read-only example on a copy of the demo, no
    password, exit 0 (the demo is healthy, so even `check` exits 0)."""
    import shlex
    import shutil

    examples = _examples()
    assert set(READ_ONLY) <= set(examples), set(READ_ONLY) - set(examples)
    home = tmp_path / "shop"
    shutil.copytree(small_demo, home)
    env = {"SHOPDB_HOME": str(home)}
    for command in READ_ONLY:  # audit export comes before audit verify, which reads its file
        args = shlex.split(examples[command])
        r = subprocess.run(
            [sys.executable, "-m", "shopdb.cli", *args],
            capture_output=True,
            text=True,
            cwd=tmp_path,
            env={k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")} | env,
            timeout=120,
        )
        assert r.returncode == 0, f"shopdb {examples[command]}: {r.stderr.strip()[-400:]}"
        assert "--as" not in args


@pytest.mark.slow
def test_plan_writes_the_dwell_and_the_predicted_map(small_demo, tmp_path):
    """`shopdb plan` on a demo part: the dwell grid as CSV (non-negative seconds on the stated
    spacing), the predicted map readable again with the PV the plan printed, --json with its
    keys; a bad TIF or output writes nothing."""
    import csv
    import itertools
    import json

    h = ["--home", str(small_demo)]
    tif = ["--tif-sigma", "2.5", "--tif-peak", "2"]
    dwell_csv, predicted = tmp_path / "dwell.csv", tmp_path / "next.x3p"
    r = run(
        "plan", "100-0603", *tif, "--dwell-csv", str(dwell_csv), "--predicted", str(predicted), *h
    )
    assert r.returncode == 0, r.stderr
    assert "predicted verdict:" in r.stdout and "RMS over" in r.stdout
    with dwell_csv.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows and all(float(row["dwell_s"]) > 0 for row in rows)
    xs = sorted({float(row["x_mm"]) for row in rows})
    assert min(b - a for a, b in itertools.pairwise(xs)) > 0.5  # the machine grid
    pv = float(r.stdout.split("PV (nm)")[1].split()[1])
    again = run("analyze", str(predicted))
    assert again.returncode == 0 and f"PV {pv:.2f} nm" in again.stdout, again.stdout
    j = run("plan", "100-0603", *tif, "--json", *h)
    d = json.loads(j.stdout)
    assert {"before", "predicted", "verdict", "total_time_min", "fields", "tif"} <= set(d)
    assert d["predicted"]["rms_nm"] < d["before"]["rms_nm"]
    for bad, message in (
        (["--tif-sigma", "0", "--tif-peak", "2"], "positive sigma"),
        (["--tif-sigma", "2"], "needs both --tif-sigma and --tif-peak"),
        ([], "give the TIF"),
        ([*tif, "--predicted", str(tmp_path / "n.xyz")], "--predicted"),
        ([*tif, "--spacing", "-1"], "--spacing"),
    ):
        r = run("plan", "100-0603", *bad, "--dwell-csv", str(tmp_path / "d2.csv"), *h)
        assert r.returncode == 2 and message in r.stderr and len(r.stderr.splitlines()) == 1
        assert not (tmp_path / "d2.csv").exists() and not list(tmp_path.glob(".*part*"))


@pytest.mark.slow
@pytest.mark.parametrize("signum", [signal.SIGTERM, signal.SIGINT])
def test_ui_passes_a_stop_signal_to_the_app_server_and_waits_for_it(small_demo, signum):
    """`shopdb ui` stopped by SIGTERM (a service manager) or SIGINT (Ctrl-C) stops the app
    server it started and exits; no server is left running on the port."""
    import socket
    import time
    import urllib.request

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    env = {k: v for k, v in os.environ.items() if not k.startswith("SHOPDB_")}
    proc = subprocess.Popen(
        [sys.executable, "-m", "shopdb.cli", "ui", "--home", str(small_demo), "--port", str(port)],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    try:
        deadline = time.time() + 90
        while True:
            try:
                urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2)
                break
            except OSError:
                assert time.time() < deadline, "the app did not come up"
                time.sleep(0.5)
        proc.send_signal(signum)
        assert proc.wait(30) == 0
        with pytest.raises(OSError):
            urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2)
    finally:
        if proc.poll() is None:
            proc.kill()
