"""Energy-balance closure: available energy, closure statistics and the Bowen-ratio correction.

The surface energy balance of a tower footprint is

    Rn = H + LE + G0 + S_canopy

with G0 the heat flux through the soil surface. Heat-flux plates sit a few centimetres
below the surface, so G0 = G_plate + S_soil, with S_soil the heat stored in the soil layer
above the plates. The energy available to the turbulent fluxes is therefore

    A = Rn - G_plate - S_soil - S_canopy                                        (1)

(all W m-2; S terms positive when the layer warms). :func:`available_energy` returns A,
:func:`assess_closure` compares H + LE against it (CONTRACT §4 ``closure``) and adds the
Bowen-ratio-preserving closure correction of Twine et al. (2000) as extra columns.

References
----------
Twine, T. E. et al. (2000): Correcting eddy-covariance flux underestimates over a grassland.
    Agric. For. Meteorol. 103, 279-300.
Wilson, K. et al. (2002): Energy balance closure at FLUXNET sites. Agric. For. Meteorol.
    113, 223-243.
Leuning, R. et al. (2012): Reflections on the surface energy imbalance problem. Agric. For.
    Meteorol. 156, 65-74.
Ochsner, T. E., Sauer, T. J. and Horton, R. (2007): Soil heat storage measurements in
    energy balance studies. Agron. J. 99, 311-319.
de Vries, D. A. (1963): Thermal properties of soils. In: van Wijk, W. R. (ed.), Physics of
    Plant Environment, North-Holland, Amsterdam, 210-235.
"""
from __future__ import annotations

import math
import warnings as _warnings

import numpy as np
import pandas as pd

from .constants import WATER_DENSITY  # kg m-3
from .errors import RuleError, warn
from .rules import duration
from .stage import StageResult

__all__ = [
    "soil_heat_capacity",
    "soil_heat_storage",
    "available_energy",
    "closure_statistics",
    "bowen_ratio_closure_factors",
    "assess_closure",
]

#: specific heat capacity of liquid water, J kg-1 K-1 (de Vries 1963, Table 7.1 [from memory]:
#: 4.18 MJ m-3 K-1 volumetric)
WATER_SPECIFIC_HEAT = 4180.0

_DEFAULTS = {
    # the same defaults as qc_rules/standard.toml [closure]; used when a caller passes no rules
    "min_fit_intervals": 10,
    "daily_min_coverage": 0.75,
    "correction_period": "1 day",
    "correction_min_coverage": 0.5,
    "correction_min_turbulent_flux": 10.0,
    "correction_bowen_guard": 0.3,
    "correction_factor_range": [0.5, 2.0],
    "soil_bulk_density": 1300.0,
    "soil_mineral_specific_heat": 840.0,
    "soil_water_when_missing": 0.2,
}


def _closure_rules(rules: dict | None) -> dict:
    out = dict(_DEFAULTS)
    if rules is not None:
        out.update(rules.get("closure", {}) or {})
    return out


def _accepted_values(frame: pd.DataFrame, flags: pd.DataFrame | None, var: str) -> np.ndarray:
    """``frame[var]`` as float, NaN where the value is not accepted (flag != 0)."""
    values = frame[var].to_numpy(dtype=float, copy=True)
    if flags is not None and var in flags:
        values[flags[var].to_numpy() != 0] = np.nan
    return values


def _interval_seconds(index: pd.DatetimeIndex, site=None) -> float:
    if site is not None and getattr(site, "interval_minutes", None):
        return float(site.interval_minutes) * 60.0
    if len(index) > 1:
        step = pd.Series(index).diff().dropna().median()
        return float(step / pd.Timedelta(seconds=1))
    raise ValueError("cannot tell the averaging interval of a frame with one row and no site")


# ---------------------------------------------------------------------------
# soil heat storage
# ---------------------------------------------------------------------------

