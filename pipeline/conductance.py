"""Canopy surface conductance, coupling and the daily water products.

Per interval, from **accepted measured** LE only (never gap-filled values):

- ``ga``: aerodynamic conductance for heat [m s-1], u*-based (Thom 1972; CONTRACT §5,
  the default) or the log-profile form with stability (:mod:`pipeline.aerodynamics`);
- ``gs``: surface conductance [m s-1] by inversion of the Penman–Monteith equation
  (Monteith 1965) with the available energy Rn − G (− storage, as the closure stage
  defines it);
- ``gs_closed``: the same from the LE of the Bowen-ratio-preserving closure correction
  (Twine et al. 2000). With an unclosed energy budget the missing energy is all put into
  H by the plain inversion, so ``gs`` is biased low; ``gs_closed`` assumes the Bowen
  ratio is right and the missing energy belongs to both fluxes. The pair brackets the
  effect of the closure gap (Wohlfahrt et al. 2010; Knauer et al. 2018);
- ``gs_molar`` [mol m-2 s-1], ``omega`` (Jarvis and McNaughton 1986), ``le_equilibrium``
  and ``le_imposed`` (McNaughton and Jarvis 1983) [W m-2], ``priestley_taylor_alpha``
  and ``bowen_ratio`` [-];
- ``gs_valid`` and ``gs_reject``: the conductance filters below.

The ``gs_reject`` bits (thresholds in the ``[conductance]`` section of the rule set).
The bits are numbered in the order the filters are applied, so the lowest set bit is
the first filter an interval fails:

====  ========================  ===========================================================
bit   name                      the interval is rejected because
====  ========================  ===========================================================
1     le_not_measured           LE is not an accepted measurement (missing, flagged; filled
                                values are never used)
2     night                     rg <= ``min_rg`` (where rg is not accepted: the QC stage's
                                ``is_day`` column if present, else rejected)
4     dew_after_sunrise         the interval starts within ``dew_period_after_sunrise`` of the
                                day's first daylight interval (dew evaporation)
8     outside_growing_season    outside the optional ``growing_season`` window
16    snow_or_frozen            snow or frozen conditions
32    wet_canopy                rain (precip > ``precip_threshold``) or irrigation within the
                                preceding ``dry_period`` (``dry_period_tall_canopy`` where the
                                canopy is at least ``tall_canopy_height_m`` tall), or the QC
                                stage marked the interval ``rain_wetted``
64    low_ustar                 u* below the site's threshold
128   low_available_energy      Rn − G (− storage) < ``min_available_energy``
256   low_le                    LE < ``min_le``
512   low_vpd                   VPD < ``min_vpd``
1024  high_rh                   RH > ``max_rh``
2048  inversion_failed          the Penman–Monteith inversion returned no value (its reason
                                codes are counted in the summary)
4096  above_max_gs              gs > ``max_gs``
====  ========================  ===========================================================

Daily products (:func:`compute_conductance` ``daily``; local standard-time days): the
median of gs and gs_closed and the mean omega over valid intervals, their count, the
midday (``midday_hours``, default 10–14 h local, interval midpoints) means, and the FAO-56
grass reference evapotranspiration (:func:`reference_et_fao56_daily`) for short canopies.
:func:`et_mm_daily` turns an LE series into evaporation in mm per day with the latent heat
of sublimation over snow and ice; dew and deposition (negative LE) are kept, never clipped.

References
----------
Allen, R. G., Pereira, L. S., Raes, D., Smith, M. (1998). Crop evapotranspiration.
FAO Irrigation and Drainage Paper 56. Rome: FAO.
Jarvis, P. G., McNaughton, K. G. (1986). Stomatal control of transpiration: scaling up from
leaf to region. Adv. Ecol. Res. 15, 1–49.
Kelliher, F. M., Leuning, R., Raupach, M. R., Schulze, E.-D. (1995). Maximum conductances for
evaporation from global vegetation types. Agric. For. Meteorol. 73, 1–16.
Knauer, J., Zaehle, S., Medlyn, B. E., Reichstein, M., Williams, C. A., Migliavacca, M., et al.
(2018). Towards physiologically meaningful water-use efficiency estimates from eddy
covariance data. Global Change Biol. 24, 694–710.
McNaughton, K. G., Jarvis, P. G. (1983). Predicting effects of vegetation changes on
transpiration and evaporation. In: Kozlowski (ed.) Water Deficits and Plant Growth VII, 1–47.
Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19, 205–234.
Twine, T. E., et al. (2000). Correcting eddy-covariance flux underestimates over a grassland.
Agric. For. Meteorol. 103, 279–300.
Wohlfahrt, G., Irschick, C., Thalinger, B., Hörtnagl, L., Obojes, N., Hammerle, A. (2010).
Insights from independent evapotranspiration estimates for closing the energy balance:
a grassland case study. Vadose Zone J. 9, 1025–1033.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd

from . import flags as flagbits
from . import micromet
from .config import SiteInfo
from .errors import ConfigError, RuleError, warn
from .rules import duration
from .stage import StageResult

__all__ = [
    "REJECT_BITS",
    "LE_NOT_MEASURED",
    "NIGHT",
    "DEW_AFTER_SUNRISE",
    "OUTSIDE_GROWING_SEASON",
    "SNOW_OR_FROZEN",
    "WET_CANOPY",
    "LOW_USTAR",
    "LOW_AVAILABLE_ENERGY",
    "LOW_LE",
    "LOW_VPD",
    "HIGH_RH",
    "INVERSION_FAILED",
    "ABOVE_MAX_GS",
    "compute_conductance",
    "et_mm_daily",
    "wind_speed_at_2m",
    "reference_et_fao56_daily",
    "describe_reject",
]

# --- gs_reject bits, in the order the filters are applied --------------------------------
LE_NOT_MEASURED = 1
NIGHT = 2
DEW_AFTER_SUNRISE = 4
OUTSIDE_GROWING_SEASON = 8
SNOW_OR_FROZEN = 16
WET_CANOPY = 32
LOW_USTAR = 64
LOW_AVAILABLE_ENERGY = 128
LOW_LE = 256
LOW_VPD = 512
HIGH_RH = 1024
INVERSION_FAILED = 2048
ABOVE_MAX_GS = 4096

#: bit -> (short name, meaning); the short names key summary["conductance_filters"]
REJECT_BITS: dict[int, tuple[str, str]] = {
    LE_NOT_MEASURED: ("le_not_measured", "LE is not an accepted measurement"),
    NIGHT: ("night", "global radiation at or below the daytime threshold"),
    DEW_AFTER_SUNRISE: ("dew_after_sunrise", "within the dew period after sunrise"),
    OUTSIDE_GROWING_SEASON: ("outside_growing_season", "outside the growing-season window"),
    SNOW_OR_FROZEN: ("snow_or_frozen", "snow or frozen conditions"),
    WET_CANOPY: ("wet_canopy", "rain or irrigation within the dry period before the interval"),
    LOW_USTAR: ("low_ustar", "friction velocity below the site's threshold"),
    LOW_AVAILABLE_ENERGY: ("low_available_energy", "available energy below the threshold"),
    LOW_LE: ("low_le", "LE below the threshold"),
    LOW_VPD: ("low_vpd", "VPD below the floor"),
    HIGH_RH: ("high_rh", "relative humidity above the ceiling"),
    INVERSION_FAILED: ("inversion_failed", "the Penman–Monteith inversion gave no value"),
    ABOVE_MAX_GS: ("above_max_gs", "gs above the plausible maximum"),
}

_REJECT_DTYPE = np.int32

#: rule keys of [conductance] this module reads (all required: the standard sets them)
_RULE_KEYS = (
    "min_rg", "sunrise_rg", "dew_period_after_sunrise", "min_available_energy", "min_le",
    "min_vpd", "max_rh", "precip_threshold", "dry_period", "dry_period_tall_canopy",
    "tall_canopy_height_m", "growing_season", "max_gs", "midday_hours",
    "reference_max_canopy_height_m", "reference_max_measurement_height_m",
    "reference_min_daily_coverage",
)


def describe_reject(bits: int) -> list[str]:
    """The short names of the conductance filters set in a ``gs_reject`` value."""
    return [name for bit, (name, _) in REJECT_BITS.items() if int(bits) & bit]


# --------------------------------------------------------------------------------------
# small helpers
# --------------------------------------------------------------------------------------
def _accepted(frame: pd.DataFrame, flags: pd.DataFrame, var: str) -> np.ndarray | None:
    """``frame[var]`` as float with NaN where not accepted; None when the column is absent."""
    return flagbits.accepted_values(frame, flags, var)


def _bool_column(frame: pd.DataFrame, name: str) -> np.ndarray | None:
    if name not in frame.columns:
        return None
    col = frame[name]
    return col.astype("boolean").fillna(False).to_numpy(dtype=bool)


def _interval(site: SiteInfo, index: pd.DatetimeIndex) -> pd.Timedelta:
    if site.interval_minutes is not None:
        return site.interval
    if len(index) > 1:
        return pd.Timedelta(np.median(np.diff(index.asi8)), unit="ns")
    raise ConfigError("interval_minutes not resolved and the record is too short to infer it",
                      key="site.interval_minutes")


def _local_dates(index: pd.DatetimeIndex) -> pd.DatetimeIndex:
    """Local standard-time calendar day of each interval start (naive midnight stamps)."""
    naive = index.tz_localize(None) if index.tz is not None else index
    return naive.normalize()


def _rule(section: dict, key: str):
    if key not in section:
        raise RuleError("missing from the rule set (the standard sets it)", key=f"conductance.{key}")
    return section[key]


def _number(section: dict, key: str) -> float:
    value = _rule(section, key)
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise RuleError(f"must be a number, got {value!r}", key=f"conductance.{key}")
    return float(value)


def _growing_season_mask(index: pd.DatetimeIndex, window) -> np.ndarray:
    """True inside the growing-season window; ``[]`` means no window (all True).

    ``window`` is ``["MM-DD", "MM-DD"]`` (inclusive month-day bounds) or ``[doy, doy]``
    (inclusive days of year). A start after the end wraps over the new year (southern
    hemisphere seasons).
    """
    key = "conductance.growing_season"
    if not isinstance(window, list):
        raise RuleError(f"must be a list, got {window!r}", key=key)
    if len(window) == 0:
        return np.ones(len(index), dtype=bool)
    if len(window) != 2:
        raise RuleError("must be [] or [start, end]", key=key)
    naive = index.tz_localize(None) if index.tz is not None else index
    if all(isinstance(v, str) for v in window):
        bounds = []
        for v in window:
            try:
                month, day = (int(p) for p in v.split("-"))
                pd.Timestamp(year=2000, month=month, day=day)  # leap year: 02-29 allowed
            except (ValueError, TypeError):
                raise RuleError(f"{v!r} is not a month-day such as \"04-15\"", key=key) from None
            bounds.append(month * 100 + day)
        position = naive.month.to_numpy() * 100 + naive.day.to_numpy()
    elif all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in window):
        bounds = [float(v) for v in window]
        if not all(1 <= b <= 366 for b in bounds):
            raise RuleError("days of year must lie in 1..366", key=key)
        position = naive.dayofyear.to_numpy().astype(float)
    else:
        raise RuleError("must hold two month-days (\"04-15\") or two days of year", key=key)
    start, end = bounds
    if start <= end:
        return (position >= start) & (position <= end)
    return (position >= start) | (position <= end)


def _rolling_any(event: np.ndarray, index: pd.DatetimeIndex, window: pd.Timedelta) -> np.ndarray:
    """True where ``event`` happened in the ``window`` ending with (and including) each interval."""
    s = pd.Series(event.astype(float), index=index)
    return s.rolling(window, min_periods=1).max().to_numpy() > 0


def _inversion_reason_names() -> dict[int, str]:
    """Reason code -> name from :mod:`pipeline.micromet`'s ``INVERSION_*`` constants."""
    names = {}
    for attr in dir(micromet):
        if attr.startswith("INVERSION_"):
            value = getattr(micromet, attr)
            if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
                names[int(value)] = attr[len("INVERSION_"):].lower()
    return names


