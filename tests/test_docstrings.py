"""Every public function and class of the numeric layers says where its formula comes from: a
numpydoc ``Notes`` (or ``References``) section (the habit of scikit-image and prysm)."""

from __future__ import annotations

import importlib
import inspect
import pkgutil

import pytest

import shopdb.spc
import shopdb.surface


def _public():
    for pkg in (shopdb.surface, shopdb.spc):
        for info in pkgutil.iter_modules(pkg.__path__):
            if info.name.startswith("_"):
                continue
            mod = importlib.import_module(f"{pkg.__name__}.{info.name}")
            for name, obj in vars(mod).items():
                if name.startswith("_") or getattr(obj, "__module__", None) != mod.__name__:
                    continue
                if inspect.isfunction(obj) or inspect.isclass(obj):
                    yield f"{info.name}.{name}", obj


@pytest.mark.parametrize("name,obj", list(_public()), ids=[n for n, _ in _public()])
def test_public_numerics_cite_their_source(name, obj):
    doc = obj.__doc__ or ""
    assert "Notes\n" in doc or "References\n" in doc, f"{name} has no Notes section"
