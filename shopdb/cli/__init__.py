"""The ``shopdb`` command line (see :mod:`shopdb.cli.main`)."""

from shopdb.cli.main import app, main

__all__ = ["app", "main"]