# --------------------------------------------------------------------------------------
# evaporation in mm
# --------------------------------------------------------------------------------------
def et_mm_daily(le, ta, frozen, interval) -> pd.Series:
    """Evaporation (ET) in mm per local day from an LE series.

    Parameters
    ----------
    le : pandas.Series
        Latent heat flux [W m-2] on a tz-aware DatetimeIndex of interval starts at the
        site's fixed offset (the runner passes ``le_filled``). Negative values (dew,
        deposition) are kept, never clipped.
    ta : pandas.Series or array-like
        Air temperature [degC], same length. Missing values are interpolated in time;
        a day without any temperature uses 20 degC (λ changes by < 2.5 % over 0–40 degC).
    frozen : pandas.Series, array-like of bool or None
        True where snow or ice covers the surface: the latent heat of sublimation is used
        there instead of that of vaporization. None: nowhere frozen.
    interval : pandas.Timedelta or number
        Averaging interval (a number means minutes).

    Returns
    -------
    pandas.Series
        mm d-1 (kg m-2 d-1, water density 1000 kg m-3) indexed by ``date`` (naive local
        midnight). A day with any missing LE value is NaN (a partial sum would understate it).

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 20 and ch. 3 (λ, 1 kg m-2 = 1 mm).
    """
    if not isinstance(le, pd.Series):
        raise TypeError("le must be a pandas Series on the interval index")
    step = interval if isinstance(interval, pd.Timedelta) else pd.Timedelta(minutes=float(interval))
    seconds = step.total_seconds()
    index = le.index
    ta_s = pd.Series(np.asarray(ta, dtype=float), index=index)
    ta_s = ta_s.interpolate(limit_direction="both").fillna(20.0)
    ta_v = ta_s.to_numpy()
    if frozen is None:
        frozen_v = np.zeros(len(index), dtype=bool)
    else:
        frozen_v = pd.Series(np.asarray(frozen), index=index).astype("boolean").fillna(False).to_numpy(dtype=bool)
    # λ of vaporization, or of sublimation where frozen (pipeline.micromet.evaporation_mm)
    mm = np.asarray(micromet.evaporation_mm(le.to_numpy(dtype=float), ta_v, seconds, frozen=frozen_v),
                    dtype=float)
    dates = _local_dates(index)
    per = pd.DataFrame({"mm": mm, "missing": np.isnan(mm)}, index=dates)
    grouped = per.groupby(level=0)
    out = grouped["mm"].sum().where(grouped["missing"].sum() == 0)
    out.index.name = "date"
    out.name = "et_mm"
    return out


