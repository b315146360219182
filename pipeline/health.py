"""Weekly clock and sensor-health diagnostics.

Every ISO week of the record is checked for signs that the station needs attention at the
next visit:

- the logger clock: its offset from the timing of the sun, found on clear days from the
  morning/afternoon symmetry of global radiation (``rg``; net radiation ``rn`` when there is
  no ``rg``) against the interval-mean potential radiation; steps (a clock reset) and drift
  across weeks;
- midday sign tests of ``rn``, ``g``, ``h`` and ``le`` (a sensor wired the wrong way round);
- ``rg`` against the clear-sky envelope (a dirty or tilted dome; a wrong calibration factor);
- night-time maxima of ``rh`` (a drifting humidity sensor);
- jumps of the midday albedo (``sw_out`` / ``rg``);
- flat lines (a stuck sensor);
- the weekly energy-balance ratio and its trend;
- days since each variable's last data.

Each finding is ``{"check", "week", "severity", "message"}`` with severity ``ok``, ``watch``
or ``act`` and a message saying in plain words what to look at.

Clock offset convention: ``offset_minutes`` > 0 means the logger's time stamps are *ahead*
of true time (the sun appears to rise and set late on the logger's clock); correcting the
record needs a shift of ``-offset_minutes`` (``shift_minutes`` of ``[[history]]`` adds the shift to
the recorded stamp to get the true one, see pipeline/history.py).
"""
from __future__ import annotations

import math
import warnings as _warnings

import numpy as np
import pandas as pd

from . import flags as flagbits
from .closure import available_energy
from .rules import duration
from .stage import StageResult

__all__ = [
    "assess_health",
    "daily_lag_correlation",
    "offset_from_correlation",
    "detect_clock_steps",
    "clock_drift",
    "longest_flat_run",
]

_DEFAULTS = {
    # the same defaults as qc_rules/standard.toml [health]
    "clock_search": "3 h",
    "clock_search_step": "5 min",
    "clock_min_day_coverage": 0.9,
    "clear_min_clearness": 0.5,
    "clear_max_roughness": 1.5,
    "clear_min_correlation": 0.95,
    "clock_offset_suspect": "15 min",
    "clock_step": "15 min",
    "clock_step_min_days": 2,
    "clock_drift_per_week": "2 min",
    "clock_drift_min_days": 5,
    "midday_fraction": 0.8,
    "midday_min_potential": 300.0,
    "midday_min_net_radiation": 100.0,
    "midday_min_intervals": 4,
    "rg_envelope_low": 0.85,
    "rg_envelope_high": 1.15,
    "rg_envelope_weeks": 3,
    "rh_night_max_low": 90.0,
    "rh_night_max_high": 103.0,
    "rh_humid_week_precip": 1.0,
    "albedo_jump": 0.08,
    "albedo_window": "7 days",
    "albedo_min_rg": 200.0,
    "flat_line_watch": "3 h",
    "flat_line_act": "1 day",
    "closure_ebr_range": [0.6, 1.2],
    "closure_min_coverage": 0.3,
    "closure_drift_weeks": 8,
    "closure_drift_per_week": 0.02,
    "closure_drift_p": 0.05,
    "data_gap_watch": "2 days",
    "data_gap_act": "7 days",
}

#: variables checked for flat lines (precip, swc, t_soil and p_air legitimately repeat)
_FLAT_LINE_VARIABLES = ("le", "h", "rn", "g", "rg", "sw_out", "lw_in", "lw_out", "ta", "rh",
                        "vpd", "wind", "wind_dir", "ustar", "fc")
#: variables that are zero all night: only their daytime values are checked for flat lines
_DAYTIME_ONLY = ("rg", "sw_out")


def _health_rules(rules: dict | None) -> dict:
    out = dict(_DEFAULTS)
    if rules is not None:
        out.update(rules.get("health", {}) or {})
    return out


def _num(x, digits: int | None = None):
    if x is None:
        return None
    x = float(x)
    if not math.isfinite(x):
        return None
    return round(x, digits) if digits is not None else x


def _minutes(value) -> float:
    return duration(value) / pd.Timedelta(minutes=1)


def _accepted(frame, flags, var, *, ignore: int = 0) -> np.ndarray:
    """Values of ``var`` whose flags carry no bit other than those in ``ignore``."""
    return flagbits.accepted_values(frame, flags, var, ignore=ignore)


#: the clock check reads radiation the consistency tests rejected: the clear-sky envelope
#: test (bit 128) itself fails when the clock is off, which would hide the very offset
_CLOCK_IGNORES = flagbits.CONSISTENCY | flagbits.CLOCK


def _iso_week(days: pd.DatetimeIndex) -> np.ndarray:
    """ISO 8601 week label ("2025-W07") of each day: the week of a date is that of its
    Thursday, numbered within the Thursday's calendar year (week 1 holds the first Thursday)."""
    days = pd.DatetimeIndex(days)
    if days.tz is not None:
        days = days.tz_localize(None)  # the wall-clock date
    d = days.to_numpy().astype("datetime64[D]").astype(np.int64)  # days since 1970-01-01, a Thursday
    thursday = d - (d + 3) % 7 + 3  # (d + 3) % 7: Monday 0 ... Sunday 6
    year_start = thursday.astype("datetime64[D]").astype("datetime64[Y]")
    week = (thursday - year_start.astype("datetime64[D]").astype(np.int64)) // 7 + 1
    code = (year_start.astype(np.int64) + 1970) * 100 + week
    unique, inverse = np.unique(code, return_inverse=True)  # format each week once, not each day
    labels = np.array([f"{c // 100}-W{c % 100:02d}" for c in unique.tolist()], dtype=object)
    return labels[inverse.reshape(-1)]