def soil_heat_capacity(swc, *, bulk_density: float = 1300.0,
                       mineral_specific_heat: float = 840.0):
    """Volumetric heat capacity of moist soil.

    Parameters
    ----------
    swc : array_like
        Volumetric soil water content [m3 m-3].
    bulk_density : float
        Dry bulk density of the soil [kg m-3].
    mineral_specific_heat : float
        Specific heat capacity of the dry soil solids [J kg-1 K-1].

    Returns
    -------
    numpy.ndarray
        Volumetric heat capacity Cs [J m-3 K-1].

    Notes
    -----
    Cs = rho_b * c_s + theta * rho_w * c_w (de Vries 1963; as used by Ochsner et al. 2007
    [from memory]); the heat capacity of the soil air is neglected (about 1.2e3 J m-3 K-1,
    under 0.1 % of Cs).
    """
    theta = np.asarray(swc, dtype=float)
    return bulk_density * mineral_specific_heat + theta * WATER_DENSITY * WATER_SPECIFIC_HEAT


def soil_heat_storage(t_soil, swc, interval_seconds: float, plate_depth_m: float, *,
                      bulk_density: float = 1300.0, mineral_specific_heat: float = 840.0):
    """Heat stored in the soil layer above the heat-flux plates.

    Parameters
    ----------
    t_soil : array_like
        Interval-mean temperature of the layer above the plates [degC], on a regular
        series of intervals.
    swc : array_like or float
        Volumetric soil water content of the layer [m3 m-3].
    interval_seconds : float
        Length of one interval [s].
    plate_depth_m : float
        Depth of the plates, i.e. thickness of the layer [m].
    bulk_density, mineral_specific_heat : float
        See :func:`soil_heat_capacity` [kg m-3], [J kg-1 K-1].

    Returns
    -------
    numpy.ndarray
        S_soil [W m-2], positive while the layer warms; NaN where the temperature change
        cannot be formed (a missing neighbour).

    Notes
    -----
    S = Cs * dz * dT/dt (Ochsner et al. 2007, eq. 2 [from memory]). The temperatures are
    interval means, so the change across interval i is estimated by the centred difference
    (T[i+1] - T[i-1]) / (2 dt), which is centred on interval i; at the ends of the series a
    one-sided difference is used.
    """
    t = np.asarray(t_soil, dtype=float)
    cs = soil_heat_capacity(swc, bulk_density=bulk_density,
                            mineral_specific_heat=mineral_specific_heat)
    if t.size < 2:
        return np.full(t.shape, np.nan)
    dtdt = np.gradient(t, interval_seconds)  # K s-1; NaN next to missing values
    return cs * plate_depth_m * dtdt


def available_energy(frame: pd.DataFrame, flags: pd.DataFrame | None = None, *,
                     rules: dict | None = None, site=None) -> pd.Series:
    """Energy available to the turbulent fluxes, A = Rn - G - S_soil - S_canopy.

    Parameters
    ----------
    frame : pandas.DataFrame
        The working frame (needs ``rn``; uses ``g``, ``s_canopy``, ``t_soil``, ``swc`` when
        present).
    flags : pandas.DataFrame, optional
        The flags; when given, only accepted values (flag 0) enter and A is NaN wherever a
        term that is present is not accepted.
    rules : dict, optional
        The rule set; ``[closure]`` supplies the soil bulk density, the heat capacity of
        the solids and the water content used when ``swc`` is missing.
    site : SiteInfo, optional
        When ``site.plate_depth_m`` is set and ``t_soil`` exists, the heat stored above
        the plates is added to G.

    Returns
    -------
    pandas.Series
        ``available_energy`` [W m-2] on the frame's index.

    Warns
    -----
    TowerflowWarning
        Without ``g``: A is Rn only (closure is then meaningful on daily sums only,
        CONTRACT §1); with plates at depth but no ``t_soil``; storage with no ``swc``.

    Notes
    -----
    Sign convention (eq. 1 of the module): G into the soil positive, storage terms positive
    while the layer gains heat; the storage terms are *included* in the available energy
    by subtracting them. LE above A (advection) is not an error and is not touched here.
    """
    cfg = _closure_rules(rules)
    a = _accepted_values(frame, flags, "rn")
    if "g" in frame:
        a = a - _accepted_values(frame, flags, "g")
        plate_depth = getattr(site, "plate_depth_m", None) if site is not None else None
        if plate_depth:
            if "t_soil" in frame:
                t_soil = _accepted_values(frame, flags, "t_soil")
                if "swc" in frame:
                    swc = _accepted_values(frame, flags, "swc")
                    swc = np.where(np.isfinite(swc), swc, float(cfg["soil_water_when_missing"]))
                else:
                    warn(f"no swc: the soil heat storage above the plates uses a water content of "
                         f"{cfg['soil_water_when_missing']} m3 m-3 (rules key closure.soil_water_when_missing)")
                    swc = float(cfg["soil_water_when_missing"])
                storage = soil_heat_storage(
                    t_soil, swc, _interval_seconds(frame.index, site), float(plate_depth),
                    bulk_density=float(cfg["soil_bulk_density"]),
                    mineral_specific_heat=float(cfg["soil_mineral_specific_heat"]))
                a = a - storage
            else:
                warn("site.plate_depth_m is set but there is no t_soil: the heat stored above "
                     "the plates is left out of the available energy")
    else:
        warn("no g (ground heat flux): available energy is Rn only; closure is assessed on "
             "daily sums, where G nearly cancels (CONTRACT §1)")
    if "s_canopy" in frame:
        a = a - _accepted_values(frame, flags, "s_canopy")
    return pd.Series(a, index=frame.index, name="available_energy")


