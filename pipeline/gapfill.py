"""Gap-filling of LE and H: drivers, similar conditions, Penman–Monteith, cross-validated choice.

Entry point: :func:`fill_gaps`. The work is split over three modules:

- :mod:`pipeline.gapfill_drivers` completes rg, ta and vpd (interpolation, neighbouring
  sites with regression, mean diurnal course; rg through the clearness index);
- :mod:`pipeline.gapfill_similar` is the vectorised similar-conditions filler after
  Reichstein et al. (2005);
- :mod:`pipeline.gapfill_penman` fills LE with Penman–Monteith and a fitted surface
  conductance, and H as the energy-balance residual.

Fill methods (``le_fill_method``, ``h_fill_method``)
---------------------------------------------------
``measured``
    the accepted measurement.
``similar_conditions``
    mean of accepted values with rg ±50 W m-2, ta ±2.5 degC and vpd ±0.5 kPa of the gap's
    drivers, within ±7 d, then ±14 d, then growing windows (Reichstein et al. 2005).
``similar_conditions_radiation_only``
    the same with rg only (±7 d, then growing).
``similar_conditions_potential_radiation``, ``similar_conditions_potential_radiation_only``
    at a site without rg: the potential (top-of-atmosphere) radiation stands in for rg, so
    that day, night and sun height still match; always lowered one quality class.
``mean_diurnal_course``
    mean at the same time of day ±1 h over the same day, ±1 d, then growing windows.
``penman_monteith_conductance``
    Penman–Monteith with gs from a Jarvis-type response fitted in moving windows (by day).
``penman_monteith_wet_canopy``
    LE in gaps caused by wetness (LE carries the wet bit, or QC's ``rain_wetted`` is true and
    LE is not accepted) where no accepted wet analogue lies within ±7 d (the site rejects LE
    when wet, e.g. an open-path analyser in rain): the evaporation of intercepted water,
    c · Penman–Monteith with zero surface resistance (gs → ∞; Monteith 1965; Rutter et al.
    1971 [from memory]) from the interval's own filled drivers and ga, with the site's
    moving-window closure ratio c, while the canopy store (``[gapfill]
    wet_canopy_storage_*_mm`` by canopy height, filled by rain, emptied by this rate)
    holds water; where it runs dry within the interval the dry fill is blended in by the
    wet fraction, once empty the dry fill stays. Applied over either LE strategy, after the
    cross-validated choice (accepted intervals are never wet gaps, so the cross-validation
    cannot rank it). Quality ``fair``, ``poor`` where rg, ta or vpd were filled or ga does
    not rest on a measured u*; ``_fill_sd`` is the spread of the dry fill at that interval
    (the dry Penman–Monteith window residual sd, or the similar-conditions sd).
``energy_balance_residual``
    H = c · A − LE with the site's moving-window closure ratio c (by day); in wet-canopy
    gaps it uses the wet-canopy LE.
``not_filled``
    no estimate: the gap is longer than ``[gapfill] max_fill_length`` (``<flux>_in_long_gap``),
    or the series has no accepted value at all.

Quality classes (``<flux>_fill_quality``): ``measured``; for filled values ``good``,
``fair`` or ``poor`` (mapping in :mod:`pipeline.gapfill_similar` and
:mod:`pipeline.gapfill_penman`; a fill from filled drivers is lowered one class, and so is
a fill of an interval under snow or frozen conditions, where few accepted analogues share
that surface state); missing (null) where nothing was filled.

Strategies and the site's choice
--------------------------------
For LE two strategies compete: ``similar_conditions`` (the whole Reichstein sequence) and
``penman_monteith_conductance`` (Penman–Monteith by day, the Reichstein sequence for the
rest). For H: ``similar_conditions`` and ``energy_balance_residual`` (residual by day,
Reichstein sequence for the rest). Accepted intervals are hidden in artificial gaps
whose lengths are drawn from the site's own gap-length distribution (seeded; at most
``cross_validation_max_intervals`` hidden intervals), each strategy fills them, and the
strategy with the smaller RMSE is chosen (``summary["fill_choice"]``, with every
candidate's skill). ``fill_skill`` reports RMSE, bias (filled − measured), R²
(1 − SSres/SStot) and n of the chosen strategy per flux, and ``by_method[flux][method]``
the same for the values each method filled within it. LE and H are hidden together.

Windows are widened where needed so that every gap up to ``max_fill_length`` has accepted
values within reach: the widest window used is max(``widest_window``,
``max_fill_length`` / 2 + 7 d).

References
----------
Reichstein, M. et al. (2005). Global Change Biology 11, 1424–1439.
Falge, E. et al. (2001). Agricultural and Forest Meteorology 107, 43–69.
Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19, 205–234.
Rutter, A. J. et al. (1971). A predictive model of rainfall interception in forests, 1.
Agricultural Meteorology 9, 367–384 [from memory].
Moffat, A. M. et al. (2007). Comprehensive comparison of gap-filling techniques for eddy
covariance net carbon fluxes. Agricultural and Forest Meteorology 147, 209–232.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from . import micromet
from .closure import available_energy as _closure_available_energy
from .errors import warn
from .flags import accepted_values
from .gapfill_drivers import FILLED_DRIVER_METHODS, fill_met_drivers, run_length, runs, value_counts
from . import flags as flagbits
from .gapfill_penman import (aerodynamic_conductance_for_filling, closure_ratio,
                             energy_balance_residual_fill, penman_monteith_fill, wet_canopy_fill,
                             wet_canopy_storage)
from .gapfill_similar import fill_similar_conditions, lower_quality, similarity_steps
from .rules import duration, standard_rules
from .stage import StageResult

__all__ = ["fill_gaps", "gapfill_rules", "wet_gaps", "LE_STRATEGIES", "H_STRATEGIES"]

LE_STRATEGIES = ("similar_conditions", "penman_monteith_conductance")
H_STRATEGIES = ("similar_conditions", "energy_balance_residual")


def gapfill_rules(rules: dict | None) -> dict:
    """The ``[gapfill]`` table of ``rules`` over the standard's (keys absent in ``rules``)."""
    out = dict(standard_rules().get("gapfill", {}))
    out.update((rules or {}).get("gapfill", {}) or {})
    return out