# ---------------------------------------------------------------------------
# clock offset
# ---------------------------------------------------------------------------

def daily_lag_correlation(radiation: np.ndarray, day_starts: pd.DatetimeIndex, interval: pd.Timedelta,
                          latitude: float, longitude: float, *, search: pd.Timedelta,
                          step: pd.Timedelta) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Correlation of each day's radiation with potential radiation shifted by candidate lags.

    Parameters
    ----------
    radiation : numpy.ndarray, shape (n_days, n_per_day)
        Interval means of rg (or rn) [W m-2] on whole local days, NaN where not accepted.
    day_starts : pandas.DatetimeIndex
        Tz-aware start of each day (the first interval start).
    interval : pandas.Timedelta
        The averaging interval.
    latitude, longitude : float
        Site position [degree].
    search : pandas.Timedelta
        Largest lag tried, both ways.
    step : pandas.Timedelta
        Lag spacing; rounded so that it divides the interval.

    Returns
    -------
    lags : numpy.ndarray, shape (n_lags,)
        Candidate lags [min]; lag tau compares radiation stamped t with the potential
        radiation at t - tau.
    corr : numpy.ndarray, shape (n_days, n_lags)
        Pearson correlation per day and lag.
    potential0 : numpy.ndarray, shape (n_days, n_per_day)
        The interval-mean potential radiation at the stamps (lag 0) [W m-2].

    Notes
    -----
    The interval-mean potential radiation (``pipeline.solar``) is evaluated once on a grid
    of spacing ``step`` that covers each day padded by ``search``; every lag then indexes
    that grid, so the cost grows with the number of days, not days times lags.
    """
    from . import solar  # lazily: pipeline.solar is a sibling stage module

    radiation = np.asarray(radiation, dtype=float)
    n_days, n_per_day = radiation.shape
    m = max(int(round(interval / step)), 1)  # grid points per interval
    step = interval / m
    s = int(round(search / step))  # grid points per search span
    lags = (np.arange(2 * s + 1) - s) * (step / pd.Timedelta(minutes=1))
    n_grid = (n_per_day - 1) * m + 2 * s + 1
    if n_days == 0:
        return lags, np.empty((0, lags.size)), np.empty((0, n_per_day))
    offsets = pd.to_timedelta(np.arange(n_grid) * step.value - s * step.value, unit="ns")
    grid_times = pd.DatetimeIndex(
        (day_starts.repeat(n_grid)) + np.tile(offsets.to_numpy(), n_days))
    pot = np.asarray(solar.interval_mean_potential_radiation(grid_times, interval, latitude, longitude),
                     dtype=float).reshape(n_days, n_grid)
    i = np.arange(n_per_day)[:, None]
    k = np.arange(2 * s + 1)[None, :]
    jidx = i * m + 2 * s - k  # time = day_start + i*interval - lag_k = grid[jidx]
    p = pot[:, jidx]  # (n_days, n_per_day, n_lags)
    w = np.isfinite(radiation)[:, :, None]
    r = np.where(w, radiation[:, :, None], 0.0)
    n = w.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        mr = r.sum(axis=1) / n
        mp = np.where(w, p, 0.0).sum(axis=1) / n
        dr = np.where(w, r - mr[:, None, :], 0.0)
        dp = np.where(w, p - mp[:, None, :], 0.0)
        corr = (dr * dp).sum(axis=1) / np.sqrt((dr ** 2).sum(axis=1) * (dp ** 2).sum(axis=1))
    potential0 = pot[:, np.arange(n_per_day) * m + s]
    return lags, corr, potential0


def offset_from_correlation(lags: np.ndarray, corr: np.ndarray) -> tuple[float, float]:
    """The lag of the correlation maximum, refined between grid points by a parabola.

    Parameters
    ----------
    lags : numpy.ndarray
        Equally spaced lags [min].
    corr : numpy.ndarray
        Correlation at each lag.

    Returns
    -------
    (offset, peak) : (float, float)
        Offset [min] and the correlation at the grid maximum; NaN offset when the maximum
        sits at the edge of the search range or the curve is all NaN.

    Notes
    -----
    Three-point parabolic interpolation of the peak: delta = (c[k-1] - c[k+1]) /
    (2 (c[k-1] - 2 c[k] + c[k+1])) grid steps (a standard sub-sample peak estimator).
    """
    corr = np.asarray(corr, dtype=float)
    if corr.size < 3 or not np.isfinite(corr).any():
        return float("nan"), float("nan")
    k = int(np.nanargmax(corr))
    peak = float(corr[k])
    if k == 0 or k == corr.size - 1 or not (np.isfinite(corr[k - 1]) and np.isfinite(corr[k + 1])):
        return float("nan"), peak
    c0, c1, c2 = corr[k - 1], corr[k], corr[k + 1]
    denom = c0 - 2 * c1 + c2
    delta = 0.5 * (c0 - c2) / denom if denom < 0 else 0.0
    spacing = float(lags[1] - lags[0])
    return float(lags[k] + delta * spacing), peak


def _offsets_from_correlation(lags: np.ndarray, corr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`offset_from_correlation` of every row of ``corr`` at once (the same arithmetic)."""
    corr = np.asarray(corr, dtype=float)
    n_rows, n_lags = corr.shape
    offset = np.full(n_rows, np.nan)
    peak = np.full(n_rows, np.nan)
    if n_lags < 3 or n_rows == 0:
        return offset, peak
    finite = np.isfinite(corr)
    has = finite.any(axis=1)
    k = np.argmax(np.where(finite, corr, -np.inf), axis=1)  # the first maximum, as numpy.nanargmax
    rows = np.arange(n_rows)
    peak = np.where(has, corr[rows, k], np.nan)
    inner = has & (k > 0) & (k < n_lags - 1)
    kk = np.clip(k, 1, n_lags - 2)
    c0, c1, c2 = corr[rows, kk - 1], corr[rows, kk], corr[rows, kk + 1]
    inner &= np.isfinite(c0) & np.isfinite(c2)
    with np.errstate(invalid="ignore", divide="ignore"):
        denom = c0 - 2 * c1 + c2
        delta = np.where(denom < 0, 0.5 * (c0 - c2) / denom, 0.0)
    spacing = float(lags[1] - lags[0])
    offset = np.where(inner, lags[kk] + delta * spacing, np.nan)
    return offset, peak