# ---------------------------------------------------------------------------
# statistics
# ---------------------------------------------------------------------------

def _num(x) -> float | None:
    """A JSON-safe float (None for NaN/inf)."""
    if x is None:
        return None
    x = float(x)
    return x if math.isfinite(x) else None


def closure_statistics(turbulent, available, *, min_n: int = 3) -> dict:
    """OLS of H + LE on available energy, and the energy-balance ratio.

    Parameters
    ----------
    turbulent : array_like
        H + LE [any energy unit, e.g. W m-2 or MJ m-2 d-1].
    available : array_like
        Rn - G (- storage) in the same unit.
    min_n : int
        Fewer finite pairs than this give null statistics.

    Returns
    -------
    dict
        ``ebr`` = sum(H + LE) / sum(A); ``slope``, ``intercept`` (unit of the inputs),
        ``r2`` of the ordinary least-squares fit y = slope * x + intercept; ``n``.
        Values that cannot be formed are None (JSON null).

    References
    ----------
    Wilson et al. (2002), eqs. for EBR and the OLS slope [from memory].
    """
    y = np.asarray(turbulent, dtype=float)
    x = np.asarray(available, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y)
    x, y = x[ok], y[ok]
    n = int(x.size)
    out = {"ebr": None, "slope": None, "intercept": None, "r2": None, "n": n}
    if n < max(min_n, 1):
        return out
    sx = x.sum()
    out["ebr"] = _num(y.sum() / sx) if sx != 0 else None
    if n >= 2:
        xm, ym = x.mean(), y.mean()
        sxx = np.sum((x - xm) ** 2)
        syy = np.sum((y - ym) ** 2)
        sxy = np.sum((x - xm) * (y - ym))
        if sxx > 0:
            slope = sxy / sxx
            out["slope"] = _num(slope)
            out["intercept"] = _num(ym - slope * xm)
            out["r2"] = _num(sxy * sxy / (sxx * syy)) if syy > 0 else None
    return out


def _local_day(index: pd.DatetimeIndex) -> pd.DatetimeIndex:
    """The local calendar day of each interval start, as naive normalized Timestamps."""
    idx = index.tz_localize(None) if index.tz is not None else index
    return idx.normalize()


def _period_labels(index: pd.DatetimeIndex, period: pd.Timedelta, *,
                   days: pd.DatetimeIndex | None = None) -> np.ndarray:
    """Integer label of the correction period (whole local days from the first day);
    ``days``: the local day of each interval when known (:func:`_local_day`)."""
    if period <= pd.Timedelta(0) or period % pd.Timedelta(days=1) != pd.Timedelta(0):
        raise RuleError(f"must be a whole number of days, got {period}", key="closure.correction_period")
    days = _local_day(index) if days is None else days
    n_days = int(period / pd.Timedelta(days=1))
    stamps = days.to_numpy()
    ordinal = (stamps - stamps[0]) // np.timedelta64(1, "D")  # whole days since the first
    return ordinal // n_days


