"""Micrometeorology: psychrometrics, Penman–Monteith forward and inverse, decoupling.

Every function is pure and vectorised: arguments are floats or numpy arrays (anything
``numpy.asarray`` accepts) broadcast elementwise; the result is a numpy array, or a numpy
float when every argument was a scalar. Missing values (NaN) propagate; invalid elements
(a negative conductance, a zero denominator) give NaN, never ``inf`` or an exception.

Units follow the project contract: temperature degC, pressure and vapour pressure kPa,
energy fluxes W m-2, conductances m s-1, relative humidity %.

Choices made here (and used consistently by every function of the module):

* saturation vapour pressure and its slope: FAO-56 eq. 11 and 13 (Tetens form with the
  Murray 1967 coefficients, as adopted by Allen et al. 1998);
* latent heat of vaporisation: linear in temperature, FAO-56 eq. 3-1 (Harrison 1963);
* specific heat of air: the FAO-56 value 1013 J kg-1 K-1 (:data:`SPECIFIC_HEAT_AIR`);
* psychrometric constant: gamma = cp P / (epsilon lambda(T)) with the temperature-dependent
  lambda (FAO-56 eq. 8 with lambda from eq. 3-1 instead of the fixed 2.45 MJ kg-1);
* air density in Penman–Monteith: dry air as an ideal gas, rho = P / (R_d T). Moist air is
  0.2–1.5 % lighter at the same P and T (:func:`air_density` with ``vapour_pressure``);
  FAO-56 eq. 3-5 uses a virtual temperature of 1.01 (T + 273).
"""
from __future__ import annotations

import numpy as np

from pipeline.constants import (
    GAS_CONSTANT,
    GAS_CONSTANT_DRY_AIR,
    HEAT_CAPACITY_DIFFERENCE_WATER_ICE,
    LATENT_HEAT_OF_FUSION_0C,
    MOLAR_MASS_RATIO,
    SPECIFIC_HEAT_AIR,
    SPECIFIC_HEAT_DRY_AIR,
    SPECIFIC_HEAT_WATER_VAPOUR,
    THOM_EXCESS_RESISTANCE_COEFFICIENT,
    THOM_EXCESS_RESISTANCE_EXPONENT,
    VON_KARMAN,
    WATER_DENSITY,
    ZERO_CELSIUS,
)

__all__ = [
    # CONTRACT §5
    "saturation_vapour_pressure",
    "slope_saturation_vapour_pressure",
    "psychrometric_constant",
    "latent_heat_of_vaporization",
    "air_density",
    "aerodynamic_conductance",
    "penman_monteith",
    "invert_penman_monteith",
    "decoupling_coefficient",
    "conductance_to_molar",
    # extensions
    "invert_penman_monteith_with_reason",
    "INVERSION_OK",
    "INVERSION_LE_NOT_POSITIVE",
    "INVERSION_ENERGY_NOT_POSITIVE",
    "INVERSION_VPD_TOO_LOW",
    "INVERSION_ABOVE_POTENTIAL",
    "INVERSION_MISSING_INPUT",
    "INVERSION_GA_NOT_POSITIVE",
    "INVERSION_REASON_NAMES",
    "DEFAULT_MIN_VPD_FOR_INVERSION",
    "vpd_from_rh",
    "rh_from_vpd",
    "vapour_pressure_from_rh",
    "vapour_pressure_from_dew_point",
    "dew_point_from_vapour_pressure",
    "pressure_from_elevation",
    "specific_heat_moist_air",
    "latent_heat_of_sublimation",
    "bowen_ratio",
    "equilibrium_latent_heat_flux",
    "imposed_latent_heat_flux",
    "priestley_taylor_alpha",
    "evaporation_mm",
]

# Reason codes of :func:`invert_penman_monteith_with_reason` (int8 array values).
#: The inversion succeeded: gs is finite and non-negative.
INVERSION_OK = 0
#: LE <= 0: no transpiration to invert (dew, night, sensor offsets).
INVERSION_LE_NOT_POSITIVE = 1
#: Available energy <= 0.
INVERSION_ENERGY_NOT_POSITIVE = 2
#: VPD below the ``min_vpd`` guard: gs is ill-determined (0/0 as VPD -> 0).
INVERSION_VPD_TOO_LOW = 3
#: Denominator <= 0: LE at or above what an infinite gs would give (the Penman potential).
INVERSION_ABOVE_POTENTIAL = 4
#: An input is missing (NaN) or not finite.
INVERSION_MISSING_INPUT = 5
#: Aerodynamic conductance <= 0 or pressure <= 0 (no exchange to invert through).
INVERSION_GA_NOT_POSITIVE = 6