def _roughness(x: np.ndarray) -> np.ndarray:
    """Sum of |second differences| over the range of each row (scale- and shift-free)."""
    if x.shape[0] == 0:
        return np.empty(0)
    d2 = np.abs(np.diff(x, n=2, axis=1))
    with _warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        _warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN days give NaN, which fails the test
        rng = np.nanmax(x, axis=1) - np.nanmin(x, axis=1)
        return np.nansum(d2, axis=1) / rng


def detect_clock_steps(dates, offsets, *, threshold: float, min_days: int) -> list[dict]:
    """Steps in a series of daily clock offsets, by binary segmentation.

    Parameters
    ----------
    dates : sequence of datetime-like
        Clear days, sorted.
    offsets : array_like
        Their clock offsets [min].
    threshold : float
        Smallest step reported [min].
    min_days : int
        Fewest clear days on each side of a step.

    Returns
    -------
    list of dict
        ``{"after": last day before, "before": first day after, "size_minutes": float}``
        sorted by date (a reset happened between ``after`` and ``before``).

    Notes
    -----
    The split minimising the two-segment sum of squares is taken; it is kept when the
    medians of the two sides differ by at least ``threshold`` (robust to a single odd
    day); both sides are then searched again.
    """
    dates = list(dates)
    x = np.asarray(offsets, dtype=float)
    steps: list[dict] = []

    def split(lo: int, hi: int) -> None:
        seg = x[lo:hi]
        n = seg.size
        if n < 2 * min_days:
            return
        csum = np.cumsum(seg)
        csq = np.cumsum(seg ** 2)
        best, best_p = np.inf, None
        for p in range(min_days, n - min_days + 1):
            left_sse = csq[p - 1] - csum[p - 1] ** 2 / p
            rs, rq = csum[-1] - csum[p - 1], csq[-1] - csq[p - 1]
            right_sse = rq - rs ** 2 / (n - p)
            if left_sse + right_sse < best:
                best, best_p = left_sse + right_sse, p
        if best_p is None:
            return
        size = float(np.median(seg[best_p:]) - np.median(seg[:best_p]))
        if abs(size) < threshold:
            return
        steps.append({"after": dates[lo + best_p - 1], "before": dates[lo + best_p], "size_minutes": size,
                      "_pos": lo + best_p})
        split(lo, lo + best_p)
        split(lo + best_p, hi)

    split(0, x.size)
    steps.sort(key=lambda d: d["_pos"])
    return steps


def clock_drift(days_since_start, offsets, segment) -> float:
    """Pooled within-segment slope of clock offset against time [min per day].

    Parameters
    ----------
    days_since_start : array_like
        Time of each daily offset [day].
    offsets : array_like
        Daily clock offsets [min].
    segment : array_like of int
        Segment (between clock steps) of each offset; each is centred on its own mean so a
        step does not count as drift.
    """
    t = np.asarray(days_since_start, dtype=float)
    y = np.asarray(offsets, dtype=float)
    seg = np.asarray(segment)
    df = pd.DataFrame({"t": t, "y": y, "s": seg})
    dt = df["t"] - df.groupby("s")["t"].transform("mean")
    dy = df["y"] - df.groupby("s")["y"].transform("mean")
    sxx = float((dt ** 2).sum())
    if sxx <= 0:
        return float("nan")
    return float((dt * dy).sum() / sxx)


# ---------------------------------------------------------------------------
# flat lines
# ---------------------------------------------------------------------------

def longest_flat_run(values: np.ndarray) -> int:
    """Length (intervals) of the longest run of identical consecutive finite values.

    A run of one value counts 1; NaN breaks a run; 0 for an all-NaN input.
    """
    x = np.asarray(values, dtype=float)
    if x.size == 0 or not np.isfinite(x).any():
        return 0
    same = np.concatenate([[False], (x[1:] == x[:-1]) & np.isfinite(x[1:])])
    # run id increases wherever a value differs from its predecessor
    run_id = np.cumsum(~same)
    counts = np.bincount(run_id[np.isfinite(x)])
    return int(counts.max()) if counts.size else 0


def _group_max(values: np.ndarray, codes: np.ndarray, n_groups: int) -> np.ndarray:
    """Largest value per group, NaN ignored (NaN for a group without a value)."""
    out = np.full(n_groups, -np.inf)
    np.fmax.at(out, codes, np.asarray(values, dtype=float))
    return np.where(np.isneginf(out), np.nan, out)


