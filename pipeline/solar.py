"""Solar geometry, potential (top-of-atmosphere) and clear-sky radiation for a site.

Times are timezone-aware pandas timestamps (a ``DatetimeIndex`` or a datetime ``Series``);
they are converted to UTC internally, so any fixed offset works. Latitude is degrees north
positive, longitude degrees east positive (CONTRACT §2). Results are numpy arrays.

Algorithm: the Astronomical Almanac's low-precision solar coordinates as published by
Michalsky (1988), stated accurate to 0.01° for 1950–2050 (the tests find about 0.01°
against pvlib's NREL SPA over 2023). Elevations are geometric (true), without atmospheric
refraction. Missing times (NaT) give NaN.

Interval means are integrated analytically over the hour angle with the declination and
distance held at the interval's midpoint (FAO-56 eq. 28 generalised to any interval up to
a day and to polar day and night), which is what an interval-averaged logger value should
be compared with.
"""
from __future__ import annotations

import datetime as _dt

import numpy as np
import pandas as pd

from pipeline.constants import SOLAR_CONSTANT
from pipeline.errors import TowerflowError

__all__ = [
    "solar_position_terms",
    "solar_elevation",
    "potential_radiation",
    "interval_mean_sine_elevation",
    "interval_mean_potential_radiation",
    "clear_sky_radiation",
    "is_daytime",
]

_TWO_PI = 2.0 * np.pi
_NS_PER_DAY = 86400 * 10**9


def _utc_index(times) -> pd.DatetimeIndex:
    if isinstance(times, pd.Timestamp | _dt.datetime):
        times = [times]
    idx = pd.DatetimeIndex(times)
    if idx.tz is None:
        raise TowerflowError(
            "solar geometry needs timezone-aware timestamps (got naive times); "
            "localise them to the site's fixed offset first"
        )
    return idx.tz_convert("UTC").as_unit("ns")  # asi8 below counts nanoseconds


def _interval_seconds(interval) -> float:
    """Interval length in seconds: a Timedelta-like, an offset string, or minutes."""
    if isinstance(interval, int | float | np.integer | np.floating):
        seconds = float(interval) * 60.0
    else:
        seconds = pd.Timedelta(interval).total_seconds()
    if not np.isfinite(seconds) or seconds <= 0 or seconds > 86400:
        raise TowerflowError(
            f"averaging interval must be longer than 0 and at most one day (got {interval!r})"
        )
    return seconds


def solar_position_terms(times):
    """Declination, Greenwich hour angle, distance factor and equation of time.

    Parameters
    ----------
    times : pandas.DatetimeIndex or Series of datetimes
        Timezone-aware instants.

    Returns
    -------
    declination : ndarray
        Solar declination δ [rad].
    greenwich_hour_angle : ndarray
        Hour angle of the Sun at longitude 0 [rad]; add the longitude for the local one.
    distance_factor : ndarray
        Inverse relative Earth–Sun distance squared (r0/r)² [-].
    equation_of_time : ndarray
        Apparent minus mean solar time [min] (for information).

    Raises
    ------
    TowerflowError
        If the times are naive.

    Notes
    -----
    The Astronomical Almanac's low-precision formulas for the Sun as given by Michalsky
    (1988): with n = JD − 2451545.0 (days from J2000.0; UT used for TT), mean longitude
    L = 280.460 + 0.9856474 n, mean anomaly g = 357.528 + 0.9856003 n, ecliptic longitude
    λ = L + 1.915 sin g + 0.020 sin 2g, obliquity ε = 23.439 − 4e-7 n, right ascension
    α = atan2(cos ε sin λ, cos λ), declination δ = asin(sin ε sin λ), Greenwich mean
    sidereal time GMST = 6.697375 + 0.0657098242 n + UT [h], distance
    R = 1.00014 − 0.01671 cos g − 0.00014 cos 2g [AU]. Stated accuracy 0.01° in solar
    position for 1950–2050.

    References
    ----------
    Michalsky, J. J. (1988). The Astronomical Almanac's algorithm for approximate solar
    position (1950–2050). Solar Energy 40(3):227–235.
    """
    idx = _utc_index(times)
    ns = idx.asi8
    ut_hours = (ns % _NS_PER_DAY).astype(float) / 3.6e12
    n = ns.astype(float) / 8.64e13 + (2440587.5 - 2451545.0)  # JD - 2451545.0 (Michalsky 1988)
    missing = np.asarray(idx.isna())
    if missing.any():
        ut_hours[missing] = np.nan
        n[missing] = np.nan
    mean_lon = np.mod(280.460 + 0.9856474 * n, 360.0)  # deg, Michalsky 1988
    g = np.deg2rad(np.mod(357.528 + 0.9856003 * n, 360.0))  # mean anomaly, Michalsky 1988
    ecl_lon = np.deg2rad(mean_lon + 1.915 * np.sin(g) + 0.020 * np.sin(2 * g))
    obliq = np.deg2rad(23.439 - 4e-7 * n)  # Michalsky 1988
    ra = np.arctan2(np.cos(obliq) * np.sin(ecl_lon), np.cos(ecl_lon))
    decl = np.arcsin(np.sin(obliq) * np.sin(ecl_lon))
    gmst = np.mod(6.697375 + 0.0657098242 * n + ut_hours, 24.0)  # h, Michalsky 1988
    gha = np.deg2rad(gmst * 15.0) - ra
    gha = np.mod(gha + np.pi, _TWO_PI) - np.pi
    r = 1.00014 - 0.01671 * np.cos(g) - 0.00014 * np.cos(2 * g)  # AU, Michalsky 1988
    eot = 4.0 * (np.mod(mean_lon - np.rad2deg(ra) + 180.0, 360.0) - 180.0)  # min
    return decl, gha, 1.0 / (r * r), eot


