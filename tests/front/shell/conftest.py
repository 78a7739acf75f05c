"""Fixtures of the shell's tests: history kept in the test's folder, and a loaded warehouse."""
from __future__ import annotations

import pytest

from .kit import LAYOUT, write_campaign


@pytest.fixture(autouse=True)
def _history(tmp_path, monkeypatch):
    monkeypatch.setenv("BLOCKYARD_HISTORY", str(tmp_path / "history" / "shell-history"))


@pytest.fixture
def loaded(cli, tmp_path, location):
    layout = tmp_path / "layout.toml"
    layout.write_text(LAYOUT)
    src = write_campaign(tmp_path / "runs.csv")
    r = cli("load", str(src), "--campaign", "autumn", "--layout", str(layout))
    assert r.code == 0, r
    return location