#: Reason code -> spelled-out name, for summaries.
INVERSION_REASON_NAMES = {
    INVERSION_OK: "ok",
    INVERSION_LE_NOT_POSITIVE: "latent heat flux not positive",
    INVERSION_ENERGY_NOT_POSITIVE: "available energy not positive",
    INVERSION_VPD_TOO_LOW: "vapour pressure deficit too low",
    INVERSION_ABOVE_POTENTIAL: "latent heat flux above the Penman potential",
    INVERSION_MISSING_INPUT: "missing input",
    INVERSION_GA_NOT_POSITIVE: "aerodynamic conductance or pressure not positive",
}

#: Numerical guard of the inversion [kPa]: below it gs is 0/0-like and not returned.
#: This is not a physiological filter (conductance filters in the rule set are stricter).
DEFAULT_MIN_VPD_FOR_INVERSION = 0.01

# FAO-56 eq. 11 coefficients (Allen et al. 1998; Tetens 1930 form, Murray 1967 fit)
_ES0 = 0.6108  # kPa, FAO-56 eq. 11
_ES_A = 17.27  # -, FAO-56 eq. 11
_ES_B = 237.3  # degC, FAO-56 eq. 11
_SLOPE_NUM = 4098.0  # = _ES_A * _ES_B (rounded in FAO-56 eq. 13)


def _f(x):
    """Return a float64 array view of ``x`` (no copy when already float64)."""
    return np.asarray(x, dtype=float)


def _ret(x):
    """Return a numpy float for 0-d results, the array otherwise."""
    return x[()] if isinstance(x, np.ndarray) and x.ndim == 0 else x


def _es_and_slope(ta):
    es = _ES0 * np.exp(_ES_A * ta / (ta + _ES_B))  # FAO-56 eq. 11
    slope = _SLOPE_NUM * es / (ta + _ES_B) ** 2  # FAO-56 eq. 13
    return es, slope


# ---------------------------------------------------------------------------------------
# Psychrometrics
# ---------------------------------------------------------------------------------------


def saturation_vapour_pressure(ta):
    """Saturation vapour pressure over liquid water.

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].

    Returns
    -------
    float or ndarray
        Saturation vapour pressure [kPa].

    Notes
    -----
    e°(T) = 0.6108 exp(17.27 T / (T + 237.3)), FAO-56 eq. 11. Used below 0 degC as well
    (over water, not ice), as FAO-56 does.

    References
    ----------
    Allen, R. G., Pereira, L. S., Raes, D. and Smith, M. (1998). Crop evapotranspiration.
    FAO Irrigation and Drainage Paper 56, eq. 11.
    """
    ta = _f(ta)
    return _ret(_ES0 * np.exp(_ES_A * ta / (ta + _ES_B)))


def slope_saturation_vapour_pressure(ta):
    """Slope of the saturation vapour pressure curve, Δ.

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].

    Returns
    -------
    float or ndarray
        Δ = de°/dT [kPa K-1].

    Notes
    -----
    Δ = 4098 e°(T) / (T + 237.3)², FAO-56 eq. 13 (the derivative of eq. 11).

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 13.
    """
    return _ret(_es_and_slope(_f(ta))[1])


def latent_heat_of_vaporization(ta):
    """Latent heat of vaporisation of water.

    Parameters
    ----------
    ta : float or array_like
        Temperature [degC].

    Returns
    -------
    float or ndarray
        λ [J kg-1]; 2.4538e6 at 20 degC.

    Notes
    -----
    λ = (2.501 − 0.002361 T) 10⁶, FAO-56 Annex 3 eq. 3-1 (Harrison 1963). Within 0.05 % of
    steam-table values between 0 and 40 degC.

    References
    ----------
    Harrison, L. P. (1963). Fundamental concepts and definitions relating to humidity. In
    Wexler, A. (ed.), Humidity and Moisture, vol. 3, Reinhold, New York.
    Allen et al. (1998), FAO-56, Annex 3, eq. 3-1.
    """
    ta = _f(ta)
    return _ret((2.501 - 0.002361 * ta) * 1e6)  # FAO-56 eq. 3-1