def solar_elevation(times, latitude, longitude):
    """Geometric solar elevation angle.

    Parameters
    ----------
    times : pandas.DatetimeIndex or Series of datetimes
        Timezone-aware instants.
    latitude : float or array_like
        Latitude [degree, north positive].
    longitude : float or array_like
        Longitude [degree, east positive].

    Returns
    -------
    ndarray
        Solar elevation above the horizon [degree], −90..90, without refraction.

    Notes
    -----
    sin h = sin φ sin δ + cos φ cos δ cos ω (Iqbal 1983, ch. 1; the integrand of FAO-56
    eq. 21), with δ and the hour angle ω from Michalsky (1988)
    (:func:`solar_position_terms`).

    References
    ----------
    Michalsky, J. J. (1988). Solar Energy 40(3):227–235.
    Iqbal, M. (1983). An Introduction to Solar Radiation. Academic Press, ch. 1.
    """
    decl, gha, _, _ = solar_position_terms(times)
    phi = np.deg2rad(np.asarray(latitude, dtype=float))
    omega = gha + np.deg2rad(np.asarray(longitude, dtype=float))
    sin_h = np.sin(phi) * np.sin(decl) + np.cos(phi) * np.cos(decl) * np.cos(omega)
    return np.rad2deg(np.arcsin(np.clip(sin_h, -1.0, 1.0)))


def potential_radiation(times, latitude, longitude, *, solar_constant=SOLAR_CONSTANT):
    """Instantaneous top-of-atmosphere solar irradiance on a horizontal surface.

    Parameters
    ----------
    times : pandas.DatetimeIndex or Series of datetimes
        Timezone-aware instants.
    latitude, longitude : float or array_like
        Site position [degree].
    solar_constant : float, optional
        Total solar irradiance at 1 AU [W m-2]; default 1361 (Kopp and Lean 2011). Use
        :data:`pipeline.constants.SOLAR_CONSTANT_FAO56` (1366.7) to reproduce FAO-56.

    Returns
    -------
    ndarray
        R_a = S0 (r0/r)² max(sin h, 0) [W m-2], ≥ 0.

    References
    ----------
    Iqbal, M. (1983). An Introduction to Solar Radiation, ch. 1 and 4.
    Kopp, G. and Lean, J. L. (2011). A new, lower value of total solar irradiance:
    evidence and climate significance. Geophys. Res. Lett. 38:L01706.
    """
    decl, gha, e0, _ = solar_position_terms(times)
    phi = np.deg2rad(np.asarray(latitude, dtype=float))
    omega = gha + np.deg2rad(np.asarray(longitude, dtype=float))
    sin_h = np.sin(phi) * np.sin(decl) + np.cos(phi) * np.cos(decl) * np.cos(omega)
    return solar_constant * e0 * np.maximum(sin_h, 0.0)


def _interval_mean_sine(starts, interval, latitude, longitude):
    seconds = _interval_seconds(interval)
    idx = _utc_index(starts)
    mid = idx + pd.Timedelta(seconds=seconds / 2.0)
    decl, gha, e0, _ = solar_position_terms(mid)
    phi = np.deg2rad(np.asarray(latitude, dtype=float))
    omega_mid = gha + np.deg2rad(np.asarray(longitude, dtype=float))
    width = _TWO_PI * seconds / 86400.0  # hour angle swept [rad]
    lo = np.mod(omega_mid - width / 2.0 + np.pi, _TWO_PI) - np.pi  # in [-pi, pi)
    hi = lo + width  # < 3 pi
    a = np.sin(phi) * np.sin(decl)
    b = np.cos(phi) * np.cos(decl)
    with np.errstate(divide="ignore", invalid="ignore"):
        # sunset hour angle (FAO-56 eq. 25), clipped for polar day/night
        cos_ws = np.clip(-a / b, -1.0, 1.0)
    ws = np.arccos(cos_ws)
    total = np.zeros(np.broadcast(lo, a).shape)
    for k in (0.0, 1.0):  # sunlit hour angles [2πk − ωs, 2πk + ωs]; lo ≥ −π, hi < 3π
        l1 = np.maximum(lo, _TWO_PI * k - ws)
        u1 = np.minimum(hi, _TWO_PI * k + ws)
        part = a * (u1 - l1) + b * (np.sin(u1) - np.sin(l1))  # ∫ (a + b cos ω) dω
        total = total + np.where(u1 > l1, part, 0.0)
    mean_sine = np.maximum(total / width, 0.0)
    return mean_sine, e0