def _weekly_median(x: np.ndarray, use: np.ndarray, week_code: np.ndarray, n_weeks: int,
                   min_values: int) -> list:
    """Median of ``x[use]`` per week (None below ``min_values`` values), as numpy.median
    computes it: the middle value, or the mean of the two middle values."""
    sel = np.flatnonzero(use)
    order = np.lexsort((x[sel], week_code[sel]))  # by week, then by value
    values = x[sel][order]
    counts = np.bincount(week_code[sel], minlength=n_weeks)
    start = np.concatenate(([0], np.cumsum(counts)[:-1]))
    out = []
    for k in range(n_weeks):
        c = int(counts[k])
        if c < max(int(min_values), 1):
            out.append(None)
            continue
        lo, hi = start[k] + (c - 1) // 2, start[k] + c // 2
        out.append(float((values[lo] + values[hi]) / 2.0))
    return out


def _weekly_longest_flat_run(x: np.ndarray, week: np.ndarray, n_weeks: int) -> np.ndarray:
    """:func:`longest_flat_run` of every week at once; ``x`` and ``week`` in time order
    within each week and grouped by week (a run never continues into the next week)."""
    x = np.asarray(x, dtype=float)
    finite = np.isfinite(x)
    same = np.zeros(x.size, dtype=bool)
    same[1:] = (x[1:] == x[:-1]) & finite[1:] & (week[1:] == week[:-1])
    run_id = np.cumsum(~same) - 1
    counts = np.bincount(run_id[finite], minlength=int(run_id[-1]) + 1 if x.size else 0)
    best = np.zeros(n_weeks, dtype=np.int64)
    if x.size:
        first_of_run = np.flatnonzero(~same)
        np.maximum.at(best, week[first_of_run], counts)
    return best


# ---------------------------------------------------------------------------
# the stage
# ---------------------------------------------------------------------------

