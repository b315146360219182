"""Invented flux-tower data with known truth: weather, canopy physics and the measurement.

ALL DATA MADE HERE ARE INVENTED. No real site, place or measurement is reproduced.

:func:`simulate_site` builds one site's record on its regular grid of averaging intervals:

1. **Weather** (shared between sites given the same ``weather_seed``): a three-state Markov
   chain of clear, broken and overcast days with autocorrelated clearness within the day;
   global radiation = clearness × interval-mean potential (top-of-atmosphere) radiation from
   :mod:`pipeline.solar`; a seasonal, synoptic (AR(1)) and diurnal air temperature with one
   cold spell (clear, frosty nights); humidity through a daily dew point; a barometric
   pressure with synoptic noise; wind with a diurnal course; rain events (Bernoulli slots per
   day, exponential amounts and durations) on cloudy days.
2. **Surface**: net radiation from albedo and Stefan–Boltzmann longwave; ground heat flux as
   a lagged fraction of Rn; u* from the log wind law over the canopy's roughness; g_a from
   :func:`pipeline.micromet.aerodynamic_conductance`; a Jarvis (1976)/Stewart (1988) surface
   conductance from Rg, VPD, Ta and soil moisture; a soil bucket (loop over days only)
   recharged by rain and irrigation and drained by ET; wet canopies (rain, dew, sprinklers)
   evaporating at a surface conductance of :data:`WET_SURFACE_CONDUCTANCE`; snow on the
   grassland during the cold spell.
3. **Fluxes**: λE = Penman–Monteith(A, Ta, VPD, P, g_a, g_s) with A = Rn − G, H = A − λE
   (the closed truth), then the closure gap: the measured pair is scaled down by
   ``closure_fraction`` keeping the Bowen ratio (the assumption behind the Bowen-ratio
   closure correction of Twine et al. 2000).
4. **Measurement**: random noise (Laplace with sd = a + b |flux| for LE, H and Fc after
   Hollinger and Richardson 2005; Gaussian instrument noise for the meteorology), spikes,
   gaps (logger outages of days, short gaps more frequent at night, rain gaps of open-path
   analysers), upstream quality flags, and the site-history faults (reversed heat-flux plates,
   a site visit).

Truth columns (``SimulatedSite.truth``)
---------------------------------------
Canonical variables (CONTRACT §1 names and units) as a perfect instrument would see them,
i.e. *with* the closure gap for ``le`` and ``h``. Besides them:

``true_le``, ``true_h``
    The noise-free measured fluxes (identical to ``le`` and ``h``):
    true_le + true_h = closure_fraction · available_energy at every interval.
``true_le_closed``, ``true_h_closed``
    The fluxes the surface really exchanged: true_le_closed = PM(A, ..., true_gs),
    true_le_closed + true_h_closed = available_energy. true_le = closure_fraction ·
    true_le_closed, so the Bowen ratio is the same in both pairs.
``available_energy``
    Rn − G [W m-2].
``true_gs``
    The surface conductance used in Penman–Monteith [m s-1] (wet surfaces:
    :data:`WET_SURFACE_CONDUCTANCE`).
``true_gs_dry``
    The physiological (dry-canopy) conductance of the Jarvis model [m s-1].
``true_ga``, ``true_omega``
    Aerodynamic conductance [m s-1] and decoupling coefficient [-] of the truth.
``canopy_wet``, ``snow_cover``, ``irrigation`` (mm), ``canopy_height_m``,
``measurement_height_m``, ``potential_radiation`` (interval-mean, W m-2), ``daytime``.

References
----------
(Citations from memory, /work/shared/REFERENCES.md conventions: confirm before quoting.)

Jarvis, P. G. (1976). Phil. Trans. R. Soc. Lond. B 273:593–610 (multiplicative response).
Stewart, J. B. (1988). Agric. For. Meteorol. 43:19–35 (response functions to Rg, D, T, θ).
Kelliher, F. M. et al. (1995). Agric. For. Meteorol. 73:1–16 (maximum canopy conductance).
Brutsaert, W. (1975). Water Resour. Res. 11:742–744 (clear-sky emissivity).
Crawford, T. M. and Duchon, C. E. (1999). J. Appl. Meteorol. 38:474–480 (cloudy sky).
Hollinger, D. Y. and Richardson, A. D. (2005). Tree Physiol. 25:873–885 (random error).
Twine, T. E. et al. (2000). Agric. For. Meteorol. 103:279–300 (Bowen-ratio closure).
Allen, R. G. et al. (1998). FAO Irrigation and Drainage Paper 56.
"""
from __future__ import annotations

import datetime as _dt
import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
import pandas as pd
from scipy.signal import lfilter

from pipeline import micromet
from pipeline.constants import VON_KARMAN, ZERO_CELSIUS

__all__ = [
    "SITE_KINDS",
    "KIND_PARAMETERS",
    "WET_SURFACE_CONDUCTANCE",
    "SimulatedSite",
    "simulate_site",
]

#: The three invented site kinds.
SITE_KINDS: tuple[str, ...] = ("grassland", "conifer-forest", "irrigated-crop")

#: Surface conductance of a wet surface [m s-1]: large enough that g_a / g_s ≈ 0, so
#: Penman–Monteith gives the wet-surface (Penman) evaporation (Monteith and Unsworth 2013,
#: ch. 13). Invented convention of this generator.
WET_SURFACE_CONDUCTANCE = 1.0

#: Stefan–Boltzmann constant [W m-2 K-4] (CODATA 2018).
STEFAN_BOLTZMANN = 5.670374419e-8

# Shared weather climates (invented). "alpine" is shared by the grassland and the forest,
# so that two sites given the same weather seed see the same clouds, rain and synoptic
# temperature anomalies (a "nearby site" for driver filling).
_CLIMATES: dict[str, dict] = {
    "alpine": dict(
        # day-type transition matrix, rows: from clear / broken / overcast (invented)
        transitions=((0.60, 0.30, 0.10), (0.25, 0.45, 0.30), (0.10, 0.30, 0.60)),
        # probability of each of three rain slots on a day of that type (invented)
        rain_slot_probability=(0.0, 0.25, 0.55),
        rain_mean_mm=4.0,  # mean event amount [mm], invented
        rain_mean_hours=2.5,  # mean event duration [h], invented
        ta_annual=7.0,  # degC at 1000 m, invented
        ta_seasonal_amplitude=9.5,  # K, invented
        dtr_clear=12.0,  # diurnal temperature range of a clear day [K], invented
        dew_point_depression=4.5,  # mean daily Ta - Td [K], invented
        wind_mean=2.6,  # m s-1 at 2 m over grass, invented
        lapse_rate=-0.0065,  # K m-1, standard atmosphere (ICAO 1993)
        reference_elevation=1000.0,  # m
    ),
    "semi-arid": dict(
        transitions=((0.78, 0.17, 0.05), (0.45, 0.40, 0.15), (0.30, 0.40, 0.30)),
        rain_slot_probability=(0.0, 0.10, 0.40),
        rain_mean_mm=7.0,
        rain_mean_hours=2.0,
        ta_annual=14.5,
        ta_seasonal_amplitude=9.5,
        dtr_clear=14.0,
        dew_point_depression=7.0,
        wind_mean=2.8,
        lapse_rate=-0.0065,
        reference_elevation=250.0,
    ),
}