def latent_heat_of_sublimation(ta):
    """Latent heat of sublimation of ice (for evaporation from snow and ice).

    Parameters
    ----------
    ta : float or array_like
        Temperature [degC] (meaningful at or below 0 degC).

    Returns
    -------
    float or ndarray
        λ_s [J kg-1]; 2.8347e6 at 0 degC.

    Notes
    -----
    λ_s = λ_v(T) + L_f(T) with λ_v from FAO-56 eq. 3-1 and the latent heat of fusion
    L_f(T) = 0.3337e6 + (c_water − c_ice) T (Kirchhoff's relation with constant heat
    capacities, values of Rogers and Yau 1989, Table 2.1). The result changes by only
    about −0.25 kJ kg-1 K-1, as tabulated values do.

    References
    ----------
    Rogers, R. R. and Yau, M. K. (1989). A Short Course in Cloud Physics, 3rd ed.,
    Pergamon, ch. 2 and Table 2.1.
    Allen et al. (1998), FAO-56, Annex 3, eq. 3-1.
    """
    ta = _f(ta)
    fusion = LATENT_HEAT_OF_FUSION_0C + HEAT_CAPACITY_DIFFERENCE_WATER_ICE * ta
    return _ret((2.501 - 0.002361 * ta) * 1e6 + fusion)


def psychrometric_constant(p_air, ta):
    """Psychrometric constant γ.

    Parameters
    ----------
    p_air : float or array_like
        Air pressure [kPa].
    ta : float or array_like
        Air temperature [degC] (enters through λ(T)).

    Returns
    -------
    float or ndarray
        γ [kPa K-1]; 0.06724 at 101.3 kPa and 20 degC.

    Notes
    -----
    γ = c_p P / (ε λ(T)), FAO-56 eq. 8 with c_p = 1013 J kg-1 K-1 and ε = 0.622 as in
    FAO-56, but with the temperature-dependent λ of :func:`latent_heat_of_vaporization`
    instead of FAO-56's fixed 2.45 MJ kg-1 (which gives γ = 0.665e-3 P). The difference is
    at most 2.1 % between 0 and 35 degC.

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 8 and Annex 3 eq. 3-1.
    """
    p_air = _f(p_air)
    ta = _f(ta)
    lam = (2.501 - 0.002361 * ta) * 1e6  # FAO-56 eq. 3-1
    return _ret(SPECIFIC_HEAT_AIR * p_air / (MOLAR_MASS_RATIO * lam))  # FAO-56 eq. 8


def air_density(ta, p_air, *, vapour_pressure=None):
    """Density of air from the ideal-gas law.

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].
    p_air : float or array_like
        Air pressure [kPa].
    vapour_pressure : float or array_like, optional
        Actual vapour pressure [kPa]. Without it the density of dry air is returned (the
        value used by :func:`penman_monteith`); with it, moist air through the virtual
        temperature.

    Returns
    -------
    float or ndarray
        ρ [kg m-3]; 1.2041 for dry air at 20 degC and 101.325 kPa.

    Notes
    -----
    ρ = P / (R_d T_v) with R_d = R / M_d = 287.05 J kg-1 K-1 and
    T_v = T / (1 − (1 − ε) e / P) (virtual temperature; e.g. Wallace and Hobbs 2006,
    ch. 3; FAO-56 eq. 3-5 approximates T_v by 1.01 T). Without ``vapour_pressure``,
    T_v = T.

    References
    ----------
    Wallace, J. M. and Hobbs, P. V. (2006). Atmospheric Science, 2nd ed., Academic Press,
    ch. 3.
    Allen et al. (1998), FAO-56, Annex 3, eq. 3-5.
    """
    ta = _f(ta)
    p_air = _f(p_air)
    tk = ta + ZERO_CELSIUS
    if vapour_pressure is not None:
        e = _f(vapour_pressure)
        tk = tk / (1.0 - (1.0 - MOLAR_MASS_RATIO) * e / p_air)  # virtual temperature
    return _ret(p_air * 1e3 / (GAS_CONSTANT_DRY_AIR * tk))


