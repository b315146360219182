"""Filling the meteorological drivers rg, ta and vpd before the fluxes are filled.

Order for every driver: measured (accepted) values are kept; short gaps (up to
``[gapfill] driver_interpolation_max``) are interpolated; longer ones are taken from a
neighbouring site, corrected by an ordinary least-squares regression over the common
record, when ``neighbours`` are given; what remains gets the mean diurnal course.

- **rg** is filled through the clearness index k = rg / R0, R0 the interval-mean
  potential (top-of-atmosphere) radiation of :mod:`pipeline.solar`: k is interpolated or
  averaged, and rg = k · R0. rg is therefore 0 wherever R0 is 0 (night), whatever the gap
  spans: it is never interpolated across dawn or dusk. k is only formed where R0 ≥ 50
  W m-2 (common practice: clearness at very low sun is dominated by sensor cosine errors).
- **ta** and the **vapour pressure** ea (from rh and ta, or from vpd and ta) are filled as
  plain series; vpd and rh are then recomputed from the filled ta and ea, so the three
  stay consistent. Where vpd itself was accepted, it is kept.

Method names in ``<driver>_fill_method``:

``measured``                 accepted measurement
``computed_from_humidity``   vpd from accepted rh and ta (nothing filled)
``zero_at_night``            rg where the potential radiation is 0
``interpolation``            linear in time (rg: in clearness index) across a short gap
``neighbour_site_regression`` from a neighbouring site (``<driver>_fill_source`` names it)
``mean_diurnal_course``      same time of day ±1 h over ±7 d, growing; (rg: in clearness)
``mean_clearness``           rg only: mean clearness index of the surrounding days
``unavailable``              no estimate (the variable is absent or entirely missing)
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from . import micromet, solar
from .errors import TowerflowError, warn
from .flags import accepted_values
from .gapfill_similar import SimilarityStep, diurnal_steps, fill_similar_conditions

__all__ = ["fill_met_drivers", "runs", "run_length", "FILLED_DRIVER_METHODS"]

#: driver fill methods that count as "the driver was filled" (lower the flux quality)
FILLED_DRIVER_METHODS = ("interpolation", "neighbour_site_regression", "mean_diurnal_course",
                         "mean_clearness")
_MIN_R0_FOR_CLEARNESS = 50.0  # W m-2, common practice


def runs(mask) -> tuple[np.ndarray, np.ndarray]:
    """Start and end (exclusive) indices of the runs of True in ``mask``."""
    m = np.concatenate(([False], np.asarray(mask, dtype=bool), [False]))
    d = np.diff(m.astype(np.int8))
    return np.flatnonzero(d == 1), np.flatnonzero(d == -1)


def run_length(mask) -> np.ndarray:
    """For every True element, the length of its run (0 where False)."""
    mask = np.asarray(mask, dtype=bool)
    out = np.zeros(mask.size, dtype=np.int64)
    s, e = runs(mask)
    lengths = e - s
    if s.size:
        label = np.cumsum(np.isin(np.arange(mask.size), s)) - 1
        out[mask] = lengths[label[mask]]
    return out


def _interior_short(missing, max_steps):
    """Missing intervals in runs of at most ``max_steps`` with data on both sides."""
    missing = np.asarray(missing, dtype=bool)
    s, e = runs(missing)
    ok = ((e - s) <= max_steps) & (s > 0) & (e < missing.size)
    diff = np.zeros(missing.size + 1, dtype=np.int64)
    np.add.at(diff, s[ok], 1)
    np.add.at(diff, e[ok], -1)
    return np.cumsum(diff[:-1]) > 0


def _interpolate(x):
    return pd.Series(x).interpolate(method="linear", limit_area="inside").to_numpy()


def _neighbour_arrays(neighbours, index, variable_fn):
    """{site: aligned array} of a derived variable for every neighbour that has it."""
    out = {}
    target = index.tz_convert("UTC")
    for site_id, nb in (neighbours or {}).items():
        nb = nb.copy()
        nb_index = pd.DatetimeIndex(nb.index)
        if nb_index.tz is None:
            raise TowerflowError("the neighbour site's index must be timezone-aware (interval starts)",
                                 key=f"neighbours.{site_id}")
        nb.index = nb_index.tz_convert("UTC")
        nb = nb[~nb.index.duplicated()].reindex(target)
        for col in list(nb.columns):
            flag = f"{col}_flag"
            if flag in nb.columns:
                nb[col] = nb[col].where(nb[flag].fillna(1) == 0)
        values = variable_fn(nb)
        if values is not None:
            out[str(site_id)] = np.asarray(values, dtype=float)
    return out


def _neighbour_fill(ours, to_fill, nb_arrays, *, restrict, min_common, min_r2, index):
    """Fill ``to_fill`` from neighbours by OLS regression over the common record."""
    est = np.full(ours.size, np.nan)
    source = np.full(ours.size, "", dtype=object)
    fits = []
    for site_id, theirs in nb_arrays.items():
        common = np.isfinite(ours) & np.isfinite(theirs) & restrict
        n = int(common.sum())
        if n < min_common or np.ptp(theirs[common]) == 0:
            continue
        fit = stats.linregress(theirs[common], ours[common])
        r2 = float(fit.rvalue ** 2)
        fits.append((r2, site_id, float(fit.slope), float(fit.intercept), n))
    fits.sort(reverse=True)
    report = {}
    for r2, site_id, slope, intercept, n in fits:
        entry = {"r2": r2, "slope": slope, "intercept": intercept, "n_common": n, "n_filled": 0,
                 "periods": []}
        report[site_id] = entry
        if r2 < min_r2:
            entry["rejected"] = f"r2 below {min_r2}"
            continue
        theirs = nb_arrays[site_id]
        take = to_fill & ~np.isfinite(est) & np.isfinite(theirs)
        est[take] = intercept + slope * theirs[take]
        source[take] = site_id
        entry["n_filled"] = int(take.sum())
        s, e = runs(take)
        entry["periods"] = [[str(index[a]), str(index[b - 1])] for a, b in zip(s[:200], e[:200])]
    return est, source, report


def _fill_series(x, *, index, interval, max_interp_steps, widest, nb_arrays, nb_rules):
    """Generic driver: interpolation, neighbours, mean diurnal course."""
    n = x.size
    measured = np.isfinite(x)
    out = x.copy()
    method = np.where(measured, "measured", "").astype(object)
    source = np.full(n, "", dtype=object)
    missing = ~measured
    short = _interior_short(missing, max_interp_steps)
    if short.any():
        interp = _interpolate(x)
        take = short & np.isfinite(interp)
        out[take] = interp[take]
        method[take] = "interpolation"
    report = {}
    if nb_arrays:
        todo = ~np.isfinite(out)
        est, src, report = _neighbour_fill(x, todo, nb_arrays, restrict=np.ones(n, bool), index=index,
                                           **nb_rules)
        take = todo & np.isfinite(est)
        out[take] = est[take]
        method[take] = "neighbour_site_regression"
        source[take] = src[take]
    todo = ~np.isfinite(out)
    if todo.any() and measured.any():
        est, _, _, _, _ = fill_similar_conditions(x, {}, todo, interval=interval, tolerances={},
                                                  steps=diurnal_steps(widest), min_samples=1)
        take = todo & np.isfinite(est)
        out[take] = est[take]
        method[take] = "mean_diurnal_course"
    method[~np.isfinite(out)] = "unavailable"
    return out, method, source, report


def _accepted(frame, flags, name):
    return accepted_values(frame, flags, name)


def _vapour_pressure_of(table) -> np.ndarray | None:
    """Vapour pressure, kPa, from vpd and ta or rh and ta (vpd preferred)."""
    if "ta" not in table.columns:
        return None
    ta = table["ta"].to_numpy(dtype=float)
    es = micromet.saturation_vapour_pressure(ta)
    ea = np.full(ta.size, np.nan)
    if "rh" in table.columns:
        ea = np.asarray(micromet.vapour_pressure_from_rh(ta, table["rh"].to_numpy(dtype=float)), dtype=float)
    if "vpd" in table.columns:
        vpd = table["vpd"].to_numpy(dtype=float)
        ea = np.where(np.isfinite(vpd), es - vpd, ea)
    return ea


def fill_met_drivers(frame: pd.DataFrame, flags: pd.DataFrame, site, rules: dict, *,
                     neighbours: dict | None = None):
    """Complete rg, ta and vpd (and rh) for gap-filling.

    Parameters
    ----------
    frame, flags : pandas.DataFrame
        The working frame and its flags after QC.
    site : SiteInfo
        Latitude, longitude [degree] and interval.
    rules : dict
        The ``[gapfill]`` table: ``driver_interpolation_max``, ``driver_widest_window``,
        ``neighbour_min_common``, ``neighbour_min_r2``.
    neighbours : dict of str to pandas.DataFrame, optional
        Frames of nearby sites (canonical columns, tz-aware index; NaN or a non-zero
        ``<var>_flag`` column marks a missing value).

    Returns
    -------
    columns : pandas.DataFrame
        ``rg_filled`` [W m-2], ``ta_filled`` [degC], ``vpd_filled`` [kPa], ``rh_filled`` [%],
        ``potential_radiation`` [W m-2], and ``<driver>_fill_method`` / ``_fill_source``.
    summary : dict
        Counts per method and the neighbour regressions (``driver_fill``).
    warnings : list of str
    """
    index = frame.index
    interval = site.interval
    n = len(index)
    max_steps = int(pd.Timedelta(rules["driver_interpolation_max"]) // interval)
    widest = pd.Timedelta(rules["driver_widest_window"])
    per_day = pd.Timedelta(days=1) // interval
    nb_rules = {"min_common": int(float(rules["neighbour_min_common_days"]) * per_day),
                "min_r2": float(rules["neighbour_min_r2"])}
    warnings_out: list[str] = []
    cols: dict[str, np.ndarray] = {}
    summary: dict = {}

    r0 = np.asarray(solar.interval_mean_potential_radiation(index, interval, site.latitude,
                                                            site.longitude), dtype=float)
    cols["potential_radiation"] = r0

    # --- rg through the clearness index ------------------------------------------------
    rg = _accepted(frame, flags, "rg")
    if rg is None or not np.isfinite(rg).any():
        msg = ("rg is absent" if rg is None else "rg has no accepted value") + \
            ": day and night come from solar geometry and the flux filling uses ta and vpd only"
        warn(msg)
        warnings_out.append(msg)
        cols["rg_filled"] = np.full(n, np.nan)
        cols["rg_fill_method"] = np.full(n, "unavailable", dtype=object)
        cols["rg_fill_source"] = np.full(n, "", dtype=object)
        summary["rg"] = {"unavailable": n}
    else:
        night = r0 <= 0
        measured = np.isfinite(rg)
        out = rg.copy()
        method = np.where(measured, "measured", "").astype(object)
        source = np.full(n, "", dtype=object)
        fill_night = ~measured & night
        out[fill_night] = 0.0
        method[fill_night] = "zero_at_night"
        with np.errstate(invalid="ignore", divide="ignore"):
            k = np.where(measured & (r0 >= _MIN_R0_FOR_CLEARNESS), rg / r0, np.nan)
        day_missing = ~measured & ~night
        short = _interior_short(day_missing, max_steps)
        if short.any():
            kk = pd.Series(k).interpolate(method="linear", limit_area="inside").ffill().bfill().to_numpy()
            take = short & np.isfinite(kk)
            out[take] = np.maximum(kk[take], 0.0) * r0[take]
            method[take] = "interpolation"
        rep = {}
        if neighbours:
            nb = _neighbour_arrays(neighbours, index, lambda t: t["rg"] if "rg" in t.columns else None)
            todo = ~np.isfinite(out)
            est, src, rep = _neighbour_fill(rg, todo, nb, restrict=~night, index=index, **nb_rules)
            take = todo & np.isfinite(est)
            out[take] = np.clip(est[take], 0.0, None)
            method[take] = "neighbour_site_regression"
            source[take] = src[take]
        todo = ~np.isfinite(out)
        if todo.any():
            steps = diurnal_steps(widest) + [
                SimilarityStep("mean_clearness", s.window, ()) for s in diurnal_steps(widest)]
            k_est, _, k_method, _, _ = fill_similar_conditions(
                k, {}, todo, interval=interval, tolerances={}, steps=steps, min_samples=1)
            take = todo & np.isfinite(k_est)
            out[take] = np.maximum(k_est[take], 0.0) * r0[take]
            method[take] = k_method[take]
        method[~np.isfinite(out)] = "unavailable"
        cols["rg_filled"], cols["rg_fill_method"], cols["rg_fill_source"] = out, method, source
        summary["rg"] = value_counts(method)
        if rep:
            summary["rg"]["neighbours"] = rep

    # --- ta and vapour pressure ----------------------------------------------------------
    ta = _accepted(frame, flags, "ta")
    rh = _accepted(frame, flags, "rh")
    vpd = _accepted(frame, flags, "vpd")
    if ta is None or not np.isfinite(ta).any():
        msg = "ta has no accepted value: ta, vpd and rh cannot be filled"
        warn(msg)
        warnings_out.append(msg)
        for name in ("ta", "vpd", "rh"):
            cols[f"{name}_filled"] = np.full(n, np.nan)
            cols[f"{name}_fill_method"] = np.full(n, "unavailable", dtype=object)
            cols[f"{name}_fill_source"] = np.full(n, "", dtype=object)
        summary["ta"] = summary["vpd"] = {"unavailable": n}
        return pd.DataFrame(cols, index=index), summary, warnings_out

    nb_ta = _neighbour_arrays(neighbours, index, lambda t: t["ta"] if "ta" in t.columns else None)
    ta_f, ta_m, ta_s, ta_rep = _fill_series(ta, index=index, interval=interval, max_interp_steps=max_steps,
                                            widest=widest, nb_arrays=nb_ta, nb_rules=nb_rules)
    cols["ta_filled"], cols["ta_fill_method"], cols["ta_fill_source"] = ta_f, ta_m, ta_s
    summary["ta"] = value_counts(ta_m)
    if ta_rep:
        summary["ta"]["neighbours"] = ta_rep

    # vapour pressure from accepted humidity and the (filled) ta: a measured rh or vpd keeps
    # its information where only ta had to be filled
    table = pd.DataFrame({"ta": ta_f}, index=index)
    if rh is not None:
        table["rh"] = rh
    if vpd is not None:
        table["vpd"] = vpd
    ea = _vapour_pressure_of(table)
    if ea is None or not np.isfinite(ea).any():
        msg = "neither vpd nor rh has an accepted value: vpd cannot be filled"
        warn(msg)
        warnings_out.append(msg)
        for name in ("vpd", "rh"):
            cols[f"{name}_filled"] = np.full(n, np.nan)
            cols[f"{name}_fill_method"] = np.full(n, "unavailable", dtype=object)
            cols[f"{name}_fill_source"] = np.full(n, "", dtype=object)
        summary["vpd"] = {"unavailable": n}
        return pd.DataFrame(cols, index=index), summary, warnings_out
    nb_ea = _neighbour_arrays(neighbours, index, _vapour_pressure_of)
    ea_f, ea_m, ea_s, ea_rep = _fill_series(ea, index=index, interval=interval, max_interp_steps=max_steps,
                                            widest=widest, nb_arrays=nb_ea, nb_rules=nb_rules)
    es_f = micromet.saturation_vapour_pressure(ta_f)
    ea_f = np.minimum(ea_f, es_f)  # no supersaturation in the filled series
    vpd_f = np.maximum(es_f - ea_f, 0.0)
    vpd_m = np.where(ea_m == "measured", "computed_from_humidity", ea_m).astype(object)
    # from measured humidity but with a filled ta: the method of ta
    ta_filled_here = np.isin(ta_m, FILLED_DRIVER_METHODS)
    vpd_m = np.where((ea_m == "measured") & ta_filled_here, ta_m, vpd_m).astype(object)
    vpd_s = np.where(ea_m == "measured", ta_s, ea_s).astype(object)
    if vpd is not None:
        keep = np.isfinite(vpd)
        vpd_f = np.where(keep, vpd, vpd_f)
        vpd_m[keep] = "measured"
        vpd_s[keep] = ""
    cols["vpd_filled"], cols["vpd_fill_method"], cols["vpd_fill_source"] = vpd_f, vpd_m, vpd_s
    with np.errstate(invalid="ignore", divide="ignore"):
        rh_f = np.clip(100.0 * ea_f / es_f, 0.0, 100.0)
    rh_m = ea_m.copy()
    if rh is not None:
        keep = np.isfinite(rh)
        rh_f = np.where(keep, np.clip(rh, 0.0, 100.0), rh_f)
        rh_m[keep] = "measured"
    cols["rh_filled"], cols["rh_fill_method"] = rh_f, rh_m
    summary["vpd"] = value_counts(vpd_m)
    if ea_rep:
        summary["vpd"]["neighbours"] = ea_rep
    return pd.DataFrame(cols, index=index), summary, warnings_out


def value_counts(values) -> dict:
    """{value: count} of a label array, keys as text in sorted order (for the summaries)."""
    counts = pd.Series(np.asarray(values, dtype=object)).value_counts(sort=False, dropna=False)
    out = {}
    for key, count in counts.items():
        out[str(key)] = out.get(str(key), 0) + int(count)
    return dict(sorted(out.items()))
