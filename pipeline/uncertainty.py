"""Uncertainty of LE and H and of the ET and energy totals built from them.

Entry point: :func:`assess_uncertainty` (after the closure and filling stages). Three parts:

1. **Random measurement error** of accepted LE and H by the paired-observation (24-h
   differencing) approach of Hollinger and Richardson (2005) and Richardson et al. (2006):
   two accepted values of the same flux one day apart under similar conditions differ
   (almost) only by their random errors, so the spread of the differences measures the
   error. The error's dependence on the flux magnitude is fitted as sd = a + b·|flux|
   (their finding: the error grows with the flux). Gives ``<flux>_random_sd``.
2. **Filling error** of every filled value from the filling stage's spread (``_fill_sd``),
   its cross-validated skill per method (``fill_skill.by_method``) and, for fills of reduced
   quality, the flux's own spread at that time of day. Gives ``<flux>_fill_error_sd``
   and ``<flux>_total_sd`` (the error sd of every value of ``<flux>_filled``).
3. **Propagation to totals** by Monte Carlo (seeded): daily, monthly, calendar-year and
   whole-record ET [mm] and LE and H energy [MJ m-2] with sd and a central interval, beside
   the closure bracket (ET from LE closed by the Bowen-ratio correction of the closure
   stage; Wilson et al. 2002: the unclosed balance moves ET by far more than the random
   band).

In the site job it runs after the filling stage (``pipeline.process``)::

    result = assess_uncertainty(state.frame, state.flags, state.site, state.rules,
                                filling=state.columns["filling"], fill_summary=state.summary,
                                closure=state.columns.get("closure"))

``result.summary["totals"]`` (a list of records) is the table of ``totals.parquet``.

Pairing rule (:func:`pair_mask`)
--------------------------------
Interval i is paired with i + 24 h when

- both values are accepted (flag 0: any rejected value, including history exclusions,
  bit 64, forms no pair);
- global radiation differs by at most ``tolerance_rg`` (35 W m-2: the photon-flux
  tolerance of 75 µmol m-2 s-1 of Hollinger and Richardson 2005 [from memory] converted
  with about 2.1 µmol J-1 of global radiation [from memory: PAR ≈ 0.47 Rg, 4.57 µmol J-1]);
  air temperature by at most ``tolerance_ta`` (3 degC) and wind speed by at most
  ``tolerance_wind`` (1 m s-1) (Hollinger and Richardson 2005, Richardson et al. 2006
  [from memory]); vapour pressure deficit by at most ``tolerance_vpd`` (0.5 kPa,
  the similar-conditions tolerance of Reichstein et al. 2005; our addition for LE and H,
  whose true value depends on VPD more than a CO2 flux does). A tolerance of a driver
  the site lacks is dropped (a warning says so); a missing driver value forms no pair;
- no rain (precip above ``[wet] rain_above``, or precip missing) and no irrigation in
  any interval from i − ``rain_lead`` to i + 24 h: a wetted surface changes the true flux,
  and a canopy stays wet for hours after the rain (``rain_lead``, common practice);
- no site-history exclusion (bit 64 on any variable) between i and i + 24 h, and the same
  canopy height, measurement height and analyser at both ends (a cut or a move between
  the two changes the true flux).

Estimator of the error from the pair differences
------------------------------------------------
With δ = x1 − x2 = ε1 − ε2 and ε1, ε2 independent Laplace (double-exponential) errors of
scale β (sd σ = √2·β; Hollinger and Richardson 2005 found the errors Laplace-distributed),
the density of δ is (1/4β)(1 + |δ|/β)·exp(−|δ|/β) (derived here), so

- E|δ| = 1.5·β = (3/(2√2))·σ, i.e. σ = (2√2/3)·mean|δ| ≈ 0.943·mean|δ|;
- P(|δ| > y) = (1 + y/(2β))·exp(−y/β), whose median is 1.1462·β, i.e.
  σ = median|δ| / 0.8105.

(The shortcut β ≈ mean|δ|/√2, σ ≈ mean|δ|, treats δ/√2 as Laplace and overstates σ by
6 %; the Gaussian σ = sd(δ)/√2 weighs outliers far more.) The pairs are binned by the
magnitude of their mean, |m| = |x1 + x2|/2 (quantile bins of about 50 pairs, 5 to 20
bins); each bin's σ comes from the MEDIAN |δ|: pairs whose true fluxes differ (the
conditions are only similar: dew, soil drying, morning transitions) form a heavy tail that
inflated the mean-based σ by about 20 % on invented records and hardly moves the median.
Then sd = a + b·|m| is fitted to the bins by non-negative weighted least squares (weights
√n/σ). With ``fit_by_sign`` true, positive and negative fluxes get their own (a, b) when
each side has ``min_pairs_by_sign`` pairs; both are always reported. Fewer than
``min_pairs`` pairs: no model (warning), and the band leaves the random error out.

Error of the filled values
--------------------------
sd_fill = max(``_fill_sd``, cross-validated RMSE of the filling method). For fills of
reduced quality (``fair`` or ``poor``, or made from drivers filled by a mean diurnal course,
a neighbouring site or a mean clearness) the flux's spread at the
same time of day (±1 interval of clock time, ±``time_of_day_window`` days, accepted values)
is a third candidate: such a fill knows little more than the mean diurnal course, whose
error is that spread (Falge et al. 2001's fallback). The cross-validation hides measured
values, so its RMSE contains the random error of the hidden values too: the filling error
is conservative by that much. The maximum (not a sum) is taken because each candidate
estimates the same error.

Monte Carlo assumptions
-----------------------
- measured values: independent Laplace errors, sd from the fitted model at |value|;
- filled values: Gaussian errors with sd_fill, correlated within each contiguous run of
  filled values (a gap) as AR(1) with the correlation time ``fill_error_correlation_time``
  (φ = exp(−Δt/τ)); independent between gaps and independent of the measured values.
  τ = ∞ makes a gap's errors fully correlated (one draw per gap);
- LE and H errors are independent of each other;
- values not filled (gaps beyond the maximum fill length) contribute nothing: a period with
  such gaps has ``complete`` false and its total understates ET;
- the closure is not part of the band: it is a systematic error, reported as a bracket
  [ET, ET closed]; ET closed gets its own band from the same draws scaled by the closure
  factor (``et_closed_mm_p025``, ``et_closed_mm_p975``);
- fills are assumed unbiased. Fills of rain gaps (open-path analysers) from drier similar
  conditions miss the evaporation of intercepted water: a one-sided error outside the band.
  ``filled_after_rain_fraction`` counts such intervals and the summary cautions above
  ``wet_fill_caution_fraction``.
Totals are the estimates; the interval is estimate + the 2.5 and 97.5 % quantiles of the
simulated error sums (``interval_level``).

References
----------
Hollinger, D. Y. and Richardson, A. D. (2005). Uncertainty in eddy covariance measurements
    and its application to physiological models. Tree Physiology 25, 873–885.
Richardson, A. D. et al. (2006). A multi-site analysis of random error in tower-based
    measurements of carbon and energy fluxes. Agric. For. Meteorol. 136, 1–18.
Wilson, K. et al. (2002). Energy balance closure at FLUXNET sites. Agric. For. Meteorol.
    113, 223–243.
Reichstein, M. et al. (2005). Global Change Biology 11, 1424–1439.
Falge, E. et al. (2001). Agric. For. Meteorol. 107, 43–69.
Twine, T. E. et al. (2000). Agric. For. Meteorol. 103, 279–300.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
from scipy.optimize import nnls
from scipy.signal import lfilter

from . import flags as flagbits
from . import micromet
from .errors import RuleError, warn
from .rules import duration, standard_rules
from .stage import StageResult

__all__ = [
    "LAPLACE_MEAN_ABS_DIFFERENCE",
    "LAPLACE_MEDIAN_ABS_DIFFERENCE",
    "standard_laplace",
    "uncertainty_rules",
    "pair_mask",
    "fit_random_error",
    "random_error_sd",
    "time_of_day_spread",
    "fill_error_sd",
    "gap_labels",
    "simulate_errors",
    "assess_uncertainty",
    "COLUMN_METADATA",
]

#: unit and long name of every column this stage adds (intervals, daily, totals)
COLUMN_METADATA: dict[str, dict[str, str]] = {
    "le_random_sd": {"unit": "W m-2", "long_name": "random error sd of measured LE (24-h paired observations; NaN where filled)"},
    "h_random_sd": {"unit": "W m-2", "long_name": "random error sd of measured H (24-h paired observations; NaN where filled)"},
    "le_fill_error_sd": {"unit": "W m-2", "long_name": "error sd of filled LE (NaN where measured)"},
    "h_fill_error_sd": {"unit": "W m-2", "long_name": "error sd of filled H (NaN where measured)"},
    "le_total_sd": {"unit": "W m-2", "long_name": "error sd of le_filled: random where measured, filling where filled"},
    "h_total_sd": {"unit": "W m-2", "long_name": "error sd of h_filled: random where measured, filling where filled"},
    "le_error_gap": {"unit": "1", "long_name": "label of the contiguous run of filled LE (-1 where measured or not filled)"},
    "et_mm_sd": {"unit": "mm", "long_name": "sd of the day's ET (random and filling errors, Monte Carlo)"},
    "et_mm_p025": {"unit": "mm", "long_name": "2.5 % quantile of the day's ET (random and filling errors)"},
    "et_mm_p975": {"unit": "mm", "long_name": "97.5 % quantile of the day's ET (random and filling errors)"},
    "et_closed_mm": {"unit": "mm", "long_name": "ET from LE closed by the Bowen-ratio correction (closure bracket)"},
    "et_random_sd_mm": {"unit": "mm", "long_name": "part of et_mm_sd from the random error of measured values"},
    "et_fill_sd_mm": {"unit": "mm", "long_name": "part of et_mm_sd from the filling error"},
    "le_energy_mj": {"unit": "MJ m-2", "long_name": "LE energy total from le_filled"},
    "le_energy_mj_sd": {"unit": "MJ m-2", "long_name": "sd of the LE energy total"},
    "h_energy_mj": {"unit": "MJ m-2", "long_name": "H energy total from h_filled"},
    "h_energy_mj_sd": {"unit": "MJ m-2", "long_name": "sd of the H energy total"},
    "filled_fraction": {"unit": "1", "long_name": "share of the period's intervals with filled LE"},
    "long_gap_fraction": {"unit": "1", "long_name": "share of the period's intervals in LE gaps beyond the maximum fill length"},
    "missing_fraction": {"unit": "1", "long_name": "share of the period's intervals without le_filled (the total understates ET)"},
    "closure_corrected_fraction": {"unit": "1", "long_name": "share of intervals with the closure stage's own factor (else the month's median)"},
    "et_closed_mm_p025": {"unit": "mm", "long_name": "2.5 % quantile of the closed ET (random and filling errors scaled by the closure factor)"},
    "et_closed_mm_p975": {"unit": "mm", "long_name": "97.5 % quantile of the closed ET"},
    "filled_after_rain_fraction": {"unit": "1", "long_name": "share of intervals with filled LE during or within rain_lead after rain or irrigation"},
}

#: E|ε1 − ε2| / σ for independent Laplace errors of sd σ: 3/(2√2) (derived in the module notes)
LAPLACE_MEAN_ABS_DIFFERENCE = 3.0 / (2.0 * math.sqrt(2.0))

_FLUXES = ("le", "h")
_REDUCED_QUALITY = ("fair", "poor")
#: driver fills that carry little of the interval's own weather (short interpolations do)
_FILLED_DRIVER_METHODS = ("neighbour_site_regression", "mean_diurnal_course", "mean_clearness")


def uncertainty_rules(rules: dict | None) -> dict:
    """The ``[uncertainty]`` table of ``rules`` over the standard's (keys absent in ``rules``)."""
    out = dict(standard_rules().get("uncertainty", {}))
    out.update((rules or {}).get("uncertainty", {}) or {})
    return out