def specific_heat_moist_air(vapour_pressure, p_air):
    """Specific heat of moist air at constant pressure.

    The Penman–Monteith functions of this module use the FAO-56 constant
    :data:`pipeline.constants.SPECIFIC_HEAT_AIR` (1013 J kg-1 K-1); this function gives the
    mass-weighted value for comparison (1005–1025 J kg-1 K-1 in the usual range).

    Parameters
    ----------
    vapour_pressure : float or array_like
        Actual vapour pressure [kPa].
    p_air : float or array_like
        Air pressure [kPa].

    Returns
    -------
    float or ndarray
        c_p [J kg-1 K-1].

    Notes
    -----
    c_p = (1 − q) c_pd + q c_pv with the specific humidity q = ε e / (P − (1 − ε) e)
    and c_pd = 3.5 R_d, c_pv = 4 R_v (ideal gases; Wallace and Hobbs 2006, sections 3.1
    and 3.3).

    References
    ----------
    Wallace, J. M. and Hobbs, P. V. (2006). Atmospheric Science, 2nd ed., Academic Press,
    sections 3.1 and 3.3.
    """
    e = _f(vapour_pressure)
    p_air = _f(p_air)
    q = MOLAR_MASS_RATIO * e / (p_air - (1.0 - MOLAR_MASS_RATIO) * e)
    return _ret((1.0 - q) * SPECIFIC_HEAT_DRY_AIR + q * SPECIFIC_HEAT_WATER_VAPOUR)


def vpd_from_rh(ta, rh):
    """Vapour pressure deficit from temperature and relative humidity.

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].
    rh : float or array_like
        Relative humidity [%]. Not clipped: RH above 100 % gives a negative VPD (quality
        control decides what to do with such readings).

    Returns
    -------
    float or ndarray
        VPD = e°(T) (1 − RH/100) [kPa].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 11 and 19 (with RH at the same time as T).
    """
    ta = _f(ta)
    rh = _f(rh)
    return _ret(saturation_vapour_pressure(ta) * (1.0 - rh / 100.0))


def rh_from_vpd(ta, vpd):
    """Relative humidity from temperature and vapour pressure deficit.

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].
    vpd : float or array_like
        Vapour pressure deficit [kPa].

    Returns
    -------
    float or ndarray
        RH = 100 (1 − VPD / e°(T)) [%].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 10 and 11.
    """
    ta = _f(ta)
    vpd = _f(vpd)
    return _ret(100.0 * (1.0 - vpd / saturation_vapour_pressure(ta)))


def vapour_pressure_from_rh(ta, rh):
    """Actual vapour pressure from temperature and relative humidity.

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].
    rh : float or array_like
        Relative humidity [%].

    Returns
    -------
    float or ndarray
        e_a = e°(T) RH / 100 [kPa].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 10 (hourly form, eq. 54).
    """
    ta = _f(ta)
    rh = _f(rh)
    return _ret(saturation_vapour_pressure(ta) * rh / 100.0)


def vapour_pressure_from_dew_point(td):
    """Actual vapour pressure from the dew-point temperature.

    Parameters
    ----------
    td : float or array_like
        Dew-point temperature [degC].

    Returns
    -------
    float or ndarray
        e_a = e°(T_dew) [kPa].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 14.
    """
    return saturation_vapour_pressure(td)


def dew_point_from_vapour_pressure(ea):
    """Dew-point temperature from the actual vapour pressure (inverse of FAO-56 eq. 11).

    Parameters
    ----------
    ea : float or array_like
        Actual vapour pressure [kPa]; values ≤ 0 give NaN.

    Returns
    -------
    float or ndarray
        T_dew = 237.3 x / (17.27 − x) with x = ln(e_a / 0.6108) [degC].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 11 and 14 (solved for T).
    """
    ea = _f(ea)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.log(np.where(ea > 0, ea, np.nan) / _ES0)
        return _ret(_ES_B * x / (_ES_A - x))


def pressure_from_elevation(elevation_m):
    """Mean air pressure at an elevation (simplified standard atmosphere).

    Parameters
    ----------
    elevation_m : float or array_like
        Elevation above sea level [m].

    Returns
    -------
    float or ndarray
        P = 101.3 ((293 − 0.0065 z) / 293)^5.26 [kPa]; 81.8 kPa at 1800 m.

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 7.
    """
    z = _f(elevation_m)
    return _ret(101.3 * ((293.0 - 0.0065 * z) / 293.0) ** 5.26)  # FAO-56 eq. 7


# ---------------------------------------------------------------------------------------
# Conductances
# ---------------------------------------------------------------------------------------