# --------------------------------------------------------------------------------------
# FAO-56 reference evapotranspiration
# --------------------------------------------------------------------------------------
def wind_speed_at_2m(wind, measurement_height_m):
    """Wind speed at 2 m over short grass from a measurement at height z (FAO-56 eq. 47).

    u2 = uz · 4.87 / ln(67.8 z − 5.42)

    Parameters
    ----------
    wind : array-like
        Wind speed at the measurement height [m s-1].
    measurement_height_m : array-like
        Measurement height above ground [m] (> 0.08 m).

    Returns
    -------
    numpy.ndarray
        Wind speed at 2 m [m s-1].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 47 and Example 14.
    """
    z = np.asarray(measurement_height_m, dtype=float)
    arg = 67.8 * z - 5.42  # FAO-56 eq. 47
    with np.errstate(invalid="ignore", divide="ignore"):
        factor = np.where(arg > 1.0, 4.87 / np.log(np.where(arg > 1.0, arg, np.nan)), np.nan)
    return np.asarray(wind, dtype=float) * factor


def _fao56_es(t):
    return 0.6108 * np.exp(17.27 * t / (t + 237.3))  # FAO-56 eq. 11, kPa


def reference_et_fao56_daily(tmax, tmin, rh_max, rh_min, u2, p_air, rs=None, rn=None, *,
                             latitude, elevation_m, day_of_year, ea=None) -> np.ndarray:
    """FAO-56 grass reference evapotranspiration ET0 per day, daily form (eq. 6).

    ET0 = [0.408 Δ (Rn − G) + γ 900/(T + 273) u2 (es − ea)] / [Δ + γ (1 + 0.34 u2)]

    with T = (Tmax + Tmin)/2 (eq. 9), es from Tmax and Tmin (eq. 12), ea from RHmax and
    RHmin (eq. 17) unless given, Δ at T (eq. 13), γ = 0.665e-3 P (eq. 8), G = 0 for a day
    (eq. 42). Rn of the reference grass from global radiation Rs (albedo 0.23, eq. 38) and
    the net longwave radiation (eq. 39) with the clear-sky radiation Rso = (0.75 + 2e-5 z) Ra
    (eq. 37) and Ra from latitude and day of year (eqs. 21–25); when ``rs`` is None the
    given ``rn`` is used instead (the site's measured net radiation over its own surface).

    Parameters
    ----------
    tmax, tmin : array-like
        Daily maximum and minimum air temperature [degC].
    rh_max, rh_min : array-like
        Daily maximum and minimum relative humidity [%] (ignored where ``ea`` is given).
    u2 : array-like
        Daily mean wind speed at 2 m [m s-1].
    p_air : array-like
        Daily mean air pressure [kPa].
    rs : array-like, optional
        Global (incoming shortwave) radiation [MJ m-2 d-1].
    rn : array-like, optional
        Net radiation [MJ m-2 d-1], used only when ``rs`` is None.
    latitude : float
        [degrees north].
    elevation_m : float
        Site elevation [m] (clear-sky radiation, eq. 37).
    day_of_year : array-like of int
        Day of the year, 1..366.
    ea : array-like, optional
        Actual vapour pressure [kPa].

    Returns
    -------
    numpy.ndarray
        ET0 [mm d-1].

    References
    ----------
    Allen et al. (1998), FAO-56, eqs. 6, 8, 9, 11–13, 17, 21–25, 37–39, 42.
    """
    tmax = np.asarray(tmax, dtype=float)
    tmin = np.asarray(tmin, dtype=float)
    t = (tmax + tmin) / 2.0  # eq. 9
    es = (_fao56_es(tmax) + _fao56_es(tmin)) / 2.0  # eq. 12
    if ea is None:
        ea = (_fao56_es(tmin) * np.asarray(rh_max, dtype=float) / 100.0
              + _fao56_es(tmax) * np.asarray(rh_min, dtype=float) / 100.0) / 2.0  # eq. 17
    ea = np.asarray(ea, dtype=float)
    delta = 4098.0 * _fao56_es(t) / (t + 237.3) ** 2  # eq. 13
    gamma = 0.665e-3 * np.asarray(p_air, dtype=float)  # eq. 8
    u2 = np.asarray(u2, dtype=float)
    if rs is not None:
        rs = np.asarray(rs, dtype=float)
        j = np.asarray(day_of_year, dtype=float)
        phi = math.radians(latitude)
        dr = 1.0 + 0.033 * np.cos(2.0 * np.pi * j / 365.0)  # eq. 23
        decl = 0.409 * np.sin(2.0 * np.pi * j / 365.0 - 1.39)  # eq. 24
        ws = np.arccos(np.clip(-np.tan(phi) * np.tan(decl), -1.0, 1.0))  # eq. 25
        ra = (24.0 * 60.0 / np.pi * 0.0820 * dr  # eq. 21, Gsc = 0.0820 MJ m-2 min-1
              * (ws * np.sin(phi) * np.sin(decl) + np.cos(phi) * np.cos(decl) * np.sin(ws)))
        rso = (0.75 + 2e-5 * elevation_m) * ra  # eq. 37
        with np.errstate(invalid="ignore", divide="ignore"):
            relative = np.clip(rs / rso, 0.0, 1.0)  # Rs/Rso <= 1.0 (eq. 39 note)
        sigma = 4.903e-9  # MJ K-4 m-2 d-1, FAO-56 eq. 39
        rnl = (sigma * ((tmax + 273.16) ** 4 + (tmin + 273.16) ** 4) / 2.0
               * (0.34 - 0.14 * np.sqrt(ea)) * (1.35 * relative - 0.35))  # eq. 39
        net = (1.0 - 0.23) * rs - rnl  # eq. 38, albedo 0.23 of the reference grass
    elif rn is not None:
        net = np.asarray(rn, dtype=float)
    else:
        raise ValueError("reference_et_fao56_daily needs rs or rn")
    g = 0.0  # eq. 42: soil heat flux of a day is small
    return ((0.408 * delta * (net - g) + gamma * 900.0 / (t + 273.0) * u2 * (es - ea))
            / (delta + gamma * (1.0 + 0.34 * u2)))  # eq. 6