@dataclass
class _Context:
    index: pd.DatetimeIndex
    interval: pd.Timedelta
    drivers: dict
    drivers_filled: dict
    radiation_measured: bool
    available_energy: np.ndarray
    ga: np.ndarray
    ga_source: np.ndarray
    p_air: np.ndarray
    is_day: np.ndarray
    snow: np.ndarray
    swc: np.ndarray | None
    rules: dict
    steps: list


def _accepted(frame, flags, name):
    return accepted_values(frame, flags, name)


def _similar(ctx: _Context, target, to_fill):
    g = ctx.rules
    est, sd, method, quality, _ = fill_similar_conditions(
        target, ctx.drivers, to_fill, interval=ctx.interval,
        tolerances={"rg": float(g["tolerance_rg"]), "ta": float(g["tolerance_ta"]),
                    "vpd": float(g["tolerance_vpd"])},
        steps=ctx.steps, min_samples=int(g["min_similar_samples"]),
        drivers_filled=ctx.drivers_filled)
    if not ctx.radiation_measured:
        renamed = method.copy()
        renamed[method == "similar_conditions"] = "similar_conditions_potential_radiation"
        renamed[method == "similar_conditions_radiation_only"] = "similar_conditions_potential_radiation_only"
        method = renamed
    return est, sd, method, quality


def _overlay(base, top):
    """Take ``top`` (est, sd, method, quality) where it has an estimate, else ``base``."""
    have = np.isfinite(top[0])
    return tuple(np.where(have, t, b) if t.dtype != object else np.where(have, t, b).astype(object)
                 for b, t in zip(base, top))


