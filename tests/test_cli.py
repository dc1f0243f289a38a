"""The command line as a user runs it: one-line errors, exit 2, help with examples."""

from __future__ import annotations

import os
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
    assert "database at 0002" in r.stdout


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
