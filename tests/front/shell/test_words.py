"""The shell's own words (warehouse/front/shell/words.py): where history is kept."""
from __future__ import annotations


def test_history_location_follows_the_environment(monkeypatch, tmp_path):
    from warehouse.front.shell.words import history_path

    monkeypatch.delenv("BLOCKYARD_HISTORY")
    monkeypatch.setenv("XDG_DATA_HOME", str(tmp_path / "data"))
    assert history_path() == tmp_path / "data" / "blockyard" / "history"
    monkeypatch.delenv("XDG_DATA_HOME")
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    assert history_path() == tmp_path / "home" / ".local" / "share" / "blockyard" / "history"