def aerodynamic_conductance(wind, ustar, *, kb_inverse=None):
    """Aerodynamic conductance for heat from wind speed and friction velocity.

    Parameters
    ----------
    wind : float or array_like
        Horizontal wind speed at the measurement height [m s-1].
    ustar : float or array_like
        Friction velocity [m s-1]; values ≤ 0 give NaN.
    kb_inverse : float or array_like, optional
        Dimensionless excess resistance kB⁻¹ [-]. If given, the excess (quasi-laminar)
        resistance is kB⁻¹ / (k u*) instead of Thom's 6.2 u*^-0.67.

    Returns
    -------
    float or ndarray
        g_a = 1 / r_a [m s-1], with r_a = u / u*² + r_b.

    Notes
    -----
    The momentum resistance u / u*² follows from the definition of u* and the
    log wind profile (Monteith and Unsworth 2013, ch. 17). The default excess resistance
    for heat and vapour r_b = 6.2 u*^-0.67 s m-1 is Thom (1972), fitted over crops; for
    forests and sparse canopies the excess resistance is better written as
    r_b = kB⁻¹ / (k u*) with kB⁻¹ ≈ 2 (Verma 1989; Garratt and Hicks 1973), k = 0.41.

    References
    ----------
    Thom, A. S. (1972). Momentum, mass and heat exchange of vegetation. Q. J. R. Meteorol.
    Soc. 98:124–134.
    Verma, S. B. (1989). Aerodynamic resistances to transfers of heat, mass and momentum.
    In Estimation of Areal Evapotranspiration, IAHS Publ. 177:13–20.
    Monteith, J. L. and Unsworth, M. H. (2013). Principles of Environmental Physics, 4th
    ed., Academic Press, ch. 17.
    """
    wind = _f(wind)
    ustar = _f(ustar)
    with np.errstate(divide="ignore", invalid="ignore"):
        u_ok = np.where(ustar > 0, ustar, np.nan)
        w_ok = np.where(wind >= 0, wind, np.nan)
        if kb_inverse is None:
            # Thom 1972: r_b = 6.2 u*^-0.67 s m-1
            rb = THOM_EXCESS_RESISTANCE_COEFFICIENT * u_ok ** THOM_EXCESS_RESISTANCE_EXPONENT
        else:
            rb = _f(kb_inverse) / (VON_KARMAN * u_ok)  # Verma 1989
        return _ret(1.0 / (w_ok / u_ok**2 + rb))


def conductance_to_molar(g, ta, p_air):
    """Convert a conductance from m s-1 to mol m-2 s-1.

    Parameters
    ----------
    g : float or array_like
        Conductance [m s-1].
    ta : float or array_like
        Air temperature [degC].
    p_air : float or array_like
        Air pressure [kPa].

    Returns
    -------
    float or ndarray
        g P / (R T) [mol m-2 s-1]; 1 m s-1 = 41.57 mol m-2 s-1 at 20 degC, 101.325 kPa.

    References
    ----------
    Pearcy, R. W., Schulze, E.-D. and Zimmermann, R. (1989). Measurement of transpiration
    and leaf conductance. In Plant Physiological Ecology, Chapman and Hall, 137–160.
    Campbell, G. S. and Norman, J. M. (1998). An Introduction to Environmental Biophysics,
    2nd ed., Springer, ch. 3 (ideal-gas molar density P / (R T)).
    """
    g = _f(g)
    ta = _f(ta)
    p_air = _f(p_air)
    return _ret(g * p_air * 1e3 / (GAS_CONSTANT * (ta + ZERO_CELSIUS)))


# ---------------------------------------------------------------------------------------
# Penman–Monteith
# ---------------------------------------------------------------------------------------


def _pm_terms(ta, p_air):
    """Δ [kPa K-1], γ [kPa K-1] and ρ c_p [J m-3 K-1] (shared by the PM family)."""
    tp = ta + _ES_B
    es = _ES0 * np.exp(_ES_A * ta / tp)  # FAO-56 eq. 11
    delta = _SLOPE_NUM * es / (tp * tp)  # FAO-56 eq. 13
    lam = (2.501 - 0.002361 * ta) * 1e6  # FAO-56 eq. 3-1
    gamma = SPECIFIC_HEAT_AIR * p_air / (MOLAR_MASS_RATIO * lam)  # FAO-56 eq. 8
    rho_cp = p_air * (1e3 * SPECIFIC_HEAT_AIR / GAS_CONSTANT_DRY_AIR) / (ta + ZERO_CELSIUS)
    return delta, gamma, rho_cp


