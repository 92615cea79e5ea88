"""Public names are curated: every module lists its exports in __all__, and each exists (httpx's practice)."""

from __future__ import annotations

import importlib
import pkgutil

import pytest

import fusion

MODULES = sorted(m.name for m in pkgutil.walk_packages(fusion.__path__, "fusion."))


def test_package_exports_create_app():
    assert fusion.__all__ == ["create_app"]


@pytest.mark.parametrize("name", MODULES)
def test_module_declares_and_defines_its_exports(name):
    module = importlib.import_module(name)
    assert hasattr(module, "__all__"), f"{name} has no __all__"
    missing = [n for n in module.__all__ if not hasattr(module, n)]
    assert missing == []