def _reference_et(index, ta, rh, wind, rg, rn, p_air, canopy_h, meas_h, site: SiteInfo,
                  cfg: dict, measured_et: pd.Series | None) -> tuple[pd.DataFrame, dict]:
    """Daily FAO-56 ET0 for short-canopy days; the summary entry with its note."""
    max_hc = _number(cfg, "reference_max_canopy_height_m")
    max_z = _number(cfg, "reference_max_measurement_height_m")
    min_cov = _number(cfg, "reference_min_daily_coverage")
    dates = _local_dates(index)
    u2 = wind_speed_at_2m(wind, meas_h)
    data = pd.DataFrame({
        "ta": ta, "rh": rh, "u2": u2,
        "rg": rg if rg is not None else np.nan,
        "rn": rn if rn is not None else np.nan,
        "p": p_air, "hc": canopy_h, "z": meas_h,
    }, index=dates)
    g = data.groupby(level=0)
    n_expected = g.size()
    use_rg = rg is not None
    radiation = "rg" if use_rg else "rn"
    cover = pd.concat([g[c].count() / n_expected for c in ("ta", "rh", "u2", radiation)], axis=1).min(axis=1)
    tall = (g["hc"].max() > max_hc) | (g["z"].max() > max_z)
    ok = (cover >= min_cov) & ~tall
    doy = pd.DatetimeIndex(n_expected.index).dayofyear.to_numpy()
    rad = g[radiation].mean() * 0.0864  # W m-2 daily mean -> MJ m-2 d-1
    et0 = reference_et_fao56_daily(
        g["ta"].max(), g["ta"].min(), g["rh"].max(), g["rh"].min(), g["u2"].mean(), g["p"].mean(),
        rs=rad.to_numpy() if use_rg else None, rn=None if use_rg else rad.to_numpy(),
        latitude=site.latitude, elevation_m=site.elevation_m, day_of_year=doy)
    et0 = pd.Series(np.where(ok.to_numpy(), et0, np.nan), index=n_expected.index)
    daily = pd.DataFrame({"et_reference_mm": et0})
    if measured_et is not None:
        measured = measured_et.reindex(daily.index)
        with np.errstate(invalid="ignore", divide="ignore"):
            daily["et_to_reference_ratio"] = (measured / et0).where(et0 > 0)
    else:
        daily["et_to_reference_ratio"] = np.nan
    n_tall = int(tall.sum())
    n_days = int(et0.notna().sum())
    method = ("FAO-56 eq. 6 (daily form) from the site's own daily meteorology: Tmax/Tmin of the "
              "interval means, RHmax/RHmin (eq. 17), wind brought to 2 m by eq. 47, "
              + ("reference-grass Rn from global radiation (albedo 0.23, eqs. 21-39), G = 0"
                 if use_rg else "the site's measured net radiation (no global radiation), G = 0"))
    notes = []
    if n_tall:
        notes.append(
            f"not given on {n_tall} day(s) with canopy taller than {max_hc:g} m or wind measured "
            f"above {max_z:g} m: FAO-56 reference ET assumes meteorology measured over a short, "
            "grass-like surface (eq. 47 brings wind to 2 m only over such a surface); over a tall, "
            "rough canopy the site's wind and humidity do not describe the reference surface")
    n_short_missing = int((~tall & (cover < min_cov)).sum())
    if n_short_missing:
        notes.append(f"{n_short_missing} short-canopy day(s) without a value: less than "
                     f"{min_cov:.0%} of the day's intervals had accepted ta, humidity, wind and radiation")
    ratio = daily["et_to_reference_ratio"]
    summary = {
        "method": method,
        "n_days": n_days,
        "median_et_reference_mm": float(et0.median()) if n_days else None,
        "median_et_to_reference_ratio": float(ratio.median()) if ratio.notna().any() else None,
        "note": "; ".join(notes) if notes else "",
    }
    return daily, summary