def _fill_le(ctx: _Context, strategy: str, le_obs, to_fill, base=None):
    """LE by ``strategy``; ``base`` is the similar-conditions fill of the same gaps if known."""
    if strategy == "similar_conditions":
        return (_similar(ctx, le_obs, to_fill) if base is None else base), {}
    g = ctx.rules
    est, sd, method, quality, info = penman_monteith_fill(
        le_obs, to_fill, index=ctx.index, rg=ctx.drivers["rg"], ta=ctx.drivers["ta"],
        vpd=ctx.drivers["vpd"], p_air=ctx.p_air, available_energy=ctx.available_energy,
        ga=ctx.ga, ga_source=ctx.ga_source, is_day=ctx.is_day, snow=ctx.snow, swc=ctx.swc,
        drivers_filled=ctx.drivers_filled, window=duration(g["conductance_window"]),
        step=duration(g["conductance_step"]), min_samples=int(g["conductance_min_samples"]))
    if base is None:  # similar conditions where the first method gave no estimate (a gap's
        # similar-conditions fill does not depend on which other gaps are filled)
        base = _similar(ctx, le_obs, to_fill & ~np.isfinite(est))
    return _overlay(base, (est, sd, method, quality)), info


def _fill_h(ctx: _Context, strategy: str, h_obs, to_fill, le_obs, le_filled, le_quality, base=None):
    """H by ``strategy``; ``base`` is the similar-conditions fill of the same gaps if known."""
    if strategy == "similar_conditions":
        return (_similar(ctx, h_obs, to_fill) if base is None else base), {}
    g = ctx.rules
    est, sd, method, quality, info = energy_balance_residual_fill(
        h_obs, le_obs, le_filled, le_quality, to_fill, index=ctx.index,
        available_energy=ctx.available_energy, is_day=ctx.is_day,
        window=duration(g["conductance_window"]), step=duration(g["conductance_step"]),
        min_samples=int(g["conductance_min_samples"]))
    if base is None:  # similar conditions where the first method gave no estimate (a gap's
        # similar-conditions fill does not depend on which other gaps are filled)
        base = _similar(ctx, h_obs, to_fill & ~np.isfinite(est))
    return _overlay(base, (est, sd, method, quality)), info


def _num(x):
    x = float(x)
    return x if np.isfinite(x) else None


def skill(estimate, truth) -> dict:
    """RMSE, bias (estimate − truth), R² (1 − SSres/SStot) and n over finite pairs [W m-2]."""
    ok = np.isfinite(estimate) & np.isfinite(truth)
    n = int(ok.sum())
    if n == 0:
        return {"rmse": None, "bias": None, "r2": None, "n": 0}
    e, t = estimate[ok], truth[ok]
    d = e - t
    ss_tot = float(np.sum((t - t.mean()) ** 2))
    r2 = 1.0 - float(np.sum(d * d)) / ss_tot if ss_tot > 0 else np.nan
    return {"rmse": _num(np.sqrt(np.mean(d * d))), "bias": _num(np.mean(d)), "r2": _num(r2), "n": n}


def artificial_gaps(accepted, gap_lengths, *, n_target, rng, max_draws=100_000):
    """Hide accepted intervals in gaps of lengths drawn from ``gap_lengths``.

    Parameters
    ----------
    accepted : numpy.ndarray of bool
        Where a measurement is accepted.
    gap_lengths : numpy.ndarray of int
        The site's own gap lengths (intervals), sampled with replacement.
    n_target : int
        Stop once at least this many accepted intervals are hidden.
    rng : numpy.random.Generator
        Seeded generator (reproducible choice).

    Returns
    -------
    numpy.ndarray of bool
        The hidden intervals (a subset of ``accepted``).
    """
    n = accepted.size
    hidden = np.zeros(n, dtype=bool)
    drawn = 0
    batch = 64
    while hidden.sum() < n_target and drawn < max_draws:
        lengths = rng.choice(gap_lengths, size=batch)
        lengths = np.minimum(lengths, n)
        starts = rng.integers(0, np.maximum(n - lengths, 0) + 1)
        diff = np.zeros(n + 1, dtype=np.int64)
        np.add.at(diff, starts, 1)
        np.add.at(diff, starts + lengths, -1)
        hidden |= (np.cumsum(diff)[:n] > 0) & accepted
        drawn += batch
    return hidden