def penman_monteith(available_energy, ta, vpd, p_air, ga, gs):
    """Latent heat flux from the Penman–Monteith combination equation.

    Parameters
    ----------
    available_energy : float or array_like
        Available energy A = Rn − G (− storage) [W m-2].
    ta : float or array_like
        Air temperature [degC].
    vpd : float or array_like
        Vapour pressure deficit [kPa].
    p_air : float or array_like
        Air pressure [kPa].
    ga : float or array_like
        Aerodynamic conductance for heat and vapour [m s-1] (≥ 0).
    gs : float or array_like
        Surface (canopy) conductance [m s-1] (≥ 0; ``inf`` gives the wet-surface
        Penman potential, 0 gives 0).

    Returns
    -------
    float or ndarray
        λE [W m-2]. Negative conductances give NaN.

    Notes
    -----
    λE = (Δ A + ρ c_p D g_a) / (Δ + γ (1 + g_a / g_s)) (Monteith 1965;
    Monteith and Unsworth 2013, ch. 13; FAO-56 eq. 3 in resistance form), with Δ from FAO-56 eq. 13,
    γ from :func:`psychrometric_constant`, ρ from :func:`air_density` (dry air) and
    c_p = 1013 J kg-1 K-1.

    References
    ----------
    Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19:205–234.
    Monteith, J. L. and Unsworth, M. H. (2013). Principles of Environmental Physics, 4th
    ed., ch. 13.
    Allen et al. (1998), FAO-56, eq. 3.
    """
    a = _f(available_energy)
    ta = _f(ta)
    vpd = _f(vpd)
    p_air = _f(p_air)
    ga = _f(ga)
    gs = _f(gs)
    delta, gamma, rho_cp = _pm_terms(ta, p_air)
    with np.errstate(divide="ignore", invalid="ignore"):
        ga = np.where(ga >= 0, ga, np.nan)
        gs = np.where(gs >= 0, gs, np.nan)
        ratio = ga / gs  # inf where gs = 0 -> λE = 0; NaN where both are 0
        le = (delta * a + rho_cp * vpd * ga) / (delta + gamma * (1.0 + ratio))
    return _ret(le)


def invert_penman_monteith_with_reason(
    le, available_energy, ta, vpd, p_air, ga, *, min_vpd=DEFAULT_MIN_VPD_FOR_INVERSION
):
    """Surface conductance from measured λE by inverting Penman–Monteith, with reasons.

    Parameters
    ----------
    le : float or array_like
        Latent heat flux λE [W m-2].
    available_energy : float or array_like
        Available energy A [W m-2].
    ta : float or array_like
        Air temperature [degC].
    vpd : float or array_like
        Vapour pressure deficit [kPa].
    p_air : float or array_like
        Air pressure [kPa].
    ga : float or array_like
        Aerodynamic conductance [m s-1].
    min_vpd : float, optional
        VPD below which no conductance is returned [kPa]; default
        :data:`DEFAULT_MIN_VPD_FOR_INVERSION` (0.01 kPa, a numerical guard).

    Returns
    -------
    gs : float or ndarray
        Surface conductance [m s-1]; finite and ≥ 0 where ``reason == INVERSION_OK``,
        NaN elsewhere (never inf, never negative).
    reason : int or ndarray of int8
        :data:`INVERSION_OK` or why the element failed, by priority:
        :data:`INVERSION_MISSING_INPUT` (an input NaN or not finite),
        :data:`INVERSION_GA_NOT_POSITIVE` (g_a ≤ 0 or P ≤ 0),
        :data:`INVERSION_LE_NOT_POSITIVE` (λE ≤ 0),
        :data:`INVERSION_ENERGY_NOT_POSITIVE` (A ≤ 0),
        :data:`INVERSION_VPD_TOO_LOW` (D < ``min_vpd``),
        :data:`INVERSION_ABOVE_POTENTIAL` (denominator ≤ 0: λE at or above the value an
        infinite g_s would give, Δ A + ρ c_p D g_a ≤ (Δ + γ) λE).

    Notes
    -----
    Solving :func:`penman_monteith` for g_s:

    g_s = γ g_a λE / (Δ A + ρ c_p D g_a − (Δ + γ) λE)

    (Monteith 1965; the equivalent resistance form r_s = r_a (β Δ/γ − 1) + ρ c_p D / (γ λE)
    follows from Monteith and Unsworth 2013, ch. 13). The same Δ, γ, ρ and c_p are used
    as in the forward function, so the round trip is exact to rounding.

    References
    ----------
    Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19:205–234.
    Monteith, J. L. and Unsworth, M. H. (2013). Principles of Environmental Physics, 4th
    ed., ch. 13.
    """
    le = _f(le)
    a = _f(available_energy)
    ta = _f(ta)
    vpd = _f(vpd)
    p_air = _f(p_air)
    ga = _f(ga)
    delta, gamma, rho_cp = _pm_terms(ta, p_air)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        den = delta * a + rho_cp * vpd * ga - (delta + gamma) * le
        gs = gamma * ga * le / den
        missing = ~(
            np.isfinite(le) & np.isfinite(a) & np.isfinite(ta) & np.isfinite(vpd)
            & np.isfinite(p_air) & np.isfinite(ga)
        )
        conditions = [
            missing,
            (ga <= 0) | (p_air <= 0),
            le <= 0,
            a <= 0,
            vpd < min_vpd,
            ~(den > 0) | ~np.isfinite(gs),
        ]
        codes = [
            INVERSION_MISSING_INPUT,
            INVERSION_GA_NOT_POSITIVE,
            INVERSION_LE_NOT_POSITIVE,
            INVERSION_ENERGY_NOT_POSITIVE,
            INVERSION_VPD_TOO_LOW,
            INVERSION_ABOVE_POTENTIAL,
        ]
        reason = np.select(conditions, codes, default=INVERSION_OK).astype(np.int8)
        gs = np.where(reason == INVERSION_OK, gs, np.nan)
    return _ret(gs), _ret(reason)


