"""Reading a site's written outputs for the reports, defensively.

The reports read only what the run wrote (``intervals.parquet``, ``daily.parquet``,
``summary.json``); any file, column or key may be missing, and the pages then show a note.
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from pipeline import flags as flagbits
from pipeline.outputs import VARIABLE_METADATA

__all__ = ["SiteOutputs", "read_site_outputs", "get", "num", "fmt", "local_naive", "history_periods",
           "accepted_values", "primary_reason", "VARIABLE_ORDER", "unit_of", "label"]

#: order in which canonical variables are listed (CONTRACT §1 order)
VARIABLE_ORDER = list(VARIABLE_METADATA)

_LABELS = {
    "le": "LE", "h": "H", "rn": "Rn", "g": "G", "rg": "Rg", "sw_out": "SW out", "lw_in": "LW in",
    "lw_out": "LW out", "ta": "Ta", "rh": "RH", "vpd": "VPD", "p_air": "p air", "wind": "wind",
    "wind_dir": "wind dir", "ustar": "u*", "precip": "precip", "swc": "SWC", "t_soil": "T soil",
    "s_canopy": "S canopy", "fc": "Fc",
}


def label(var: str) -> str:
    """Short display label of a canonical variable (the trade's own symbols)."""
    return _LABELS.get(var, var)


@dataclass
class SiteOutputs:
    """Everything the site report reads, with what is missing recorded."""

    site_dir: Path
    intervals: pd.DataFrame | None
    daily: pd.DataFrame | None
    summary: dict
    units: dict[str, str] = field(default_factory=dict)
    file_meta: dict = field(default_factory=dict)
    interval: pd.Timedelta = pd.Timedelta(minutes=30)
    problems: list[str] = field(default_factory=list)

    @property
    def site(self) -> str:
        return str(self.summary.get("site") or self.file_meta.get("site") or self.site_dir.name)

    def has(self, column: str) -> bool:
        return (self.intervals is not None and column in self.intervals.columns
                and self.intervals[column].notna().any())

    def period_text(self) -> str:
        start, end = self.summary.get("start"), self.summary.get("end")
        if (start is None or end is None) and self.intervals is not None and len(self.intervals):
            start = start or self.intervals["timestamp_start"].iloc[0]
            end = end or self.intervals["timestamp_end"].iloc[-1]
        return f"{_short_time(start)} to {_short_time(end)}" if start and end else "period unknown"


def _short_time(value) -> str:
    try:
        t = pd.Timestamp(value)
    except (ValueError, TypeError):
        return str(value)
    text = t.strftime("%Y-%m-%d %H:%M")
    if t.tzinfo is not None:
        off = t.utcoffset()
        minutes = int(off.total_seconds() // 60)
        sign = "+" if minutes >= 0 else "-"
        text += f" UTC{sign}{abs(minutes) // 60:02d}:{abs(minutes) % 60:02d}"
    return text


def get(d, *keys, default=None):
    """``d[k1][k2]...`` or ``default`` if any level is missing or not a dict."""
    for k in keys:
        if isinstance(d, dict) and k in d:
            d = d[k]
        elif isinstance(d, list) and isinstance(k, int) and -len(d) <= k < len(d):
            d = d[k]
        else:
            return default
    return default if d is None else d


def num(value) -> float:
    """A float, or NaN for anything that is not a finite number."""
    try:
        x = float(value)
    except (TypeError, ValueError):
        return math.nan
    return x if math.isfinite(x) else math.nan


def fmt(value, spec: str = ".2f", missing: str = "n/a") -> str:
    x = num(value)
    return missing if math.isnan(x) else format(x, spec)


def local_naive(series: pd.Series) -> pd.Series:
    """Timestamps at the site's fixed offset, as naive local standard time (for plotting)."""
    s = pd.to_datetime(series)
    if getattr(s.dt, "tz", None) is not None:
        s = s.dt.tz_localize(None)
    return s


def _interval_from(frame: pd.DataFrame, meta: dict) -> pd.Timedelta:
    minutes = num(meta.get("interval_minutes"))
    if not math.isnan(minutes) and minutes > 0:
        return pd.Timedelta(minutes=minutes)
    if frame is not None and "timestamp_start" in frame and len(frame) > 1:
        steps = np.diff(pd.DatetimeIndex(frame["timestamp_start"]).asi8)
        if len(steps):
            return pd.Timedelta(int(np.median(steps)), unit="ns")
    return pd.Timedelta(minutes=30)


def read_site_outputs(site_dir: Path) -> SiteOutputs:
    """Read the site's outputs; a missing or unreadable file is recorded, never raised."""
    site_dir = Path(site_dir)
    problems: list[str] = []
    intervals = None
    units: dict[str, str] = {}
    file_meta: dict = {}
    path = site_dir / "intervals.parquet"
    if path.exists():
        try:
            table = pq.read_table(path)
            for f in table.schema:
                if f.metadata and b"unit" in f.metadata:
                    units[f.name] = f.metadata[b"unit"].decode()
            raw_meta = (table.schema.metadata or {}).get(b"towerflow")
            if raw_meta:
                try:
                    file_meta = json.loads(raw_meta)
                except ValueError:
                    file_meta = {}
            intervals = table.to_pandas()
        except Exception as exc:  # the report must still say what it could not read
            problems.append(f"intervals.parquet could not be read ({type(exc).__name__})")
    else:
        problems.append("intervals.parquet is missing")
    if intervals is not None:
        if "timestamp_start" not in intervals.columns:
            problems.append("intervals.parquet has no timestamp_start column")
            intervals = None
        else:
            intervals = intervals.sort_values("timestamp_start", kind="stable").reset_index(drop=True)
            if "timestamp_end" not in intervals.columns:
                intervals["timestamp_end"] = intervals["timestamp_start"] + _interval_from(intervals, file_meta)
    daily = None
    path = site_dir / "daily.parquet"
    if path.exists():
        try:
            daily = pd.read_parquet(path)
            if "date" in daily.columns:
                daily["date"] = pd.to_datetime(daily["date"].astype(str), errors="coerce")
                daily = daily.dropna(subset=["date"]).sort_values("date").reset_index(drop=True)
            else:
                problems.append("daily.parquet has no date column")
                daily = None
        except Exception as exc:
            problems.append(f"daily.parquet could not be read ({type(exc).__name__})")
    else:
        problems.append("daily.parquet is missing")
    summary: dict = {}
    path = site_dir / "summary.json"
    if path.exists():
        try:
            loaded = json.loads(path.read_text())
            summary = loaded if isinstance(loaded, dict) else {}
        except (ValueError, OSError) as exc:
            problems.append(f"summary.json could not be read ({type(exc).__name__})")
    else:
        problems.append("summary.json is missing")
    return SiteOutputs(site_dir=site_dir, intervals=intervals, daily=daily, summary=summary, units=units,
                       file_meta=file_meta, interval=_interval_from(intervals, file_meta), problems=problems)


def unit_of(out: SiteOutputs, column: str, default: str = "") -> str:
    """Unit of a column: the parquet field metadata, else the canonical unit, else ``default``."""
    if column in out.units:
        return out.units[column]
    from pipeline.outputs import CANONICAL_UNITS  # the canonical units, re-exported with the metadata

    return CANONICAL_UNITS.get(column, default)


def accepted_values(frame: pd.DataFrame, var: str) -> np.ndarray:
    """Values of ``var`` where its flag is 0 (NaN elsewhere); without a flag column, as is."""
    values = frame[var].to_numpy(dtype=float, na_value=np.nan)
    flag_col = f"{var}_flag"
    if flag_col in frame.columns:
        flags = frame[flag_col].fillna(flagbits.MISSING).to_numpy().astype(np.int64)
        values = np.where(flags == 0, values, np.nan)
    return values


def primary_reason(flags: np.ndarray) -> np.ndarray:
    """For each flag value, the short name of its first (lowest) reason bit other than
    ``missing`` ('' for accepted or only-missing values)."""
    flags = np.asarray(flags, dtype=np.int64)
    out = np.full(flags.shape, "", dtype=object)
    # lowest set bit wins: assign from the highest bit down so lower bits overwrite
    for bit, (name, _) in sorted(flagbits.BITS.items(), reverse=True):
        if bit == flagbits.MISSING:
            continue
        out[(flags & bit) != 0] = name
    return out


def history_periods(out: SiteOutputs) -> list[tuple[pd.Timestamp, pd.Timestamp, str, str]]:
    """Site-history periods from ``summary.json`` as (start, end, short label, kind), naive local time."""
    periods = []
    for i, entry in enumerate(out.summary.get("history") or []):
        if not isinstance(entry, dict):
            continue
        try:
            start = pd.Timestamp(entry.get("start"))
            end = pd.Timestamp(entry.get("end")) if entry.get("end") else None
        except (ValueError, TypeError):
            continue
        if start is pd.NaT or start is None:
            continue
        if start.tzinfo is not None:
            start = start.tz_localize(None)
        if end is None or end is pd.NaT:
            end = start + pd.Timedelta(hours=1)
        elif end.tzinfo is not None:
            end = end.tz_localize(None)
        number = entry.get("entry", i)
        periods.append((start, end, f"#{number}", str(entry.get("kind") or "")))
    return periods


#: history kinds drawn as a thin band at the top of time axes instead of a full-height shade
BAND_KINDS = ("irrigation",)
#: history kinds listed on the overview page only (they change parameters, not data)
LISTED_ONLY_KINDS = ("site parameters",)


def history_lines(out: SiteOutputs) -> list[str]:
    """One line per correction or exclusion (the #numbers on time axes); other kinds summarised."""
    lines = []
    grouped: dict[str, list[dict]] = {}
    for i, entry in enumerate(out.summary.get("history") or []):
        if not isinstance(entry, dict):
            continue
        kind = str(entry.get("kind") or "")
        if kind in BAND_KINDS or kind in LISTED_ONLY_KINDS:
            grouped.setdefault(kind, []).append(entry)
            continue
        number = entry.get("entry", i)
        what = entry.get("detail") or entry.get("kind") or ""
        variables = entry.get("variables")
        if isinstance(variables, (list, tuple)):
            variables = ", ".join(map(str, variables))
        text = f"#{number} {_short_time(entry.get('start'))} to {_short_time(entry.get('end'))}: {what}"
        if variables and str(variables) not in str(what):
            text += f" ({variables})"
        if entry.get("reason"):
            text += f" - {entry['reason']}"
        lines.append(text)
    for kind, entries in grouped.items():
        variables = sorted({str(e.get("variables") or e.get("detail") or "") for e in entries} - {""})
        first = _short_time(entries[0].get("start"))[:10]
        last = _short_time(entries[-1].get("end") or entries[-1].get("start"))[:10]
        how = "thin band on top of time axes" if kind in BAND_KINDS else "not drawn on time axes"
        lines.append(f"{len(entries)} {kind} period(s), {first} to {last}"
                     + (f" ({', '.join(variables)})" if variables else "") + f" - {how}")
    return lines
