"""The public API is declared in one place and every module says what it exports."""

from __future__ import annotations

import importlib
import pkgutil

import streamcount


def test_package_all_is_sorted_and_complete() -> None:
    names = streamcount.__all__
    assert list(names) == sorted(names)
    for name in names:
        assert hasattr(streamcount, name), name
    public = {n for n in vars(streamcount) if not n.startswith("_")} - {
        m.name for m in pkgutil.iter_modules(streamcount.__path__)
    }
    public -= {"annotations"}
    assert public == set(names) - {"__version__"}


def test_every_module_declares_all() -> None:
    for info in pkgutil.iter_modules(streamcount.__path__):
        if info.name.startswith("_"):
            continue
        module = importlib.import_module(f"streamcount.{info.name}")
        exported = getattr(module, "__all__", None)
        assert exported is not None, f"streamcount.{info.name} has no __all__"
        for name in exported:
            assert hasattr(module, name), f"streamcount.{info.name}.{name} missing"
