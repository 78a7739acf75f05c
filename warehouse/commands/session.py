"""The one piece of state a front end keeps: where the warehouse is, the focus, the settings."""
from __future__ import annotations

from dataclasses import dataclass, field

from ..collapse.settings import Collapse
from ..store.connect import Warehouse, open_warehouse, resolve_location


@dataclass
class Session:
    location: str | None = None
    focus: str = ""
    metric: str | None = None
    collapse: Collapse = field(default_factory=Collapse)
    last_analysis: int | None = None
    interactive: bool = False
    # the commands the front end offers (name -> Command); the shell reads its words from here
    commands: dict | None = None
    _wh: Warehouse | None = None

    @property
    def where(self) -> str:
        return resolve_location(self.location)

    def warehouse(self) -> Warehouse:
        if self._wh is None:
            self._wh = open_warehouse(self.location)
        return self._wh

    @property
    def read_only(self) -> str | None:
        """Why the open warehouse can only be read here, or None (also when none is open yet)."""
        return self._wh.read_only if self._wh is not None else None

    def reset(self) -> None:
        if self._wh is not None:
            self._wh.close()
        self._wh = None

    def close(self) -> None:
        self.reset()