def interval_mean_sine_elevation(starts, interval, latitude, longitude):
    """Mean of max(sin h, 0) over each averaging interval [start, start + interval).

    Parameters
    ----------
    starts : pandas.DatetimeIndex or Series of datetimes
        Timezone-aware interval starts.
    interval : pandas.Timedelta, str, datetime.timedelta or number
        Interval length (a number is minutes), at most one day.
    latitude, longitude : float or array_like
        Site position [degree].

    Returns
    -------
    ndarray
        Interval mean of the positive part of the sine of the solar elevation [-]; the
        night part of an interval counts as zero.

    Notes
    -----
    ∫ (sin φ sin δ + cos φ cos δ cos ω) dω over the sunlit part of the interval's hour
    angles, divided by the interval's hour-angle width; δ and the equation of time are
    taken at the midpoint (FAO-56 eq. 28 and 31, generalised).

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 25, 28, 29 and 31.
    Iqbal, M. (1983). An Introduction to Solar Radiation, ch. 1.
    """
    return _interval_mean_sine(starts, interval, latitude, longitude)[0]


def interval_mean_potential_radiation(starts, interval, latitude, longitude, *,
                                      solar_constant=SOLAR_CONSTANT):
    """Mean top-of-atmosphere irradiance on a horizontal surface over each interval.

    Parameters
    ----------
    starts : pandas.DatetimeIndex or Series of datetimes
        Timezone-aware interval starts.
    interval : pandas.Timedelta, str, datetime.timedelta or number
        Interval length (a number is minutes), at most one day.
    latitude, longitude : float or array_like
        Site position [degree].
    solar_constant : float, optional
        [W m-2]; default 1361 (Kopp and Lean 2011).

    Returns
    -------
    ndarray
        Mean potential radiation over [start, start + interval) [W m-2], ≥ 0. For a
        one-day interval starting at local solar midnight this is FAO-56 eq. 21 divided
        by the day length (with S0 = 1361 instead of 1366.7 W m-2).

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 21 and 28.
    Kopp and Lean (2011), Geophys. Res. Lett. 38:L01706.
    """
    mean_sine, e0 = _interval_mean_sine(starts, interval, latitude, longitude)
    return solar_constant * e0 * mean_sine


def clear_sky_radiation(potential, elevation_m):
    """Clear-sky solar radiation at the surface from potential radiation.

    Parameters
    ----------
    potential : float or array_like
        Top-of-atmosphere radiation on a horizontal surface [W m-2] (instantaneous or an
        interval mean).
    elevation_m : float or array_like
        Site elevation above sea level [m].

    Returns
    -------
    float or ndarray
        R_so = (0.75 + 2e-5 z) R_a [W m-2].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 37.
    Allen, R. G. (1996). Assessing integrity of weather data for reference
    evapotranspiration estimation. J. Irrig. Drain. Eng. 122(2):97–106.
    """
    potential = np.asarray(potential, dtype=float)
    z = np.asarray(elevation_m, dtype=float)
    out = (0.75 + 2e-5 * z) * potential  # FAO-56 eq. 37
    return out[()] if out.ndim == 0 else out


def is_daytime(starts, interval, latitude, longitude, *, min_potential_radiation=0.0):
    """Whether the sun is above the horizon during (part of) each averaging interval.

    Parameters
    ----------
    starts : pandas.DatetimeIndex or Series of datetimes
        Timezone-aware interval starts.
    interval : pandas.Timedelta, str, datetime.timedelta or number
        Interval length (a number is minutes).
    latitude, longitude : float or array_like
        Site position [degree].
    min_potential_radiation : float, optional
        Threshold on the interval-mean potential radiation [W m-2]. The default 0 marks an
        interval as day as soon as the (geometric) sun is above the horizon for any part of
        it; a positive value (e.g. 10–20 W m-2) excludes twilight-edge intervals.

    Returns
    -------
    ndarray of bool
        True where :func:`interval_mean_potential_radiation` exceeds the threshold.

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 28 (interval-integrated extraterrestrial radiation).
    """
    mean = interval_mean_potential_radiation(starts, interval, latitude, longitude)
    return mean > min_potential_radiation
