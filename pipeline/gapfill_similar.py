"""Vectorised similar-conditions and mean-diurnal-course filling (Reichstein et al. 2005).

A missing value at interval *i* is replaced by the mean of the accepted values at
intervals *j* whose meteorological drivers are close to those at *i* (within the
published tolerances) and that lie within a time window around *i*; the standard
deviation of those values is the fill's uncertainty. When too few such intervals exist
the window widens and the set of drivers shrinks, ending with the mean diurnal course
(the same time of day, ±1 h, over neighbouring days), following the order of
Reichstein et al. (2005), with look-up tables after Falge et al. (2001).

Windows are time spans (``pandas.Timedelta``), converted to counts of intervals for the
site's own interval, so 30- and 60-minute sites get the same windows in time.

Vectorisation (no Python loop over gaps; loops run over the steps of the sequence and
over chunks of gaps only):

- steps with drivers (the look-up steps): accepted candidates are grouped into cells by
  the classes of rg and ta (classes a hair wider than the tolerance) and sorted by time
  within each cell, so that every gap's candidates lie in 3 × 3 cells, each a contiguous
  run in time found by :func:`numpy.searchsorted`; these runs are expanded into one flat
  (ragged) index array for all gaps of a chunk, the exact tolerance tests select the
  similar samples, and :func:`numpy.bincount` gives count, mean and spread per gap;
- mean-diurnal-course steps: every gap gets a row of candidate offsets (a 2-D integer
  array, gaps × candidates at the same time of day ±1 h), gathered with numpy fancy
  indexing and reduced along the rows.

Both give exactly the candidate sets of the plain definition (tested against a per-gap
loop over timestamps to 1e-12).

Method names written to ``<flux>_fill_method`` by this module:

``similar_conditions``
    rg, ta and vpd all within tolerance, window ±7 d, ±14 d, then growing.
``similar_conditions_radiation_only``
    rg within tolerance only, window ±7 d, then growing.
``mean_diurnal_course``
    same time of day ±1 h; the same day first (±0 d), then ±1 d, then growing.

Quality classes (the window and fallback used, mapped to CONTRACT §4):

=====================================  ===========  ===========  =========
method                                 good         fair         poor
=====================================  ===========  ===========  =========
similar_conditions                     window ≤14 d window ≤28 d wider
similar_conditions_radiation_only      —            window ≤28 d wider
mean_diurnal_course                    window ≤1 d  window ≤7 d  wider
=====================================  ===========  ===========  =========

after Reichstein et al. (2005) classes A/B/C (bounds from memory, see REFERENCES §2).
A value filled from drivers that were themselves filled is lowered one class.

References
----------
Reichstein, M. et al. (2005). On the separation of net ecosystem exchange into
assimilation and ecosystem respiration. Global Change Biology 11, 1424–1439.
Falge, E. et al. (2001). Gap filling strategies for defensible annual sums of net
ecosystem exchange. Agricultural and Forest Meteorology 107, 43–69.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

__all__ = [
    "SimilarityStep",
    "similarity_steps",
    "diurnal_steps",
    "step_offsets",
    "fill_similar_conditions",
    "QUALITY_ORDER",
    "lower_quality",
]

#: quality classes, best first (CONTRACT §4)
QUALITY_ORDER = ("good", "fair", "poor")


_ALL_DRIVERS = ("rg", "ta", "vpd")


@dataclass(frozen=True)
class SimilarityStep:
    """One step of the filling sequence.

    Attributes
    ----------
    method : str
        Name written to ``_fill_method``.
    window : pandas.Timedelta
        Half-width of the time window (±window).
    drivers : tuple of str
        Drivers that must lie within tolerance (empty for the mean diurnal course).
    diurnal : bool
        True: candidates only at the same time of day ±1 h on each day of the window.
    """

    method: str
    window: pd.Timedelta
    drivers: tuple[str, ...]
    diurnal: bool = False

    @property
    def quality(self) -> str:
        days = self.window / pd.Timedelta(days=1)
        if self.method == "similar_conditions":
            return "good" if days <= 14 else "fair" if days <= 28 else "poor"
        if self.method == "similar_conditions_radiation_only":
            return "fair" if days <= 28 else "poor"
        return "good" if days <= 1 else "fair" if days <= 7 else "poor"


def similarity_steps(widest_window: pd.Timedelta, *, radiation: bool = True) -> list[SimilarityStep]:
    """The filling sequence of Reichstein et al. (2005), then growing windows.

    (1) rg, ta, vpd within ±7 d, then ±14 d; (2) rg only within ±7 d; (3) mean diurnal
    course (±1 h) on the same day, then ±1 d; then, repeated with windows growing by 7 d
    until ``widest_window``: all drivers ±(14 + 7k) d, rg only ±(7 + 7k) d, mean diurnal
    course ±7k d.

    Parameters
    ----------
    widest_window : pandas.Timedelta
        The largest half-width tried.
    radiation : bool
        False when the site has no radiation driver: steps that need rg are left out.
    """
    d = pd.Timedelta(days=1)
    steps = [
        SimilarityStep("similar_conditions", 7 * d, _ALL_DRIVERS),
        SimilarityStep("similar_conditions", 14 * d, _ALL_DRIVERS),
        SimilarityStep("similar_conditions_radiation_only", 7 * d, ("rg",)),
        SimilarityStep("mean_diurnal_course", 0 * d, (), True),
        SimilarityStep("mean_diurnal_course", 1 * d, (), True),
    ]
    k = 1
    while True:
        grown = [
            SimilarityStep("similar_conditions", (14 + 7 * k) * d, _ALL_DRIVERS),
            SimilarityStep("similar_conditions_radiation_only", (7 + 7 * k) * d, ("rg",)),
            SimilarityStep("mean_diurnal_course", 7 * k * d, (), True),
        ]
        grown = [s for s in grown if s.window <= widest_window]
        if not grown:
            break
        steps.extend(grown)
        k += 1
    if not radiation:
        steps = [s for s in steps if "rg" not in s.drivers]
    return steps


def diurnal_steps(widest_window: pd.Timedelta) -> list[SimilarityStep]:
    """Mean-diurnal-course steps only: ±7 d, then growing by 7 d (for met drivers)."""
    d = pd.Timedelta(days=1)
    out = []
    k = 1
    while 7 * k * d <= widest_window:
        out.append(SimilarityStep("mean_diurnal_course", 7 * k * d, (), True))
        k += 1
    return out


def step_offsets(step: SimilarityStep, interval: pd.Timedelta) -> np.ndarray:
    """Candidate index offsets of a step for a site with the given interval.

    Plain window: every offset with ``|offset · interval| <= window``. Diurnal window: every
    offset ``day · n_per_day + j`` with ``|day| <= window in days`` and ``|j · interval| <= 1 h``.
    """
    interval = pd.Timedelta(interval)
    if not step.diurnal:
        half = int(step.window // interval)
        return np.arange(-half, half + 1, dtype=np.int64)
    per_day = pd.Timedelta(days=1) // interval
    hour = int(pd.Timedelta(hours=1) // interval)  # ±1 h, Reichstein et al. 2005
    days = int(step.window // pd.Timedelta(days=1))
    day_off = np.arange(-days, days + 1, dtype=np.int64) * per_day
    within = np.arange(-hour, hour + 1, dtype=np.int64)
    return (day_off[:, None] + within[None, :]).ravel()


def lower_quality(quality: np.ndarray, lower: np.ndarray) -> np.ndarray:
    """Lower ``quality`` (object array of good/fair/poor) one class where ``lower`` is true."""
    out = np.asarray(quality, dtype=object).copy()
    lower = np.asarray(lower, dtype=bool)
    for better, worse in (("fair", "poor"), ("good", "fair")):  # order matters: fair first
        out[lower & (out == better)] = worse
    return out


def _reduce_step(y, drivers, tolerances, gaps, offsets, min_samples, chunk_elements):
    """Mean, sample sd and count over the candidates of one step for every gap."""
    n = y.size
    m = offsets.size
    mean = np.full(gaps.size, np.nan)
    sd = np.full(gaps.size, np.nan)
    count = np.zeros(gaps.size, dtype=np.int64)
    rows = max(1, int(chunk_elements // max(m, 1)))
    for start in range(0, gaps.size, rows):  # loop over chunks of gaps, not gaps
        g = gaps[start:start + rows]
        idx = g[:, None] + offsets[None, :]
        ok = (idx >= 0) & (idx < n)
        np.clip(idx, 0, n - 1, out=idx)
        yv = y[idx]
        ok &= np.isfinite(yv)
        for drv, tol in zip(drivers, tolerances):
            ok &= np.abs(drv[idx] - drv[g][:, None]) <= tol
        cnt = ok.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            mu = np.where(ok, yv, 0.0).sum(axis=1) / cnt
            dev = np.where(ok, yv - mu[:, None], 0.0)
            var = (dev * dev).sum(axis=1) / (cnt - 1)
        enough = cnt >= min_samples
        sl = slice(start, start + g.size)
        mean[sl] = np.where(enough, mu, np.nan)
        sd[sl] = np.where(enough, np.sqrt(np.where(cnt > 1, var, np.nan)), np.nan)
        count[sl] = cnt
    return mean, sd, count


def _reduce_step_bucketed(y, drivers, tolerances, gaps, half, min_samples, chunk_elements):
    """Like :func:`_reduce_step` for a plain window with drivers, enumerating likely candidates only.

    Accepted candidates are grouped into cells by the class of the first two drivers
    (classes a hair wider than the tolerance, so that a similar value lies in the same or
    a neighbouring class) and sorted by time within each cell. A gap's candidates then lie
    in 3 × 3 cells, in each in one contiguous run of time (the window), found by
    :func:`numpy.searchsorted`. The runs of all gaps of a chunk are expanded into one flat
    (ragged) index array, the exact tolerance tests (the same comparisons as
    :func:`_reduce_step`) select the candidates, and :func:`numpy.bincount` sums per gap.
    """
    n = y.size
    mean = np.full(gaps.size, np.nan)
    sd = np.full(gaps.size, np.nan)
    count = np.zeros(gaps.size, dtype=np.int64)
    finite = np.isfinite(y)
    for d in drivers:
        finite &= np.isfinite(d)
    cand = np.flatnonzero(finite)
    live = np.ones(gaps.size, dtype=bool)
    for d in drivers:
        live &= np.isfinite(d[gaps])
    live_pos = np.flatnonzero(live)
    if cand.size == 0 or live_pos.size == 0:
        return mean, sd, count
    g_all = gaps[live_pos]
    cell_c = np.zeros(cand.size, dtype=np.int64)
    base_g = np.zeros(g_all.size, dtype=np.int64)
    neighbours = np.zeros(1, dtype=np.int64)
    mult = 1
    for d, t in zip(drivers[:2], tolerances[:2]):
        width = max(float(t), 1e-12) * (1.0 + 1e-9)  # a hair wider than the tolerance
        cc = np.floor(d[cand] / width).astype(np.int64)
        cg = np.floor(d[g_all] / width).astype(np.int64)
        low = min(cc.min(), cg.min()) - 1
        span = max(cc.max(), cg.max()) + 1 - low + 1
        cell_c += (cc - low) * mult
        base_g += (cg - low) * mult
        neighbours = (neighbours[:, None] + np.arange(-1, 2, dtype=np.int64) * mult).ravel()
        mult *= span
    key = cell_c * (n + 1) + cand  # by cell, then time
    order = np.argsort(key, kind="stable")
    key_sorted = key[order]
    cand_sorted = cand[order].astype(np.int32 if n < 2**31 else np.int64)
    cells = base_g[:, None] + neighbours[None, :]  # gaps × 3^k
    first = np.maximum(g_all - half, 0)[:, None]
    last = np.minimum(g_all + half, n - 1)[:, None]
    lo = np.searchsorted(key_sorted, (cells * (n + 1) + first).ravel(), side="left")
    hi = np.searchsorted(key_sorted, (cells * (n + 1) + last).ravel(), side="right")
    lengths = (hi - lo).reshape(cells.shape)
    per_gap = lengths.sum(axis=1)
    # chunks of gaps whose candidate lists together stay below chunk_elements
    bounds = np.searchsorted(np.cumsum(per_gap), np.arange(1, per_gap.sum() // max(chunk_elements, 1) + 1)
                             * chunk_elements)
    edges = np.unique(np.concatenate(([0], bounds, [g_all.size])))
    lo = lo.reshape(cells.shape)
    for a, b in zip(edges[:-1], edges[1:]):  # loop over chunks of gaps, not gaps
        if b <= a:
            continue
        ln = lengths[a:b].ravel()
        total = int(ln.sum())
        if total == 0:
            continue
        owner_seg = np.repeat(np.arange(b - a, dtype=np.int32), neighbours.size)
        seg_start = np.cumsum(ln) - ln
        flat = np.arange(total, dtype=np.int64)
        flat += np.repeat(lo[a:b].ravel() - seg_start, ln)
        owner = np.repeat(owner_seg, ln)
        j = cand_sorted[flat]
        g = g_all[a:b]
        ok = None
        for drv, tol in zip(drivers, tolerances):
            diff = drv[j]
            diff -= drv[g][owner]
            np.abs(diff, out=diff)
            ok = diff <= tol if ok is None else np.logical_and(ok, diff <= tol, out=ok)
        j, owner = j[ok], owner[ok]
        cnt = np.bincount(owner, minlength=b - a)
        yv = y[j]
        with np.errstate(invalid="ignore", divide="ignore"):
            mu = np.bincount(owner, weights=yv, minlength=b - a) / cnt
            dev = yv - mu[owner]
            var = np.bincount(owner, weights=dev * dev, minlength=b - a) / (cnt - 1)
        enough = cnt >= min_samples
        pos = live_pos[a:b]
        mean[pos] = np.where(enough, mu, np.nan)
        sd[pos] = np.where(enough, np.sqrt(np.where(cnt > 1, var, np.nan)), np.nan)
        count[pos] = cnt
    return mean, sd, count


def fill_similar_conditions(target, drivers: dict, to_fill, *, interval, tolerances: dict,
                            steps: list[SimilarityStep], min_samples: int = 2,
                            drivers_filled: dict | None = None,
                            chunk_elements: int = 2_000_000):
    """Fill ``target`` where ``to_fill`` by the similar-conditions sequence (vectorised).

    Parameters
    ----------
    target : array_like of float
        The accepted measurements (NaN where not accepted), any unit.
    drivers : dict of str to array_like
        ``rg`` [W m-2], ``ta`` [degC], ``vpd`` [kPa]: complete (filled) driver series.
    to_fill : array_like of bool
        Intervals to estimate.
    interval : pandas.Timedelta
        The site's averaging interval.
    tolerances : dict of str to float
        Half-widths of similarity per driver (Reichstein et al. 2005: rg 50 W m-2,
        ta 2.5 degC, vpd 0.5 kPa).
    steps : list of SimilarityStep
        The sequence, e.g. :func:`similarity_steps`.
    min_samples : int
        Fewest similar samples for a fill; with 1, a fill from a single sample has sd NaN
        (a spread needs 2).
    drivers_filled : dict of str to array_like of bool, optional
        Where each driver was itself filled: lowers the quality one class.
    chunk_elements : int
        Bound on gaps × candidates held in memory at once.

    Returns
    -------
    estimate, sd : numpy.ndarray
        Mean and sample standard deviation (ddof 1) of the similar samples; NaN where
        not filled or not requested.
    method, quality : numpy.ndarray of object
        Method name and quality class per interval ('' where not filled).
    window_days : numpy.ndarray
        Half-width of the window used, days (NaN where not filled).
    """
    y = np.asarray(target, dtype=float)
    n = y.size
    drv = {k: np.asarray(v, dtype=float) for k, v in drivers.items()}
    filled_flags = {k: np.asarray(v, dtype=bool) for k, v in (drivers_filled or {}).items()}
    estimate = np.full(n, np.nan)
    sd = np.full(n, np.nan)
    method_code = np.full(n, -1, dtype=np.int16)  # index into `steps`
    quality_code = np.full(n, -1, dtype=np.int8)  # index into QUALITY_ORDER
    window_days = np.full(n, np.nan)
    remaining = np.flatnonzero(np.asarray(to_fill, dtype=bool))
    for k, step in enumerate(steps):
        if remaining.size == 0:
            break
        d_arrays = [drv[name] for name in step.drivers]
        tols = [float(tolerances[name]) for name in step.drivers]
        if step.drivers and not step.diurnal:
            half = int(step.window // pd.Timedelta(interval))
            mu, s, _ = _reduce_step_bucketed(y, d_arrays, tols, remaining, half,
                                             max(int(min_samples), 1), chunk_elements)
        else:
            offsets = step_offsets(step, interval)
            mu, s, _ = _reduce_step(y, d_arrays, tols, remaining, offsets, max(int(min_samples), 1),
                                    chunk_elements)
        done = np.isfinite(mu)
        idx = remaining[done]
        estimate[idx] = mu[done]
        sd[idx] = s[done]
        method_code[idx] = k
        lower = np.zeros(idx.size, dtype=bool)
        for name in step.drivers:
            if name in filled_flags:
                lower |= filled_flags[name][idx]
        # lowering one class = one step down QUALITY_ORDER, 'poor' stays 'poor'
        quality_code[idx] = np.minimum(QUALITY_ORDER.index(step.quality) + lower, len(QUALITY_ORDER) - 1)
        window_days[idx] = step.window / pd.Timedelta(days=1)
        remaining = remaining[~done]
    names = np.array([st.method for st in steps] + [""], dtype=object)
    classes = np.array(list(QUALITY_ORDER) + [""], dtype=object)
    method = names[method_code]  # code -1 picks the trailing ''
    quality = classes[quality_code]
    return estimate, sd, method, quality, window_days
