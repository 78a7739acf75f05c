"""What a wheel ships: every package folder of the tree, and the migrations inside the package.

A wheel is built from pyproject.toml's explicit package list (the migrations are mapped in from
the repository's top-level `migrations/`), so a new package folder missing from that list would
install without it. .ci/wheel-smoke proves the built wheel end to end; this checks the list.
"""
from __future__ import annotations

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _config() -> dict:
    return tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]


def test_every_package_folder_is_listed_for_the_wheel():
    tree = {".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "warehouse").rglob("__init__.py")}
    listed = set(_config()["packages"])
    assert tree - listed == set(), "package folders a wheel would leave out"
    assert listed - tree == {"warehouse.migrations"}


def test_the_migrations_are_mapped_into_the_package_with_every_revision():
    cfg = _config()
    assert cfg["package-dir"]["warehouse.migrations"] == "migrations"
    assert "versions/*.py" in cfg["package-data"]["warehouse.migrations"]
    assert (ROOT / "migrations" / "__init__.py").exists() and (ROOT / "migrations" / "env.py").exists()


def test_the_installed_package_finds_its_migrations_through_the_package():
    from warehouse import migrations
    from warehouse.store.connect import migrations_dir

    assert migrations_dir() == Path(migrations.__file__).parent
    assert sorted(p.name for p in (migrations_dir() / "versions").glob("0*.py"))[0].startswith("0001")