def invert_penman_monteith(le, available_energy, ta, vpd, p_air, ga, *,
                           min_vpd=DEFAULT_MIN_VPD_FOR_INVERSION):
    """Surface conductance from measured λE by inverting Penman–Monteith.

    Parameters
    ----------
    le : float or array_like
        Latent heat flux λE [W m-2].
    available_energy : float or array_like
        Available energy A [W m-2].
    ta : float or array_like
        Air temperature [degC].
    vpd : float or array_like
        Vapour pressure deficit [kPa].
    p_air : float or array_like
        Air pressure [kPa].
    ga : float or array_like
        Aerodynamic conductance [m s-1].
    min_vpd : float, optional
        VPD guard [kPa], see :func:`invert_penman_monteith_with_reason`.

    Returns
    -------
    float or ndarray
        g_s [m s-1]; NaN where the inversion is undefined (see
        :func:`invert_penman_monteith_with_reason` for the reasons).

    References
    ----------
    Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19:205–234.
    """
    return invert_penman_monteith_with_reason(
        le, available_energy, ta, vpd, p_air, ga, min_vpd=min_vpd
    )[0]


def decoupling_coefficient(ta, p_air, ga, gs):
    """Decoupling coefficient Ω of Jarvis and McNaughton (1986).

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].
    p_air : float or array_like
        Air pressure [kPa].
    ga : float or array_like
        Aerodynamic conductance [m s-1] (≥ 0).
    gs : float or array_like
        Surface conductance [m s-1] (≥ 0).

    Returns
    -------
    float or ndarray
        Ω [-], in [0, 1]: 1 where the surface is fully decoupled from the air above
        (λE = equilibrium), 0 where fully coupled (λE = imposed).

    Notes
    -----
    Ω = (ε + 1) / (ε + 1 + g_a / g_s) with ε = Δ / γ (Jarvis and McNaughton 1986;
    McNaughton and Jarvis 1983). Negative conductances give NaN.

    References
    ----------
    Jarvis, P. G. and McNaughton, K. G. (1986). Stomatal control of transpiration: scaling
    up from leaf to region. Adv. Ecol. Res. 15:1–49.
    McNaughton, K. G. and Jarvis, P. G. (1983). Predicting effects of vegetation changes on
    transpiration and evaporation. In Kozlowski (ed.), Water Deficits and Plant Growth
    7:1–47.
    """
    ta = _f(ta)
    p_air = _f(p_air)
    ga = _f(ga)
    gs = _f(gs)
    delta, gamma, _ = _pm_terms(ta, p_air)
    eps1 = delta / gamma + 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        ga = np.where(ga >= 0, ga, np.nan)
        gs = np.where(gs >= 0, gs, np.nan)
        omega = eps1 / (eps1 + ga / gs)
    return _ret(omega)


def equilibrium_latent_heat_flux(available_energy, ta, p_air):
    """Equilibrium latent heat flux λE_eq.

    Parameters
    ----------
    available_energy : float or array_like
        Available energy A [W m-2].
    ta : float or array_like
        Air temperature [degC].
    p_air : float or array_like
        Air pressure [kPa].

    Returns
    -------
    float or ndarray
        λE_eq = Δ A / (Δ + γ) [W m-2].

    References
    ----------
    Slatyer, R. O. and McIlroy, I. C. (1961). Practical Microclimatology. CSIRO/UNESCO.
    McNaughton and Jarvis (1983), in Water Deficits and Plant Growth 7:1–47.
    """
    a = _f(available_energy)
    delta, gamma, _ = _pm_terms(_f(ta), _f(p_air))
    return _ret(delta * a / (delta + gamma))