def _site_gap_lengths(accepted, long_gap, per_day):
    s, e = runs(~accepted & ~long_gap)
    inner = (s > 0) & (e < accepted.size)
    lengths = (e - s)[inner]
    if lengths.size < 5:  # too few gaps of its own: common practice, 1 interval to 1 day
        lengths = np.unique(np.concatenate([lengths, np.array([1, 2, 4, 8, per_day // 2, per_day])]))
    return lengths.astype(np.int64)


def _by_method(est, method, truth, hidden):
    out = {}
    for name in np.unique(method[hidden & np.isfinite(est)]):
        sel = hidden & (method == name)
        out[str(name)] = skill(np.where(sel, est, np.nan), truth)
    return out


def fill_gaps(frame: pd.DataFrame, flags: pd.DataFrame, site, rules: dict, *,
              neighbours: dict[str, pd.DataFrame] | None = None) -> StageResult:
    """Fill LE and H (and the drivers rg, ta, vpd) and measure the fill skill.

    Parameters
    ----------
    frame, flags : pandas.DataFrame
        The working frame and flags after QC (a value is accepted where its flag is 0;
        ``is_day`` and ``snow_or_frozen`` are used when present).
    site : SiteInfo
        With ``interval_minutes`` resolved (30 or 60).
    rules : dict
        The rule set; the ``[gapfill]`` table is read (standard values for absent keys).
    neighbours : dict of str to pandas.DataFrame, optional
        Frames of nearby sites used to fill long driver gaps (see
        :func:`pipeline.gapfill_drivers.fill_met_drivers`).

    Returns
    -------
    StageResult
        Columns ``le_filled``, ``h_filled`` [W m-2], ``le_fill_method``, ``h_fill_method``,
        ``le_fill_quality``, ``h_fill_quality``, ``le_fill_sd``, ``h_fill_sd`` [W m-2],
        ``le_in_long_gap``, ``h_in_long_gap``, the filled drivers ``rg_filled``,
        ``ta_filled``, ``vpd_filled``, ``rh_filled`` with ``_fill_method`` and
        ``_fill_source``; summary ``fill_skill``, ``gaps``, ``fill_choice``, ``long_gaps``,
        ``driver_fill``; daily (index ``date``, local) ``le_long_gap_fraction`` and
        ``h_long_gap_fraction``: the share of the day's intervals in gaps beyond the
        maximum fill length (ET per day and ``complete_day`` are built from
        ``le_filled`` by the caller).

    Warns
    -----
    TowerflowWarning
        A flux or driver with no accepted value (left unfilled), no rg (potential
        radiation stands in), no available energy (no Penman–Monteith or residual).
    """
    g = gapfill_rules(rules)
    index = frame.index
    n = len(index)
    interval = site.interval
    per_day = int(pd.Timedelta(days=1) // interval)
    warnings_out: list[str] = []

    drv_cols, drv_summary, drv_warn = fill_met_drivers(frame, flags, site, g, neighbours=neighbours)
    warnings_out += drv_warn
    r0 = drv_cols["potential_radiation"].to_numpy()
    radiation_measured = bool(np.isfinite(drv_cols["rg_filled"].to_numpy()).any())
    rg = drv_cols["rg_filled"].to_numpy() if radiation_measured else r0
    drivers = {"rg": rg, "ta": drv_cols["ta_filled"].to_numpy(), "vpd": drv_cols["vpd_filled"].to_numpy()}
    drivers_filled = {k: np.isin(drv_cols[f"{k}_fill_method"].to_numpy(dtype=object).astype(str),
                                 FILLED_DRIVER_METHODS) for k in drivers}
    if not radiation_measured:
        drivers_filled["rg"] = np.ones(n, dtype=bool)

    if "is_day" in frame.columns:
        is_day = frame["is_day"].fillna(False).to_numpy(dtype=bool)
    else:
        is_day = r0 > 0
    snow = frame["snow_or_frozen"].fillna(False).to_numpy(dtype=bool) if "snow_or_frozen" in frame.columns \
        else np.zeros(n, dtype=bool)

    if "available_energy" in frame.columns:  # handed over from the closure stage
        a = frame["available_energy"].to_numpy(dtype=float)
    elif "rn" in frame.columns:
        a = _closure_available_energy(frame, flags, rules=rules, site=site).to_numpy(dtype=float)
    else:
        a = np.full(n, np.nan)
        msg = "no rn: Penman–Monteith and energy-balance-residual filling are not possible"
        warn(msg)
        warnings_out.append(msg)
    wind = _accepted(frame, flags, "wind")
    ustar = _accepted(frame, flags, "ustar")
    ga, ga_source, ga_relation = aerodynamic_conductance_for_filling(
        wind if wind is not None else np.full(n, np.nan),
        ustar if ustar is not None else np.full(n, np.nan))
    p_air = _accepted(frame, flags, "p_air")
    p_site = float(micromet.pressure_from_elevation(site.elevation_m))  # FAO-56 eq. 7
    p_air = np.full(n, p_site) if p_air is None else np.where(np.isfinite(p_air), p_air, p_site)
    swc = _accepted(frame, flags, "swc")

    ctx = _Context(index=index, interval=interval, drivers=drivers, drivers_filled=drivers_filled,
                   radiation_measured=radiation_measured, available_energy=a, ga=ga,
                   ga_source=ga_source, p_air=p_air, is_day=is_day, snow=snow, swc=swc, rules=g,
                   steps=similarity_steps(_widest(g)))

    max_len = duration(g["max_fill_length"])
    obs, acc, long_gap, to_fill = {}, {}, {}, {}
    for flux in ("le", "h"):
        v = _accepted(frame, flags, flux)
        if v is None:
            v = np.full(n, np.nan)
        obs[flux] = v
        acc[flux] = np.isfinite(v)
        long_gap[flux] = run_length(~acc[flux]) * interval > max_len
        to_fill[flux] = ~acc[flux] & ~long_gap[flux]
        if not acc[flux].any():
            msg = f"{flux} has no accepted value: it is not filled"
            warn(msg)
            warnings_out.append(msg)
            to_fill[flux] = np.zeros(n, dtype=bool)

    # ---- cross-validation: hide accepted intervals, fill them with each strategy -----------
    rng = np.random.default_rng(int(g["cross_validation_seed"]))
    joint_acc = acc["le"] & acc["h"]
    lengths = _site_gap_lengths(acc["le"], long_gap["le"], per_day)
    n_target = int(min(float(g["cross_validation_fraction"]) * joint_acc.sum(),
                       int(g["cross_validation_max_intervals"])))
    hidden = artificial_gaps(joint_acc, lengths, n_target=n_target, rng=rng) if n_target > 0 \
        else np.zeros(n, dtype=bool)
    le_cv = np.where(hidden, np.nan, obs["le"])
    h_cv = np.where(hidden, np.nan, obs["h"])
    choice = {"le": {"chosen": "similar_conditions", "candidates": {}},
              "h": {"chosen": "similar_conditions", "candidates": {}},
              "n_hidden": int(hidden.sum()), "seed": int(g["cross_validation_seed"]),
              "gap_lengths_intervals": {"min": int(lengths.min()), "median": float(np.median(lengths)),
                                        "max": int(lengths.max())}}
    cv_results = {}
    min_cv = 10  # common practice: fewer hidden values do not rank methods
    if hidden.sum() >= min_cv:
        # both strategies share the similar-conditions fill (the second fills by day only)
        le_base = _similar(ctx, le_cv, hidden)
        for strat in LE_STRATEGIES:
            res, _ = _fill_le(ctx, strat, le_cv, hidden, base=le_base)
            cv_results[("le", strat)] = res
            choice["le"]["candidates"][strat] = skill(np.where(hidden, res[0], np.nan), obs["le"])
        choice["le"]["chosen"] = _best(choice["le"]["candidates"])
        le_cv_res = cv_results[("le", choice["le"]["chosen"])]
        le_cv_filled = np.where(hidden, le_cv_res[0], le_cv)
        le_cv_quality = np.where(hidden, le_cv_res[3], "measured").astype(object)
        h_base = _similar(ctx, h_cv, hidden)
        for strat in H_STRATEGIES:
            res, _ = _fill_h(ctx, strat, h_cv, hidden, le_cv, le_cv_filled, le_cv_quality, base=h_base)
            cv_results[("h", strat)] = res
            choice["h"]["candidates"][strat] = skill(np.where(hidden, res[0], np.nan), obs["h"])
        choice["h"]["chosen"] = _best(choice["h"]["candidates"])
    else:
        choice["reason"] = f"fewer than {min_cv} intervals could be hidden: the default is used"

    fill_skill = {}
    for flux in ("le", "h"):
        chosen = choice[flux]["chosen"]
        if (flux, chosen) in cv_results:
            est, _, method, _ = cv_results[(flux, chosen)]
            fill_skill[flux] = {**skill(np.where(hidden, est, np.nan), obs[flux]), "method": chosen}
            fill_skill.setdefault("by_method", {})[flux] = _by_method(est, method, obs[flux], hidden)
        else:
            fill_skill[flux] = {"rmse": None, "bias": None, "r2": None, "n": 0, "method": chosen}
            fill_skill.setdefault("by_method", {})[flux] = {}

    # hidden-vs-filled pairs of the chosen methods, for the report's skill scatter (a capped,
    # evenly spaced sample keeps summary.json small)
    fill_validation = {}
    for flux in ("le", "h"):
        chosen = choice[flux]["chosen"]
        if (flux, chosen) not in cv_results:
            continue
        est = cv_results[(flux, chosen)][0]
        pairs = np.flatnonzero(hidden & np.isfinite(est) & np.isfinite(obs[flux]))
        if pairs.size > 2000:
            pairs = pairs[np.linspace(0, pairs.size - 1, 2000).astype(int)]
        fill_validation[flux] = {"method": chosen, "observed": obs[flux][pairs].round(3).tolist(),
                                 "filled": est[pairs].round(3).tolist()}

    # ---- the fill itself ---------------------------------------------------------------------
    cols = {}
    (le_est, le_sd, le_m, le_q), le_info = _fill_le(ctx, choice["le"]["chosen"], obs["le"], to_fill["le"])
    wet_info = {}
    if _truthy(g.get("wet_canopy_fill", True)) and to_fill["le"].any():
        wet_res, wet_info = _wet_canopy(ctx, frame, flags, site, rules, obs, acc, to_fill["le"],
                                        le_est, le_sd)
        le_est, le_sd, le_m, le_q = _overlay((le_est, le_sd, le_m, le_q), wet_res)
    le_out = _assemble("le", obs["le"], acc["le"], le_est, le_sd, le_m, le_q)
    (h_est, h_sd, h_m, h_q), h_info = _fill_h(ctx, choice["h"]["chosen"], obs["h"], to_fill["h"],
                                              obs["le"], le_out[0], le_out[3])
    h_out = _assemble("h", obs["h"], acc["h"], h_est, h_sd, h_m, h_q)
    for flux, (val, sd, method, quality) in (("le", le_out), ("h", h_out)):
        # under snow or frozen conditions no accepted analogue shares the surface state
        quality = lower_quality(quality, snow & ~acc[flux] & np.isfinite(val))
        cols[f"{flux}_filled"] = val
        cols[f"{flux}_fill_method"] = method
        cols[f"{flux}_fill_quality"] = quality
        cols[f"{flux}_fill_sd"] = sd
        cols[f"{flux}_in_long_gap"] = long_gap[flux]
        unfilled = to_fill[flux] & ~np.isfinite(val)
        if unfilled.any():
            msg = (f"{flux}: {int(unfilled.sum())} intervals could not be filled within the widest "
                   f"window ({g['widest_window']})")
            warn(msg)
            warnings_out.append(msg)
    for name in ("rg", "ta", "vpd", "rh"):
        for suffix in ("_filled", "_fill_method", "_fill_source"):
            if f"{name}{suffix}" in drv_cols.columns:
                cols[f"{name}{suffix}"] = drv_cols[f"{name}{suffix}"].to_numpy()
    cols["ga_for_filling"] = ga
    cols["ga_for_filling_source"] = ga_source
    columns = pd.DataFrame(cols, index=index)

    long_summary = {}
    for flux in ("le", "h"):
        s, e = runs(long_gap[flux])
        long_summary[flux] = {"n_gaps": int(s.size), "n_intervals": int(long_gap[flux].sum()),
                              "fraction": float(long_gap[flux].mean()) if n else 0.0,
                              "periods": [[str(index[a]), str(index[b - 1])] for a, b in zip(s, e)]}
    summary = {
        "fill_skill": fill_skill,
        "fill_validation": fill_validation,
        "gaps": {flux: float((~acc[flux]).mean()) if n else 0.0 for flux in ("le", "h")},
        "fill_choice": choice,
        "long_gaps": long_summary,
        "driver_fill": {**drv_summary, "ga_wind_relation": ga_relation,
                        "ga_source": value_counts(ga_source)},
    }
    for flux in ("le", "h"):
        choice[flux]["method_counts"] = value_counts(cols[f"{flux}_fill_method"])
    if le_info:
        choice["le"]["penman_monteith_fit"] = le_info
    if wet_info:
        choice["le"]["wet_canopy"] = wet_info
    if h_info:
        choice["h"]["closure_ratio"] = h_info
    daily = _daily(index, long_gap)
    return StageResult(columns=columns, summary=summary, warnings=warnings_out, daily=daily)


def _truthy(value) -> bool:
    return value if isinstance(value, bool) else str(value).strip().lower() in ("true", "1", "yes")


def wet_gaps(frame: pd.DataFrame, flags: pd.DataFrame, le_accepted, to_fill, *, window_intervals: int,
             min_analogues: int) -> np.ndarray:
    """LE gaps caused by wetness where no accepted wet analogue is within reach.

    A gap qualifies where LE carries the wet bit (:data:`pipeline.flags.WET`) or QC's
    ``rain_wetted`` is true, and fewer than ``min_analogues`` accepted LE values under
    ``rain_wetted`` lie within ±``window_intervals`` (the site rejects LE when wet, as an
    open-path analyser does; at a closed-path site LE in rain is measured and the
    similar-conditions look-up has wet analogues, so its gaps are left to it).
    """
    n = le_accepted.size
    wet_bit = np.zeros(n, dtype=bool)
    if "le" in flags.columns:
        wet_bit = (flags["le"].to_numpy().astype(np.int64) & int(flagbits.WET)) != 0
    if "rain_wetted" in frame.columns:
        wetted = frame["rain_wetted"].astype("boolean").fillna(False).to_numpy(dtype=bool)
    else:
        wetted = np.zeros(n, dtype=bool)
    candidate = to_fill & ~le_accepted & (wet_bit | wetted)
    if not candidate.any():
        return candidate
    cum = np.concatenate(([0], np.cumsum(le_accepted & wetted)))
    i = np.arange(n)
    lo = np.clip(i - window_intervals, 0, n)
    hi = np.clip(i + window_intervals + 1, 0, n)
    analogues = cum[hi] - cum[lo]
    return candidate & (analogues < min_analogues)


def _wet_canopy(ctx: _Context, frame, flags, site, rules, obs, acc, to_fill, le_est, le_sd):
    """The wet-canopy fill (:func:`pipeline.gapfill_penman.wet_canopy_fill`) on wet gaps."""
    g = ctx.rules
    n = len(ctx.index)
    first = ctx.steps[0].window if ctx.steps else pd.Timedelta(days=7)
    wet_gap = wet_gaps(frame, flags, acc["le"], to_fill, window_intervals=int(first // ctx.interval),
                       min_analogues=int(g["min_similar_samples"]))
    empty = (np.full(n, np.nan), np.full(n, np.nan), np.full(n, "", dtype=object),
             np.full(n, "", dtype=object))
    if not wet_gap.any():
        return empty, {"intervals": 0, "wet_gap_intervals": 0}
    wet_rules = dict(standard_rules().get("wet", {}))
    wet_rules.update((rules or {}).get("wet", {}) or {})
    precip = _accepted(frame, flags, "precip")
    precip = np.full(n, np.nan) if precip is None else precip
    with np.errstate(invalid="ignore"):
        rainy = precip > float(wet_rules.get("rain_above", 0.0))
    irrigated = frame["irrigated"].astype("boolean").fillna(False).to_numpy(dtype=bool) \
        if "irrigated" in frame.columns else np.zeros(n, dtype=bool)
    refill = np.where(irrigated, np.inf, np.where(rainy, precip, 0.0))  # irrigation depth unknown: fills
    hc = frame["canopy_height_m"].to_numpy(dtype=float) if "canopy_height_m" in frame.columns \
        else np.full(n, float(site.canopy_height_m))
    hc = np.where(np.isfinite(hc), hc, float(site.canopy_height_m))
    storage = wet_canopy_storage(hc, short_mm=float(g["wet_canopy_storage_short_mm"]),
                                 tall_mm=float(g["wet_canopy_storage_tall_mm"]),
                                 tall_height_m=float(g["wet_canopy_tall_height_m"]))
    c, c_info = closure_ratio(obs["h"], obs["le"], ctx.available_energy, ctx.is_day, index=ctx.index,
                              window=duration(g["conductance_window"]), step=duration(g["conductance_step"]),
                              min_samples=int(g["conductance_min_samples"]))
    if c is None:  # too little accepted H and LE for a closure ratio: the closed rate
        c = np.ones(n)
    est, sd, method, quality, info = wet_canopy_fill(
        le_est, le_sd, wet_gap, wetting=rainy | irrigated, refill_mm=refill, storage_mm=storage,
        ta=ctx.drivers["ta"], vpd=ctx.drivers["vpd"], p_air=ctx.p_air,
        available_energy=ctx.available_energy, ga=ctx.ga, ga_source=ctx.ga_source, closure=c,
        snow=ctx.snow, drivers_filled=ctx.drivers_filled,
        interval_seconds=ctx.interval.total_seconds())
    info["closure_ratio"] = c_info["ratio"]
    info["storage_mm"] = float(np.median(storage))
    return (est, sd, method, quality), info


def _widest(g: dict) -> pd.Timedelta:
    """The widest window: the rule's, but at least half the maximum fill length + 7 d, so that
    every gap up to the maximum fill length has accepted values within reach."""
    return max(duration(g["widest_window"]), duration(g["max_fill_length"]) / 2 + pd.Timedelta(days=7))


def _best(candidates: dict) -> str:
    # ties (e.g. Penman–Monteith not applicable anywhere) go to the simpler look-up
    scored = [(c["rmse"], name != "similar_conditions", name) for name, c in candidates.items()
              if c["rmse"] is not None]
    return min(scored)[2] if scored else "similar_conditions"


def _assemble(flux, obs, acc, est, sd, method, quality):
    val = np.where(acc, obs, est)
    sd_out = np.where(acc, np.nan, sd)
    m = np.where(acc, "measured", method).astype(object)
    q = np.where(acc, "measured", quality).astype(object)
    none = ~acc & ~np.isfinite(est)
    m[none] = "not_filled"
    q[none] = None  # CONTRACT: quality is measured / good / fair / poor; an unfilled value has none
    sd_out[none] = np.nan
    return val, sd_out, m, q


def _daily(index, long_gap):
    """Per local day: the share of intervals lying in gaps beyond the maximum fill length."""
    day = index.normalize()
    df = pd.DataFrame({"le_long_gap_fraction": long_gap["le"].astype(float),
                       "h_long_gap_fraction": long_gap["h"].astype(float)}, index=index)
    out = df.groupby(day).mean()
    out.index = pd.Index(out.index.date, name="date")
    return out