#: Invented defaults of each site kind. Every number here is invented for the demo unless a
#: source is named; conductances follow the order of magnitude of Kelliher et al. (1995)
#: [from memory, /work/shared/REFERENCES.md §2: ~20 mm s-1 natural vegetation, ~32 crops].
KIND_PARAMETERS: dict[str, dict] = {
    "grassland": dict(
        climate="alpine",
        latitude=47.05,
        longitude=11.60,
        elevation_m=1240.0,
        utc_offset_hours=1.0,
        canopy_height_m=0.15,
        measurement_height_m=2.5,
        irga="closed-path",
        interval_minutes=30,
        gs_max=0.015,  # m s-1 (brief; order of Kelliher et al. 1995 [from memory])
        gs_night=0.0008,  # m s-1, cuticular/night conductance, invented
        gs_snow=0.0010,  # m s-1, sublimation-limited snow surface, invented
        light_half=150.0,  # W m-2, Stewart 1988 form of f(Rg), invented parameter
        vpd_half=1.3,  # kPa, f(D) = 1/(1 + D/D0) (Lohammar et al. 1980 form [from memory])
        t_response=(-2.0, 20.0, 38.0),  # degC: Tmin, Topt, Tmax (Jarvis 1976 form)
        albedo=0.23,  # FAO-56 reference grass
        albedo_snow=0.80,  # fresh snow, common practice
        surface_excess_k=4.0,  # K surface-air difference at Rg = 1000 W m-2, invented
        g_fraction=(0.15, 0.40),  # G/Rn by day / by night (FAO-56 eq. 45-46 order)
        g_lag_minutes=60.0,
        soil_depth_mm=300.0,
        theta=dict(sat=0.50, fc=0.38, crit=0.27, wp=0.12, init=0.35),
        dry_off_mj=1.5,  # MJ m-2 of Rg to dry a rain-wetted canopy, invented
        dew_dry_off_mj=0.4,
        rain_factor=1.0,
        wind_factor=1.0,
        snow=True,
        gpp_max=22.0,  # umol m-2 s-1, invented
        r10=3.5,  # umol m-2 s-1 at 10 degC, invented
    ),
    "conifer-forest": dict(
        climate="alpine",
        latitude=47.12,
        longitude=11.48,
        elevation_m=980.0,
        utc_offset_hours=1.0,
        canopy_height_m=18.0,
        measurement_height_m=30.0,
        irga="open-path",
        interval_minutes=30,
        gs_max=0.012,
        gs_night=0.0005,
        gs_snow=None,
        light_half=250.0,
        vpd_half=1.1,
        t_response=(-3.0, 18.0, 36.0),
        albedo=0.09,
        albedo_snow=0.09,  # snow under a dense canopy hardly changes its albedo
        surface_excess_k=1.0,
        g_fraction=(0.04, 0.15),
        g_lag_minutes=120.0,
        soil_depth_mm=600.0,
        theta=dict(sat=0.45, fc=0.32, crit=0.21, wp=0.10, init=0.29),
        dry_off_mj=3.0,
        dew_dry_off_mj=0.3,
        rain_factor=1.1,
        wind_factor=1.25,
        snow=False,
        gpp_max=28.0,
        r10=4.5,
    ),
    "irrigated-crop": dict(
        climate="semi-arid",
        latitude=41.63,
        longitude=-0.87,
        elevation_m=250.0,
        utc_offset_hours=1.0,
        canopy_height_m=None,  # growing: 0.1 -> 2.0 m in steps (see _crop_height)
        measurement_height_m=4.0,
        irga="closed-path",
        interval_minutes=60,
        gs_max=0.025,
        gs_night=0.0008,
        gs_snow=None,
        light_half=200.0,
        vpd_half=1.8,
        t_response=(2.0, 27.0, 42.0),
        albedo=0.17,  # bare soil at sowing; rises to albedo_full with the canopy
        albedo_full=0.22,
        albedo_snow=0.17,
        surface_excess_k=5.0,
        g_fraction=(0.30, 0.50),  # bare soil; falls to g_fraction_full with the canopy
        g_fraction_full=(0.07, 0.25),
        g_lag_minutes=60.0,
        soil_depth_mm=700.0,
        theta=dict(sat=0.46, fc=0.34, crit=0.25, wp=0.14, init=0.30),
        irrigation=dict(trigger=0.23, amount_mm=30.0, start_hour=6.0, hours=3.0,
                        min_days_between=4),
        dry_off_mj=2.0,
        dew_dry_off_mj=0.4,
        rain_factor=1.0,
        wind_factor=1.1,
        snow=False,
        gpp_max=40.0,
        r10=3.0,
        crop_height=(0.1, 2.0),
        tipping_bucket_mm=0.2,  # mm per tip of the rain gauge
    ),
}

#: Random noise of the measurement. LE, H, Fc: Laplace (double exponential) with
#: sd = a + b |flux| (form of Hollinger and Richardson 2005; values invented, of the order
#: reported for forests and crops [from memory]). Others: Gaussian sd = a + b |x|.
NOISE_MODEL: dict[str, dict] = {
    "le": dict(distribution="laplace", a=6.0, b=0.10),  # W m-2, -
    "h": dict(distribution="laplace", a=8.0, b=0.10),
    "fc": dict(distribution="laplace", a=0.8, b=0.12),  # umol m-2 s-1, -
    "rn": dict(distribution="normal", a=3.0, b=0.02),
    "g": dict(distribution="normal", a=1.5, b=0.05),
    "rg": dict(distribution="normal", a=1.0, b=0.015),
    "sw_out": dict(distribution="normal", a=1.0, b=0.02),
    "lw_in": dict(distribution="normal", a=3.0, b=0.0),
    "lw_out": dict(distribution="normal", a=2.0, b=0.0),
    "ta": dict(distribution="normal", a=0.1, b=0.0),  # K
    "rh": dict(distribution="normal", a=1.5, b=0.0),  # %
    "p_air": dict(distribution="normal", a=0.02, b=0.0),  # kPa
    "wind": dict(distribution="normal", a=0.05, b=0.03),
    "wind_dir": dict(distribution="normal", a=5.0, b=0.0),
    "ustar": dict(distribution="normal", a=0.01, b=0.08),
    "swc": dict(distribution="normal", a=0.003, b=0.0),
    "t_soil": dict(distribution="normal", a=0.05, b=0.0),
}