def imposed_latent_heat_flux(ta, vpd, p_air, gs):
    """Imposed latent heat flux λE_imp (the flux the air's VPD imposes through g_s).

    Parameters
    ----------
    ta : float or array_like
        Air temperature [degC].
    vpd : float or array_like
        Vapour pressure deficit [kPa].
    p_air : float or array_like
        Air pressure [kPa].
    gs : float or array_like
        Surface conductance [m s-1].

    Returns
    -------
    float or ndarray
        λE_imp = ρ c_p D g_s / γ [W m-2].

    Notes
    -----
    With the same Δ, γ, ρ and c_p as :func:`penman_monteith`,
    λE = Ω λE_eq + (1 − Ω) λE_imp holds exactly (McNaughton and Jarvis 1983;
    Jarvis and McNaughton 1986).

    References
    ----------
    McNaughton and Jarvis (1983), in Water Deficits and Plant Growth 7:1–47.
    Jarvis and McNaughton (1986), Adv. Ecol. Res. 15:1–49.
    """
    vpd = _f(vpd)
    gs = _f(gs)
    _, gamma, rho_cp = _pm_terms(_f(ta), _f(p_air))
    with np.errstate(invalid="ignore"):
        gs = np.where(gs >= 0, gs, np.nan)
    return _ret(rho_cp * vpd * gs / gamma)


def priestley_taylor_alpha(le, available_energy, ta, p_air):
    """Priestley–Taylor coefficient α = λE / λE_eq.

    Parameters
    ----------
    le : float or array_like
        Latent heat flux [W m-2].
    available_energy : float or array_like
        Available energy [W m-2].
    ta : float or array_like
        Air temperature [degC].
    p_air : float or array_like
        Air pressure [kPa].

    Returns
    -------
    float or ndarray
        α [-]; NaN where λE_eq ≤ 0. About 1.26 over extensive wet surfaces.

    References
    ----------
    Priestley, C. H. B. and Taylor, R. J. (1972). On the assessment of surface heat flux
    and evaporation using large-scale parameters. Mon. Weather Rev. 100:81–92.
    """
    le = _f(le)
    eq = _f(equilibrium_latent_heat_flux(available_energy, ta, p_air))
    with np.errstate(divide="ignore", invalid="ignore"):
        return _ret(le / np.where(eq > 0, eq, np.nan))


def bowen_ratio(h, le):
    """Bowen ratio β = H / λE.

    Parameters
    ----------
    h : float or array_like
        Sensible heat flux [W m-2].
    le : float or array_like
        Latent heat flux [W m-2]; 0 gives NaN (not inf).

    Returns
    -------
    float or ndarray
        β [-].

    References
    ----------
    Bowen, I. S. (1926). The ratio of heat losses by conduction and by evaporation from any
    water surface. Phys. Rev. 27:779–787.
    """
    h = _f(h)
    le = _f(le)
    with np.errstate(divide="ignore", invalid="ignore"):
        return _ret(h / np.where(le != 0, le, np.nan))


def evaporation_mm(le, ta, seconds, *, frozen=None):
    """Evaporation (or sublimation) depth from a latent heat flux over a duration.

    Parameters
    ----------
    le : float or array_like
        Mean latent heat flux over the duration [W m-2].
    ta : float or array_like
        Air temperature [degC] (for the latent heat).
    seconds : float or array_like
        Duration [s]: 1800 for a half-hour interval, 86400 for a daily mean flux.
    frozen : bool or array_like of bool, optional
        Where true, the latent heat of sublimation is used (snow and ice surfaces).

    Returns
    -------
    float or ndarray
        Water depth [mm] = λE t / λ / ρ_w · 1000 (1 kg m-2 = 1 mm).

    References
    ----------
    Allen et al. (1998), FAO-56, ch. 1 (units) and Annex 3 eq. 3-1.
    Rogers and Yau (1989), Table 2.1 (sublimation).
    """
    le = _f(le)
    ta = _f(ta)
    seconds = _f(seconds)
    lam = (2.501 - 0.002361 * ta) * 1e6  # FAO-56 eq. 3-1
    if frozen is not None:
        lam = np.where(np.asarray(frozen, dtype=bool), latent_heat_of_sublimation(ta), lam)
    return _ret(le * seconds / lam * (1000.0 / WATER_DENSITY))
