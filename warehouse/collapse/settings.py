"""How runs collapse to observations: the replicate and instance statistics, the failure and
hole policies. A value crossing layers: the front ends hold one in the session."""
from __future__ import annotations

from dataclasses import dataclass


@dataclass
class Collapse:
    replicates: str = "mean"  # mean | median | trimmed:0.1
    instances: str = "mean"  # mean | median
    failures: str = "drop"  # drop | penalize:FACTOR | worst
    holes: str = "drop"  # drop | keep

    def to_dict(self) -> dict:
        return {"replicates": self.replicates, "instances": self.instances,
                "failures": self.failures, "holes": self.holes}