_FLUX_VARS = ("le", "h", "fc")
_SONIC_VARS = ("le", "h", "fc", "ustar", "wind", "wind_dir")
_ANALYSER_VARS = ("le", "fc")


@dataclass(frozen=True)
class SimulatedSite:
    """One invented site: the truth, what the instruments recorded, and how it was made.

    Attributes
    ----------
    kind : str
        One of :data:`SITE_KINDS`.
    truth : pandas.DataFrame
        Noise-free record on the site grid (index ``timestamp_start``, tz-aware at the
        site's fixed offset); canonical names and units plus the ``true_*`` columns
        described in the module docstring.
    observed : pandas.DataFrame
        The same grid after noise, spikes, gaps, upstream-flag faults and the site-history
        faults, in canonical units (what the loggers export, before any unit change).
        Extra columns: ``le_upstream_flag`` (0/1/2, 2 = instrument says reject) and
        ``signal_strength`` (%, analyser signal) where the site has them.
    meta : dict
        ``site`` (parameters), ``noise`` (:data:`NOISE_MODEL`), ``spikes`` (variable ->
        DatetimeIndex), ``gaps`` (list of dicts: start, end, variables, cause),
        ``gap_mask`` (DataFrame of bool, True where observed was blanked), ``history``
        (list of dicts for ``[[history]]``), ``irrigation_events``, ``cold_spell``,
        ``snow_period``, ``closure_fraction``, ``seed``, ``weather_seed``.
    """

    kind: str
    truth: pd.DataFrame
    observed: pd.DataFrame
    meta: dict = field(default_factory=dict)


# ---------------------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------------------


def _ar1(innovations: np.ndarray, phi: float) -> np.ndarray:
    """Stationary AR(1) with unit variance from standard-normal innovations (lfilter)."""
    scale = math.sqrt(1.0 - phi * phi)
    out = lfilter([scale], [1.0, -phi], innovations)
    out[0] = innovations[0]  # start in the stationary distribution
    return out


def _wet_after(events: np.ndarray, cumulative_mj: np.ndarray, threshold_mj: float) -> np.ndarray:
    """True from each wetting event until ``threshold_mj`` of radiation has fallen since."""
    n = events.size
    idx = np.where(events, np.arange(n), -1)
    last = np.maximum.accumulate(idx)
    has = last >= 0
    since = cumulative_mj - cumulative_mj[np.maximum(last, 0)]
    return has & (since < threshold_mj)


def _f_temperature(ta: np.ndarray, tmin: float, topt: float, tmax: float) -> np.ndarray:
    """Jarvis (1976) temperature response, 1 at Topt, 0 outside (Tmin, Tmax)."""
    p = (tmax - topt) / (topt - tmin)
    with np.errstate(invalid="ignore"):
        f = ((ta - tmin) / (topt - tmin)) * ((tmax - ta) / (tmax - topt)) ** p
    return np.where((ta > tmin) & (ta < tmax), np.clip(f, 0.0, 1.0), 0.0)


def _crop_height(index: pd.DatetimeIndex, low: float, high: float, step_days: float = 14.0):
    """Stepwise logistic crop growth ``low`` -> ``high`` through the record [m].

    Heights change every ``step_days`` (a technician's measurement), rounded to 0.05 m.
    """
    t = np.asarray((index - index[0]) / pd.Timedelta(days=1), dtype=float)
    total = max(t[-1], 1.0)
    step = np.floor(t / step_days) * step_days + 0.5 * step_days
    mid, tau = 0.42 * total, total / 11.0
    h = low + (high - low) / (1.0 + np.exp(-(step - mid) / tau))
    h = np.where(t < step_days, low, h)  # sown: the first period is the initial height
    return np.round(h / 0.05) * 0.05