def bowen_ratio_closure_factors(h, le, available, labels, *, intervals_per_period: float,
                                min_coverage: float, min_turbulent_flux: float,
                                bowen_guard: float, factor_range) -> pd.DataFrame:
    """Per-period closure factors of the Bowen-ratio-preserving correction (Twine et al. 2000).

    Parameters
    ----------
    h, le, available : array_like
        Accepted H, LE and available energy per interval [W m-2] (NaN where not accepted).
    labels : array_like of int
        The period of each interval.
    intervals_per_period : float
        How many intervals a full period holds.
    min_coverage : float
        Smallest fraction of the period's intervals with H, LE and A all accepted [-].
    min_turbulent_flux : float
        Smallest |mean(H + LE)| over those intervals [W m-2].
    bowen_guard : float
        Smallest |1 + beta|, beta = sum(H) / sum(LE) [-]; near -1 the factor is unbounded.
    factor_range : (float, float)
        Plausible factors; outside it the period is skipped [-].

    Returns
    -------
    pandas.DataFrame
        Indexed by period label: ``n`` paired intervals, ``sum_available``,
        ``sum_turbulent`` (W m-2 summed over intervals), ``bowen_ratio``, ``factor``
        (NaN when skipped) and ``skip_reason`` ("" when corrected).

    Notes
    -----
    factor = sum(A) / sum(H + LE) over the period's paired intervals. Multiplying H and LE
    by the same factor keeps every interval's and the period's Bowen ratio and closes the
    period's sums: sum(f H + f LE) = sum(A). This equals Twine et al. (2000)'s
    LE' = A / (1 + beta), H' = beta LE' applied to the period sums.
    """
    h = np.asarray(h, dtype=float)
    le = np.asarray(le, dtype=float)
    a = np.asarray(available, dtype=float)
    paired = np.isfinite(h) & np.isfinite(le) & np.isfinite(a)
    df = pd.DataFrame({
        "label": np.asarray(labels),
        "n": paired.astype(int),
        "h": np.where(paired, h, 0.0),
        "le": np.where(paired, le, 0.0),
        "a": np.where(paired, a, 0.0),
    })
    g = df.groupby("label").sum()  # pandas' compensated sums
    n = g["n"].to_numpy()
    s_h, s_le, s_a = g["h"].to_numpy(), g["le"].to_numpy(), g["a"].to_numpy()
    sum_t = s_h + s_le
    with np.errstate(divide="ignore", invalid="ignore"):
        bowen = s_h / s_le
        factor = s_a / sum_t
        mean_t = sum_t / n
        one_plus_beta = sum_t / s_le  # = 1 + beta without forming beta twice
    lo, hi = float(factor_range[0]), float(factor_range[1])
    reason = np.full(len(g), "", dtype=object)
    conditions = [
        (n < min_coverage * intervals_per_period, "too few intervals with H, LE, Rn and G accepted"),
        (~(np.abs(mean_t) >= min_turbulent_flux), "H + LE too small"),
        (np.isfinite(one_plus_beta) & (np.abs(one_plus_beta) < bowen_guard), "Bowen ratio near -1"),
        (~((factor >= lo) & (factor <= hi)), "factor outside the plausible range"),
    ]
    for mask, text in conditions:  # the first reason that applies is kept
        reason[mask & (reason == "")] = text
    out = pd.DataFrame({
        "n": n.astype(int),
        "sum_available": s_a,
        "sum_turbulent": sum_t,
        "bowen_ratio": bowen,
        "factor": np.where(reason == "", factor, np.nan),
        "skip_reason": reason,
    }, index=g.index)
    return out


def _records(df: pd.DataFrame) -> list[dict]:
    out = []
    for row in df.to_dict(orient="records"):
        out.append({k: (_num(v) if isinstance(v, (float, np.floating)) else
                        int(v) if isinstance(v, (np.integer,)) else v) for k, v in row.items()})
    return out