def assess_health(frame: pd.DataFrame, flags: pd.DataFrame, site, rules: dict, *,
                  now: pd.Timestamp | None = None) -> StageResult:
    """Weekly clock and sensor-health diagnostics.

    Parameters
    ----------
    frame, flags : pandas.DataFrame
        The working frame and flags after QC. Uses ``is_day`` and ``snow_or_frozen`` when
        present.
    site : SiteInfo
        Position, elevation and interval.
    rules : dict
        The rule set; thresholds in ``[health]``.
    now : pandas.Timestamp, optional
        Time of the run, for "days since the last data" (default: the end of the record).

    Returns
    -------
    StageResult
        columns: ``suspect_clock`` (bool; intervals in weeks whose clock offset exceeds
        ``clock_offset_suspect``); summary: ``health`` (weeks, clock, albedo jumps, days
        since last data, findings, counts) and ``suspect_clock_weeks`` (list of ISO weeks).
    """
    from . import solar

    cfg = _health_rules(rules)
    index = frame.index
    n = len(index)
    interval = site.interval
    per_day = int(round(pd.Timedelta(days=1) / interval))
    lat, lon = float(site.latitude), float(site.longitude)
    local = index.tz_localize(None) if index.tz is not None else index
    day = local.normalize()
    day_code, day_values = pd.factorize(day)  # the ISO week of each distinct day, not of each interval
    week_of_day, week_uniques = pd.factorize(_iso_week(pd.DatetimeIndex(day_values)))
    week_code = week_of_day[day_code]  # weeks numbered in order of appearance
    week_labels = [str(w) for w in week_uniques]
    n_weeks = len(week_labels)
    # positions of each week's intervals (ascending), once: index arrays, not one boolean mask
    # of the whole record per week (that costs weeks × intervals in time and memory)
    order = np.argsort(week_code, kind="stable")
    weeks_in_order = bool(np.all(np.diff(week_code) >= 0))  # each week one run of intervals: order is 1, 2, …
    bounds = np.searchsorted(week_code[order], np.arange(len(week_labels) + 1))
    in_week = {wk: order[bounds[k]:bounds[k + 1]] for k, wk in enumerate(week_labels)}
    findings: list[dict] = []
    warnings: list[str] = []

    def finding(check, wk, severity, message):
        findings.append({"check": check, "week": wk, "severity": severity, "message": " ".join(message.split())})

    pot0 = np.asarray(solar.interval_mean_potential_radiation(index, interval, lat, lon), dtype=float)
    clear_sky = np.asarray(solar.clear_sky_radiation(pot0, float(site.elevation_m)), dtype=float)
    frozen = (frame["snow_or_frozen"].fillna(False).to_numpy(dtype=bool)
              if "snow_or_frozen" in frame else np.zeros(n, dtype=bool))
    if "is_day" in frame:
        is_day = frame["is_day"].fillna(False).to_numpy(dtype=bool)
    elif "rg" in frame:
        rg_acc = _accepted(frame, flags, "rg")
        is_day = np.where(np.isfinite(rg_acc), rg_acc > 20.0, pot0 > 0)  # 20 W m-2, common practice
    else:
        is_day = pot0 > 0

    weeks: dict[str, dict] = {}
    day_text = np.datetime_as_string(day_values.to_numpy(), unit="D")
    for wk in week_labels:
        sel = in_week[wk]
        weeks[wk] = {"week": wk, "start": str(day_text[day_code[sel[0]]]),
                     "end": str(day_text[day_code[sel[-1]]]), "n_intervals": int(sel.size)}

    # ------------------------------------------------------------------ clock
    rad_var = "rg" if "rg" in frame and np.isfinite(_accepted(frame, flags, "rg")).any() else (
        "rn" if "rn" in frame else None)
    search = duration(cfg["clock_search"])
    step = duration(cfg["clock_search_step"])
    suspect_minutes = _minutes(cfg["clock_offset_suspect"])
    daily_offsets: list[dict] = []
    steps: list[dict] = []
    drift_per_week = None
    if rad_var is not None and n >= per_day:
        rad = _accepted(frame, flags, rad_var, ignore=_CLOCK_IGNORES)
        # whole local days only
        counts = np.bincount(day_code, minlength=len(day_values))
        first_of_day = np.full(len(day_values), n, dtype=np.int64)
        np.minimum.at(first_of_day, day_code, np.arange(n))
        whole = np.flatnonzero(counts == per_day)
        order_days = np.argsort(day_values[whole], kind="stable")  # sorted by date
        full_days = pd.DatetimeIndex(day_values[whole[order_days]])
        first_pos = first_of_day[whole[order_days]]
        rows = first_pos[:, None] + np.arange(per_day)[None, :]
        day_rad = rad[rows] if len(full_days) else np.empty((0, per_day))
        day_pot = pot0[rows] if len(full_days) else np.empty((0, per_day))
        coverage = np.isfinite(day_rad).mean(axis=1) if len(full_days) else np.empty(0)
        candidate = (coverage >= float(cfg["clock_min_day_coverage"])) & (np.nanmax(day_pot, axis=1, initial=0) > 0)
        if rad_var == "rg":
            with np.errstate(invalid="ignore", divide="ignore"):
                clearness = np.nansum(np.where(day_pot > 0, day_rad, 0), axis=1) / day_pot.sum(axis=1)
            candidate &= clearness >= float(cfg["clear_min_clearness"])
        with np.errstate(invalid="ignore", divide="ignore"):
            rough = _roughness(day_rad) / _roughness(day_pot)
        candidate &= rough <= float(cfg["clear_max_roughness"])
        cand_idx = np.flatnonzero(candidate)
        starts = index[first_pos[cand_idx]] if cand_idx.size else index[:0]
        lags, corr, _ = daily_lag_correlation(day_rad[cand_idx], starts, interval, lat, lon,
                                              search=search, step=step)
        day_offsets, day_peaks = _offsets_from_correlation(lags, corr)
        full_day_text = np.datetime_as_string(full_days.to_numpy(), unit="D")
        for j, d in enumerate(cand_idx):
            off, peak = day_offsets[j], day_peaks[j]
            if peak >= float(cfg["clear_min_correlation"]) and math.isfinite(off):
                daily_offsets.append({"date": str(full_day_text[d]), "offset_minutes": off,
                                      "correlation": peak, "_day": full_days[d], "_row": j})
        # steps and drift across the clear days
        if daily_offsets:
            d_dates = [o["date"] for o in daily_offsets]
            d_off = np.array([o["offset_minutes"] for o in daily_offsets])
            steps = detect_clock_steps(d_dates, d_off, threshold=_minutes(cfg["clock_step"]),
                                       min_days=int(cfg["clock_step_min_days"]))
            seg = np.zeros(len(daily_offsets), dtype=int)
            for st in steps:
                seg[st["_pos"]:] += 1
            for o, s_ in zip(daily_offsets, seg):
                o["segment"] = int(s_)
            clear_days = pd.DatetimeIndex([o["_day"] for o in daily_offsets])
            t_days = ((clear_days - clear_days[0]) / pd.Timedelta(days=1)).to_numpy(dtype=float)
            if len(daily_offsets) >= int(cfg["clock_drift_min_days"]) and np.ptp(t_days) >= 7:
                drift_per_week = _num(clock_drift(t_days, d_off, seg) * 7.0)
            # per-week offsets: the mean correlation curve of the week's clear days
            day_week = _iso_week(clear_days)
            rows_by_week: dict[str, list[int]] = {}
            for o, w_ in zip(daily_offsets, day_week):
                rows_by_week.setdefault(w_, []).append(o["_row"])
            for wk in week_labels:
                rows_wk = rows_by_week.get(wk, [])
                info = weeks[wk]
                info["n_clear_days"] = len(rows_wk)
                info["clock_offset_minutes"] = None
                info["clock_offset_inferred"] = False
                if rows_wk:
                    off, _ = offset_from_correlation(lags, np.nanmean(corr[rows_wk], axis=0))
                    info["clock_offset_minutes"] = _num(off, 2)
            # weeks without a clear day inherit the offset of the step-free segment around them
            # (seg is non-decreasing: each segment is a run of consecutive clear days)
            seg_ids, seg_start, seg_size = np.unique(seg, return_index=True, return_counts=True)
            seg_meds = [float(np.median(d_off[a_:a_ + c_])) for a_, c_ in zip(seg_start, seg_size)]
            clear_dates = clear_days.to_numpy()
            seg_first = clear_dates[seg_start]
            seg_last = clear_dates[seg_start + seg_size - 1]
            for wk in week_labels:
                info = weeks[wk]
                if info["clock_offset_minutes"] is not None:
                    continue
                first = np.datetime64(info["start"], "ns")
                last = np.datetime64(info["end"], "ns")
                for k_seg in range(seg_ids.size):
                    if seg_size[k_seg] >= 3 and seg_first[k_seg] <= first and last <= seg_last[k_seg]:
                        info["clock_offset_minutes"] = _num(seg_meds[k_seg], 2)
                        info["clock_offset_inferred"] = True
        for o in daily_offsets:
            o["offset_minutes"] = _num(o["offset_minutes"], 2)
            o["correlation"] = _num(o["correlation"], 4)
            o.pop("_day", None)
            o.pop("_row", None)
    else:
        warnings.append("clock check skipped: neither rg nor rn, or less than one whole day of data")
    for wk in week_labels:
        weeks[wk].setdefault("n_clear_days", 0)
        weeks[wk].setdefault("clock_offset_minutes", None)
        weeks[wk].setdefault("clock_offset_inferred", False)

    suspect_weeks = []
    for wk in week_labels:
        off = weeks[wk]["clock_offset_minutes"]
        if off is None:
            continue
        how = "inferred from the clear days around this week" if weeks[wk]["clock_offset_inferred"] else \
            f"from {weeks[wk]['n_clear_days']} clear day(s)"
        if abs(off) > suspect_minutes:
            suspect_weeks.append(wk)
            direction = "ahead of" if off > 0 else "behind"
            finding("clock_offset", wk, "act",
                    f"Logger clock about {abs(off):.0f} min {direction} solar time ({how}, using {rad_var}). "
                    f"Check and set the logger clock; for the affected period add a [[history]] entry with "
                    f"correct = {{ <variable> = {{ shift_minutes = {-off:.0f} }} }} for the logger's variables.")
        else:
            finding("clock_offset", wk, "ok", f"Logger clock within {suspect_minutes:.0f} min of solar time "
                    f"(offset {off:+.1f} min, {how}).")
    for st in steps:
        wk = _iso_week(pd.DatetimeIndex([pd.Timestamp(st["before"])]))[0]
        finding("clock_step", wk, "act",
                f"Logger clock jumped by {st['size_minutes']:+.0f} min between {st['after']} and {st['before']} "
                f"(a clock reset at a site visit?). Record the reset in the site history.")
    if drift_per_week is not None and abs(drift_per_week) > _minutes(cfg["clock_drift_per_week"]):
        finding("clock_drift", week_labels[-1], "watch",
                f"Logger clock drifts by {drift_per_week:+.1f} min per week. Synchronise the logger clock "
                f"(time server or GPS) at the next visit.")
    suspect_clock = np.isin(np.array(week_labels, dtype=object), suspect_weeks)[week_code] if n else \
        np.zeros(0, dtype=bool)

    # ------------------------------------------------------------------ midday signs
    day_max_pot = _group_max(pot0, day_code, len(day_values))[day_code]
    midday = (pot0 >= float(cfg["midday_fraction"]) * day_max_pot) & (
        day_max_pot >= float(cfg["midday_min_potential"])) & ~frozen
    min_iv = int(cfg["midday_min_intervals"])
    rn_min = float(cfg["midday_min_net_radiation"])
    signs = {v: _accepted(frame, flags, v) for v in ("rn", "g", "h", "le") if v in frame}
    week_medians = {v: _weekly_median(x, midday & np.isfinite(x), week_code, n_weeks, min_iv)
                    for v, x in signs.items()}
    for k_wk, wk in enumerate(week_labels):
        med = {v: week_medians[v][k_wk] for v in signs}
        weeks[wk]["midday_median"] = {v: _num(m, 1) for v, m in med.items()}
        rn_med = med.get("rn")
        if rn_med is not None:
            if rn_med < 0:
                finding("midday_sign_rn", wk, "act",
                        f"Net radiation is negative at midday (median {rn_med:.0f} W m-2). Check the net "
                        "radiometer's wiring and orientation (upper and lower sensors swapped?).")
            else:
                finding("midday_sign_rn", wk, "ok", f"Net radiation positive at midday (median {rn_med:.0f} W m-2).")
        sunny = rn_med is not None and rn_med >= rn_min
        if not sunny:
            continue
        for v, text_bad, severity in (
                ("g", "Ground heat flux is negative at midday (median {m:.0f} W m-2) although the sun is up: "
                      "the heat-flux plates may be wired or installed upside down. Check the plates.", "act"),
                ("h", "Sensible heat flux is negative at midday (median {m:.0f} W m-2). Unless the field is "
                      "irrigated (advection), check the sonic anemometer's orientation and temperature sign.", "watch"),
                ("le", "Latent heat flux is negative at midday (median {m:.0f} W m-2). Check the gas analyser's "
                       "sign convention and the flux processing settings.", "act")):
            m = med.get(v)
            if m is None:
                continue
            if m < 0:
                finding(f"midday_sign_{v}", wk, severity, text_bad.format(m=m))
            else:
                finding(f"midday_sign_{v}", wk, "ok", f"{v} positive at midday (median {m:.0f} W m-2).")

    # ------------------------------------------------------------------ rg vs clear-sky envelope
    if "rg" in frame:
        rg = _accepted(frame, flags, "rg")
        rg_max = _group_max(rg, day_code, len(day_values))
        cs_max = _group_max(np.where(np.isfinite(rg), clear_sky, np.nan), day_code, len(day_values))
        ok_day = cs_max >= float(cfg["midday_min_potential"]) * 0.5
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio_day = np.where(ok_day, rg_max / cs_max, np.nan)
        ratio_week = _group_max(ratio_day, week_of_day, n_weeks)
        low, high = float(cfg["rg_envelope_low"]), float(cfg["rg_envelope_high"])
        persist = int(cfg["rg_envelope_weeks"])
        run_low = run_high = 0
        for k_wk, wk in enumerate(week_labels):
            r = ratio_week[k_wk]
            weeks[wk]["rg_clear_sky_ratio"] = _num(r, 3)
            if not np.isfinite(r):
                continue
            run_low = run_low + 1 if r < low else 0
            run_high = run_high + 1 if r > high else 0
            if run_high:
                finding("rg_clear_sky", wk, "act" if run_high >= persist else "watch",
                        f"Global radiation reaches {r:.2f} times the clear-sky value: check the pyranometer's "
                        "calibration factor in the logger program (and its levelling).")
            elif run_low >= persist:
                finding("rg_clear_sky", wk, "act",
                        f"Global radiation has stayed below {low:.2f} of the clear-sky value for {run_low} weeks "
                        f"(best day {r:.2f}): clean the pyranometer dome and check its levelling.")
            elif run_low:
                finding("rg_clear_sky", wk, "ok",
                        f"No clear day this week (best day {r:.2f} of clear sky); watch the next weeks.")
            else:
                finding("rg_clear_sky", wk, "ok", f"Global radiation meets the clear-sky envelope (best day {r:.2f}).")

    # ------------------------------------------------------------------ night RH
    if "rh" in frame:
        rh = frame["rh"].to_numpy(dtype=float)
        if "rh" in flags:
            rh = np.where((flags["rh"].to_numpy() & flagbits.MISSING) != 0, np.nan, rh)
        precip = _accepted(frame, flags, "precip") if "precip" in frame else None
        for wk in week_labels:
            sel = in_week[wk][~is_day[in_week[wk]]]
            vals = rh[sel]
            vals = vals[np.isfinite(vals)]
            if vals.size < 4:
                continue
            top = float(np.quantile(vals, 0.99))  # robust to a single glitch
            weeks[wk]["night_rh_max"] = _num(top, 1)
            rain = float(np.nansum(precip[in_week[wk]])) if precip is not None else None
            if top > float(cfg["rh_night_max_high"]):
                finding("night_rh_max", wk, "act",
                        f"Relative humidity reaches {top:.0f} % at night: the humidity sensor reads high; "
                        "check or replace the sensor (calibration drift or a wet element).")
            elif top < float(cfg["rh_night_max_low"]):
                humid = rain is not None and rain >= float(cfg["rh_humid_week_precip"])
                finding("night_rh_max", wk, "act" if humid else "watch",
                        f"Night-time relative humidity never exceeded {top:.0f} % this week"
                        + (f" although {rain:.1f} mm of rain fell" if humid else "")
                        + ": the humidity sensor may be drifting low; compare it with a reference at the next visit.")
            else:
                finding("night_rh_max", wk, "ok", f"Night-time RH reaches {top:.0f} %.")

    # ------------------------------------------------------------------ albedo jumps
    albedo_jumps: list[dict] = []
    if "rg" in frame and "sw_out" in frame:
        rg = _accepted(frame, flags, "rg")
        sw = _accepted(frame, flags, "sw_out")
        use = midday & (rg >= float(cfg["albedo_min_rg"])) & np.isfinite(rg) & np.isfinite(sw)
        # per day (integer day codes, in time order: the working frame's index is sorted)
        sums = pd.DataFrame({"rg": np.where(use, rg, 0.0), "sw": np.where(use, sw, 0.0),
                             "n": use.astype(int)}).groupby(day_code).sum()  # pandas' compensated sums
        alb = pd.Series(np.where(sums["n"].to_numpy() >= 2, (sums["sw"] / sums["rg"]).to_numpy(), np.nan),
                        index=pd.DatetimeIndex(day_values[sums.index.to_numpy()])).sort_index().dropna()
        if alb.size:
            ref = alb.rolling(duration(cfg["albedo_window"]), closed="left").median()
            jump = ((alb - ref).abs() > float(cfg["albedo_jump"])).to_numpy()
            alb_values, ref_values = alb.to_numpy(), ref.to_numpy()
            alb_text = np.datetime_as_string(alb.index.to_numpy(), unit="D")
            alb_week_code = week_of_day[day_values.get_indexer(alb.index)]
            for i in np.flatnonzero(jump).tolist():
                albedo_jumps.append({"date": str(alb_text[i]), "albedo": _num(alb_values[i], 3),
                                     "previous": _num(ref_values[i], 3), "_week": int(alb_week_code[i])})
            alb_week = alb.groupby(alb_week_code).median().to_dict()
            for k_wk, wk in enumerate(week_labels):
                if k_wk in alb_week:
                    weeks[wk]["albedo_median"] = _num(alb_week[k_wk], 3)
                js = [j for j in albedo_jumps if j["_week"] == k_wk]
                if js:
                    text = "; ".join(f"{j['date']}: {j['previous']:.2f} -> {j['albedo']:.2f}" for j in js)
                    finding("albedo_jump", wk, "watch",
                            f"Midday albedo jumped ({text}). Unless the surface changed (mowing, harvest, snow), "
                            "check the levelling and the view of the downward-facing pyranometer.")
                elif k_wk in alb_week:
                    finding("albedo_jump", wk, "ok", f"Midday albedo steady (median {alb_week[k_wk]:.2f}).")
            for j in albedo_jumps:
                del j["_week"]

    # ------------------------------------------------------------------ flat lines
    watch_n = duration(cfg["flat_line_watch"]) / interval
    act_n = duration(cfg["flat_line_act"]) / interval
    for v in _FLAT_LINE_VARIABLES:
        if v not in frame:
            continue
        x = frame[v].to_numpy(dtype=float, copy=True)
        if v in flags:
            x[(flags[v].to_numpy() & flagbits.MISSING) != 0] = np.nan
        if v in _DAYTIME_ONLY:
            x[~is_day] = np.nan
        if v == "rh":
            # near-saturated air (fog, dew) legitimately holds a sensor at its plateau for hours
            x[x >= 95.0] = np.nan
        if v == "vpd":
            x[x <= 0.01] = np.nan  # likewise 0 kPa
        flat_flagged = (flags[v].to_numpy() & flagbits.FLAT_LINE) != 0 if v in flags else np.zeros(n, bool)
        runs = _weekly_longest_flat_run(x if weeks_in_order else x[order],
                                        week_code if weeks_in_order else week_code[order], n_weeks)
        # hours as Timedelta arithmetic gives them: (run · interval [ns]) / 1 h [ns]
        run_hours = ((runs * interval.value) / pd.Timedelta(hours=1).value).tolist()
        n_flagged = np.bincount(week_code[flat_flagged], minlength=n_weeks)
        for k_wk, wk in enumerate(week_labels):
            weeks[wk].setdefault("longest_flat_line_hours", {})[v] = round(run_hours[k_wk], 2)
        for k_wk in np.flatnonzero((runs >= act_n) | (runs >= watch_n)).tolist():
            wk, run, hours, n_flag = week_labels[k_wk], int(runs[k_wk]), run_hours[k_wk], int(n_flagged[k_wk])
            severity = "act" if run >= act_n else "watch"
            finding("flat_line", wk, severity,
                    f"{v} repeated the same value for {hours:.1f} h"
                    + (f" ({n_flag} intervals flagged as flat line)" if n_flag else "")
                    + ": the sensor or its logger channel may be stuck; check it.")

    # ------------------------------------------------------------------ closure per week
    if all(v in frame for v in ("h", "le", "rn")):
        with _warnings.catch_warnings():
            _warnings.simplefilter("ignore")
            a = available_energy(frame, flags, rules=rules, site=site).to_numpy(dtype=float)
        t = _accepted(frame, flags, "h") + _accepted(frame, flags, "le")
        ok = np.isfinite(a) & np.isfinite(t) & ~frozen
        per_week = pd.DataFrame({"a": np.where(ok, a, 0.0), "t": np.where(ok, t, 0.0)}).groupby(
            week_code).sum()  # pandas' compensated sums, as before
        sum_a, sum_t = per_week["a"].to_numpy(), per_week["t"].to_numpy()
        n_ok = np.bincount(week_code[ok], minlength=n_weeks)
        n_all = np.bincount(week_code, minlength=n_weeks)
        lo, hi = (float(v) for v in cfg["closure_ebr_range"])
        ebr_series = []
        for k, wk in enumerate(week_labels):
            if n_ok[k] < float(cfg["closure_min_coverage"]) * n_all[k] or sum_a[k] <= 0:
                weeks[wk]["ebr"] = None
                continue
            e = float(sum_t[k] / sum_a[k])
            weeks[wk]["ebr"] = _num(e, 3)
            ebr_series.append((k, e))
            if not (lo <= e <= hi):
                finding("closure", wk, "watch",
                        f"Energy-balance ratio {e:.2f} this week, outside {lo:.2f}-{hi:.2f}. Check the net "
                        "radiometer and heat-flux plates, and the gas analyser's window and calibration.")
            else:
                finding("closure", wk, "ok", f"Energy-balance ratio {e:.2f}.")
        n_trend = int(cfg["closure_drift_weeks"])
        recent = ebr_series[-n_trend:]
        if len(recent) >= 4:
            from scipy import stats

            xs = np.array([k for k, _ in recent], dtype=float)
            ys = np.array([e for _, e in recent])
            fit = stats.linregress(xs, ys)
            if fit.pvalue < float(cfg["closure_drift_p"]) and abs(fit.slope) >= float(cfg["closure_drift_per_week"]):
                finding("closure_drift", week_labels[-1], "watch",
                        f"The energy-balance ratio has been {'rising' if fit.slope > 0 else 'falling'} by "
                        f"{abs(fit.slope):.3f} per week over the last {len(recent)} weeks. A sensor is drifting: "
                        "check the gas analyser calibration, the net radiometer domes and the plates.")

    # ------------------------------------------------------------------ days since the last data
    end = index[-1] + interval if n else None
    ref_time = pd.Timestamp(now) if now is not None else end
    if ref_time is not None and ref_time.tzinfo is None and index.tz is not None:
        ref_time = ref_time.tz_localize(index.tz)
    since: dict[str, float | None] = {}
    if n:
        ref_week = _iso_week(pd.DatetimeIndex([ref_time.tz_convert(index.tz).tz_localize(None)
                                               if index.tz is not None else ref_time]))[0]
        w_days = duration(cfg["data_gap_watch"]) / pd.Timedelta(days=1)
        a_days = duration(cfg["data_gap_act"]) / pd.Timedelta(days=1)
        for v in flags.columns:
            if v not in frame:
                continue
            acc = np.flatnonzero(flags[v].to_numpy() == 0)
            if acc.size == 0:
                since[v] = None
                finding("days_since_last_data", ref_week, "act", f"{v} has no accepted value in the record: "
                        "check the sensor and its logger channel.")
                continue
            last_end = index[acc[-1]] + interval
            d = (ref_time - last_end) / pd.Timedelta(days=1)
            since[v] = _num(d, 2)
            if d > w_days:
                finding("days_since_last_data", ref_week, "act" if d > a_days else "watch",
                        f"No accepted {v} for {d:.1f} days (last at {last_end.isoformat()}): check the sensor, "
                        "its cable and the logger channel.")

    counts = {s: sum(1 for f in findings if f["severity"] == s) for s in ("ok", "watch", "act")}
    health = {
        "radiation_for_clock": rad_var,
        "weeks": [weeks[wk] for wk in week_labels],
        "clock": {
            "daily_offsets": daily_offsets,
            "steps": [{k: (_num(v, 2) if k == "size_minutes" else v) for k, v in s_.items() if not k.startswith("_")}
                      for s_ in steps],
            "drift_minutes_per_week": _num(drift_per_week, 3) if drift_per_week is not None else None,
            "suspect_weeks": suspect_weeks,
        },
        "albedo_jumps": albedo_jumps,
        "days_since_last_data": since,
        "findings": findings,
        "counts": counts,
    }
    columns = pd.DataFrame({"suspect_clock": suspect_clock}, index=index)
    return StageResult(columns=columns, summary={"health": health, "suspect_clock_weeks": suspect_weeks},
                       warnings=warnings)
