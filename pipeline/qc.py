"""Rule-based quality control of every canonical variable (the QC stage).

:func:`run_qc` applies the rule set (``qc_rules/*.toml``, see :mod:`pipeline.rules`) to the
working frame and flags (DEVELOPERS.md, "The working frame") in this order:

1. small pyranometer offsets (rg, sw_out) set to zero; range (bit 2); rh in (100, max]
   clipped to 100 (bit 128 above ``[met] rh_clip_accepted_up_to``); vpd in [min, 0) set to 0;
2. meteorological tests, never the flux despiker: flat line (bit 256), step (bit 128),
   rg above the clear-sky envelope (bit 128);
3. consistency: sw_out above rg, lw_in and lw_out against the air's black-body emission
   (bit 128);
4. generic instrument rejections from passthrough diagnostics (bit 8);
5. despiking of the fluxes (bit 4, Papale et al. 2006, :mod:`pipeline.despike`) on the
   values accepted so far, day and night separately;
6. wet sensors (bit 16), low turbulence (bit 32), excluded wind sectors (bit 512), snow or
   frozen conditions (bit 1024).

Every test is a small pure function below; ``run_qc`` only wires them to the rules.

Decisions documented in ``qc_rules/standard.toml``: rh above 100 % is clipped to 100 %;
up to ``[met] rh_clip_accepted_up_to`` (103 %, within a capacitive sensor's accuracy at
saturation) it stays accepted, above that it carries bit 128 and is rejected (a wet or
drifting sensor). Step and
clear-sky failures use bit 128 (no bit of their own in CONTRACT §4). Where u* itself is
missing or rejected, ``ustar_below_threshold`` is False and no bit 32 is set.

References
----------
Allen, R. G., 1996. Assessing integrity of weather data for reference evapotranspiration
estimation. J. Irrig. Drain. Eng. 122, 97-106.
Estévez, J., Gavilán, P., Giráldez, J. V., 2011. Guidelines on validation procedures for
meteorological data from automatic weather stations. J. Hydrol. 402, 144-154.
Meek, D. W., Hatfield, J. L., 1994. Data quality checking for single station
meteorological databases. Agric. For. Meteorol. 69, 85-109.
Papale, D., et al., 2006. Biogeosciences 3, 571-583.
Reichstein, M., et al., 2005. Global Change Biology 11, 1424-1439.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from . import flags as fb
from .config import CANONICAL_VARIABLES, SiteInfo
from .constants import ZERO_CELSIUS
from .despike import despike
from .errors import RuleError, warn
from .rules import duration, merge_rules, standard_rules

__all__ = [
    "QCResult",
    "STEFAN_BOLTZMANN",
    "out_of_range",
    "step_outliers",
    "flat_line",
    "above_clear_sky",
    "wetting",
    "in_sectors",
    "snow_days_by_albedo",
    "ustar_thresholds",
    "day_or_night",
    "run_qc",
]

#: Stefan-Boltzmann constant [W m-2 K-4] (CODATA 2018, exact from h, k and c).
STEFAN_BOLTZMANN = 5.670374419e-8


@dataclass
class QCResult:
    """What the QC stage returns (new objects; the inputs are untouched).

    Attributes
    ----------
    frame : pandas.DataFrame
        The working frame with QC adjustments (clipped rh, zeroed pyranometer offsets,
        vpd >= 0) and boolean helper columns ``is_day`` (accepted rg >= 20 W m-2, else
        clear-sky rg >= 20 W m-2), ``snow_or_frozen``, ``ustar_below_threshold`` (False
        where u* is unknown) and ``rain_wetted`` (rain or irrigation, and the drying time
        after it, whatever the analyser).
    flags : pandas.DataFrame
        The flags with the QC bits added.
    summary : dict
        JSON-serialisable: ``spikes``, ``rejected``, ``ustar_threshold``, ``qc``.
    warnings : list of str
        One-line warnings for the report.
    """

    frame: pd.DataFrame
    flags: pd.DataFrame
    summary: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)


# ---------------------------------------------------------------------------
# single tests: pure functions over arrays
# ---------------------------------------------------------------------------

def out_of_range(values, low: float, high: float) -> np.ndarray:
    """True where a (non-missing) value lies outside [low, high]."""
    x = np.asarray(values, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.isfinite(x) & ((x < low) | (x > high))


def step_outliers(values, limit: float) -> np.ndarray:
    """Values that change by more than ``limit`` from the value before them.

    An outlier (a step in and a step back out of opposite sign, both above the limit)
    flags only the outlier; a lasting jump flags only the first value after it; the
    value after an outlier is not flagged for the step back. Steps are taken between
    consecutive intervals only (undefined next to a gap). The kind of test of Meek and
    Hatfield (1994) and Estévez et al. (2011); the outlier/jump rule is ours.

    Parameters
    ----------
    values : array_like
        A regular series, missing as NaN.
    limit : float
        Largest credible change between consecutive intervals, same unit.

    Returns
    -------
    numpy.ndarray of bool
    """
    x = np.asarray(values, dtype=float)
    n = x.size
    step_in = np.full(n, np.nan)
    if n > 1:
        step_in[1:] = np.diff(x)
    step_out = np.append(step_in[1:], np.nan)
    with np.errstate(invalid="ignore"):
        big_in = np.abs(step_in) > limit
        big_out = np.abs(step_out) > limit
        outlier = big_in & big_out & (np.sign(step_in) == -np.sign(step_out))
    after_outlier = np.append(False, outlier[:-1]) if n else outlier
    jump = big_in & ~outlier & ~after_outlier
    return outlier | jump


def flat_line(values, min_run: int, allowed=(), allowed_where=None) -> np.ndarray:
    """Values that belong to a run of at least ``min_run`` identical consecutive values.

    Parameters
    ----------
    values : array_like
        A regular series, missing as NaN (a gap ends a run).
    min_run : int
        Shortest run that counts as a stuck sensor (count of intervals).
    allowed : sequence of float
        Values that may legitimately repeat (0 mm of rain, 0 W m-2 at night).
    allowed_where : array_like of bool, optional
        Where the allowed values are legitimate (e.g. 0 W m-2 only at night); default
        everywhere. A run of zeros from a dead pyranometer is then flagged in daylight.

    Returns
    -------
    numpy.ndarray of bool
    """
    x = np.asarray(values, dtype=float)
    n = x.size
    if n == 0:
        return np.zeros(0, dtype=bool)
    same = np.zeros(n, dtype=bool)
    same[1:] = (x[1:] == x[:-1]) & np.isfinite(x[1:])
    run_id = np.cumsum(~same)
    run_len = np.bincount(run_id)[run_id]
    stuck = np.isfinite(x) & (run_len >= min_run)
    where = np.ones(n, dtype=bool) if allowed_where is None else np.asarray(allowed_where, dtype=bool)
    for value in allowed:
        stuck &= ~(np.isclose(x, float(value), rtol=0.0, atol=1e-9) & where)
    return stuck


def above_clear_sky(rg, clear_sky, factor: float, allowance: float) -> np.ndarray:
    """Global radiation above the clear-sky envelope: rg > factor * clear_sky + allowance.

    Cloud edges only reduce or briefly enhance rg below the envelope, so they pass; a
    dirty dome cannot be caught here (it reads low), a wrong clock or a reflection can.
    Envelope after Allen (1996); the margin is common practice.
    """
    x = np.asarray(rg, dtype=float)
    env = factor * np.asarray(clear_sky, dtype=float) + allowance
    with np.errstate(invalid="ignore"):
        return np.isfinite(x) & (x > env)


def wetting(times: pd.DatetimeIndex, interval: pd.Timedelta, precip, irrigated,
            rain_above: float, dry_after: pd.Timedelta) -> tuple[np.ndarray, np.ndarray]:
    """Rainy or irrigated intervals, and those still wet afterwards.

    Parameters
    ----------
    times : pandas.DatetimeIndex
        Interval starts.
    interval : pandas.Timedelta
        The site interval.
    precip : array_like
        Precipitation per interval, mm (NaN: unknown, counts as dry).
    irrigated : array_like of bool
        Intervals during which the site was irrigated.
    rain_above : float
        mm per interval above which an interval is rainy.
    dry_after : pandas.Timedelta
        Time after the end of the last wetting during which sensors stay wet.

    Returns
    -------
    wet_now, wetted : numpy.ndarray of bool
        Rain or irrigation in the interval; and that or within ``dry_after`` of its end.
    """
    p = np.asarray(precip, dtype=float)
    with np.errstate(invalid="ignore"):
        wet_now = (np.nan_to_num(p, nan=-np.inf) > rain_above) | np.asarray(irrigated, dtype=bool)
    t = times.asi8.astype(float)
    last = pd.Series(np.where(wet_now, t, np.nan)).ffill().to_numpy()
    reach = (interval + dry_after).value
    with np.errstate(invalid="ignore"):
        wetted = np.isfinite(last) & ((t - last) < reach)
    return wet_now, wetted | wet_now


def in_sectors(wind_dir, sectors) -> np.ndarray:
    """Wind directions inside any [from, to] sector (degrees clockwise; from > to wraps north).

    Both ends are inclusive. Missing directions are outside every sector.
    """
    wd = np.mod(np.asarray(wind_dir, dtype=float), 360.0)
    out = np.zeros(wd.shape, dtype=bool)
    with np.errstate(invalid="ignore"):
        for start, end in sectors:
            start, end = float(start) % 360.0, float(end) % 360.0
            if start <= end:
                out |= (wd >= start) & (wd <= end)
            else:
                out |= (wd >= start) | (wd <= end)
    return out & np.isfinite(wd)


def snow_days_by_albedo(times: pd.DatetimeIndex, rg, sw_out, albedo_above: float,
                        rg_above: float) -> np.ndarray:
    """Intervals of local days whose albedo, sum(sw_out) / sum(rg) over rg > rg_above, is high.

    The daily ratio of sums rather than single intervals: albedo at low sun is inflated
    by the cosine response and forward scattering, and snow lies all day. Intervals of
    days without enough sun are not judged (False).

    Parameters
    ----------
    times : pandas.DatetimeIndex
        Interval starts at the site's local standard time.
    rg, sw_out : array_like
        Accepted incoming and reflected shortwave radiation, W m-2 (NaN where rejected).
    albedo_above : float
        Albedo above which the day counts as snow covered.
    rg_above : float
        W m-2: only intervals with more global radiation enter the ratio.
    """
    rg = np.asarray(rg, dtype=float)
    sw = np.asarray(sw_out, dtype=float)
    with np.errstate(invalid="ignore"):
        use = np.isfinite(rg) & np.isfinite(sw) & (rg > rg_above)
    day = times.normalize()
    # grouped by the days' int64 stamps (one per local day, as the Timestamps themselves, but
    # without boxing every interval's stamp into an object array)
    keys = np.asarray(day) if day.hasnans else day.asi8
    sums = pd.DataFrame({"rg": np.where(use, rg, 0.0), "sw": np.where(use, sw, 0.0)}).groupby(
        keys).transform("sum")
    with np.errstate(invalid="ignore", divide="ignore"):
        albedo = sums["sw"].to_numpy() / sums["rg"].to_numpy()
    return np.isfinite(albedo) & (albedo > albedo_above)


def ustar_thresholds(times: pd.DatetimeIndex, threshold: float, monthly=()) -> np.ndarray:
    """The u* threshold of every interval, m s-1: monthly values (January first) or one value."""
    if monthly:
        table = np.asarray(monthly, dtype=float)
        return table[np.asarray(times.month) - 1]
    return np.full(len(times), float(threshold))


def day_or_night(rg, rg_accepted, geometric_day, night_rg_below: float) -> np.ndarray:
    """Day (True) from accepted rg >= night_rg_below, else from solar geometry.

    Papale et al. (2006) take night as rg < 20 W m-2.
    """
    rg = np.asarray(rg, dtype=float)
    ok = np.asarray(rg_accepted, dtype=bool) & np.isfinite(rg)
    with np.errstate(invalid="ignore"):
        return np.where(ok, rg >= night_rg_below, np.asarray(geometric_day, dtype=bool))


# ---------------------------------------------------------------------------
# the stage
# ---------------------------------------------------------------------------

def _site_interval(site: SiteInfo, index: pd.DatetimeIndex) -> pd.Timedelta:
    if site.interval_minutes is not None:
        return site.interval
    if len(index) > 1:
        return index[1] - index[0]
    return pd.Timedelta(minutes=30)


def _solar(index: pd.DatetimeIndex, interval: pd.Timedelta, site: SiteInfo):
    """Interval-mean potential and clear-sky radiation (pipeline.solar), W m-2."""
    from . import solar

    potential = np.asarray(solar.interval_mean_potential_radiation(
        index, interval, site.latitude, site.longitude), dtype=float)
    clear = np.asarray(solar.clear_sky_radiation(potential, site.elevation_m), dtype=float)
    return potential, clear


def _values(frame: pd.DataFrame, var: str) -> np.ndarray:
    return frame[var].to_numpy(dtype=float, copy=True)


def _accepted_values(frame, flags, var) -> np.ndarray:
    x = _values(frame, var)
    x[flags[var].to_numpy() != 0] = np.nan
    return x


def _check_monthly(monthly) -> list[float]:
    if monthly and len(monthly) != 12:
        raise RuleError(f"must hold 12 monthly thresholds (January first), got {len(monthly)}",
                        key="ustar.monthly")
    return [float(v) for v in monthly]


def run_qc(frame: pd.DataFrame, flags: pd.DataFrame, site: SiteInfo, rules: dict) -> QCResult:
    """Apply the rule set to the working frame: adjusted values, flag bits, helper columns.

    Parameters
    ----------
    frame : pandas.DataFrame
        The working frame (DEVELOPERS.md); not modified.
    flags : pandas.DataFrame
        One int32 bitmask column per canonical variable present; not modified.
    site : SiteInfo
        The site (latitude, longitude, elevation, irga default, interval).
    rules : dict
        The effective rule set (:func:`pipeline.rules.load_rules`); keys it lacks take the
        standard's value.

    Returns
    -------
    QCResult
        New frame and flags, summary (``spikes``, ``rejected``, ``ustar_threshold``, ``qc``)
        and warnings. See the module notes for the order of the tests.

    Raises
    ------
    RuleError
        ``[ustar] monthly`` without 12 values.
    """
    rules = merge_rules(standard_rules(), rules or {})
    out = frame.copy()
    fl = flags.copy()
    index = out.index
    interval = _site_interval(site, index)
    messages: list[str] = []
    variables = [v for v in CANONICAL_VARIABLES if v in out.columns]
    for var in variables:
        if var not in fl.columns:
            fl[var] = np.zeros(len(out), dtype=fb.FLAG_DTYPE)
        fb.set_bit(fl, var, out[var].isna().to_numpy() & (fl[var].to_numpy() == 0), fb.MISSING)
    var_rules = rules.get("variables", {})
    met = rules["met"]
    details: dict = {}

    potential, clear = _solar(index, interval, site)
    geometric_night = potential <= 0.0

    # 1. pyranometer offsets, range, rh clipping, negative vpd
    offset = float(met["night_rg_offset"])
    for var in ("rg", "sw_out"):
        if var in variables:
            x = _values(out, var)
            with np.errstate(invalid="ignore"):
                small = (np.abs(x) <= offset) & (geometric_night | (x < 0.0))
            small &= x != 0.0
            x[small] = 0.0
            out[var] = x
            details[f"{var}_offsets_zeroed"] = int(small.sum())
    for var in variables:
        vr = var_rules.get(var, {})
        if "range" not in vr:
            continue
        low, high = (float(v) for v in vr["range"])
        x = _values(out, var)
        if var == "rh":
            with np.errstate(invalid="ignore"):
                clip = np.isfinite(x) & (x > 100.0) & (x <= high)
            with np.errstate(invalid="ignore"):
                suspect = clip & (x > float(met["rh_clip_accepted_up_to"]))
            x[clip] = 100.0
            out[var] = x
            fb.set_bit(fl, var, suspect, fb.CONSISTENCY)
            details["rh_clipped"] = int(clip.sum())
            details["rh_clipped_and_rejected"] = int(suspect.sum())
        bad = out_of_range(x, low, high)
        fb.set_bit(fl, var, bad, fb.RANGE)
        if var == "vpd":
            with np.errstate(invalid="ignore"):
                neg = ~bad & (x < 0.0)
            x[neg] = 0.0
            out[var] = x
            details["vpd_negative_zeroed"] = int(neg.sum())

    # 2. meteorological tests: flat line on the (offset-zeroed, clipped) values whatever their
    #    flags, steps on the accepted values
    per = duration(met["step_per"])
    for var in variables:
        vr = var_rules.get(var, {})
        if "flat_line" in vr:
            span = duration(vr["flat_line"])
            min_run = int(span // interval) + 1  # repeated for longer than the span
            # zero shortwave is legitimate at night only (a dead pyranometer reads 0 by day)
            where = clear < float(met["zero_shortwave_clear_sky_below"]) if var in ("rg", "sw_out") else None
            stuck = flat_line(_values(out, var), min_run, vr.get("flat_line_allowed", ()), where)
            fb.set_bit(fl, var, stuck, fb.FLAT_LINE)
        if "step" in vr:
            limit = float(vr["step"]) * (interval / per)
            fb.set_bit(fl, var, step_outliers(_accepted_values(out, fl, var), limit), fb.CONSISTENCY)
    if "rg" in variables:
        fb.set_bit(fl, "rg", above_clear_sky(_accepted_values(out, fl, "rg"), clear,
                                             float(met["clear_sky_factor"]),
                                             float(met["clear_sky_allowance"])), fb.CONSISTENCY)

    # 3. consistency between variables
    if "rg" in variables and "sw_out" in variables:
        rg_ok, sw_ok = _accepted_values(out, fl, "rg"), _accepted_values(out, fl, "sw_out")
        with np.errstate(invalid="ignore"):
            fb.set_bit(fl, "sw_out", sw_ok > rg_ok + float(met["sw_out_above_rg"]), fb.CONSISTENCY)
    if "ta" in variables:
        ta_ok = _accepted_values(out, fl, "ta")
        blackbody = STEFAN_BOLTZMANN * (ta_ok + ZERO_CELSIUS) ** 4
        for var, key in (("lw_in", "lw_in_ratio_range"), ("lw_out", "lw_out_ratio_range")):
            if var in variables:
                low, high = (float(v) for v in met[key])
                ratio = _accepted_values(out, fl, var) / blackbody
                fb.set_bit(fl, var, out_of_range(ratio, low, high), fb.CONSISTENCY)

    # 4. generic instrument rejections from passthrough diagnostics
    for column, table in rules.get("instrument", {}).items():
        if not table.get("enabled", False) or column not in out.columns:
            continue
        signal = pd.to_numeric(out[column], errors="coerce").to_numpy(dtype=float)
        with np.errstate(invalid="ignore"):
            weak = signal < float(table["below"])
        for var in table.get("variables", []):
            if var in variables:
                fb.set_bit(fl, var, weak, fb.INSTRUMENT)

    # day and night: accepted rg, else solar geometry (clear-sky rg above the same threshold)
    desp = rules["despike"]
    geometric_day = clear >= float(desp["night_rg_below"])
    if "rg" in variables:
        is_day = day_or_night(out["rg"].to_numpy(dtype=float), fl["rg"].to_numpy() == 0,
                              geometric_day, float(desp["night_rg_below"]))
    else:
        is_day = geometric_day.copy()
    out["is_day"] = is_day

    # 5. despiking (Papale et al. 2006) of the values accepted so far
    spikes: dict[str, int] = {}
    for var in desp["variables"]:
        if var not in variables:
            continue
        mask = despike(_accepted_values(out, fl, var), index, is_day, z=float(desp["z"]),
                       block=duration(desp["block"]), min_values=int(desp["min_values"]))
        fb.set_bit(fl, var, mask, fb.SPIKE)
        spikes[var] = int(mask.sum())

    # 6a. wet sensors
    wet = rules["wet"]
    irrigated = (out["irrigated"].fillna(False).to_numpy(dtype=bool) if "irrigated" in out.columns
                 else np.zeros(len(out), dtype=bool))
    if "precip" in variables and np.isfinite(_accepted_values(out, fl, "precip")).any():
        precip = _accepted_values(out, fl, "precip")
    else:
        precip = np.full(len(out), np.nan)
        msg = ("no precipitation: open-path LE and fc are not rejected in rain, and H and u* "
               "not in heavy rain (irrigation still counts as wetting)")
        warn(msg)
        messages.append(msg)
    wet_now, wetted = wetting(index, interval, precip, irrigated, float(wet["rain_above"]),
                              duration(wet["dry_after"]))
    out["rain_wetted"] = wetted
    irga = (out["irga"].astype(str).to_numpy() if "irga" in out.columns
            else np.full(len(out), site.irga))
    open_path = irga == "open-path"
    for var in wet["open_path_variables"]:
        if var in variables:
            fb.set_bit(fl, var, wetted & open_path, fb.WET)
    hours = interval / pd.Timedelta(hours=1)
    with np.errstate(invalid="ignore"):
        heavy = np.nan_to_num(precip, nan=0.0) / hours >= float(wet["heavy_rain_rate"])
    for var in wet["heavy_rain_variables"]:
        if var in variables:
            fb.set_bit(fl, var, heavy, fb.WET)

    # 6b. low turbulence: the column always; the bit only on apply_to
    ust = rules["ustar"]
    monthly = _check_monthly(ust.get("monthly", []))
    thresholds = ustar_thresholds(index, float(ust["threshold"]), monthly)
    if "ustar" in variables:
        u = _accepted_values(out, fl, "ustar")
        with np.errstate(invalid="ignore"):
            below = np.isfinite(u) & (u < thresholds)
    else:
        below = np.zeros(len(out), dtype=bool)
    out["ustar_below_threshold"] = below
    to_flag = below & ~is_day if ust["night_only"] else below
    for var in ust["apply_to"]:
        if var in variables:
            fb.set_bit(fl, var, to_flag, fb.LOW_TURBULENCE)

    # 6c. excluded wind sectors
    sectors = rules["sectors"]
    if sectors["exclude"] and "wind_dir" in variables:
        excluded = in_sectors(_accepted_values(out, fl, "wind_dir"), sectors["exclude"])
        for var in sectors["apply_to"]:
            if var in variables:
                fb.set_bit(fl, var, excluded, fb.SECTOR)
        details["excluded_sector_intervals"] = int(excluded.sum())

    # 6d. snow or frozen
    snow = rules["snow"]
    snow_or_frozen = np.zeros(len(out), dtype=bool)
    if "rg" in variables and "sw_out" in variables:
        snow_or_frozen |= snow_days_by_albedo(index, _accepted_values(out, fl, "rg"),
                                              _accepted_values(out, fl, "sw_out"),
                                              float(snow["albedo_above"]), float(snow["albedo_rg_above"]))
    with np.errstate(invalid="ignore"):
        if "t_soil" in variables:
            snow_or_frozen |= _accepted_values(out, fl, "t_soil") <= float(snow["t_soil_at_or_below"])
        if "ta" in variables:
            snow_or_frozen |= _accepted_values(out, fl, "ta") < float(snow["ta_below"])
    out["snow_or_frozen"] = snow_or_frozen
    for var in snow["apply_to"]:
        if var in variables:
            fb.set_bit(fl, var, snow_or_frozen, fb.SNOW)

    details.update({
        "rain_wetted_intervals": int(wetted.sum()),
        "heavy_rain_intervals": int(heavy.sum()),
        "snow_or_frozen_intervals": int(snow_or_frozen.sum()),
        "ustar_below_threshold_intervals": int(below.sum()),
        "day_intervals": int(np.count_nonzero(is_day)),
    })
    summary = {
        "spikes": spikes,
        "rejected": {var: fb.count_by_reason(fl[var]) for var in variables},
        "ustar_threshold": {
            "value": float(ust["threshold"]),
            "source": str(ust["source"]),
            "monthly": monthly or None,
            "apply_to": list(ust["apply_to"]),
        },
        "qc": details,
    }
    return QCResult(frame=out, flags=fl, summary=summary, warnings=messages)
