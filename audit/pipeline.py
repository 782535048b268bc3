"""The audit pipeline: inventory -> models -> figures -> (proposals, ranking) -> outputs.

Each stage is a function that takes the :class:`Audit` and adds columns to its
``results`` table (one row per inventory row, in inventory order; nothing is
ever dropped). Stages never convert units; the inventory did that.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np
import pandas as pd

from . import __version__
from .loop import LoopModel
from .rows import Inventory


@dataclass
class AuditOptions:
    """What the user asked for on the command line."""

    out_dir: str = "audit-out"
    site: str = ""
    title: str = "Control loop audit"
    date: str | None = None          # ISO date; today when None
    paper: str = "a4"
    detail: str = "failing"          # failing | all
    propose: str = "failing"         # failing | all | none
    pdf: bool = True
    jobs: int = 1
    quiet: bool = False
    history: str | None = None       # path or URL; None -> default beside the inventory
    record_history: bool = True


@dataclass
class Audit:
    """Everything one run knows. ``results`` grows column by column as stages run."""

    inventory: Inventory
    options: AuditOptions
    models: list[LoopModel | None]
    results: pd.DataFrame
    date: str
    tool_version: str = __version__
    extras: dict[str, Any] = field(default_factory=dict)   # per-stage side data (records, proposals, ...)
    timings: dict[str, float] = field(default_factory=dict)  # stage -> wall time [s]

    @property
    def meta(self) -> dict[str, Any]:
        """What identifies the run: recorded in results.json, the report and the history."""
        return {
            "tool": "plant-audit",
            "tool_version": self.tool_version,
            "date": self.date,
            "site": self.options.site,
            "title": self.options.title,
            "inventory": self.inventory.name,
            "inventory_sha256": self.inventory.sha256,
            "policy": self.inventory.policy.as_dict(),
        }


def audit_date(option: str | None) -> str:
    """The audit date as ISO text (``--date`` makes runs reproducible)."""
    if option:
        return _dt.date.fromisoformat(option).isoformat()
    return _dt.date.today().isoformat()


Stage = Callable[[Audit], None]