# ---------------------------------------------------------------------------------------
# pairing and the random-error model
# ---------------------------------------------------------------------------------------


def _window_any(mask: np.ndarray, lag: int) -> np.ndarray:
    """For each i < n − lag: any ``mask`` in [i, i + lag] (cumulative sums, vectorised)."""
    c = np.concatenate(([0], np.cumsum(np.asarray(mask, dtype=np.int64))))
    n = mask.size
    i = np.arange(max(n - lag, 0))
    return (c[i + lag + 1] - c[i]) > 0


def _within_lead(mask: np.ndarray, lead: int) -> np.ndarray:
    """True where ``mask`` is true in the interval itself or in the ``lead`` intervals before it."""
    c = np.concatenate(([0], np.cumsum(np.asarray(mask, dtype=np.int64))))
    k = np.arange(mask.size)
    return (c[k + 1] - c[np.maximum(k - int(lead), 0)]) > 0


def pair_mask(x, *, lag: int, drivers: dict | None = None, tolerances: dict | None = None,
              blocked=None, same=None) -> np.ndarray:
    """Which intervals i form a valid pair (i, i + lag) for the paired-observation method.

    Parameters
    ----------
    x : array_like
        Accepted flux values (NaN where not accepted) [W m-2].
    lag : int
        Steps between the two members (one day of intervals).
    drivers : dict of str to array_like, optional
        Driver values (NaN where not accepted) on the same grid.
    tolerances : dict of str to float, optional
        Largest |difference| of each driver between the two members (same units).
    blocked : array_like of bool, optional
        True where an interval stops every pair that spans it (rain, irrigation, history
        exclusions); the window is [i, i + lag] inclusive.
    same : dict of str to array_like, optional
        Site parameters that must be equal at both members (canopy height, ...).

    Returns
    -------
    numpy.ndarray of bool
        Length ``len(x)``; True at i where the pair (i, i + lag) is formed (False in the
        last ``lag`` positions).

    References
    ----------
    Hollinger and Richardson (2005); Richardson et al. (2006) (tolerances: module notes).
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    out = np.zeros(n, dtype=bool)
    if lag <= 0 or n <= lag:
        return out
    ok = np.isfinite(x[:-lag]) & np.isfinite(x[lag:])
    for name, tol in (tolerances or {}).items():
        if drivers is None or name not in drivers:
            continue
        d = np.asarray(drivers[name], dtype=float)
        with np.errstate(invalid="ignore"):
            ok &= np.abs(d[lag:] - d[:-lag]) <= float(tol)  # NaN compares False: no pair
    if blocked is not None:
        ok &= ~_window_any(np.asarray(blocked, dtype=bool), lag)
    for values in (same or {}).values():
        v = np.asarray(values)
        ok &= v[:-lag] == v[lag:]
    out[:-lag] = ok
    return out


def _laplace_difference_median() -> float:
    """median|ε1 − ε2| / σ for independent Laplace errors of sd σ (derived in the module notes).

    P(|δ| > y) = (1 + y/(2β))·exp(−y/β); the median u·β solves (1 + u/2)·e^(−u) = 1/2.
    """
    from scipy.optimize import brentq

    u = brentq(lambda v: (1.0 + 0.5 * v) * math.exp(-v) - 0.5, 0.5, 2.0)
    return u / math.sqrt(2.0)


#: median|ε1 − ε2| / σ for independent Laplace errors: 1.1462/√2 ≈ 0.8105 (derived)
LAPLACE_MEDIAN_ABS_DIFFERENCE = _laplace_difference_median()


def _fit_bins(m_abs: np.ndarray, d_abs: np.ndarray, n_bins: int):
    """σ per quantile bin of |m| from the median |δ|, and a, b ≥ 0 fitted to the bins."""
    edges = np.unique(np.quantile(m_abs, np.linspace(0.0, 1.0, int(n_bins) + 1)))
    which = np.clip(np.searchsorted(edges, m_abs, side="right") - 1, 0, max(edges.size - 2, 0))
    n_k = max(edges.size - 1, 1)
    counts = np.bincount(which, minlength=n_k)
    start = np.concatenate(([0], np.cumsum(counts)))
    order = np.argsort(which, kind="stable")  # by bin; the pairs keep their order within a bin
    m_by_bin, d_by_bin = m_abs[order], d_abs[order]
    d_sorted = d_abs[np.lexsort((d_abs, which))]  # by bin, then by |δ|: medians by position
    bins = []
    for k in range(n_k):
        a, c = int(start[k]), int(counts[k])
        if c >= 5:
            median = (d_sorted[a + (c - 1) // 2] + d_sorted[a + c // 2]) / 2.0  # as numpy.median
            bins.append({"flux_abs_mean": float(m_by_bin[a:a + c].mean()),
                         "sd": float(median / LAPLACE_MEDIAN_ABS_DIFFERENCE),
                         "sd_from_mean": float(d_by_bin[a:a + c].mean() / LAPLACE_MEAN_ABS_DIFFERENCE),
                         "n": c})
    if len(bins) < 2:
        return float("nan"), float("nan"), bins
    xb = np.array([b["flux_abs_mean"] for b in bins])
    sb = np.array([b["sd"] for b in bins])
    nb = np.array([b["n"] for b in bins], dtype=float)
    # the sd of a bin's estimate ∝ σ/√n: weights n/σ²
    w = np.sqrt(nb) / np.maximum(sb, 1e-6)
    coef, _ = nnls(np.column_stack([np.ones_like(xb), xb]) * w[:, None], sb * w)
    return float(coef[0]), float(coef[1]), bins


def fit_random_error(x1, x2, *, by_sign: bool = False, min_pairs: int = 100,
                     min_pairs_by_sign: int = 200, pairs_per_bin: int = 50) -> dict:
    """Fit sd = a + b·|flux| of the random error from paired observations.

    Parameters
    ----------
    x1, x2 : array_like
        The two members of each pair [W m-2] (same length; non-finite pairs are dropped).
    by_sign : bool, optional
        Use separate (a, b) for positive and negative pair means where each side has at
        least ``min_pairs_by_sign`` pairs. The sign fits are reported in any case.
    min_pairs : int, optional
        Fewest pairs for a model; fewer: ``a`` and ``b`` are None.
    pairs_per_bin : int, optional
        Pairs per quantile bin of |m| (5 to 20 bins).

    Returns
    -------
    dict
        ``a`` [W m-2], ``b`` [-], ``n_pairs``, ``estimator`` (text), ``positive`` and
        ``negative`` (each ``{"a", "b", "n_pairs"}`` or None), ``use_sign_fits`` (bool) and
        ``bins`` (list of ``{"flux_abs_mean", "sd", "sd_from_mean", "n"}``).

    Notes
    -----
    Pairs are binned by |m| = |x1 + x2|/2 (quantile bins); in each bin
    σ = median|x1 − x2| / 0.8105 (independent Laplace errors, module notes); then
    sd = a + b·|m| is fitted to the bins by non-negative weighted least squares (weights
    √n/σ). The median, not the mean, of |δ|: pairs whose true fluxes differ (the conditions
    are only similar) form a heavy tail that the mean follows and the median hardly does.
    ``sd_from_mean`` = (2√2/3)·mean|δ| is reported beside it.

    References
    ----------
    Hollinger and Richardson (2005); Richardson et al. (2006).
    """
    x1 = np.asarray(x1, dtype=float)
    x2 = np.asarray(x2, dtype=float)
    ok = np.isfinite(x1) & np.isfinite(x2)
    x1, x2 = x1[ok], x2[ok]
    m = 0.5 * (x1 + x2)
    d_abs = np.abs(x1 - x2)
    m_abs = np.abs(m)
    out = {"a": None, "b": None, "n_pairs": int(m.size),
           "estimator": "sd = a + b|flux| fitted to per-bin sd = median|x1 - x2|/0.8105 "
                        "(independent Laplace errors), weighted non-negative least squares",
           "positive": None, "negative": None, "use_sign_fits": False, "bins": []}
    if m.size < max(int(min_pairs), 10):
        return out

    def n_bins(k):
        return int(np.clip(k // max(int(pairs_per_bin), 5), 5, 20))

    a, b, bins = _fit_bins(m_abs, d_abs, n_bins(m.size))
    if not np.isfinite(a):
        return out
    out["a"], out["b"], out["bins"] = a, b, bins
    sides = {}
    for name, sel in (("positive", m >= 0), ("negative", m < 0)):
        if sel.sum() >= max(int(min_pairs), 10):
            sa, sb, _ = _fit_bins(m_abs[sel], d_abs[sel], n_bins(int(sel.sum())))
            if np.isfinite(sa):
                sides[name] = {"a": sa, "b": sb, "n_pairs": int(sel.sum())}
                out[name] = sides[name]
    out["use_sign_fits"] = bool(by_sign and all(
        name in sides and sides[name]["n_pairs"] >= int(min_pairs_by_sign)
        for name in ("positive", "negative")))
    return out


def random_error_sd(x, model: dict) -> np.ndarray:
    """Random-error sd [W m-2] of flux values ``x`` from a :func:`fit_random_error` model.

    NaN where ``x`` is NaN or the model has no fit.
    """
    x = np.asarray(x, dtype=float)
    if model.get("a") is None:
        return np.full(x.shape, np.nan)
    sd = model["a"] + model["b"] * np.abs(x)
    if model.get("use_sign_fits"):
        neg, pos = model["negative"], model["positive"]
        sd = np.where(x < 0, neg["a"] + neg["b"] * np.abs(x), pos["a"] + pos["b"] * np.abs(x))
    return np.where(np.isfinite(x), sd, np.nan)


# ---------------------------------------------------------------------------------------
# filling error
# ---------------------------------------------------------------------------------------


def time_of_day_spread(x, index: pd.DatetimeIndex, interval: pd.Timedelta, *, half_window_days: int,
                       min_values: int = 5) -> np.ndarray:
    """SD of accepted values at the same clock time (±1 interval), ±``half_window_days``.

    Parameters
    ----------
    x : array_like
        Accepted flux values (NaN elsewhere) [W m-2] on a regular grid.
    index : pandas.DatetimeIndex
        The grid (local clock time).
    interval : pandas.Timedelta
    half_window_days : int
        Days before and after.
    min_values : int, optional
        Fewest values for a spread (else NaN).

    Returns
    -------
    numpy.ndarray
        The spread [W m-2] at every interval: the error of a mean-diurnal-course estimate
        (Falge et al. 2001) of that interval.
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    per_day = int(pd.Timedelta(days=1) / interval)
    local = index.tz_localize(None) if index.tz is not None else index
    day0 = local[0].normalize() if n else pd.Timestamp(0)
    pos = np.asarray((local - day0) / interval, dtype=np.int64) if n else np.zeros(0, np.int64)
    days = int(pos[-1] // per_day) + 1 if n else 0
    grid = np.full((days, per_day), np.nan)
    grid[pos // per_day, pos % per_day] = x
    # ±1 interval of clock time: neighbouring columns (wrapping over midnight)
    shifted = [np.roll(grid, s, axis=1) for s in (-1, 0, 1)]
    vals = [np.where(np.isfinite(a), a, 0.0) for a in shifted]
    s1 = (vals[0] + vals[1]) + vals[2]
    s2 = (vals[0] * vals[0] + vals[1] * vals[1]) + vals[2] * vals[2]
    cnt = (np.isfinite(shifted[0]).astype(float) + np.isfinite(shifted[1])) + np.isfinite(shifted[2])
    w = 2 * int(half_window_days) + 1
    kernel = np.ones(w)

    def roll_days(a):
        """Each clock-time column summed over ±``half_window_days`` days (the days that exist)."""
        h = int(half_window_days)
        return np.array([np.convolve(col, kernel, mode="full")[h:h + a.shape[0]] for col in a.T]).T

    S1, S2 = roll_days(s1), roll_days(s2)
    # the counts are whole numbers: their window sums by differences of cumulative sums are exact
    h = int(half_window_days)
    c_cum = np.concatenate((np.zeros((1, per_day)), np.cumsum(cnt, axis=0)))
    top = np.minimum(np.arange(days) + h + 1, days)
    C = c_cum[top] - c_cum[np.maximum(np.arange(days) - h, 0)]
    with np.errstate(invalid="ignore", divide="ignore"):
        var = (S2 - S1 * S1 / C) / (C - 1.0)
    sd = np.where(C >= max(int(min_values), 2), np.sqrt(np.maximum(var, 0.0)), np.nan)
    return sd[pos // per_day, pos % per_day]


def _label_is(values, names) -> np.ndarray:
    """True where the label equals one of ``names`` (a missing label equals no name); a hashed
    look-up (:meth:`pandas.Series.isin`), not the sort of :func:`numpy.isin` on text."""
    return pd.Series(np.asarray(values, dtype=object), copy=False).isin(list(names)).to_numpy()


def fill_error_sd(fill_sd, method, quality, cv_rmse: dict, *, reduced=None, spread=None) -> np.ndarray:
    """Error sd of filled values [W m-2]: the largest of the available estimates.

    Parameters
    ----------
    fill_sd : array_like
        The filling stage's spread of the estimate (``<flux>_fill_sd``) [W m-2].
    method, quality : array_like of str
        ``<flux>_fill_method`` and ``<flux>_fill_quality``.
    cv_rmse : dict of str to float
        Cross-validated RMSE per fill method (``fill_skill.by_method[flux][m]["rmse"]``).
    reduced : array_like of bool, optional
        True for fills of reduced quality (besides ``fair`` and ``poor``): e.g. made from
        filled drivers.
    spread : array_like, optional
        The flux's time-of-day spread (:func:`time_of_day_spread`); used for fills of
        reduced quality.

    Returns
    -------
    numpy.ndarray
        NaN where the value is measured or not filled.
    """
    method = np.asarray(method, dtype=object)
    filled = ~_label_is(method, ("measured", "not_filled"))
    sd = np.asarray(fill_sd, dtype=float).copy()
    sd = np.where(np.isfinite(sd), sd, 0.0)
    rmse = np.zeros(method.size)
    for name, value in (cv_rmse or {}).items():
        if value is not None and np.isfinite(value):
            rmse[method == name] = float(value)
    if rmse[filled].min(initial=np.inf) == 0.0:  # a method the cross-validation did not see
        known = [float(v) for v in (cv_rmse or {}).values() if v is not None and np.isfinite(v)]
        if known:
            rmse = np.where(filled & (rmse == 0.0), max(known), rmse)
    out = np.maximum(sd, rmse)
    low = _label_is(quality, _REDUCED_QUALITY)
    if reduced is not None:
        low |= np.asarray(reduced, dtype=bool)
    if spread is not None:
        sp = np.asarray(spread, dtype=float)
        out = np.where(low & np.isfinite(sp), np.maximum(out, sp), out)
    return np.where(filled, out, np.nan)


# ---------------------------------------------------------------------------------------
# Monte Carlo propagation
# ---------------------------------------------------------------------------------------


def gap_labels(filled) -> np.ndarray:
    """Label of the contiguous run of filled values each interval belongs to (−1: none)."""
    filled = np.asarray(filled, dtype=bool)
    start = filled & ~np.concatenate(([False], filled[:-1]))
    lab = np.cumsum(start) - 1
    return np.where(filled, lab, -1)


def _gap_ar1(z: np.ndarray, filled: np.ndarray, phi: float, *, overwrite: bool = False) -> np.ndarray:
    """Unit-variance AR(1) along axis 0 over the filled positions, restarted at every gap.

    ``z`` holds standard-normal innovations (k × draws, k = filled positions in order).
    The recursion y_t = φ·y_{t−1} + √(1 − φ²)·z_t is run over the concatenated gaps with
    one :func:`scipy.signal.lfilter`; at a gap start the innovation has unit weight, and
    the state carried in from the previous gap, φ^(t − start + 1)·y_(start − 1), is
    subtracted (exact, since the carried part decays geometrically). ``overwrite`` lets the
    weighting of the innovations reuse ``z`` (a caller's fresh draws) instead of a copy.
    """
    pos = np.flatnonzero(filled)
    k = pos.size
    if k == 0:
        return z
    new_gap = np.ones(k, dtype=bool)
    new_gap[1:] = pos[1:] != pos[:-1] + 1
    if phi <= 0.0:
        return z
    c = np.where(new_gap, 1.0, math.sqrt(max(1.0 - phi * phi, 0.0)))
    if overwrite:
        z *= c[:, None]
    else:
        z = z * c[:, None]
    y = lfilter([1.0], [1.0, -phi], z, axis=0)
    starts = np.flatnonzero(new_gap)
    gid = np.cumsum(new_gap) - 1
    # the first gap carries nothing in; from the second gap on, subtract the carried state
    later = slice(starts[1], None) if starts.size > 1 else slice(k, None)
    offset = (np.arange(k) - starts[gid] + 1)[later]  # steps since the value before the gap start
    prev = (starts[gid] - 1)[later]
    with np.errstate(under="ignore"):
        decay = phi ** offset.astype(float)
    carried = y[prev]  # a copy (fancy index): taken before y changes
    carried *= decay[:, None]
    y[later] -= carried
    return y


def _ar1_matrix(filled: np.ndarray, phi: float, *, max_entries: int | None = None):
    """The sparse (k × k) matrix L of the restarted AR(1) of :func:`_gap_ar1`: y = L·z.

    L[t, s] = c_s·φ^(t − s) for filled positions s ≤ t in the same gap (c_s = 1 at a gap
    start, √(1 − φ²) elsewhere), zero otherwise. None when it would hold more than
    ``max_entries`` entries (Σ over gaps of len·(len + 1)/2: long gaps make it large).
    """
    from scipy import sparse

    pos = np.flatnonzero(filled)
    k = pos.size
    new_gap = np.ones(k, dtype=bool)
    new_gap[1:] = pos[1:] != pos[:-1] + 1
    starts = np.flatnonzero(new_gap)
    gid = np.cumsum(new_gap) - 1
    counts = np.arange(k) - starts[gid] + 1  # entries of row t: s = gap start … t
    if max_entries is not None and int(counts.sum()) > max_entries:
        return None
    c = np.where(new_gap, 1.0, math.sqrt(max(1.0 - phi * phi, 0.0)))
    rows = np.repeat(np.arange(k), counts)
    lag = np.arange(rows.size) - np.repeat(np.cumsum(counts) - counts, counts)  # t − s
    cols = rows - lag
    with np.errstate(under="ignore"):
        vals = c[cols] * phi ** lag.astype(float)
    out = sparse.csr_matrix((vals, (rows, cols)), shape=(k, k))
    out.eliminate_zeros()  # φ = 1: only the gap starts carry weight
    return out


#: the AR(1) of the filled values enters the sums through the weights (A = M·L, once per
#: call) when L holds at most k × draws / 8 entries and A at most this many times the entries
#: of M; else each block of draws is filtered (long gaps make L and A large)
_AR1_THROUGH_WEIGHTS_MAX_GROWTH = 4


#: elements per slab of :func:`standard_laplace`: each slab is finished while it is in cache
_SLAB_ELEMENTS = 1 << 16
#: shift that brings bit j of a 64-bit word to the sign position (bit 63)
_TO_SIGN_BIT = (63 - np.arange(64)).astype(np.uint64)
_SIGN_BIT = np.uint64(1 << 63)


def standard_laplace(rng: np.random.Generator, shape, scale=None, *, out: np.ndarray | None = None) -> np.ndarray:
    """Laplace(0, 1) draws (variance 2) as exponential magnitudes with random signs, times ``scale``.

    If E ~ Exp(1) and S = ±1 with probability ½ each, independent of E, then S·E has the
    density ½·exp(−|x|) (the Laplace distribution of scale 1). E is drawn by inversion of
    its distribution function, E = −ln(1 − U) with U uniform on [0, 1) from
    :meth:`numpy.random.Generator.random` (53-bit; 1 − U is exact and lies in (0, 1], so E
    is finite, at most 36.7). The signs are the bits of random 64-bit words (value i takes
    bit i mod 64 of word i div 64), set as the IEEE sign bit. Order of the draws: the sign
    words of the whole block, then U in C order. The block is finished slab by slab of
    rows while a slab is in cache (one uniform and a vectorised logarithm per value cost
    less than the ziggurat exponential of
    :meth:`numpy.random.Generator.standard_exponential` with a separate sign step).

    Parameters
    ----------
    rng : numpy.random.Generator
    shape : tuple of int
    scale : array_like, optional
        Multiplier, broadcast against ``shape`` (e.g. one per row); default 1.
    out : numpy.ndarray, optional
        C-contiguous float64 array of ``shape`` to fill (a caller's reused buffer).

    Returns
    -------
    numpy.ndarray
        float64 of ``shape``.

    References
    ----------
    Johnson, N. L., Kotz, S. and Balakrishnan, N. (1995). Continuous Univariate
    Distributions, vol. 2, 2nd ed., Wiley, ch. 24 (Laplace as a symmetrised exponential;
    chapter from memory). Devroye, L. (1986). Non-Uniform Random Variate Generation,
    Springer, ch. II.2 (the inversion method; from memory).
    """
    shape = tuple(np.atleast_1d(shape).tolist()) if not isinstance(shape, tuple) else shape
    if out is None:
        out = np.empty(shape)
    elif out.shape != shape or out.dtype != np.float64 or not out.flags.c_contiguous:
        raise ValueError("out must be a C-contiguous float64 array of the given shape")
    n = out.size
    if n == 0:
        return out * np.asarray(scale, dtype=float) if scale is not None else out
    words = np.frombuffer(rng.bytes(8 * ((n + 63) // 64)), dtype="<u8").astype(np.uint64, copy=False)
    rows = out.shape[0] if out.ndim >= 1 else 1
    flat = out.reshape(rows, -1)  # views: out is contiguous
    cols = flat.shape[1]
    word = flat.view(np.uint64)
    mult = None if scale is None else np.broadcast_to(np.asarray(scale, dtype=float), out.shape).reshape(rows, -1)
    # slabs of whole rows that start on a whole sign word (a multiple of 64 values)
    unit = 64 // math.gcd(cols, 64)
    step = max(unit, (_SLAB_ELEMENTS // cols) // unit * unit)
    sign = np.empty((-(-min(step, rows) * cols // 64), 64), dtype=np.uint64)
    for r0 in range(0, rows, step):
        r1 = min(rows, r0 + step)
        x = flat[r0:r1]
        rng.random(out=x)
        np.subtract(1.0, x, out=x)
        np.log(x, out=x)  # −E: ≤ 0 (ln 1 = +0.0)
        w0, w1 = r0 * cols // 64, -(-r1 * cols // 64)
        s = sign[:w1 - w0]
        np.left_shift(words[w0:w1, None], _TO_SIGN_BIT[None, :], out=s)
        np.bitwise_and(s, _SIGN_BIT, out=s)
        word[r0:r1] ^= s.reshape(-1)[:(r1 - r0) * cols].reshape(r1 - r0, cols)  # sign bit 1: −(−E) = E
        if mult is not None:
            x *= mult[r0:r1]
    return out


def _nested_source(groups: list[np.ndarray], n_groups: list[int]) -> list:
    """For each grouping, the nearest earlier grouping whose groups each lie within one of
    its groups (or in none), with the map of those groups to its own (−1: none); None
    when there is no such grouping. Its sums are then sums of the earlier one's sums."""
    out = []
    for i, g in enumerate(groups):
        found = None
        for j in range(i - 1, -1, -1):
            gj = groups[j]
            inside = gj >= 0
            if np.any(g[~inside] >= 0):
                continue  # an interval in one of i's groups but in none of j's
            mapping = np.full(n_groups[j], -1, dtype=np.int64)
            mapping[gj[inside]] = g[inside]
            if np.array_equal(mapping[gj[inside]], g[inside]):
                found = (j, mapping)
                break
        out.append(found)
    return out


def simulate_errors(sd, measured, filled, *, draws: int, seed: int, phi: float,
                    weights, groups: list[np.ndarray], chunk_elements: int = 4_000_000):
    """Monte Carlo sums of per-interval errors over groups of intervals.

    Parameters
    ----------
    sd : array_like
        Error sd of every interval [W m-2] (NaN or 0: no error).
    measured, filled : array_like of bool
        Measured values (independent Laplace errors) and filled values (Gaussian, AR(1)
        within each contiguous gap with coefficient ``phi`` per step; 1 = one draw per gap).
    draws, seed : int
        Number of Monte Carlo draws and the seed of the random generator
        (:class:`numpy.random.SFC64` under :class:`numpy.random.Generator`).
    phi : float
        AR(1) coefficient per interval within gaps, 0 ≤ phi ≤ 1.
    weights : array_like
        Conversion of an error in W m-2 to the summed unit (mm or MJ m-2) per interval:
        shape (n,), or (n_weights, n) to sum the same draws with several conversions.
    groups : list of array_like of int
        Each a group label per interval (−1: in no group); the error sums are returned per
        group label 0 … max.
    chunk_elements : int, optional
        Largest draws × intervals block held at once.

    Returns
    -------
    list
        Per grouping: (measured part, filled part), each draws × groups. With 2-D
        ``weights``: one such list per row of ``weights``.

    Notes
    -----
    Errors are drawn in blocks of intervals × draws (per block: the Laplace errors of the
    measured intervals with :func:`standard_laplace`, then the Gaussian innovations of the
    filled ones in the same order); their scales and the conversion weights are the
    entries of the sparse matrices the blocks are multiplied with. A grouping whose groups are
    unions of an earlier grouping's groups (months of days, the year of months: nested
    groupings) is summed from that grouping's sums; the others ("base" groupings) are summed
    from the draws, all of them and every row of ``weights`` in one product of the block
    with a sparse (group and weight × interval) matrix. A grouping equal to an earlier one
    gets copies of that one's sums. The sums of nested groupings are therefore sums of
    partial sums: equal to the direct sums up to floating-point rounding.
    """
    from scipy import sparse

    sd = np.nan_to_num(np.asarray(sd, dtype=float), nan=0.0)
    measured = np.asarray(measured, dtype=bool) & (sd > 0)
    filled = np.asarray(filled, dtype=bool) & (sd > 0) & ~measured
    w_all = np.nan_to_num(np.asarray(weights, dtype=float), nan=0.0)
    single = w_all.ndim == 1
    w_all = np.atleast_2d(w_all)
    n_w = w_all.shape[0]
    n = sd.size
    # SFC64 (small fast chaotic generator): seeded like numpy.random.default_rng, faster draws
    rng = np.random.Generator(np.random.SFC64(int(seed)))
    groups = [np.asarray(g, dtype=np.int64) for g in groups]
    n_groups = [int(g.max()) + 1 if g.size and g.max() >= 0 else 0 for g in groups]
    mpos = np.flatnonzero(measured)
    fpos = np.flatnonzero(filled)

    source = _nested_source(groups, n_groups)
    same_as = [None] * len(groups)
    for i, src in enumerate(source):
        if src is not None and n_groups[src[0]] == n_groups[i] and \
                np.array_equal(src[1], np.arange(n_groups[i])):
            same_as[i] = src[0]  # equal to an earlier grouping: copied at the end
    base = [i for i, src in enumerate(source) if src is None and n_groups[i] > 0]
    # rows of the base products: base grouping b, group g, weight w at offset[b] + g·n_w + w
    offset, total_rows = {}, 0
    for b in base:
        offset[b] = total_rows
        total_rows += n_groups[b] * n_w

    def stacked(pos, scale):
        """The sparse (base group and weight × interval) matrix of the positions ``pos``:
        conversion weight times the error scale of each interval."""
        rows, cols, vals = [], [], []
        for b in base:
            g = groups[b][pos]
            keep = np.flatnonzero(g >= 0)
            rows.append((offset[b] + g[keep][:, None] * n_w + np.arange(n_w)[None, :]).ravel())
            cols.append(np.repeat(keep, n_w))
            vals.append((w_all[:, pos[keep]] * scale[keep]).T.ravel())
        cat = (lambda parts, dt: np.concatenate(parts) if parts else np.zeros(0, dt))
        return sparse.csr_matrix((cat(vals, float), (cat(rows, np.int64), cat(cols, np.int64))),
                                 shape=(max(total_rows, 1), pos.size))

    # the draws are standard (Laplace of scale 1, unit-variance AR(1)); each interval's scale
    # enters with its conversion weight: Laplace scale β = sd/√2 (variance 2β²), Gaussian sd
    mat_m, mat_f = stacked(mpos, sd[mpos] / math.sqrt(2.0)), stacked(fpos, sd[fpos])
    # the sums of the AR(1) errors M·y = M·(L·z) = (M·L)·z: one sparse product of the
    # innovations, no filter per block of draws (exact up to rounding)
    filter_blocks = phi > 0.0 and fpos.size > 0
    if filter_blocks:
        ar1 = _ar1_matrix(filled, phi, max_entries=fpos.size * draws // 8)
        if ar1 is not None:
            through = mat_f @ ar1
            if through.nnz <= _AR1_THROUGH_WEIGHTS_MAX_GROWTH * max(mat_f.nnz, 1):
                mat_f, filter_blocks = through, False
    aggregate = {}
    for i, src in enumerate(source):
        if src is not None and same_as[i] is None and n_groups[i] > 0:
            j, mapping = src
            keep = np.flatnonzero(mapping >= 0)
            aggregate[i] = sparse.csr_matrix((np.ones(keep.size), (mapping[keep], keep)),
                                             shape=(n_groups[i], n_groups[j]))
    out = [[(np.zeros((draws, k)), np.zeros((draws, k))) for k in n_groups] for _ in range(n_w)]
    step = max(1, int(chunk_elements // max(n, 1)))
    em_buffer = np.empty(mpos.size * min(step, draws))  # reused by every block
    for d0 in range(0, draws, step):
        d1 = min(draws, d0 + step)
        nd = d1 - d0
        # drawn in the layout of the sparse products, intervals × draws: no transposed copies
        em_t = standard_laplace(rng, (mpos.size, nd), out=em_buffer[:mpos.size * nd].reshape(mpos.size, nd))
        ef_t = rng.standard_normal((fpos.size, nd))  # innovations
        if filter_blocks:
            ef_t = _gap_ar1(ef_t, filled, phi, overwrite=True)
        for part, (mat, block) in enumerate(((mat_m, em_t), (mat_f, ef_t))):
            sums = {}  # grouping → (groups, n_w · draws) sums of this block
            prod = mat @ block
            for b in base:
                sums[b] = prod[offset[b]:offset[b] + n_groups[b] * n_w].reshape(n_groups[b], n_w * nd)
            for i in aggregate:  # in grouping order: a source is always summed before
                j = source[i][0]
                while same_as[j] is not None:  # a copy of an earlier grouping: sum that one's
                    j = same_as[j]
                sums[i] = aggregate[i] @ sums[j]
            for i, s in sums.items():
                s3 = s.reshape(n_groups[i], n_w, nd)
                for w in range(n_w):
                    out[w][i][part][d0:d1] = s3[:, w, :].T
    for per_w in out:
        for i, j in enumerate(same_as):
            if j is not None:
                per_w[i] = (per_w[j][0].copy(), per_w[j][1].copy())
    return out[0] if single else out


# ---------------------------------------------------------------------------------------
# the stage
# ---------------------------------------------------------------------------------------


def _accepted(frame, flags, name):
    if name not in frame.columns:
        return None
    v = frame[name].to_numpy(dtype=float, copy=True)
    if name in flags.columns:
        v[flags[name].to_numpy() != 0] = np.nan
    return v


def _num(x):
    return None if x is None or not np.isfinite(x) else float(x)


def _closure_factor_everywhere(closure: pd.DataFrame, frozen: np.ndarray, months: np.ndarray):
    """The closure factor on every interval: the closure stage's where it corrected the
    period, else the median of the corrected periods' factors in the same month, else of
    the record; 1 (no correction) on snow or frozen intervals, as in the closure stage."""
    f = closure["closure_factor"].to_numpy(dtype=float) if "closure_factor" in closure else \
        np.full(len(closure), np.nan)
    direct = np.isfinite(f) & ~frozen
    out = np.where(direct, f, np.nan)
    overall = float(np.nanmedian(f[direct])) if direct.any() else float("nan")
    s = pd.Series(np.where(direct, f, np.nan))
    month_median = s.groupby(months).transform("median").to_numpy()
    out = np.where(np.isfinite(out), out, month_median)
    out = np.where(np.isfinite(out), out, overall)
    out = np.where(frozen, 1.0, out)
    return out, direct


def assess_uncertainty(frame: pd.DataFrame, flags: pd.DataFrame, site, rules: dict, *,
                       filling: pd.DataFrame, fill_summary: dict,
                       closure: pd.DataFrame | None = None) -> StageResult:
    """Random and filling errors of LE and H and the uncertainty of the ET and energy totals.

    Parameters
    ----------
    frame, flags : pandas.DataFrame
        The working frame and flags after QC (accepted where the flag is 0). Used: ``le``,
        ``h``, ``rg``, ``ta``, ``vpd``, ``wind``, ``precip``, ``snow_or_frozen``,
        ``canopy_height_m``, ``measurement_height_m``, ``irga``, ``irrigated`` (as present).
    site : SiteInfo
        With ``interval_minutes`` resolved.
    rules : dict
        The rule set: ``[uncertainty]`` (standard values for absent keys) and
        ``[wet] rain_above``.
    filling : pandas.DataFrame
        The filling stage's columns (``le_filled``, ``le_fill_method``, ``le_fill_quality``,
        ``le_fill_sd``, ``le_in_long_gap``, the same for ``h``, and the drivers'
        ``<x>_fill_method``).
    fill_summary : dict
        The filling stage's summary (``fill_skill`` with ``by_method``).
    closure : pandas.DataFrame, optional
        The closure stage's columns (``closure_factor``); None: no closure bracket.

    Returns
    -------
    StageResult
        columns: ``le_random_sd``, ``h_random_sd`` (measured values), ``le_fill_error_sd``,
        ``h_fill_error_sd`` (filled values), ``le_total_sd``, ``h_total_sd`` (every value of
        ``<flux>_filled``), all W m-2; ``le_error_gap`` (label of the contiguous filled run,
        −1 for measured values).
        daily (index ``date``): ``et_mm_sd``, ``et_mm_p025``, ``et_mm_p975``,
        ``et_closed_mm`` [mm] (NaN on days with a value missing from ``le_filled``).
        summary: ``uncertainty`` (the random-error models, the filling-error and Monte
        Carlo settings, and a sentence on which dominates) and ``totals`` (records for
        every month, calendar year and the whole record; see the module notes).

    Warns
    -----
    TowerflowWarning
        Too few pairs for a random-error model; a driver of the pairing rule missing; no
        precip (rain not excluded from pairs); many values filled during or after rain.
    """
    u = uncertainty_rules(rules)
    wet_rules = dict(standard_rules().get("wet", {}))
    wet_rules.update((rules or {}).get("wet", {}) or {})
    warnings_out: list[str] = []

    def _warn(msg):
        warn(msg)
        warnings_out.append(msg)

    index = frame.index
    n = len(index)
    interval = site.interval
    seconds = interval.total_seconds()
    lag = int(round(duration(u["pair_offset"]) / interval))
    level = float(u["interval_level"])
    if not 0.0 < level < 1.0:
        raise RuleError("interval_level must lie between 0 and 1", key="uncertainty.interval_level")

    # ---- pairing conditions -------------------------------------------------------------
    drivers, tolerances = {}, {}
    for name in ("rg", "ta", "wind", "vpd"):
        tol = u.get(f"tolerance_{name}")
        if tol is None:
            continue
        v = _accepted(frame, flags, name)
        if v is None:
            _warn(f"uncertainty: no {name}: the pairing rule drops its tolerance")
            continue
        drivers[name], tolerances[name] = v, float(tol)
    # rain (or unknown precip) and irrigation stop pairs from `rain_lead` before to the end
    lead = int(round(duration(u["rain_lead"]) / interval))
    rain_above = float(wet_rules.get("rain_above", 0.0))
    irrigated = frame["irrigated"].fillna(False).to_numpy(dtype=bool) if "irrigated" in frame.columns \
        else np.zeros(n, dtype=bool)
    if "precip" in frame.columns:
        p = _accepted(frame, flags, "precip")
        with np.errstate(invalid="ignore"):
            rain_or_unknown = ~(p <= rain_above)
            rain_known = p > rain_above
    else:
        _warn("uncertainty: no precip: pairs across rain cannot be excluded")
        rain_or_unknown = rain_known = np.zeros(n, dtype=bool)
    blocked = _within_lead(rain_or_unknown | irrigated, lead)
    # filled values during or within `rain_lead` after known rain or irrigation (caution)
    wet_after = _within_lead(rain_known | irrigated, lead)
    if len(flags.columns):
        hist = (flags.to_numpy() & flagbits.HISTORY).any(axis=1)
        blocked |= hist
    same = {name: frame[name].to_numpy() for name in ("canopy_height_m", "measurement_height_m", "irga")
            if name in frame.columns}

    # ---- random error per flux ------------------------------------------------------------
    models = {}
    cols = {}
    for flux in _FLUXES:
        x = _accepted(frame, flags, flux)
        if x is None:
            x = np.full(n, np.nan)
        ok = pair_mask(x, lag=lag, drivers=drivers, tolerances=tolerances, blocked=blocked, same=same)
        i = np.flatnonzero(ok)
        model = fit_random_error(x[i], x[i + lag], by_sign=bool(u["fit_by_sign"]),
                                 min_pairs=int(u["min_pairs"]),
                                 min_pairs_by_sign=int(u["min_pairs_by_sign"]))
        if model["a"] is None:
            _warn(f"uncertainty: {flux}: {model['n_pairs']} pairs, fewer than {u['min_pairs']}: "
                  "no random-error model (the band leaves the random error out)")
        models[flux] = model
        cols[f"{flux}_random_sd"] = random_error_sd(x, model)

    # ---- filling error ----------------------------------------------------------------------
    by_method = ((fill_summary or {}).get("fill_skill", {}) or {}).get("by_method", {}) or {}
    drivers_filled = np.zeros(n, dtype=bool)
    for name in ("rg", "ta", "vpd"):
        c = f"{name}_fill_method"
        if c in filling.columns:
            drivers_filled |= _label_is(filling[c], _FILLED_DRIVER_METHODS)
    half = int(round(duration(u["time_of_day_window"]) / pd.Timedelta(days=1)))
    tau = duration(u["fill_error_correlation_time"])
    phi = math.exp(-interval / tau) if tau > pd.Timedelta(0) else 0.0
    measured, filled_mask = {}, {}
    for flux in _FLUXES:
        method = filling[f"{flux}_fill_method"].to_numpy(dtype=object)
        quality = filling[f"{flux}_fill_quality"].to_numpy(dtype=object)
        x = _accepted(frame, flags, flux)
        x = np.full(n, np.nan) if x is None else x
        spread = time_of_day_spread(x, index, interval, half_window_days=half)
        cv = {m: (s or {}).get("rmse") for m, s in (by_method.get(flux, {}) or {}).items()}
        fe = fill_error_sd(filling[f"{flux}_fill_sd"].to_numpy(dtype=float), method, quality, cv,
                           reduced=drivers_filled, spread=spread)
        cols[f"{flux}_fill_error_sd"] = fe
        measured[flux] = _label_is(method, ("measured",))
        filled_mask[flux] = ~(measured[flux] | _label_is(method, ("not_filled",))) & \
            np.isfinite(filling[f"{flux}_filled"].to_numpy(dtype=float))
        cols[f"{flux}_total_sd"] = np.where(measured[flux], cols[f"{flux}_random_sd"],
                                            np.where(filled_mask[flux], fe, np.nan))
    cols["le_error_gap"] = gap_labels(filled_mask["le"])
    columns = pd.DataFrame(cols, index=index)

    # ---- conversion factors -------------------------------------------------------------------
    ta = pd.Series(frame["ta"].to_numpy(dtype=float) if "ta" in frame else np.full(n, np.nan), index=index)
    ta = ta.interpolate(limit_direction="both").fillna(20.0).to_numpy()  # as conductance.et_mm_daily
    frozen = frame["snow_or_frozen"].astype("boolean").fillna(False).to_numpy(dtype=bool) \
        if "snow_or_frozen" in frame.columns else np.zeros(n, dtype=bool)
    mm_per_w = np.asarray(micromet.evaporation_mm(np.ones(n), ta, seconds, frozen=frozen), dtype=float)
    mj_per_w = np.full(n, seconds / 1e6)

    local = index.tz_localize(None) if index.tz is not None else index
    stamps = local.to_numpy()  # for the first and last interval of each period
    day = local.normalize()
    day_codes, day_values = pd.factorize(day, sort=True)
    # months and years of the distinct days (each interval's are its day's)
    month_of_day, month_values = pd.factorize(day_values.to_period("M"), sort=True)
    month_codes = month_of_day[day_codes]
    year_of_day, year_values = pd.factorize(day_values.year.to_numpy(), sort=True)
    year_codes = year_of_day[day_codes]
    record = np.zeros(n, dtype=np.int64)

    le_f = filling["le_filled"].to_numpy(dtype=float)
    h_f = filling["h_filled"].to_numpy(dtype=float)
    draws = int(u["draws"])
    seed = int(u["seed"])
    groups = [day_codes, month_codes, year_codes, record]
    mc = {}
    le_weights = [mm_per_w, mj_per_w]
    closed = closure is not None and len(closure)
    if closed:
        factor, direct = _closure_factor_everywhere(closure.reindex(index), frozen, month_codes)
        le_closed_all = le_f * factor
        # the closed ET carries the same errors scaled by the factor (the same draws)
        le_weights.append(mm_per_w * np.nan_to_num(factor, nan=1.0))
    else:
        factor = np.full(n, np.nan)
        direct = np.zeros(n, dtype=bool)
        le_closed_all = np.full(n, np.nan)
    le_mc = simulate_errors(cols["le_total_sd"], measured["le"], filled_mask["le"], draws=draws, seed=seed,
                            phi=phi, weights=np.vstack(le_weights), groups=groups)
    mc["et"], mc["le_energy"] = le_mc[0], le_mc[1]
    if closed:
        mc["et_closed"] = le_mc[2]
    mc["h_energy"] = simulate_errors(cols["h_total_sd"], measured["h"], filled_mask["h"], draws=draws,
                                     seed=seed + 1, phi=phi, weights=mj_per_w, groups=groups)

    q_lo, q_hi = (1.0 - level) / 2.0, 1.0 - (1.0 - level) / 2.0
    in_long = filling["le_in_long_gap"].to_numpy(dtype=bool) if "le_in_long_gap" in filling else \
        np.zeros(n, dtype=bool)

    def table(codes, k):
        """Per group: estimates, MC statistics."""
        def s(v, w):
            vals = np.where(np.isfinite(v), v * w, 0.0)
            return np.bincount(codes, weights=vals, minlength=k)
        cnt = np.bincount(codes, minlength=k).astype(float)
        present = np.bincount(codes, weights=np.isfinite(le_f).astype(float), minlength=k)
        res = {
            "n_intervals": cnt,
            "complete": present == cnt,
            "et_mm": s(le_f, mm_per_w),
            "et_closed_mm": np.where(np.bincount(codes, weights=np.isfinite(le_closed_all), minlength=k) > 0,
                                     s(le_closed_all, mm_per_w), np.nan),
            "le_energy_mj": s(le_f, mj_per_w),
            "h_energy_mj": s(h_f, mj_per_w),
            "filled_fraction": np.bincount(codes, weights=filled_mask["le"].astype(float), minlength=k) / cnt,
            "long_gap_fraction": np.bincount(codes, weights=in_long.astype(float), minlength=k) / cnt,
            "missing_fraction": 1.0 - present / cnt,
            "closure_corrected_fraction": np.bincount(codes, weights=direct.astype(float), minlength=k) / cnt,
            "filled_after_rain_fraction": np.bincount(codes, weights=(filled_mask["le"] & wet_after).astype(float),
                                                      minlength=k) / cnt,
        }
        return res

    def mc_stats(part, which):
        em, ef = part[which]
        tot = em + ef
        lo, hi = np.quantile(tot, [q_lo, q_hi], axis=0)
        return tot.std(axis=0, ddof=1), lo, hi, em.std(axis=0, ddof=1), ef.std(axis=0, ddof=1)

    def mc_sd(part, which):
        em, ef = part[which]
        return (em + ef).std(axis=0, ddof=1)

    # ---- daily ------------------------------------------------------------------------------
    dt = table(day_codes, len(day_values))
    sd_d, lo_d, hi_d, _, _ = mc_stats(mc["et"], 0)
    complete_d = dt["complete"]
    daily = pd.DataFrame({
        "et_mm_sd": np.where(complete_d, sd_d, np.nan),
        "et_mm_p025": np.where(complete_d, dt["et_mm"] + lo_d, np.nan),
        "et_mm_p975": np.where(complete_d, dt["et_mm"] + hi_d, np.nan),
        "et_closed_mm": np.where(complete_d, dt["et_closed_mm"], np.nan),
    }, index=pd.DatetimeIndex(day_values, name="date"))

    # ---- totals -------------------------------------------------------------------------------
    totals = []
    for which, (label, codes, values) in enumerate(
            [("month", month_codes, month_values), ("year", year_codes, year_values),
             ("record", record, np.array(["record"]))], start=1):
        t = table(codes, len(values))
        sd, lo, hi, sd_m, sd_f = mc_stats(mc["et"], which)
        if "et_closed" in mc:
            _, lo_c, hi_c, _, _ = mc_stats(mc["et_closed"], which)
        else:
            lo_c = hi_c = np.full(len(values), np.nan)
        le_sd = mc_sd(mc["le_energy"], which)
        h_sd = mc_sd(mc["h_energy"], which)
        first = np.full(len(values), np.iinfo(np.int64).max)
        np.minimum.at(first, codes, stamps.view(np.int64))
        first = first.view(stamps.dtype)
        last = np.full(len(values), np.iinfo(np.int64).min)
        np.maximum.at(last, codes, stamps.view(np.int64))
        last = last.view(stamps.dtype)
        for k, v in enumerate(values):
            totals.append({
                "period_type": label,
                "period": str(v),
                "start": pd.Timestamp(first[k]).isoformat(),
                "end": (pd.Timestamp(last[k]) + interval).isoformat(),
                "n_intervals": int(t["n_intervals"][k]),
                "complete": bool(t["complete"][k]),
                "et_mm": _num(t["et_mm"][k]),
                "et_mm_sd": _num(sd[k]),
                "et_mm_p025": _num(t["et_mm"][k] + lo[k]),
                "et_mm_p975": _num(t["et_mm"][k] + hi[k]),
                "et_random_sd_mm": _num(sd_m[k]),
                "et_fill_sd_mm": _num(sd_f[k]),
                "et_closed_mm": _num(t["et_closed_mm"][k]),
                "et_closed_mm_p025": _num(t["et_closed_mm"][k] + lo_c[k]),
                "et_closed_mm_p975": _num(t["et_closed_mm"][k] + hi_c[k]),
                "filled_fraction": _num(t["filled_fraction"][k]),
                "long_gap_fraction": _num(t["long_gap_fraction"][k]),
                "missing_fraction": _num(t["missing_fraction"][k]),
                "closure_corrected_fraction": _num(t["closure_corrected_fraction"][k]),
                "filled_after_rain_fraction": _num(t["filled_after_rain_fraction"][k]),
                "le_energy_mj": _num(t["le_energy_mj"][k]),
                "le_energy_mj_sd": _num(le_sd[k]),
                "h_energy_mj": _num(t["h_energy_mj"][k]),
                "h_energy_mj_sd": _num(h_sd[k]),
            })

    whole = totals[-1]
    band = (whole["et_mm_p975"] - whole["et_mm_p025"]) / 2.0 if whole["et_mm_p975"] is not None else None
    bracket = (whole["et_closed_mm"] - whole["et_mm"]) if whole["et_closed_mm"] is not None else None
    if band is None or whole["et_mm"] is None:
        verdict = "No ET total: nothing to compare."
    elif bracket is None:
        verdict = (f"Whole record: ET {whole['et_mm']:.1f} mm ± {band:.1f} mm ({level:.0%} random and "
                   "filling band); no closure correction was available, so the systematic closure "
                   "error (typically 10-30 % of LE, Wilson et al. 2002) is not bracketed.")
    else:
        pct = 100.0 * abs(bracket) / abs(whole["et_mm"]) if whole["et_mm"] else float("nan")
        bpct = 100.0 * band / abs(whole["et_mm"]) if whole["et_mm"] else float("nan")
        dominant = "the closure bracket (systematic)" if abs(bracket) > band else \
            "the random and filling band"
        verdict = (f"Whole record: ET {whole['et_mm']:.1f} mm; the {level:.0%} random and filling band "
                   f"is ±{band:.1f} mm ({bpct:.1f} %), while closing the energy balance moves ET by "
                   f"{bracket:+.1f} mm ({pct:.1f} %) to {whole['et_closed_mm']:.1f} mm: {dominant} "
                   "dominates (Wilson et al. 2002).")
    wet_share = whole["filled_after_rain_fraction"] or 0.0
    if wet_share > float(u["wet_fill_caution_fraction"]):
        caution = (f"Caution: {wet_share:.0%} of the intervals are filled during or within "
                   f"{u['rain_lead']} after rain; fills from drier similar conditions can miss "
                   "the evaporation of intercepted water, a one-sided error the band does not cover.")
        verdict += " " + caution
        _warn(f"uncertainty: {caution}")
    summary = {
        "uncertainty": {
            "random_error": {flux: models[flux] for flux in _FLUXES},
            "pairing": {"offset": str(u["pair_offset"]), "tolerances": tolerances,
                        "excluded_across": ["rain or unknown precip", "irrigation",
                                            "site-history exclusion (bit 64)",
                                            "change of canopy height, measurement height or analyser"]},
            "filling_error": "max(fill sd, cross-validated RMSE of the method; for fair/poor fills "
                             "or fills from filled drivers also the time-of-day spread)",
            "fill_error_correlation_time": str(u["fill_error_correlation_time"]),
            "fill_error_ar1_coefficient": float(phi),
            "draws": draws, "seed": seed, "interval_level": level,
            "closure_factor_fallback": "month median of corrected periods, else record median; "
                                       "1 on snow or frozen intervals",
            "dominant": verdict,
        },
        "totals": totals,
    }
    return StageResult(columns=columns, summary=summary, warnings=warnings_out, daily=daily)
