"""The site history (CONTRACT §2 ``[[history]]``) applied to time series.

A history entry (:class:`pipeline.config.HistoryEntry`) covers the averaging intervals whose
*start* lies in ``[start, end)``; its bounds are in the site's local standard time and are
tz-aware, so any tz-aware index (UTC stamps from ingest, the working frame at the site
offset) is compared in absolute time. Entries may

- change site parameters (``canopy_height_m``, ``measurement_height_m``, ``irga``) for a
  period (:func:`site_parameters`);
- correct a variable: ``value * scale + offset`` (:func:`apply_corrections`, which also
  returns the entry applied to every value), or shift its clock by ``shift_minutes``
  (:func:`shift_minutes`: the true start of an interval is the recorded start plus the
  shift, i.e. a logger clock running 60 min slow has ``shift_minutes = 60``; the period is
  matched against the *recorded* stamps);
- exclude variables (:func:`apply_exclusions`: flag bit 64);
- mark irrigation (``irrigated`` in :func:`site_parameters`).

The configuration loader refuses overlapping entries that set the same parameter or
correct the same variable; should such entries reach these functions anyway, the later
entry in the file wins.

All functions are pure: they return new objects and never modify their inputs.
"""
from __future__ import annotations

from typing import Iterable

import numpy as np
import pandas as pd

from . import flags as _flags
from .config import HistoryEntry, SiteInfo

__all__ = [
    "period_mask",
    "shift_minutes",
    "apply_corrections",
    "apply_exclusions",
    "site_parameters",
    "history_periods",
]

TRACE_SUFFIX = "_history_entry"
TRACE_DTYPE = np.int16


def _as_index(times) -> pd.DatetimeIndex:
    index = pd.DatetimeIndex(times)
    if index.tz is None:
        raise ValueError("history periods need tz-aware timestamps (UTC or the site's offset)")
    return index


def period_mask(times, entry: HistoryEntry) -> np.ndarray:
    """True for the stamps (interval starts) that lie in ``[entry.start, entry.end)``.

    Parameters
    ----------
    times : pandas.DatetimeIndex
        tz-aware interval starts.
    entry : HistoryEntry
        A history entry with tz-aware bounds.

    Returns
    -------
    numpy.ndarray of bool
    """
    index = _as_index(times)
    return np.asarray((index >= entry.start) & (index < entry.end), dtype=bool)


def shift_minutes(times_utc, history: Iterable[HistoryEntry], variable: str, site: SiteInfo) -> np.ndarray:
    """Clock correction of ``variable`` per recorded stamp, in minutes.

    Parameters
    ----------
    times_utc : pandas.DatetimeIndex
        Recorded interval starts (tz-aware; naive stamps are taken as UTC).
    history : sequence of HistoryEntry
    variable : str
        Canonical variable name.
    site : SiteInfo
        The site (kept for a uniform signature; entries carry their own time zone).

    Returns
    -------
    numpy.ndarray of float64
        ``shift_minutes`` of the entry covering each stamp that corrects ``variable``'s
        clock, 0 elsewhere [min]. True start = recorded start + shift.
    """
    index = pd.DatetimeIndex(times_utc)
    if index.tz is None:  # naive stamps are taken as UTC, as the name says
        index = index.tz_localize("UTC")
    out = np.zeros(len(index), dtype=np.float64)
    for entry in history:
        spec = entry.correct.get(variable)
        if not spec or "shift_minutes" not in spec:
            continue
        out[period_mask(index, entry)] = float(spec["shift_minutes"])
    return out


def apply_corrections(frame: pd.DataFrame, history: Iterable[HistoryEntry], site: SiteInfo):
    """Apply the history's scale / offset corrections: ``value * scale + offset``.

    Parameters
    ----------
    frame : pandas.DataFrame
        Index: tz-aware interval starts. Columns: canonical variables (others untouched).
    history : sequence of HistoryEntry
    site : SiteInfo
        The site (used to localise a naive index to the site's standard time).

    Returns
    -------
    corrected : pandas.DataFrame
        A new frame; corrected variables as float64 (new arrays; the other columns share
        the input's arrays, which neither function writes).
    trace : pandas.DataFrame
        Same index; an int16 column ``<var>_history_entry`` for each variable of the frame
        that some entry scales or offsets, holding the :attr:`HistoryEntry.index` applied
        to the value, -1 where none. Clock shifts are applied at ingest
        (:func:`shift_minutes`) and are not traced here.
    """
    index = frame.index if getattr(frame.index, "tz", None) is not None else \
        pd.DatetimeIndex(frame.index).tz_localize(site.tz)
    # a shallow copy: a corrected column is replaced by a new array (never written in place),
    # so the input stays as it was; the columns no entry corrects are not copied
    out = frame.copy(deep=False)
    trace = pd.DataFrame(index=frame.index)
    for entry in history:
        mask = None
        for var, spec in entry.correct.items():
            if var not in out.columns or not ({"scale", "offset"} & set(spec)):
                continue
            if mask is None:
                mask = period_mask(index, entry)
            values = out[var].to_numpy(dtype=np.float64, copy=True)
            scale = float(spec.get("scale", 1.0))
            offset = float(spec.get("offset", 0.0))
            values[mask] = values[mask] * scale + offset
            out[var] = values
            column = f"{var}{TRACE_SUFFIX}"
            if column not in trace.columns:
                trace[column] = np.full(len(index), -1, dtype=TRACE_DTYPE)
            entries = trace[column].to_numpy(copy=True)
            entries[mask] = entry.index
            trace[column] = entries.astype(TRACE_DTYPE)
    return out, trace