def assess_closure(frame: pd.DataFrame, flags: pd.DataFrame, site, rules: dict) -> StageResult:
    """Energy-balance closure statistics and the Bowen-ratio closure correction.

    Parameters
    ----------
    frame, flags : pandas.DataFrame
        The working frame and its flags after QC (a value is accepted where its flag is 0).
        ``snow_or_frozen`` (bool column), when present, keeps intervals out of the statistics.
    site : SiteInfo
        The site (interval, ``plate_depth_m``).
    rules : dict
        The rule set; thresholds in ``[closure]``.

    Returns
    -------
    StageResult
        columns: ``available_energy`` [W m-2], ``h_closed``, ``le_closed`` [W m-2] (NaN
        where the day was not corrected or the measurement is not accepted),
        ``closure_factor`` [-] (the period's factor on every interval of a corrected
        period), ``closure_corrected`` (bool: a closed value was formed for this interval).
        summary: ``closure`` (CONTRACT §4, intervals; on daily sums when ``g`` is missing),
        ``closure_basis``, ``closure_daily``, ``closure_monthly``, ``closure_diurnal``,
        ``closure_correction`` (counts of corrected and skipped periods).
        daily: per local day ``ebr`` (daily sums), ``closure_factor``, ``closure_corrected``,
        ``closure_skip_reason``, ``available_energy_mj``, ``turbulent_flux_mj`` [MJ m-2 d-1],
        ``n_closure_intervals``.

    Notes
    -----
    Statistics use intervals where H, LE, Rn and G (and s_canopy, t_soil for storage when
    used) are all accepted and the interval is not snow-covered or frozen. Daily statistics
    (Leuning et al. 2012) use days on which at least ``daily_min_coverage`` of the
    intervals are complete, with the daily value = mean over those intervals times the
    day length, in MJ m-2 d-1. LE larger than A (advection) is kept as it is.
    """
    cfg = _closure_rules(rules)
    warnings: list[str] = []
    with _warnings.catch_warnings(record=True) as caught:
        _warnings.simplefilter("always")
        a = available_energy(frame, flags, rules=rules, site=site)
    for item in caught:
        text = str(item.message)
        warnings.append(text)
        warn(text)
    has_g = "g" in frame
    index = frame.index
    dt = _interval_seconds(index, site)
    per_day = 86400.0 / dt

    h = _accepted_values(frame, flags, "h")
    le = _accepted_values(frame, flags, "le")
    av = a.to_numpy(dtype=float)
    frozen = np.zeros(len(frame), dtype=bool)
    if "snow_or_frozen" in frame:
        frozen = frame["snow_or_frozen"].fillna(False).to_numpy(dtype=bool)
    turbulent = h + le
    use = np.isfinite(turbulent) & np.isfinite(av) & ~frozen
    y = np.where(use, turbulent, np.nan)
    x = np.where(use, av, np.nan)
    min_n = int(cfg["min_fit_intervals"])

    interval_stats = closure_statistics(y, x, min_n=min_n)

    # --- daily sums (Leuning et al. 2012) ---
    day = _local_day(index)
    gd = pd.DataFrame({"y": y, "x": x, "n": use.astype(int)}, index=day).groupby(level=0)
    n_day = gd["n"].sum()
    cover = n_day / per_day
    to_mj = 86400.0 / 1e6  # mean W m-2 over a day -> MJ m-2 d-1
    day_means = gd[["y", "x"]].mean()  # pandas' compensated means
    day_y = day_means["y"] * to_mj
    day_x = day_means["x"] * to_mj
    complete = cover >= float(cfg["daily_min_coverage"])
    daily_stats = closure_statistics(day_y[complete], day_x[complete], min_n=3)
    daily_stats["unit"] = "MJ m-2 d-1"

    if has_g:
        summary_closure = interval_stats
        basis = "intervals"
    else:
        summary_closure = {k: daily_stats[k] for k in ("ebr", "slope", "intercept", "r2", "n")}
        basis = "daily sums of Rn only (no g)"

    # --- monthly ---
    month_code, month_values = pd.factorize(
        pd.PeriodIndex(index.tz_localize(None) if index.tz is not None else index, freq="M"))
    if not has_g:
        day_month = day_x.index.to_period("M")
    monthly = []
    for k, m in enumerate(month_values):
        if has_g:
            sel = month_code == k
            s = closure_statistics(y[sel], x[sel], min_n=min_n)
        else:
            msel = complete & (day_month == m)
            s = closure_statistics(day_y[msel], day_x[msel], min_n=3)
        monthly.append({"month": str(m), **s})

    # --- mean diurnal course ---
    tod = (index - index.normalize()) if index.tz is None else (index.tz_localize(None) - index.tz_localize(None).normalize())
    minutes = (tod // pd.Timedelta(minutes=1)).to_numpy()
    gc = pd.DataFrame({"y": y, "x": x}).groupby(minutes).mean()  # pandas' compensated means
    n_minute = np.bincount(np.searchsorted(gc.index.to_numpy(), minutes), weights=use, minlength=len(gc))
    diurnal = [{"time": f"{int(mi) // 60:02d}:{int(mi) % 60:02d}",
                "turbulent_flux": _num(yt), "available_energy": _num(xa), "n": int(nn)}
               for mi, yt, xa, nn in zip(gc.index.tolist(), gc["y"].tolist(), gc["x"].tolist(), n_minute.tolist())]

    # --- Bowen-ratio-preserving correction (Twine et al. 2000) on period sums ---
    period = duration(cfg["correction_period"])
    labels = _period_labels(index, period, days=day)
    n_days_period = max(int(round(period / pd.Timedelta(days=1))), 1)
    ok_h = np.isfinite(h)
    ok_le = np.isfinite(le)
    fac_table = bowen_ratio_closure_factors(
        np.where(frozen, np.nan, h), np.where(frozen, np.nan, le), av, labels,
        intervals_per_period=per_day * n_days_period,
        min_coverage=float(cfg["correction_min_coverage"]),
        min_turbulent_flux=float(cfg["correction_min_turbulent_flux"]),
        bowen_guard=float(cfg["correction_bowen_guard"]),
        factor_range=cfg["correction_factor_range"])
    factor = fac_table["factor"].reindex(labels).to_numpy(dtype=float)
    reason = fac_table["skip_reason"].reindex(labels).to_numpy(dtype=object)
    # snow/frozen intervals are left uncorrected: their balance was not part of the factor
    factor_iv = np.where(frozen, np.nan, factor)
    h_closed = np.where(ok_h, h * factor_iv, np.nan)
    le_closed = np.where(ok_le, le * factor_iv, np.nan)
    corrected = np.isfinite(h_closed) | np.isfinite(le_closed)
    columns = pd.DataFrame({
        "available_energy": av,
        "h_closed": h_closed,
        "le_closed": le_closed,
        "closure_factor": factor_iv,
        "closure_corrected": corrected,
    }, index=index)

    # --- per-day table ---
    ok_day = complete.to_numpy()
    daily = pd.DataFrame({
        "ebr": np.where(ok_day, (day_y / day_x).to_numpy(), np.nan),
        "available_energy_mj": np.where(ok_day, day_x.to_numpy(), np.nan),
        "turbulent_flux_mj": np.where(ok_day, day_y.to_numpy(), np.nan),
        "n_closure_intervals": n_day.to_numpy().astype(int),
    }, index=day_y.index)
    # a day lies in one correction period: its factor and reason are those of its first interval
    first_of_day = np.searchsorted(day.to_numpy(), daily.index.to_numpy()) if day.is_monotonic_increasing \
        else pd.Series(np.arange(len(day)), index=day).groupby(level=0).min().reindex(daily.index).to_numpy()
    day_factor = pd.Series(factor[first_of_day], index=daily.index)
    daily["closure_factor"] = day_factor
    daily["closure_corrected"] = day_factor.notna()
    daily["closure_skip_reason"] = pd.Series(reason[first_of_day], index=daily.index).fillna("").astype(str)
    daily.index.name = "date"

    n_periods = int(len(fac_table))
    skipped = fac_table.loc[fac_table["skip_reason"] != "", "skip_reason"].value_counts()
    correction = {
        "period": str(cfg["correction_period"]),
        "n_periods": n_periods,
        "n_corrected": int((fac_table["skip_reason"] == "").sum()),
        "skipped": {str(k): int(v) for k, v in skipped.items()},
        "median_factor": _num(np.median(good)) if (good := fac_table["factor"].dropna().to_numpy()).size else None,
    }
    summary = {
        "closure": summary_closure,
        "closure_basis": basis,
        "closure_daily": daily_stats,
        "closure_monthly": monthly,
        "closure_diurnal": diurnal,
        "closure_correction": correction,
    }
    return StageResult(columns=columns, summary=summary, warnings=warnings, daily=daily)
