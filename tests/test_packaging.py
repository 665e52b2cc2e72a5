"""Every package of sandbox/ is in what pip installs (the list is found, not written out)."""

from __future__ import annotations

from pathlib import Path

import pytest
from setuptools import find_packages

tomllib = pytest.importorskip("tomllib")  # Python 3.11 and later

ROOT = Path(__file__).resolve().parents[1]


def test_every_sandbox_package_is_installed() -> None:
    found = set(find_packages(str(ROOT), **_find_options()))
    on_disk = {".".join(path.parent.relative_to(ROOT).parts)
               for path in (ROOT / "sandbox").rglob("__init__.py")}
    assert on_disk and on_disk <= found, sorted(on_disk - found)


def _find_options() -> dict:
    data = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    options = data["tool"]["setuptools"]["packages"]["find"]
    return {"include": options.get("include", ["*"]), "exclude": options.get("exclude", ())}