# --------------------------------------------------------------------------------------
# the stage
# --------------------------------------------------------------------------------------
def compute_conductance(frame: pd.DataFrame, flags: pd.DataFrame, site: SiteInfo, rules: dict, *,
                        closed: pd.DataFrame | None = None, aerodynamic: str = "ustar",
                        kb_inverse: float | None = None,
                        le_filled: pd.Series | None = None) -> StageResult:
    """Surface conductance, coupling and their filters for every interval (see module doc).

    Parameters
    ----------
    frame, flags : pandas.DataFrame
        The working frame and its flags after QC (DEVELOPERS.md). Used if present:
        QC's boolean columns ``is_day``, ``snow_or_frozen``, ``ustar_below_threshold``,
        ``rain_wetted``; ``precip``, ``irrigated``, ``rg``, ``rh``/``vpd``, ``p_air``,
        ``canopy_height_m``, ``measurement_height_m``.
    site : SiteInfo
        The site, ``interval_minutes`` resolved.
    rules : dict
        The effective rule set; its ``[conductance]`` section holds the filter thresholds.
    closed : pandas.DataFrame, optional
        The closure stage's columns: ``available_energy`` [W m-2], ``le_closed`` [W m-2],
        ``closure_corrected`` (bool). Without it the available energy comes from
        :func:`pipeline.closure.available_energy` and ``gs_closed`` is missing (warned).
    aerodynamic : {"ustar", "log-profile"}
        CONTRACT ``[conductance] aerodynamic``.
    kb_inverse : float, optional
        kB⁻¹ [-]. ``"ustar"``: replaces Thom's excess resistance 6.2 u*^-0.67
        (:func:`pipeline.micromet.aerodynamic_conductance`); ``"log-profile"``: ln(z0m/z0h)
        (None: :mod:`pipeline.aerodynamics`' documented default).
    le_filled : pandas.Series, optional
        The gap-filled LE; used only for the measured ET beside the FAO-56 reference ET
        (``et_to_reference_ratio``). Without it the ratio rests on days whose every LE
        value is an accepted measurement.

    Returns
    -------
    StageResult
        ``columns``: ga, gs, gs_closed, gs_molar, gs_valid, gs_reject, omega,
        le_equilibrium, le_imposed, priestley_taylor_alpha, bowen_ratio.
        ``summary``: ``conductance``, ``conductance_filters``, ``reference_et``.
        ``daily`` (index ``date``): gs_median, gs_closed_median, omega_mean, n_gs_valid,
        gs_midday_mean, gs_closed_midday_mean, omega_midday_mean,
        priestley_taylor_alpha_midday_mean, n_gs_valid_midday, et_reference_mm,
        et_to_reference_ratio.

    Raises
    ------
    ConfigError
        Unknown ``aerodynamic`` option.
    RuleError
        A missing or malformed ``[conductance]`` rule.
    """
    if aerodynamic not in ("ustar", "log-profile"):
        raise ConfigError(f"unknown option {aerodynamic!r} (use \"ustar\" or \"log-profile\")",
                          key="conductance.aerodynamic")
    cfg = rules.get("conductance")
    if not isinstance(cfg, dict):
        raise RuleError("missing from the rule set", key="conductance")
    for key in _RULE_KEYS:
        _rule(cfg, key)

    messages: list[str] = []

    def note(message: str) -> None:
        message = " ".join(message.split())
        if message not in messages:
            messages.append(message)
            warn(message, stacklevel=3)

    index = frame.index
    n = len(index)
    step = _interval(site, index)

    # ---------------- inputs (accepted values only) ----------------
    le = _accepted(frame, flags, "le")
    if le is None:
        raise ConfigError("the working frame has no le column", key="input.columns.le")
    h = _accepted(frame, flags, "h")
    ta = _accepted(frame, flags, "ta")
    wind = _accepted(frame, flags, "wind")
    ustar = _accepted(frame, flags, "ustar")
    rg = _accepted(frame, flags, "rg")
    rn = _accepted(frame, flags, "rn")
    nan = np.full(n, np.nan)
    h = nan.copy() if h is None else h
    ta = nan.copy() if ta is None else ta
    wind = nan.copy() if wind is None else wind
    ustar = nan.copy() if ustar is None else ustar

    p_air = _accepted(frame, flags, "p_air")
    p_elev = float(micromet.pressure_from_elevation(site.elevation_m))
    if p_air is None:
        p_air = np.full(n, p_elev)
        note(f"no air pressure measured: conductances use {p_elev:.2f} kPa from the site "
             f"elevation {site.elevation_m:g} m (barometric formula)")
    else:
        missing_p = np.isnan(p_air)
        if missing_p.any():
            p_air = np.where(missing_p, p_elev, p_air)

    vpd = _accepted(frame, flags, "vpd")
    rh = _accepted(frame, flags, "rh")
    if vpd is None and rh is None:
        raise ConfigError("the working frame has neither rh nor vpd", key="input.columns")
    if rh is not None:
        vpd_from_rh = np.asarray(micromet.vpd_from_rh(ta, rh), dtype=float)
        vpd = vpd_from_rh if vpd is None else np.where(np.isnan(vpd), vpd_from_rh, vpd)
    if rh is None:
        with np.errstate(invalid="ignore", divide="ignore"):
            rh = np.asarray(micromet.rh_from_vpd(ta, vpd), dtype=float)

    canopy_h = (frame["canopy_height_m"].to_numpy(dtype=float) if "canopy_height_m" in frame
                else np.full(n, float(site.canopy_height_m)))
    meas_h = (frame["measurement_height_m"].to_numpy(dtype=float) if "measurement_height_m" in frame
              else np.full(n, float(site.measurement_height_m)))

    # ---------------- available energy and closed LE ----------------
    le_closed = None
    if closed is not None and "available_energy" in closed:
        avail = closed["available_energy"].reindex(index).to_numpy(dtype=float)
    elif "available_energy" in frame:
        avail = frame["available_energy"].to_numpy(dtype=float)
    else:
        from .closure import available_energy as _closure_available_energy

        avail = _closure_available_energy(frame, flags, rules=rules, site=site).to_numpy(dtype=float)
    if closed is not None and "le_closed" in closed:
        le_closed = closed["le_closed"].reindex(index).to_numpy(dtype=float).copy()
        le_closed[np.isnan(le)] = np.nan  # only where LE itself is an accepted measurement
        if "closure_corrected" in closed:
            corrected = closed["closure_corrected"].reindex(index).astype("boolean").fillna(False)
            le_closed[~corrected.to_numpy(dtype=bool)] = np.nan
    else:
        note("no closure-corrected LE: gs_closed is missing, the closure bracket cannot be given")

    # ---------------- aerodynamic conductance ----------------
    if aerodynamic == "ustar":
        ga = np.asarray(micromet.aerodynamic_conductance(wind, ustar, kb_inverse=kb_inverse), dtype=float)
    else:
        from . import aerodynamics

        options = {"warn_roughness_sublayer": False}  # warned below, once, into the result
        if kb_inverse is not None:
            options["kb_inverse"] = kb_inverse  # else the module's documented default
        ga = np.asarray(aerodynamics.aerodynamic_conductance_log_profile(
            wind, ustar, ta, h, p_air, meas_h, canopy_h, **options), dtype=float)
        in_rsl = np.asarray(aerodynamics.in_roughness_sublayer(meas_h, canopy_h), dtype=bool)
        in_rsl = np.broadcast_to(in_rsl, (n,))
        if in_rsl.any():
            note(f"measurement height lies in the roughness sublayer in {int(in_rsl.sum())} of {n} "
                 "intervals: the log-profile aerodynamic conductance does not hold there "
                 "(consider aerodynamic = \"ustar\")")
    ga = np.where(np.isfinite(ga) & (ga > 0), ga, np.nan)

    # ---------------- inversion ----------------
    gs, reason = micromet.invert_penman_monteith_with_reason(le, avail, ta, vpd, p_air, ga)
    gs = np.asarray(gs, dtype=float).copy()
    reason = np.broadcast_to(np.asarray(reason), (n,))
    gs[~np.isfinite(gs)] = np.nan
    if le_closed is not None:
        gs_closed, _ = micromet.invert_penman_monteith_with_reason(le_closed, avail, ta, vpd, p_air, ga)
        gs_closed = np.asarray(gs_closed, dtype=float).copy()
        gs_closed[~np.isfinite(gs_closed)] = np.nan
    else:
        gs_closed = nan.copy()

    with np.errstate(invalid="ignore", divide="ignore"):
        gs_molar = np.asarray(micromet.conductance_to_molar(gs, ta, p_air), dtype=float)
        omega = np.asarray(micromet.decoupling_coefficient(ta, p_air, ga, gs), dtype=float)
        le_eq = np.asarray(micromet.equilibrium_latent_heat_flux(avail, ta, p_air), dtype=float)
        le_imp = np.asarray(micromet.imposed_latent_heat_flux(ta, vpd, p_air, gs), dtype=float)
        alpha = np.asarray(micromet.priestley_taylor_alpha(le, avail, ta, p_air), dtype=float)
        bowen = np.asarray(micromet.bowen_ratio(h, le), dtype=float)
    omega = np.where(np.isnan(gs), np.nan, omega)
    le_imp = np.where(np.isnan(gs), np.nan, le_imp)
    alpha = np.where(np.isfinite(alpha), alpha, np.nan)
    bowen = np.where(np.isfinite(bowen), bowen, np.nan)

    # ---------------- filters ----------------
    reject = np.zeros(n, dtype=_REJECT_DTYPE)

    def mark(mask, bit):
        nonlocal reject
        reject = reject | np.where(np.asarray(mask, dtype=bool), bit, 0).astype(_REJECT_DTYPE)

    mark(np.isnan(le), LE_NOT_MEASURED)

    min_rg = _number(cfg, "min_rg")
    is_day_qc = _bool_column(frame, "is_day")
    if rg is not None:
        day = rg > min_rg
        if is_day_qc is not None:
            day = np.where(np.isnan(rg), is_day_qc, day)
        light = rg > _number(cfg, "sunrise_rg")
        if is_day_qc is not None:
            light = np.where(np.isnan(rg), is_day_qc, light)
    elif is_day_qc is not None:
        note("no global radiation: the daytime filter uses the QC stage's is_day (solar geometry) "
             "instead of the rg threshold")
        day = is_day_qc
        light = is_day_qc
    else:
        raise ConfigError("neither global radiation (rg) nor the QC column is_day is available: "
                          "the conductance daytime filter needs one", key="input.columns.rg")
    mark(~day, NIGHT)

    # dew: the first hours after the day's first daylight interval
    dew_span = duration(_rule(cfg, "dew_period_after_sunrise"))
    dates = _local_dates(index)
    starts = pd.Series(index.asi8, index=dates)
    first_light = starts[light].groupby(level=0).min()
    first_light_per_row = first_light.reindex(dates).to_numpy(dtype=float)
    with np.errstate(invalid="ignore"):
        dew = index.asi8 < first_light_per_row + dew_span.value
    mark(dew & ~np.isnan(first_light_per_row), DEW_AFTER_SUNRISE)

    mark(~_growing_season_mask(index, _rule(cfg, "growing_season")), OUTSIDE_GROWING_SEASON)

    snow = _bool_column(frame, "snow_or_frozen")
    if snow is None:
        # QC did not provide the column: the snow flag bit on any variable, and the QC
        # stage's own [snow] temperature thresholds where the rule set has them
        snow_rules = rules.get("snow", {}) if isinstance(rules.get("snow"), dict) else {}
        snow = np.zeros(n, dtype=bool)
        for var in flags.columns:
            snow |= (flags[var].to_numpy() & flagbits.SNOW) != 0
        used = ["the snow flag bit"]
        with np.errstate(invalid="ignore"):
            if "ta_below" in snow_rules:
                snow |= ta < float(snow_rules["ta_below"])
                used.append(f"air temperature below {float(snow_rules['ta_below']):g} degC")
            t_soil = _accepted(frame, flags, "t_soil")
            if t_soil is not None and "t_soil_at_or_below" in snow_rules:
                snow |= t_soil <= float(snow_rules["t_soil_at_or_below"])
                used.append(f"soil temperature at or below {float(snow_rules['t_soil_at_or_below']):g} degC")
        note("no snow_or_frozen column from QC: snow/frozen conditions derived from " + ", ".join(used))
    mark(snow, SNOW_OR_FROZEN)

    # dry canopy
    wet = np.zeros(n, dtype=bool)
    event = np.zeros(n, dtype=bool)
    precip = _accepted(frame, flags, "precip")
    if precip is not None:
        with np.errstate(invalid="ignore"):
            event |= precip > _number(cfg, "precip_threshold")
    else:
        note("no precipitation measured: the dry-canopy filter cannot see rain "
             "(irrigation and the QC stage's rain_wetted are still used)")
    irrigated = _bool_column(frame, "irrigated")
    if irrigated is not None:
        event |= irrigated
    if event.any():
        short_window = duration(_rule(cfg, "dry_period"))
        tall_window = duration(_rule(cfg, "dry_period_tall_canopy"))
        tall = canopy_h >= _number(cfg, "tall_canopy_height_m")
        wet = np.where(tall, _rolling_any(event, index, tall_window), _rolling_any(event, index, short_window))
    rain_wetted = _bool_column(frame, "rain_wetted")
    if rain_wetted is not None:
        wet = wet | rain_wetted
    mark(wet, WET_CANOPY)

    low_ustar = _bool_column(frame, "ustar_below_threshold")
    if low_ustar is None:
        ustar_rules = rules.get("ustar", {}) if isinstance(rules.get("ustar"), dict) else {}
        threshold = ustar_rules.get("threshold")
        monthly = ustar_rules.get("monthly") or []
        if isinstance(monthly, list) and len(monthly) == 12:
            naive_idx = index.tz_localize(None) if index.tz is not None else index
            per_interval = np.asarray(monthly, dtype=float)[naive_idx.month.to_numpy() - 1]
            with np.errstate(invalid="ignore"):
                low_ustar = ustar < per_interval
        elif isinstance(threshold, (int, float)) and not isinstance(threshold, bool):
            with np.errstate(invalid="ignore"):
                low_ustar = ustar < float(threshold)
        else:
            low_ustar = np.zeros(n, dtype=bool)
            note("no u* threshold (neither the QC column ustar_below_threshold nor ustar.threshold "
                 "in the rule set): the low-u* conductance filter is not applied")
    mark(low_ustar, LOW_USTAR)

    with np.errstate(invalid="ignore"):
        mark(avail < _number(cfg, "min_available_energy"), LOW_AVAILABLE_ENERGY)
        mark(le < _number(cfg, "min_le"), LOW_LE)
        mark(vpd < _number(cfg, "min_vpd"), LOW_VPD)
        mark(rh > _number(cfg, "max_rh"), HIGH_RH)
        mark(np.isnan(gs), INVERSION_FAILED)
        mark(gs > _number(cfg, "max_gs"), ABOVE_MAX_GS)

    valid = reject == 0

    columns = pd.DataFrame({
        "ga": ga,
        "gs": gs,
        "gs_closed": gs_closed,
        "gs_molar": gs_molar,
        "gs_valid": valid,
        "gs_reject": reject,
        "omega": omega,
        "le_equilibrium": le_eq,
        "le_imposed": le_imp,
        "priestley_taylor_alpha": alpha,
        "bowen_ratio": bowen,
    }, index=index)

    # ---------------- filter counts ----------------
    lowest = reject & -reject  # the lowest set bit = the first filter failed
    removed_alone = {name: int(np.count_nonzero(reject & bit)) for bit, (name, _) in REJECT_BITS.items()}
    first_failing = {name: int(np.count_nonzero(lowest == bit)) for bit, (name, _) in REJECT_BITS.items()}
    only = {name: int(np.count_nonzero(reject == bit)) for bit, (name, _) in REJECT_BITS.items()}
    reason_names = _inversion_reason_names()
    tried = ~np.isnan(le)
    codes, counts = np.unique(reason[tried & np.isnan(gs)], return_counts=True)
    inversion_reasons = {reason_names.get(int(c), f"code_{int(c)}"): int(k) for c, k in zip(codes, counts)}
    filters_summary = {
        "n_intervals": int(n),
        "n_valid": int(valid.sum()),
        "bits": {name: bit for bit, (name, _) in REJECT_BITS.items()},
        "removed_alone": removed_alone,
        "removed_first": first_failing,
        "removed_only_by": only,
        "inversion_reasons": inversion_reasons,
        "thresholds": {k: (list(cfg[k]) if isinstance(cfg[k], list) else cfg[k]) for k in _RULE_KEYS},
    }

    def _median(values):
        values = values[np.isfinite(values)]
        return float(np.median(values)) if values.size else None

    conductance_summary = {
        "aerodynamic": aerodynamic,
        "kb_inverse": None if kb_inverse is None else float(kb_inverse),
        "n_gs_valid": int(valid.sum()),
        "gs_median": _median(gs[valid]),
        "gs_closed_median": _median(gs_closed[valid]),
        "omega_median": _median(omega[valid]),
    }

    # ---------------- daily products ----------------
    hours = _rule(cfg, "midday_hours")
    if (not isinstance(hours, list) or len(hours) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in hours)
            or not 0 <= hours[0] < hours[1] <= 24):
        raise RuleError("must be [start_hour, end_hour] within 0..24", key="conductance.midday_hours")
    naive = index.tz_localize(None) if index.tz is not None else index
    mid = naive + step / 2
    hour_of_mid = (mid - naive.normalize()) / pd.Timedelta(hours=1)
    midday = valid & (hour_of_mid >= hours[0]) & (hour_of_mid < hours[1])

    per = pd.DataFrame({
        "gs": np.where(valid, gs, np.nan),
        "gs_closed": np.where(valid, gs_closed, np.nan),
        "omega": np.where(valid, omega, np.nan),
        "valid": valid,
        "gs_mid": np.where(midday, gs, np.nan),
        "gs_closed_mid": np.where(midday, gs_closed, np.nan),
        "omega_mid": np.where(midday, omega, np.nan),
        "alpha_mid": np.where(midday, alpha, np.nan),
        "midday": midday,
    }, index=dates)
    g = per.groupby(level=0)
    daily = pd.DataFrame({
        "gs_median": g["gs"].median(),
        "gs_closed_median": g["gs_closed"].median(),
        "omega_mean": g["omega"].mean(),
        "n_gs_valid": g["valid"].sum().astype("int64"),
        "gs_midday_mean": g["gs_mid"].mean(),
        "gs_closed_midday_mean": g["gs_closed_mid"].mean(),
        "omega_midday_mean": g["omega_mid"].mean(),
        "priestley_taylor_alpha_midday_mean": g["alpha_mid"].mean(),
        "n_gs_valid_midday": g["midday"].sum().astype("int64"),
    })

    if le_filled is not None:
        measured_et = et_mm_daily(le_filled.reindex(index), ta, snow, step)
    else:
        measured_et = et_mm_daily(pd.Series(le, index=index), ta, snow, step)
    ref_daily, ref_summary = _reference_et(index, ta, rh, wind, rg, rn, p_air, canopy_h, meas_h,
                                           site, cfg, measured_et)
    if le_filled is None:
        ref_summary["measured_et"] = "accepted measured LE, days whose every interval is measured"
    else:
        ref_summary["measured_et"] = "gap-filled LE (complete days)"
    daily = daily.join(ref_daily, how="left")
    daily.index.name = "date"

    summary = {
        "conductance": conductance_summary,
        "conductance_filters": filters_summary,
        "reference_et": ref_summary,
    }
    return StageResult(columns=columns, summary=summary, warnings=list(messages), daily=daily)