def apply_exclusions(flags: pd.DataFrame, history: Iterable[HistoryEntry]) -> pd.DataFrame:
    """OR the HISTORY bit (64) into the excluded variables over the excluded periods.

    Parameters
    ----------
    flags : pandas.DataFrame
        Flag frame (tz-aware index; one int column per variable).
    history : sequence of HistoryEntry

    Returns
    -------
    pandas.DataFrame
        A new flag frame; variables the frame lacks are ignored.
    """
    out = flags.copy(deep=False)  # columns are replaced, never written in place (as above)
    for entry in history:
        if not entry.exclude:
            continue
        mask = period_mask(out.index, entry)
        for var in entry.exclude:
            if var in out.columns:
                col = out[var].to_numpy(copy=True)
                col[mask] |= _flags.HISTORY
                out[var] = col.astype(_flags.FLAG_DTYPE)
    return out


def site_parameters(index, site: SiteInfo, history: Iterable[HistoryEntry]) -> pd.DataFrame:
    """The site parameters as time series: defaults from ``[site]``, history periods applied.

    Parameters
    ----------
    index : pandas.DatetimeIndex
        tz-aware interval starts.
    site : SiteInfo
    history : sequence of HistoryEntry

    Returns
    -------
    pandas.DataFrame
        Same index; ``canopy_height_m`` [m] and ``measurement_height_m`` [m] (float64),
        ``irga`` (``"open-path"`` / ``"closed-path"``), ``irrigated`` (bool, true in entries
        with ``irrigation = true``).
    """
    idx = _as_index(index)
    n = len(idx)
    canopy = np.full(n, float(site.canopy_height_m))
    height = np.full(n, float(site.measurement_height_m))
    irga = np.full(n, site.irga, dtype=object)
    irrigated = np.zeros(n, dtype=bool)
    for entry in history:
        if not (entry.parameters or entry.irrigation):
            continue
        mask = period_mask(idx, entry)
        if "canopy_height_m" in entry.parameters:
            canopy[mask] = float(entry.parameters["canopy_height_m"])
        if "measurement_height_m" in entry.parameters:
            height[mask] = float(entry.parameters["measurement_height_m"])
        if "irga" in entry.parameters:
            irga[mask] = entry.parameters["irga"]
        if entry.irrigation:
            irrigated[mask] = True
    return pd.DataFrame({"canopy_height_m": canopy, "measurement_height_m": height,
                         "irga": irga, "irrigated": irrigated}, index=index)


def _fmt(value) -> str:
    return f"{value:g}" if isinstance(value, float) else str(value)


def history_periods(history: Iterable[HistoryEntry]) -> pd.DataFrame:
    """The history as a tidy table for reports: one row per entry and kind.

    Returns
    -------
    pandas.DataFrame
        Columns ``entry`` (HistoryEntry.index), ``start``, ``end`` (tz-aware, site time),
        ``kind`` (``"site parameters"``, ``"correction"``, ``"exclusion"``,
        ``"irrigation"``), ``variables`` (comma-separated names: the variables corrected or
        excluded, or the parameters set), ``detail`` (e.g. ``"g: scale -1"``), ``reason``.
        Sorted by start, then entry.
    """
    rows = []
    for e in history:
        base = {"entry": e.index, "start": e.start, "end": e.end, "reason": e.reason}
        if e.parameters:
            rows.append({**base, "kind": "site parameters", "variables": ", ".join(e.parameters),
                         "detail": ", ".join(f"{k} = {_fmt(v)}" for k, v in e.parameters.items())})
        if e.correct:
            rows.append({**base, "kind": "correction", "variables": ", ".join(e.correct),
                         "detail": "; ".join(f"{var}: " + ", ".join(f"{k} {_fmt(v)}" for k, v in spec.items())
                                             for var, spec in e.correct.items())})
        if e.exclude:
            rows.append({**base, "kind": "exclusion", "variables": ", ".join(e.exclude),
                         "detail": "excluded"})
        if e.irrigation:
            rows.append({**base, "kind": "irrigation", "variables": "", "detail": "canopy irrigated"})
    columns = ["entry", "start", "end", "kind", "variables", "detail", "reason"]
    table = pd.DataFrame(rows, columns=columns)
    if len(table):
        table = table.sort_values(["start", "entry"], kind="stable").reset_index(drop=True)
    return table
