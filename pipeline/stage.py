"""The common return type of the processing stages.

Every stage after ingest takes the working frame (see DEVELOPERS.md, "The working
frame") and returns a :class:`StageResult`: new per-interval columns on the same index,
a JSON-serialisable summary for ``summary.json``, warnings for the report, and
optionally per-day columns for ``daily.parquet``.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd


@dataclass
class StageResult:
    columns: pd.DataFrame
    summary: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    daily: pd.DataFrame | None = None