def _runs(values: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) index pairs of runs of equal values."""
    change = np.flatnonzero(np.r_[True, values[1:] != values[:-1], True])
    return list(zip(change[:-1].tolist(), change[1:].tolist()))


def _mask_runs(mask: np.ndarray) -> list[tuple[int, int]]:
    """(start, stop) index pairs of the True runs of a boolean array."""
    m = np.r_[False, mask, False].astype(np.int8)
    d = np.diff(m)
    return list(zip(np.flatnonzero(d == 1).tolist(), np.flatnonzero(d == -1).tolist()))


def _expand_events(starts: np.ndarray, lengths: np.ndarray, n: int):
    """Interval indices covered by events (start, length): flat index array and event id."""
    lengths = np.asarray(lengths, dtype=int)
    total = int(lengths.sum())
    if total == 0:
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int)
    event = np.repeat(np.arange(len(starts)), lengths)
    offset = np.arange(total) - np.repeat(np.cumsum(lengths) - lengths, lengths)
    idx = np.asarray(starts, dtype=int)[event] + offset
    keep = idx < n
    return idx[keep], event[keep]


# ---------------------------------------------------------------------------------------
# the simulation
# ---------------------------------------------------------------------------------------


def simulate_site(
    kind: str,
    *,
    start: str | pd.Timestamp = "2025-01-01",
    days: int = 365,
    interval_minutes: int | None = None,
    latitude: float | None = None,
    longitude: float | None = None,
    elevation_m: float | None = None,
    utc_offset_hours: float | None = None,
    canopy_height_m: float | Callable | np.ndarray | None = None,
    measurement_height_m: float | None = None,
    seed: int = 0,
    weather_seed: int | None = None,
    closure_fraction: float = 0.8,
    noise: bool = True,
    noise_scale: float = 1.0,
    spikes: bool = True,
    gaps: bool = True,
    history_faults: bool = True,
) -> SimulatedSite:
    """Simulate one invented flux-tower site with known truth.

    Parameters
    ----------
    kind : {"grassland", "conifer-forest", "irrigated-crop"}
        Site kind; sets the invented defaults of :data:`KIND_PARAMETERS`.
    start : str or Timestamp, optional
        First local (standard-time) day of the record.
    days : int, optional
        Length of the record [days].
    interval_minutes : int, optional
        Averaging interval [min]; default the kind's (30; 60 for the crop).
    latitude, longitude : float, optional
        Decimal degrees (north, east positive); default the kind's invented place.
    elevation_m : float, optional
        Elevation [m].
    utc_offset_hours : float, optional
        Fixed offset of local standard time [h].
    canopy_height_m : float, callable or array, optional
        Canopy height [m]: a scalar, a function of the DatetimeIndex of interval starts
        returning an array, or an array on the grid. Default: the kind's (the crop grows
        from 0.1 to 2.0 m in two-week steps).
    measurement_height_m : float, optional
        Measurement height [m]; default the kind's.
    seed : int, optional
        Seed of the site's own randomness (noise, spikes, gaps, faults).
    weather_seed : int, optional
        Seed of the weather; two sites of one climate with the same weather seed, start,
        length and interval share clouds, rain and synoptic anomalies. Default ``seed``.
    closure_fraction : float, optional
        (H + LE) / (Rn − G) of the measured truth; 1 gives perfect closure.
    noise_scale : float, optional
        Multiplies a and b of every entry of :data:`NOISE_MODEL` (0.5 halves the random
        noise of every variable); the scaled model is recorded in ``meta["noise"]``.
    noise, spikes, gaps, history_faults : bool, optional
        Switch the measurement artefacts on or off (all on by default); ``spikes`` also
        switches the short corrupted LE episodes that the upstream flag marks 2.

    Returns
    -------
    SimulatedSite
        Truth, observed record and metadata (see the class).

    Raises
    ------
    ValueError
        Unknown kind, non-positive length, interval not dividing a day, closure fraction
        outside (0, 1.5].
    """
    if kind not in KIND_PARAMETERS:
        raise ValueError(f"unknown site kind {kind!r}; choose one of {', '.join(SITE_KINDS)}")
    if days < 1:
        raise ValueError("days must be at least 1")
    if not 0.0 < closure_fraction <= 1.5:
        raise ValueError("closure_fraction must lie in (0, 1.5]")
    if not noise_scale >= 0.0:
        raise ValueError("noise_scale must be >= 0")
    par = KIND_PARAMETERS[kind]
    clim = _CLIMATES[par["climate"]]
    interval_minutes = int(interval_minutes or par["interval_minutes"])
    if (24 * 60) % interval_minutes:
        raise ValueError("interval_minutes must divide a day")
    lat = par["latitude"] if latitude is None else float(latitude)
    lon = par["longitude"] if longitude is None else float(longitude)
    elev = par["elevation_m"] if elevation_m is None else float(elevation_m)
    offset_h = par["utc_offset_hours"] if utc_offset_hours is None else float(utc_offset_hours)
    zm = par["measurement_height_m"] if measurement_height_m is None else float(measurement_height_m)
    weather_seed = seed if weather_seed is None else weather_seed
    wrng = np.random.default_rng(weather_seed)
    rng = np.random.default_rng([seed, 7919])

    tz = _dt.timezone(_dt.timedelta(hours=offset_h))
    m = (24 * 60) // interval_minutes  # intervals per day
    n = days * m
    dt_s = interval_minutes * 60.0
    interval = pd.Timedelta(minutes=interval_minutes)
    first = pd.Timestamp(start)
    first = first.tz_localize(tz) if first.tzinfo is None else first.tz_convert(tz)
    first = first.normalize()
    index = pd.date_range(first, periods=n, freq=interval, name="timestamp_start")
    mid = index + interval / 2
    day = np.repeat(np.arange(days), m)
    utc_hours = np.asarray(
        (mid.tz_convert("UTC") - mid.tz_convert("UTC").normalize()) / pd.Timedelta(hours=1)
    )
    solar_hour = np.mod(utc_hours + lon / 15.0, 24.0)  # mean solar time [h]

    # ---- canopy height -----------------------------------------------------------------
    if canopy_height_m is None:
        if par["canopy_height_m"] is None:
            hc = _crop_height(index, *par["crop_height"])
        else:
            hc = np.full(n, par["canopy_height_m"])
    elif callable(canopy_height_m):
        hc = np.asarray(canopy_height_m(index), dtype=float) * np.ones(n)
    else:
        hc = np.asarray(canopy_height_m, dtype=float) * np.ones(n)
    if np.any(hc <= 0) or np.any(hc >= zm):
        raise ValueError("canopy height must be positive and below the measurement height")
    cover = np.clip((hc - 0.05) / 0.95, 0.1, 1.0) if par["canopy_height_m"] is None else np.ones(n)

    # ---- solar --------------------------------------------------------------------------
    from pipeline import solar

    potential = np.asarray(
        solar.interval_mean_potential_radiation(index, interval, lat, lon), dtype=float
    )
    potential = np.where(potential > 0, potential, 0.0)
    daytime = potential > 0

    # ---- weather draws (fixed order and sizes: shared by sites of one weather seed) ------
    u_state = wrng.random(days)
    z_cloud = wrng.standard_normal(n)
    z_ta = wrng.standard_normal(days)
    z_dep = wrng.standard_normal(days)
    z_p = wrng.standard_normal(days)
    z_wind_day = wrng.standard_normal(days)
    z_wind = wrng.standard_normal(n)
    z_dir = wrng.standard_normal(days)
    z_dir_i = wrng.standard_normal(n)
    u_rain = wrng.random((days, 3))
    u_rain_start = wrng.random((days, 3))
    u_rain_amount = wrng.random((days, 3))
    u_rain_dur = wrng.random((days, 3))
    z_ta_i = wrng.standard_normal(n)

    # cold spell: six days, starting at 15 % of the record (at least day 1)
    cs_len = min(6, max(1, days // 4))
    cs0 = min(max(1, int(0.15 * days)), max(days - cs_len, 0))
    cold = np.zeros(days, dtype=bool)
    cold[cs0:cs0 + cs_len] = True

    # day types: Markov chain over days (a loop over days)
    trans = np.cumsum(np.asarray(clim["transitions"]), axis=1)
    state = np.empty(days, dtype=int)
    s = 1
    for d in range(days):
        s = int(np.searchsorted(trans[s], u_state[d]))
        s = min(s, 2)
        state[d] = s
    state[cold] = 0  # the cold spell is a clear high-pressure spell ...
    state[cs0] = 2  # ... that arrives with an overcast, snowy day
    kt_clear = 0.75 + 2e-5 * elev  # FAO-56 eq. 37: Rso = (0.75 + 2e-5 z) Ra
    base = np.array([0.97, 0.70, 0.30])[state]  # day-type mean, fraction of kt_clear
    amp = np.array([0.03, 0.22, 0.10])[state]  # within-day variability
    cloud_ar = _ar1(z_cloud, 0.85)
    rel = np.repeat(base, m) + np.repeat(amp, m) * cloud_ar
    # broken-cloud enhancement allowed up to 5 % above the clear-sky envelope
    rel = np.clip(rel, 0.08, np.where(np.repeat(state, m) == 1, 1.05, 1.0))

    # rain events: up to three per day (slot probabilities by day type)
    p_slot = np.asarray(clim["rain_slot_probability"])[state]
    occurs = u_rain < p_slot[:, None]
    occurs[cs0, 0] = True  # the cold spell's snowfall
    d_idx, k_idx = np.nonzero(occurs)
    ev_start = d_idx * m + np.floor(u_rain_start[d_idx, k_idx] * m).astype(int)
    ev_hours = -clim["rain_mean_hours"] * np.log1p(-u_rain_dur[d_idx, k_idx] * 0.999)
    ev_len = np.maximum(1, np.round(ev_hours * 60.0 / interval_minutes)).astype(int)
    ev_mm = -clim["rain_mean_mm"] * par["rain_factor"] * np.log1p(
        -u_rain_amount[d_idx, k_idx] * 0.999)
    ev_mm = np.where((d_idx == cs0) & (k_idx == 0), 12.0, ev_mm)  # snowfall, mm water
    ev_mm = np.round(np.maximum(ev_mm, 0.4), 1)
    ridx, rev = _expand_events(ev_start, ev_len, n)
    precip = np.zeros(n)
    np.add.at(precip, ridx, (ev_mm / ev_len)[rev])
    raining = precip > 0
    rel = np.where(raining, np.minimum(rel, 0.15), rel)
    rg = rel * kt_clear * potential

    # daily clear index (for temperature range, humidity, longwave at night)
    pot_day = np.bincount(day, potential, minlength=days)
    rg_day = np.bincount(day, rg, minlength=days)
    clear_day = np.where(pot_day > 0, rg_day / np.maximum(pot_day * kt_clear, 1e-9), 0.5)
    cloud_frac_day = np.clip(1.0 - clear_day, 0.0, 1.0)

    # ---- air temperature ---------------------------------------------------------------
    doy_day = np.asarray(pd.DatetimeIndex(index[::m]).dayofyear, dtype=float)
    seasonal = clim["ta_annual"] - clim["ta_seasonal_amplitude"] * np.cos(
        2.0 * np.pi * (doy_day - 20.0) / 365.25)  # coldest about 20 January (invented)
    lapse = clim["lapse_rate"] * (elev - clim["reference_elevation"])
    synoptic = 2.5 * _ar1(z_ta, 0.75)
    cold_anomaly = np.where(cold, -9.0, 0.0)
    tmean_day = seasonal + lapse + synoptic + cold_anomaly + 1.5 * (clear_day - 0.6)
    dtr_day = clim["dtr_clear"] * (0.35 + 0.65 * np.clip(clear_day, 0, 1))
    dtr_day = np.where(cold, dtr_day * 1.2, dtr_day)
    t_day = np.arange(days) + 0.5
    t_i = (np.arange(n) + 0.5) / m
    tmean = np.interp(t_i, t_day, tmean_day)
    dtr = np.interp(t_i, t_day, dtr_day)
    # diurnal course: minimum near sunrise, maximum about 15 h solar time (invented shape)
    phase = 2.0 * np.pi * (solar_hour - 15.0) / 24.0
    shape = (np.cos(phase) + 0.2 * np.cos(2 * phase)) / 1.2
    ta = tmean + 0.5 * dtr * shape + 0.3 * _ar1(z_ta_i, 0.9)
    ta = np.where(raining, ta - 1.0, ta)

    # ---- humidity through the dew point ------------------------------------------------
    dep_day = clim["dew_point_depression"] * (0.4 + 0.9 * clear_day) + 1.0 * _ar1(z_dep, 0.6)
    rainy_day = np.bincount(day, precip, minlength=days) > 0
    dep_day = np.where(rainy_day, np.minimum(dep_day, 1.0), dep_day)
    dep_day = np.maximum(dep_day, 0.3)
    td = np.interp(t_i, t_day, tmean_day - dep_day)
    es = micromet.saturation_vapour_pressure(ta)
    ea = np.minimum(micromet.vapour_pressure_from_dew_point(td), es)
    vpd = np.maximum(es - ea, 0.0)
    rh = np.minimum(100.0 * ea / es, 100.0)

    # ---- pressure, wind ----------------------------------------------------------------
    p0 = micromet.pressure_from_elevation(elev)  # FAO-56 eq. 7
    p_air = p0 * (1.0 + 0.007 * np.interp(t_i, t_day, _ar1(z_p, 0.8)))
    wind_day = clim["wind_mean"] * par["wind_factor"] * np.exp(0.35 * _ar1(z_wind_day, 0.6) - 0.06)
    wind_day = np.where(cold, wind_day * 0.7, wind_day)
    diurnal_wind = 1.0 + 0.3 * np.cos(2.0 * np.pi * (solar_hour - 14.0) / 24.0)
    wind = np.interp(t_i, t_day, wind_day) * diurnal_wind * np.exp(0.15 * _ar1(z_wind, 0.8))
    wind = np.maximum(wind, 0.25)
    wdir = 240.0 + 40.0 * np.interp(t_i, t_day, _ar1(z_dir, 0.7)) + 15.0 * _ar1(z_dir_i, 0.8)
    wind_dir = np.mod(wdir, 360.0)

    # ---- snow (grassland) --------------------------------------------------------------
    snow_days = np.zeros(days, dtype=bool)
    if par["snow"]:
        snow_days[cs0:min(days, cs0 + cs_len + 2)] = True
    snow = np.repeat(snow_days, m)

    # ---- radiation balance --------------------------------------------------------------
    albedo = par["albedo"] + (par.get("albedo_full", par["albedo"]) - par["albedo"]) * (
        (cover - 0.1) / 0.9)
    albedo = np.where(snow, par["albedo_snow"], albedo)
    sw_out = albedo * rg
    tk = ta + ZERO_CELSIUS
    eps_clear = 1.24 * (10.0 * ea / tk) ** (1.0 / 7.0)  # Brutsaert 1975, ea in hPa
    cloud = np.where(daytime, np.clip(1.0 - rel, 0.0, 1.0), np.repeat(cloud_frac_day, m))
    eps_sky = cloud + (1.0 - cloud) * eps_clear  # Crawford and Duchon 1999
    lw_in = eps_sky * STEFAN_BOLTZMANN * tk**4
    excess = par["surface_excess_k"] * (1.0 - 0.6 * ((cover - 0.1) / 0.9)) if par[
        "canopy_height_m"] is None else par["surface_excess_k"]
    ts = ta + np.where(daytime, excess * rg / 1000.0, -2.0 * (1.0 - cloud))
    ts = np.where(snow, np.minimum(ts, 0.0), ts)
    eps_s = np.where(snow, 0.99, 0.98)  # surface emissivity, common practice
    lw_out = eps_s * STEFAN_BOLTZMANN * (ts + ZERO_CELSIUS) ** 4 + (1.0 - eps_s) * lw_in
    rn = rg - sw_out + lw_in - lw_out

    # ---- ground heat flux: lagged fraction of Rn ---------------------------------------
    lag = int(round(par["g_lag_minutes"] / interval_minutes))
    rn_lag = np.r_[np.full(lag, rn[0]), rn[:-lag]] if lag > 0 else rn
    gf_day, gf_night = par["g_fraction"]
    if "g_fraction_full" in par:
        w = (cover - 0.1) / 0.9
        gf_day = gf_day + (par["g_fraction_full"][0] - gf_day) * w
        gf_night = gf_night + (par["g_fraction_full"][1] - gf_night) * w
    g = np.where(rn_lag > 0, gf_day, gf_night) * rn_lag
    g = np.where(snow, 0.1 * g, g)
    available = rn - g

    # ---- turbulence ---------------------------------------------------------------------
    d0 = 0.67 * hc  # zero-plane displacement, common practice (Monteith and Unsworth 2013)
    z0 = 0.123 * hc  # roughness length for momentum, FAO-56 eq. 4 (zom = 0.123 h)
    z0 = np.where(snow & (hc < 0.5), 0.005, z0)  # snow buries the short grass
    u_log = VON_KARMAN * wind / np.log((zm - d0) / z0)  # log wind law, neutral
    # stability (invented factors): a little more mixing by day, much less on clear calm
    # nights (wind scaled by the kind's wind factor, so the forest's stronger wind above
    # the canopy does not hide its calm nights)
    calm = np.exp(-wind / (3.0 * par["wind_factor"]))
    calm_clear = np.where(daytime, 1.08, 1.0 - 0.6 * (1.0 - cloud) * calm)
    ustar = np.maximum(u_log * calm_clear, 0.02)
    ga = micromet.aerodynamic_conductance(wind, ustar)

    # ---- wetness ------------------------------------------------------------------------
    cum_mj = np.cumsum(rg) * dt_s / 1e6
    # dew on clear, calm, saturated nights (invented thresholds)
    dew_event = (~daytime) & (rh >= 99.0) & (wind < 2.5) & (cloud < 0.5)
    wet = _wet_after(raining, cum_mj, par["dry_off_mj"]) | _wet_after(
        dew_event, cum_mj, par["dew_dry_off_mj"])

    # ---- surface conductance without soil water (Jarvis 1976, Stewart 1988) -------------
    k_r = par["light_half"]
    f_rg = np.clip(rg * (1000.0 + k_r) / (1000.0 * (rg + k_r)), 0.0, 1.0)  # Stewart 1988
    f_vpd = 1.0 / (1.0 + vpd / par["vpd_half"])
    f_t = _f_temperature(ta, *par["t_response"])
    gs_no_water = par["gs_max"] * cover * f_rg * f_vpd * f_t

    # ---- soil bucket and fluxes: a loop over days ---------------------------------------
    th = par["theta"]
    depth = par["soil_depth_mm"]
    irr_par = par.get("irrigation")
    irrigation = np.zeros(n)
    swc = np.empty(n)
    gs_dry = np.empty(n)
    gs = np.empty(n)
    le_closed = np.empty(n)
    irrigation_events: list[dict] = []
    theta = th["init"]
    last_irrigation = -10**6
    i_start = int(round(irr_par["start_hour"] * 60 / interval_minutes)) if irr_par else 0
    i_len = max(1, int(round(irr_par["hours"] * 60 / interval_minutes))) if irr_par else 0
    f_theta_all = np.empty(days)
    for d in range(days):
        sl = slice(d * m, (d + 1) * m)
        wet_d = wet[sl].copy()
        if irr_par and theta < irr_par["trigger"] and d - last_irrigation >= irr_par[
                "min_days_between"]:
            last_irrigation = d
            a, b = d * m + i_start, d * m + i_start + i_len
            irrigation[a:b] = irr_par["amount_mm"] / i_len
            irrigation_events.append(dict(start=index[a], end=index[b - 1] + interval,
                                          amount_mm=irr_par["amount_mm"]))
            ev = np.zeros(m, dtype=bool)
            ev[i_start:i_start + i_len] = True
            wet_d |= _wet_after(ev, cum_mj[sl], par["dry_off_mj"]) & (
                np.arange(m) >= i_start)
            wet[sl] = wet_d
        f_theta = float(np.clip((theta - th["wp"]) / (th["crit"] - th["wp"]), 0.0, 1.0))
        f_theta_all[d] = f_theta
        gdry = np.maximum(gs_no_water[sl] * f_theta, par["gs_night"])
        if par["gs_snow"] is not None:
            gdry = np.where(snow[sl], par["gs_snow"], gdry)
        gsd = np.where(wet_d & ~snow[sl], WET_SURFACE_CONDUCTANCE, gdry)
        le_d = micromet.penman_monteith(available[sl], ta[sl], vpd[sl], p_air[sl], ga[sl], gsd)
        et = micromet.evaporation_mm(le_d, ta[sl], dt_s, frozen=snow[sl])
        path = theta + np.cumsum(precip[sl] + irrigation[sl] - et) / depth
        path = np.clip(path, th["wp"] * 0.6, th["sat"])
        swc[sl] = path
        theta = float(path[-1])
        if theta > th["fc"]:  # drainage of half the excess over field capacity per day
            theta -= 0.5 * (theta - th["fc"])
        gs_dry[sl] = gdry
        gs[sl] = gsd
        le_closed[sl] = le_d
    h_closed = available - le_closed
    le = closure_fraction * le_closed  # Bowen ratio kept: both scaled down
    h = closure_fraction * h_closed
    omega = micromet.decoupling_coefficient(ta, p_air, ga, gs)

    # ---- soil temperature, CO2 flux -----------------------------------------------------
    ta_s = pd.Series(ta)
    t_soil = ta_s.ewm(halflife=3 * m).mean().to_numpy()
    t_soil = t_soil + 0.15 * dtr * np.cos(2.0 * np.pi * (solar_hour - 18.0) / 24.0)
    t_soil = np.where(snow, np.clip(t_soil, -0.5, 0.5), t_soil)
    gpp = par["gpp_max"] * cover * (rg / (rg + 350.0)) * f_t * np.repeat(f_theta_all, m) * (
        1.0 / (1.0 + vpd / (2.0 * par["vpd_half"])))
    gpp = np.where(snow, 0.0, gpp)
    reco = par["r10"] * 2.0 ** ((t_soil - 10.0) / 10.0)  # Q10 = 2, common practice
    fc = reco - gpp

    truth = pd.DataFrame(
        {
            "le": le, "h": h, "rn": rn, "g": g, "rg": rg, "sw_out": sw_out,
            "lw_in": lw_in, "lw_out": lw_out, "ta": ta, "rh": rh, "vpd": vpd,
            "p_air": p_air, "wind": wind, "wind_dir": wind_dir, "ustar": ustar,
            "precip": precip, "swc": swc, "t_soil": t_soil, "fc": fc,
            "true_le": le, "true_h": h, "true_le_closed": le_closed,
            "true_h_closed": h_closed, "available_energy": available,
            "true_gs": gs, "true_gs_dry": gs_dry, "true_ga": ga, "true_omega": omega,
            "canopy_wet": wet, "snow_cover": snow, "irrigation": irrigation,
            "canopy_height_m": hc, "measurement_height_m": np.full(n, zm),
            "potential_radiation": potential, "daytime": daytime,
        },
        index=index,
    )

    site = dict(kind=kind, latitude=lat, longitude=lon, elevation_m=elev,
                utc_offset_hours=offset_h, canopy_height_m=float(hc[0]),
                measurement_height_m=zm, irga=par["irga"], interval_minutes=interval_minutes)
    meta: dict = dict(
        site=site, seed=seed, weather_seed=weather_seed, closure_fraction=closure_fraction,
        noise={k: dict(v, a=v["a"] * noise_scale, b=v["b"] * noise_scale)
               for k, v in NOISE_MODEL.items()} if noise else {},
        cold_spell=(index[cs0 * m], index[min(n - 1, (cs0 + cs_len) * m - 1)] + interval),
        snow_period=None, irrigation_events=irrigation_events,
        wet_surface_conductance=WET_SURFACE_CONDUCTANCE,
    )
    if snow.any():
        a, b = _mask_runs(snow)[0]
        meta["snow_period"] = (index[a], index[b - 1] + interval)
    observed = _observe(truth, par, meta, rng, interval, noise=noise, spikes=spikes,
                        gaps=gaps, history_faults=history_faults)
    return SimulatedSite(kind=kind, truth=truth, observed=observed, meta=meta)


# ---------------------------------------------------------------------------------------
# the measurement
# ---------------------------------------------------------------------------------------

_OBSERVED = ("le", "h", "rn", "g", "rg", "sw_out", "lw_in", "lw_out", "ta", "rh", "vpd",
             "p_air", "wind", "wind_dir", "ustar", "precip", "swc", "t_soil", "fc")


def _observe(truth, par, meta, rng, interval, *, noise, spikes, gaps, history_faults):
    """Noise, spikes, gaps, upstream flags and history faults -> the observed frame."""
    index = truth.index
    n = len(index)
    per_day = int(pd.Timedelta(days=1) / interval)
    days = n // per_day
    obs = truth.loc[:, list(_OBSERVED)].copy()
    daytime = truth["daytime"].to_numpy()
    raining = truth["precip"].to_numpy() > 0
    open_path = par["irga"] == "open-path"

    # ---- random noise ---------------------------------------------------------------------
    if noise:
        for var, spec in meta["noise"].items():
            x = obs[var].to_numpy()
            sd = spec["a"] + spec["b"] * np.abs(x)
            if spec["distribution"] == "laplace":
                e = rng.laplace(0.0, sd / math.sqrt(2.0))  # var of Laplace(b) = 2 b^2
            else:
                e = rng.normal(0.0, sd)
            obs[var] = x + e
        # pyranometers read slightly negative at night (thermal offset), common practice
        night = ~daytime
        obs.loc[night, "rg"] = rng.normal(-1.0, 0.4, int(night.sum()))
        obs.loc[night, "sw_out"] = rng.normal(-0.5, 0.3, int(night.sum()))
        obs["rh"] = np.clip(obs["rh"].to_numpy(), 1.0, 102.0)
        obs["vpd"] = micromet.vpd_from_rh(obs["ta"].to_numpy(), obs["rh"].to_numpy())
        obs["wind"] = np.maximum(obs["wind"].to_numpy(), 0.0)
        obs["ustar"] = np.maximum(obs["ustar"].to_numpy(), 0.005)
        obs["wind_dir"] = np.mod(obs["wind_dir"].to_numpy(), 360.0)
        obs["swc"] = np.clip(obs["swc"].to_numpy(), 0.01, 0.7)
    bucket = par.get("tipping_bucket_mm")
    if bucket:  # a tipping-bucket gauge records whole tips
        obs["precip"] = np.round(obs["precip"].to_numpy() / bucket) * bucket

    # ---- spikes: a few per week on LE, H and Fc -----------------------------------------------
    spike_pos: dict[str, pd.DatetimeIndex] = {}
    if spikes:
        for var, size in (("le", (120.0, 320.0)), ("h", (120.0, 320.0)), ("fc", (12.0, 35.0))):
            k = rng.poisson(3.0 * days / 7.0)
            pos = np.unique(rng.integers(0, n, k))
            sign = rng.choice([-1.0, 1.0], pos.size)
            mag = rng.uniform(*size, pos.size)
            x = obs[var].to_numpy().copy()
            x[pos] += sign * mag
            obs[var] = x
            spike_pos[var] = index[pos]
    meta["spikes"] = spike_pos

    # ---- upstream quality flag of LE (0 good, 1 fair, 2 reject) -----------------------------
    upstream = np.where(rng.random(n) < 0.08, 1.0, 0.0)
    k = max(1, days // 15) if spikes else 0  # corrupted episodes the instrument flags
    starts = rng.integers(0, max(1, n - 6), k)
    lens = rng.integers(2, 7, k)
    bad, ev = _expand_events(starts, lens, n)
    if bad.size:
        bias = rng.choice([-1.0, 1.0], k) * rng.uniform(80.0, 200.0, k)
        x = obs["le"].to_numpy().copy()
        x[bad] += bias[ev]
        obs["le"] = x
        upstream[bad] = 2.0
    obs["le_upstream_flag"] = upstream
    meta["upstream_rejects"] = index[np.unique(bad)]

    # ---- analyser signal strength (%), drops in rain on open-path analysers ----------------
    signal = np.clip(rng.normal(96.0, 1.5, n), 0, 100)
    if open_path:
        signal = np.where(truth["canopy_wet"].to_numpy() & raining,
                          rng.uniform(5.0, 55.0, n), signal)
    obs["signal_strength"] = np.round(signal, 1)

    # ---- history faults --------------------------------------------------------------------
    history: list[dict] = []
    hc = truth["canopy_height_m"].to_numpy()
    runs = _runs(hc)
    if len(runs) > 1:
        for a, b in runs[1:]:
            history.append(dict(start=index[a], end=index[b - 1] + interval,
                                canopy_height_m=float(hc[a]), reason="canopy height measured"))
    for ev_ in meta["irrigation_events"]:
        history.append(dict(start=ev_["start"], end=ev_["end"], irrigation=True,
                            reason=f"sprinkler irrigation, {ev_['amount_mm']:g} mm"))
    if history_faults and days >= 4:
        # reversed heat-flux plates: from 40 % of the record for a fifth of it (>= 1 day)
        d_a = int(0.40 * days)
        d_b = min(days, d_a + max(1, days // 5))
        a, b = d_a * per_day + per_day // 2, d_b * per_day + per_day // 2
        b = min(b, n)
        x = obs["g"].to_numpy().copy()
        x[a:b] = -x[a:b]
        obs["g"] = x
        history.append(dict(start=index[a], end=index[b - 1] + interval,
                            correct={"g": {"scale": -1.0}},
                            reason="heat-flux plates wired the wrong way round"))
        # site visit: 09:00-12:00 local on the day at 70 % of the record
        d_v = min(days - 1, int(0.70 * days))
        a = d_v * per_day + int(pd.Timedelta(hours=9) / interval)
        b = d_v * per_day + int(pd.Timedelta(hours=12) / interval)
        visit = slice(a, b)
        damp = rng.uniform(0.2, 0.6, b - a)
        for var in ("le", "fc"):
            x = obs[var].to_numpy().copy()
            x[visit] = x[visit] * damp + rng.laplace(0.0, 30.0 if var == "le" else 4.0, b - a)
            obs[var] = x
        x = obs["h"].to_numpy().copy()
        x[visit] = x[visit] + rng.normal(60.0, 40.0, b - a)  # people and a car by the tower
        obs["h"] = x
        history.append(dict(start=index[a], end=index[b - 1] + interval,
                            exclude=["le", "h", "fc"],
                            reason="site visit: analyser cleaned, people at the tower"))
    history.sort(key=lambda e: (e["start"], e["end"]))
    meta["history"] = history

    # ---- gaps ------------------------------------------------------------------------------
    mask = pd.DataFrame(False, index=index, columns=list(_OBSERVED))
    gap_list: list[dict] = []
    if gaps:
        mvals = mask.to_numpy().copy()
        col = {v: i for i, v in enumerate(mask.columns)}

        def blank(idx, variables, cause):
            if len(idx) == 0:
                return
            for v in variables:
                mvals[idx, col[v]] = True
            for a, b in _mask_runs(np.isin(np.arange(n), idx)):
                gap_list.append(dict(start=index[a], end=index[b - 1] + interval,
                                     variables=list(variables), cause=cause))

        # logger outages of 1-4 days (about one per 40 days, at least one after 3 weeks)
        k = rng.poisson(days / 40.0)
        if days >= 21:
            k = max(k, 1)
        for _ in range(k):
            length = int(rng.uniform(1.0, 4.0) * per_day)
            a = int(rng.integers(0, max(1, n - length)))
            if par["irga"] == "open-path":  # forest: flux or met logger, at random
                variables = _SONIC_VARS if rng.random() < 0.5 else tuple(
                    v for v in _OBSERVED if v not in _SONIC_VARS)
            else:
                variables = _OBSERVED
            blank(np.arange(a, min(n, a + length)), variables, "logger outage")
        # short gaps of the flux system, three times as frequent at night
        p_start = np.where(daytime, 0.012, 0.036)
        starts = np.flatnonzero(rng.random(n) < p_start)
        lens = rng.geometric(0.3, starts.size)
        idx, ev = _expand_events(starts, lens, n)
        sonic = rng.random(starts.size) < 0.5
        blank(idx[sonic[ev]], _SONIC_VARS, "short gap (sonic)")
        blank(idx[~sonic[ev]], _ANALYSER_VARS, "short gap (analyser)")
        # open-path analyser: rain and the hour after it
        if open_path:
            after = int(pd.Timedelta(hours=1) / interval)
            wet_window = np.convolve(raining.astype(int), np.ones(after + 1, dtype=int))[:n] > 0
            blank(np.flatnonzero(wet_window), _ANALYSER_VARS, "rain on the open-path analyser")
        # rare single met gaps
        for v in ("ta", "rh", "rg", "rn", "swc"):
            blank(np.flatnonzero(rng.random(n) < 0.002), (v,), "short gap (met sensor)")
        mask = pd.DataFrame(mvals, index=index, columns=mask.columns)
        vpd_gap = mask["ta"].to_numpy() | mask["rh"].to_numpy()
        mask["vpd"] = mask["vpd"].to_numpy() | vpd_gap
        for v in mask.columns:
            obs.loc[mask[v].to_numpy(), v] = np.nan
        le_gap = mask["le"].to_numpy()
        obs.loc[le_gap, "le_upstream_flag"] = np.nan
        if par["irga"] == "open-path":
            obs.loc[mask["wind"].to_numpy() & mask["h"].to_numpy(), "signal_strength"] = np.nan
    meta["gaps"] = gap_list
    meta["gap_mask"] = mask
    return obs
