"""Tests of pipeline.micromet against FAO-56, oracle libraries and identities.

Sources are named beside every expected value. "FAO-56" is Allen, Pereira, Raes and Smith
(1998), FAO Irrigation and Drainage Paper 56. Oracle libraries (MetPy, PsychroLib, pyet,
scipy) are used here only.
"""
from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from pipeline import micromet as mm
from pipeline.micromet import (
    INVERSION_ABOVE_POTENTIAL,
    INVERSION_ENERGY_NOT_POSITIVE,
    INVERSION_GA_NOT_POSITIVE,
    INVERSION_LE_NOT_POSITIVE,
    INVERSION_MISSING_INPUT,
    INVERSION_OK,
    INVERSION_VPD_TOO_LOW,
    aerodynamic_conductance,
    air_density,
    bowen_ratio,
    conductance_to_molar,
    decoupling_coefficient,
    dew_point_from_vapour_pressure,
    equilibrium_latent_heat_flux,
    evaporation_mm,
    imposed_latent_heat_flux,
    invert_penman_monteith,
    invert_penman_monteith_with_reason,
    latent_heat_of_sublimation,
    latent_heat_of_vaporization,
    penman_monteith,
    pressure_from_elevation,
    priestley_taylor_alpha,
    psychrometric_constant,
    rh_from_vpd,
    saturation_vapour_pressure,
    slope_saturation_vapour_pressure,
    specific_heat_moist_air,
    vapour_pressure_from_dew_point,
    vapour_pressure_from_rh,
    vpd_from_rh,
)

# Temperature at which FAO-56 eq. 3-1 gives FAO-56's fixed λ = 2.45 MJ kg-1 (so our
# temperature-dependent γ equals FAO-56 eq. 8 exactly): (2.501 − 2.45) / 0.002361.
T_LAMBDA_245 = (2.501 - 2.45) / 0.002361

# FAO-56 constants used to convert λE to mm the handbook's way (eq. 6: 0.408 = 1/2.45).
FAO_LAMBDA = 2.45e6  # J kg-1, FAO-56 eq. 6 and Table 1.1


# --------------------------------------------------------------------------------------
# Handbook tables
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("ta", "es_table"),
    # FAO-56 Annex 2, Table 2.3 (3 decimals); also REFERENCES.md §1 [C] from eq. 11
    [(10, 1.228), (15, 1.705), (20, 2.338), (25, 3.168), (30, 4.243), (40, 7.376)],
)
def test_es_fao56_table(ta, es_table):
    """e°(T) matches the FAO-56 Annex 2 table within its rounding."""
    assert_allclose(saturation_vapour_pressure(ta), es_table, atol=5e-4 + 1e-9)


def test_es_fao56_example3():
    """FAO-56 Example 3: e°(24.5) = 3.075, e°(15) = 1.705, es = 2.39 kPa."""
    assert_allclose(saturation_vapour_pressure(24.5), 3.075, atol=5e-4)  # FAO-56 Example 3
    assert_allclose(saturation_vapour_pressure(15.0), 1.705, atol=5e-4)  # FAO-56 Example 3
    es = (saturation_vapour_pressure(24.5) + saturation_vapour_pressure(15.0)) / 2
    assert_allclose(es, 2.39, atol=5e-3)  # FAO-56 Example 3


@pytest.mark.parametrize(
    ("ta", "slope_table"),
    # FAO-56 Annex 2, Table 2.4 (3 decimals); REFERENCES.md §1 [C] from eq. 13
    [(10, 0.082), (15, 0.110), (20, 0.145), (25, 0.189), (30, 0.243), (40, 0.393)],
)
def test_slope_fao56_table(ta, slope_table):
    """Δ(T) matches the FAO-56 Annex 2 table within its rounding."""
    assert_allclose(slope_saturation_vapour_pressure(ta), slope_table, atol=5e-4 + 1e-9)


def test_slope_is_derivative_of_es():
    """Δ equals the numerical derivative of e° (FAO-56 eq. 13 is d(eq. 11)/dT)."""
    ta = np.linspace(-10, 45, 56)
    h = 1e-4
    numeric = (saturation_vapour_pressure(ta + h) - saturation_vapour_pressure(ta - h)) / (2 * h)
    # eq. 13 rounds 17.27 × 237.3 = 4098.171 to 4098: 4e-5 relative (FAO-56 eq. 13)
    assert_allclose(slope_saturation_vapour_pressure(ta), numeric, rtol=1e-4)


@pytest.mark.parametrize(
    ("z", "p_expected", "gamma_expected"),
    # FAO-56 Table 2.2 / eq. 7 and 8; REFERENCES.md §1 [C]
    [(0, 101.30, 0.0674), (100, 100.12, 0.0666), (500, 95.53, 0.0635), (1000, 90.02, 0.0599),
     (1500, 84.78, 0.0564), (2000, 79.79, 0.0531), (3000, 70.51, 0.0469)],
)
def test_pressure_and_gamma_at_altitude(z, p_expected, gamma_expected):
    """P(z) (eq. 7) and γ (eq. 8) at several altitudes, FAO-56 Table 2.2."""
    p = pressure_from_elevation(z)
    assert_allclose(p, p_expected, atol=5e-3)
    # with λ(T) = 2.45 MJ kg-1 our γ is FAO-56 eq. 8; tolerance: the table's 4 decimals plus
    # the rounding of eq. 8's 0.665e-3 (= 1.013e-3 / (0.622 · 2.45) = 0.6647e-3)
    assert_allclose(psychrometric_constant(p, T_LAMBDA_245), gamma_expected,
                    atol=5e-5, rtol=6e-4)
    assert_allclose(psychrometric_constant(p, T_LAMBDA_245), 0.665e-3 * p, rtol=1e-3)


def test_pressure_and_gamma_example2():
    """FAO-56 Example 2: z = 1800 m → P = 81.8 kPa, γ = 0.054 kPa K-1."""
    p = pressure_from_elevation(1800)
    assert_allclose(p, 81.8, atol=0.05)  # FAO-56 Example 2
    assert_allclose(psychrometric_constant(p, T_LAMBDA_245), 0.054, atol=5e-4)  # Example 2


def test_gamma_temperature_dependence_small():
    """γ with λ(T) stays within 2.1 % of FAO-56's fixed-λ γ between 0 and 35 degC."""
    ta = np.linspace(0, 35, 36)
    ratio = psychrometric_constant(101.3, ta) / (0.665e-3 * 101.3)  # FAO-56 eq. 8
    # λ(0) = 2.501 vs 2.45 MJ/kg: 2.08 % (FAO-56 eq. 3-1)
    assert np.all(np.abs(ratio - 1) < 0.021)
    assert np.all(np.diff(ratio) > 0)  # λ falls with T, so γ rises (FAO-56 eq. 3-1)


def test_pressure_vs_psychrolib():
    """P(1800 m) agrees with PsychroLib's standard atmosphere within 0.5 %."""
    psychrolib = pytest.importorskip("psychrolib")
    psychrolib.SetUnitSystem(psychrolib.SI)
    # PsychroLib 2.5.0 GetStandardAtmPressure(1800) = 81489 Pa (REFERENCES.md §3);
    # FAO eq. 7 is 0.3 % higher
    assert_allclose(pressure_from_elevation(1800) * 1e3,
                    psychrolib.GetStandardAtmPressure(1800.0), rtol=5e-3)


@pytest.mark.parametrize(
    ("ta", "hfg_kj"),
    # steam table h_fg, REFERENCES.md §1 [V: university steam table]
    [(10, 2477.2), (20, 2453.5), (25, 2441.7), (30, 2429.8)],
)
def test_latent_heat_steam_table(ta, hfg_kj):
    """λ(T) (FAO-56 eq. 3-1, Harrison 1963) within 0.05 % of steam-table values."""
    assert_allclose(latent_heat_of_vaporization(ta), hfg_kj * 1e3, rtol=5e-4)


def test_latent_heat_values():
    """λ(20) = 2.45378 MJ kg-1 (pyet calc_lambda, REFERENCES.md §3) and MetPy within 0.1 %."""
    assert_allclose(latent_heat_of_vaporization(20.0), 2.45378e6, rtol=1e-5)  # pyet 1.5.0
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    ta = np.array([0.0, 10.0, 20.0, 30.0, 40.0])
    oracle = mpcalc.water_latent_heat_vaporization(ta * units.degC).to("J/kg").magnitude
    assert_allclose(latent_heat_of_vaporization(ta), oracle, rtol=1e-3)  # MetPy 1.7


def test_latent_heat_of_sublimation_vs_metpy():
    """λ_s matches MetPy's water_latent_heat_sublimation within 0.05 % from −30 to 0 degC."""
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    ta = np.array([-30.0, -20.0, -10.0, -5.0, 0.0])
    oracle = mpcalc.water_latent_heat_sublimation(ta * units.degC).to("J/kg").magnitude
    assert_allclose(latent_heat_of_sublimation(ta), oracle, rtol=5e-4)  # MetPy 1.7
    # ≈ 2.83 MJ kg-1 at 0 degC (REFERENCES.md §1, from memory)
    assert_allclose(latent_heat_of_sublimation(0.0), 2.83e6, rtol=5e-3)


# --------------------------------------------------------------------------------------
# Oracle libraries: humidity and density
# --------------------------------------------------------------------------------------


def test_es_vs_metpy_and_psychrolib():
    """e° within 0.5 % of MetPy (Ambaum 2020) and PsychroLib (ASHRAE) from 0 to 45 degC."""
    mpcalc = pytest.importorskip("metpy.calc")
    psychrolib = pytest.importorskip("psychrolib")
    from metpy.units import units

    psychrolib.SetUnitSystem(psychrolib.SI)
    ta = np.linspace(0.5, 45.0, 30)  # PsychroLib switches to ice at ≤ 0 degC
    ours = saturation_vapour_pressure(ta) * 1e3
    metpy_es = mpcalc.saturation_vapor_pressure(ta * units.degC).to("Pa").magnitude
    psy_es = np.array([psychrolib.GetSatVapPres(float(t)) for t in ta])
    # formulas differ by 0.15–0.4 % (REFERENCES.md §3): tolerance 0.5 %
    assert_allclose(ours, metpy_es, rtol=5e-3)  # MetPy 1.7.1
    assert_allclose(ours, psy_es, rtol=5e-3)  # PsychroLib 2.5.0
    # spot values: MetPy 2334.75 Pa, PsychroLib 2338.80 Pa at 20 degC (REFERENCES.md §3)
    assert_allclose(saturation_vapour_pressure(20.0) * 1e3, 2338.80, rtol=5e-4)


def test_dry_air_density_vs_oracles():
    """ρ_dry(20 degC, 101.325 kPa) = 1.2041 kg m-3 (MetPy, PsychroLib, REFERENCES.md §1)."""
    assert_allclose(air_density(20.0, 101.325), 1.204152, rtol=1e-4)  # PsychroLib 2.5.0
    assert_allclose(air_density(20.0, 101.325), 1.20413, rtol=1e-4)  # MetPy 1.7.1
    psychrolib = pytest.importorskip("psychrolib")
    psychrolib.SetUnitSystem(psychrolib.SI)
    for ta, p in [(-10.0, 95.0), (0.0, 101.325), (35.0, 85.0)]:
        assert_allclose(air_density(ta, p), psychrolib.GetDryAirDensity(ta, p * 1e3), rtol=1e-3)


def test_moist_air_density_vs_oracles():
    """Moist-air ρ with vapour pressure matches PsychroLib and MetPy within 0.5 %."""
    psychrolib = pytest.importorskip("psychrolib")
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    psychrolib.SetUnitSystem(psychrolib.SI)
    for ta, rh, p in [(20.0, 50.0, 101.325), (30.0, 80.0, 100.0), (5.0, 90.0, 85.0)]:
        ea = vapour_pressure_from_rh(ta, rh)
        ours = air_density(ta, p, vapour_pressure=ea)
        w = psychrolib.GetHumRatioFromRelHum(ta, rh / 100, p * 1e3)
        # PsychroLib 2.5.0 GetMoistAirDensity (1.198898 at 20 degC, 50 %: REFERENCES.md §3)
        assert_allclose(ours, psychrolib.GetMoistAirDensity(ta, w, p * 1e3), rtol=5e-3)
        w_mp = mpcalc.mixing_ratio_from_relative_humidity(
            p * units.kPa, ta * units.degC, rh * units.percent)
        rho_mp = mpcalc.density(p * units.kPa, ta * units.degC, w_mp).to("kg/m^3").magnitude
        assert_allclose(ours, rho_mp, rtol=5e-3)  # MetPy 1.7.1 density
        assert ours < air_density(ta, p)  # moist air is lighter (Wallace and Hobbs 2006)


def test_dew_point_vs_oracles():
    """Dew point from RH within 0.1 K of MetPy and PsychroLib (different e° formulas)."""
    psychrolib = pytest.importorskip("psychrolib")
    mpcalc = pytest.importorskip("metpy.calc")
    from metpy.units import units

    psychrolib.SetUnitSystem(psychrolib.SI)
    # spot value: MetPy 9.2561, PsychroLib 9.2724 degC at 20 degC, 50 % (REFERENCES.md §3)
    assert_allclose(dew_point_from_vapour_pressure(vapour_pressure_from_rh(20.0, 50.0)),
                    9.2724, atol=0.03)
    for ta in (5.0, 15.0, 25.0, 35.0):
        for rh in (30.0, 60.0, 95.0):
            ours = dew_point_from_vapour_pressure(vapour_pressure_from_rh(ta, rh))
            mp = mpcalc.dewpoint_from_relative_humidity(
                ta * units.degC, rh * units.percent).to("degC").magnitude
            psy = psychrolib.GetTDewPointFromRelHum(ta, rh / 100)
            # e° formulas differ by up to 0.4 % (REFERENCES.md §3); e° grows 6–7 % per K,
            # so the dew points may differ by up to about 0.07 K
            tol = 0.1
            assert abs(ours - mp) < tol  # MetPy 1.7.1
            if ours > 0:  # PsychroLib returns the frost point (over ice) below 0 degC
                assert abs(ours - psy) < tol  # PsychroLib 2.5.0


def test_vpd_vs_psychrolib():
    """VPD from RH within 0.5 % of PsychroLib GetVaporPressureDeficit."""
    psychrolib = pytest.importorskip("psychrolib")
    psychrolib.SetUnitSystem(psychrolib.SI)
    # PsychroLib 2.5.0: 1169.40 Pa at 20 degC, 50 %, 101.325 kPa (REFERENCES.md §3)
    assert_allclose(vpd_from_rh(20.0, 50.0) * 1e3, 1169.40, rtol=5e-3)
    for ta in (2.0, 12.0, 22.0, 32.0, 42.0):
        for rh in (10.0, 50.0, 85.0):
            w = psychrolib.GetHumRatioFromRelHum(ta, rh / 100, 101325.0)
            oracle = psychrolib.GetVaporPressureDeficit(ta, w, 101325.0)
            assert_allclose(vpd_from_rh(ta, rh) * 1e3, oracle, rtol=5e-3)


@given(ta=st.floats(-20, 45), rh=st.floats(1, 100))
def test_humidity_round_trips(ta, rh):
    """RH → VPD → RH and e_a → T_dew → e_a round-trip (FAO-56 eq. 11, 14; regression)."""
    assert_allclose(rh_from_vpd(ta, vpd_from_rh(ta, rh)), rh, rtol=1e-10, atol=1e-10)
    ea = vapour_pressure_from_rh(ta, rh)
    td = dew_point_from_vapour_pressure(ea)
    assert_allclose(vapour_pressure_from_dew_point(td), ea, rtol=1e-10)
    assert td <= ta + 1e-9  # dew point never above the air temperature


def test_dew_point_invalid():
    """e_a ≤ 0 or NaN gives a NaN dew point (no warning, no error)."""
    out = dew_point_from_vapour_pressure([0.0, -1.0, np.nan, 1.0])
    assert np.isnan(out[:3]).all() and np.isfinite(out[3])


def test_specific_heat():
    """c_p of dry air = 3.5 R_d (MetPy Cp_d 1004.666) and FAO-56's 1013 within 1 % when moist."""
    assert_allclose(specific_heat_moist_air(0.0, 101.325), 1004.666, rtol=1e-4)  # MetPy Cp_d
    cp = specific_heat_moist_air(vapour_pressure_from_rh(20.0, 60.0), 101.3)
    assert_allclose(cp, 1013.0, rtol=1e-2)  # FAO-56 eq. 8 value
    assert cp > specific_heat_moist_air(0.0, 101.3)


# --------------------------------------------------------------------------------------
# Conductances
# --------------------------------------------------------------------------------------


def test_thom_aerodynamic_conductance():
    """u 3, u* 0.3 → ga 0.0211757 m s-1 (Thom 1972 form; REFERENCES.md §2 [C])."""
    assert_allclose(aerodynamic_conductance(3.0, 0.3), 0.0211757, rtol=1e-5)


def test_aerodynamic_conductance_kb_inverse():
    """With kB⁻¹ the excess resistance is kB⁻¹/(k u*) (Verma 1989), k = 0.41 (FAO-56 eq. 4)."""
    wind, ustar = np.array([1.0, 3.0, 6.0]), np.array([0.1, 0.3, 0.7])
    expected = 1.0 / (wind / ustar**2 + 2.0 / (0.41 * ustar))
    assert_allclose(aerodynamic_conductance(wind, ustar, kb_inverse=2.0), expected, rtol=1e-12)


def test_aerodynamic_conductance_invalid():
    """u* ≤ 0, negative wind and NaN give NaN, never inf (regression)."""
    out = aerodynamic_conductance([3.0, 3.0, -1.0, np.nan, 3.0], [0.0, -0.2, 0.3, 0.3, np.nan])
    assert np.isnan(out).all()


def test_molar_conversion_scipy():
    """g P / (R T) with scipy.constants.R; 1 m/s = 41.571 mol m-2 s-1 at 20 degC (REFERENCES.md)."""
    from scipy import constants

    ta = np.array([0.0, 20.0, 25.0])
    p = 101.325
    expected = 1.0 * p * 1e3 / (constants.R * (ta + constants.zero_Celsius))
    assert_allclose(conductance_to_molar(1.0, ta, p), expected, rtol=1e-12)  # scipy.constants
    assert_allclose(conductance_to_molar(1.0, ta, p), [44.615, 41.571, 40.874], atol=1e-3)
    assert_allclose(conductance_to_molar(0.01, 20.0, 101.325), 0.41571, atol=1e-5)


# --------------------------------------------------------------------------------------
# Penman–Monteith: FAO-56 worked examples
# --------------------------------------------------------------------------------------


def _fao56_example18_inputs():
    """FAO-56 Example 18 (6 July, 50°48'N, 100 m), computed as in FAO-56 chapter 3."""
    z = 100.0
    tmax, tmin = 21.5, 12.3  # degC
    rh_max, rh_min = 84.0, 63.0  # %
    u10 = 10.0 / 3.6  # 10 km/h at 10 m
    u2 = u10 * 4.87 / math.log(67.8 * 10.0 - 5.42)  # FAO-56 eq. 47
    n_sun = 9.25  # h
    doy = 187
    lat = math.radians(50.0 + 48.0 / 60.0)
    p = pressure_from_elevation(z)  # eq. 7
    tmean = (tmax + tmin) / 2  # eq. 9
    es = (saturation_vapour_pressure(tmax) + saturation_vapour_pressure(tmin)) / 2  # eq. 12
    ea = (saturation_vapour_pressure(tmin) * rh_max / 100
          + saturation_vapour_pressure(tmax) * rh_min / 100) / 2  # eq. 17
    dr = 1 + 0.033 * math.cos(2 * math.pi / 365 * doy)  # eq. 23
    decl = 0.409 * math.sin(2 * math.pi / 365 * doy - 1.39)  # eq. 24
    ws = math.acos(-math.tan(lat) * math.tan(decl))  # eq. 25
    ra = 24 * 60 / math.pi * 0.0820 * dr * (
        ws * math.sin(lat) * math.sin(decl) + math.cos(lat) * math.cos(decl) * math.sin(ws))  # eq. 21
    day_length = 24 / math.pi * ws  # eq. 34
    rs = (0.25 + 0.50 * n_sun / day_length) * ra  # eq. 35
    rso = (0.75 + 2e-5 * z) * ra  # eq. 37
    rns = (1 - 0.23) * rs  # eq. 38
    rnl = 4.903e-9 * ((tmax + 273.16) ** 4 + (tmin + 273.16) ** 4) / 2 * (
        0.34 - 0.14 * math.sqrt(ea)) * (1.35 * rs / rso - 0.35)  # eq. 39
    rn = rns - rnl  # eq. 40
    return dict(p=p, tmean=tmean, es=es, ea=ea, ra=ra, day_length=day_length, rs=rs,
                rso=rso, rns=rns, rnl=rnl, rn=rn, u2=u2)


def test_fao56_example18_intermediates():
    """Our e° and P reproduce FAO-56 Example 18's intermediate values (handbook rounding)."""
    x = _fao56_example18_inputs()
    assert_allclose(x["u2"], 2.078, atol=5e-4)  # FAO-56 Example 18 (via Example 14)
    assert_allclose(slope_saturation_vapour_pressure(x["tmean"]), 0.122, atol=5e-4)  # Ex. 18
    assert_allclose(0.665e-3 * x["p"], 0.0666, atol=5e-5)  # FAO-56 Example 18, γ
    assert_allclose(x["es"], 1.997, atol=5e-4)  # FAO-56 Example 18
    assert_allclose(x["ea"], 1.409, atol=5e-4)  # FAO-56 Example 18
    assert_allclose(x["ra"], 41.09, atol=5e-3)  # FAO-56 Example 18
    assert_allclose(x["rso"], 30.90, atol=5e-3)  # FAO-56 Example 18
    assert_allclose(x["rnl"], 3.71, atol=5e-3)  # FAO-56 Example 18
    assert_allclose(x["rn"], 13.28, atol=5e-3)  # FAO-56 Example 18


def test_fao56_example18_daily_et0():
    """FAO-56 Example 18: ET0 = 3.9 mm/d with rs = 70 s/m, ra = 208/u2 (eq. 4 and 6)."""
    x = _fao56_example18_inputs()
    a = x["rn"] * 1e6 / 86400  # MJ m-2 d-1 → mean W m-2, G = 0 (FAO-56 eq. 42)
    le = penman_monteith(a, x["tmean"], x["es"] - x["ea"], x["p"], x["u2"] / 208, 1 / 70)
    et_fao_lambda = le * 86400 / FAO_LAMBDA  # mm/d, FAO-56 eq. 6 (0.408 = 1/2.45)
    assert round(float(et_fao_lambda), 1) == 3.9  # FAO-56 Example 18
    # with our λ(T): 3.880 unrounded per REFERENCES.md (pyet 1.5.0 pm_fao56 3.88009)
    et_ours = evaporation_mm(le, x["tmean"], 86400)
    assert round(float(et_ours), 1) == 3.9  # FAO-56 Example 18
    assert_allclose(et_ours, 3.88009, rtol=1e-2)  # pyet 1.5.0 pm_fao56 (REFERENCES.md §3)


def _fao56_example19(ta, rh, u2, rs_mj, t_mid, daytime):
    """FAO-56 Example 19 (N'Diaye, 1 October, 16°13'N 16°15'W, 8 m), chapter 3 hourly."""
    z = 8.0
    doy = 274
    lat = math.radians(16.0 + 13.0 / 60.0)
    lz, lm = 15.0, 16.25  # degrees west of Greenwich: time-zone centre and site (Example 19)
    p = pressure_from_elevation(z)  # eq. 7
    es = saturation_vapour_pressure(ta)  # eq. 11
    ea = es * rh / 100  # eq. 54
    dr = 1 + 0.033 * math.cos(2 * math.pi / 365 * doy)  # eq. 23
    decl = 0.409 * math.sin(2 * math.pi / 365 * doy - 1.39)  # eq. 24
    b = 2 * math.pi * (doy - 81) / 364  # eq. 33
    sc = 0.1645 * math.sin(2 * b) - 0.1255 * math.cos(b) - 0.025 * math.sin(b)  # eq. 32
    w = math.pi / 12 * ((t_mid + 0.06667 * (lz - lm) + sc) - 12)  # eq. 31
    w1, w2 = w - math.pi / 24, w + math.pi / 24  # eq. 29, 30
    ra = 12 * 60 / math.pi * 0.0820 * dr * (
        (w2 - w1) * math.sin(lat) * math.sin(decl)
        + math.cos(lat) * math.cos(decl) * (math.sin(w2) - math.sin(w1)))  # eq. 28
    rso = (0.75 + 2e-5 * z) * ra  # eq. 37
    # at night Rs/Rso is taken from before sunset: 0.8 in Example 19 (FAO-56, after eq. 39)
    ratio = rs_mj / rso if daytime else 0.8
    rnl = 2.043e-10 * (ta + 273.16) ** 4 * (0.34 - 0.14 * math.sqrt(ea)) * (
        1.35 * ratio - 0.35)  # eq. 39, hourly σ
    rn = 0.77 * rs_mj - rnl  # eq. 38, 40
    g = 0.1 * rn if daytime else 0.5 * rn  # eq. 45, 46
    le = penman_monteith((rn - g) * 1e6 / 3600, ta, es - ea, p, u2 / 208, 1 / 70)
    return dict(es=es, ea=ea, ra=ra, rso=rso, rn=rn, g=g, le=le)


def test_fao56_example19_afternoon():
    """FAO-56 Example 19, 14–15 h: ET0 = 0.63 mm/h (Rn 1.749, G 0.175 MJ m-2 h-1)."""
    x = _fao56_example19(38.0, 52.0, 3.3, 2.450, 14.5, True)
    assert_allclose(x["es"], 6.625, atol=5e-4)  # FAO-56 Example 19
    assert_allclose(x["ea"], 3.445, atol=5e-4)  # FAO-56 Example 19
    assert_allclose(x["ra"], 3.543, atol=5e-4)  # FAO-56 Example 19 (REFERENCES.md: from memory)
    assert_allclose(x["rn"], 1.749, atol=5e-4)  # FAO-56 Example 19
    assert_allclose(x["g"], 0.175, atol=5e-4)  # FAO-56 Example 19
    et = x["le"] * 3600 / FAO_LAMBDA  # mm/h, the handbook's fixed λ (eq. 53: 0.408)
    assert round(float(et), 2) == 0.63  # FAO-56 Example 19
    # with λ(38 degC) = 2.411 MJ/kg instead of 2.45 the depth is 1.6 % larger:
    # 0.63 within rounding plus that documented difference
    assert abs(evaporation_mm(x["le"], 38.0, 3600) - 0.63) < 0.005 + 0.017 * 0.63


def test_fao56_example19_night():
    """FAO-56 Example 19, 02–03 h: Rn −0.100, G −0.050 MJ m-2 h-1, ET0 = 0.00 mm/h."""
    x = _fao56_example19(28.0, 90.0, 1.9, 0.0, 2.5, False)
    assert_allclose(x["es"], 3.780, atol=5e-4)  # FAO-56 Example 19 (from memory)
    assert_allclose(x["ea"], 3.402, atol=5e-4)  # FAO-56 Example 19 (from memory)
    assert_allclose(x["rn"], -0.100, atol=5e-4)  # FAO-56 Example 19 (from memory)
    assert_allclose(x["g"], -0.050, atol=5e-4)  # FAO-56 Example 19 (from memory)
    assert round(float(x["le"] * 3600 / FAO_LAMBDA), 2) == 0.0  # FAO-56 Example 19
    assert round(float(evaporation_mm(x["le"], 28.0, 3600)), 2) == 0.0  # FAO-56 Example 19


# --------------------------------------------------------------------------------------
# Penman–Monteith: oracle and identities
# --------------------------------------------------------------------------------------


def test_penman_monteith_reference_case():
    """T 25, RH 50, P 101.3, A 400, ra 50, rs 100 → λE 289.82 W m-2 (pyet, REFERENCES.md §3)."""
    le = penman_monteith(400.0, 25.0, vpd_from_rh(25.0, 50.0), 101.3, 1 / 50, 1 / 100)
    # pyet uses γ = 0.665e-3 P and a virtual-temperature ρ; ours λ(T) and dry ρ: 0.1 %
    assert_allclose(le, 289.819, rtol=1e-3)  # pyet 1.5.0 pm
    omega = decoupling_coefficient(25.0, 101.3, 1 / 50, 1 / 100)
    assert_allclose(omega, 0.655226, rtol=2e-3)  # REFERENCES.md §3 [C]
    assert_allclose(equilibrium_latent_heat_flux(400.0, 25.0, 101.3), 294.762, rtol=2e-3)  # [C]
    assert_allclose(imposed_latent_heat_flux(25.0, vpd_from_rh(25.0, 50.0), 101.3, 1 / 100),
                    280.425, rtol=5e-3)  # REFERENCES.md §3 [C]


def test_penman_monteith_vs_pyet_random():
    """Penman–Monteith agrees with pyet.pm for random inputs within 2.5 %.

    pyet.pm returns mm/d with rn in MJ m-2 d-1 and ra = 208/wind; λE = mm/d · λ(T) / 86400
    (REFERENCES.md §3). pyet fixes γ = 0.665e-3 P (λ = 2.45 MJ/kg) and uses a virtual-
    temperature density; we use λ(T) in γ and dry-air density: up to 2 % apart between 0 and
    35 degC, and within 1 % where λ(T) = 2.45 MJ/kg.
    """
    pyet = pytest.importorskip("pyet")
    rng = np.random.default_rng(20240601)
    n = 60
    for rs in (40.0, 150.0, 600.0):  # pyet takes a scalar surface resistance
        ta = rng.uniform(0, 35, n)
        rh = rng.uniform(20, 95, n)
        p = rng.uniform(75, 103, n)
        a = rng.uniform(20, 600, n)
        ra = rng.uniform(10, 200, n)
        idx = pd.date_range("2020-01-01", periods=n, freq="D")

        def series(x, idx=idx):
            return pd.Series(x, index=idx)

        pet = pyet.pm(series(ta), series(208 / ra), rn=series(a * 0.0864), g=0,
                      pressure=series(p), rh=series(rh), r_s=rs, clip_zero=False)
        le_pyet = pet.to_numpy() * pyet.calc_lambda(ta) * 1e6 / 86400
        ours = penman_monteith(a, ta, vpd_from_rh(ta, rh), p, 1 / ra, 1 / rs)
        assert_allclose(ours, le_pyet, rtol=0.025)  # pyet 1.5.0 pm
        # at λ(T) = 2.45 MJ/kg the γ conventions coincide; only ρ differs (moist vs dry)
        t0 = np.full(n, T_LAMBDA_245)
        pet0 = pyet.pm(series(t0), series(208 / ra), rn=series(a * 0.0864), g=0,
                       pressure=series(p), rh=series(rh), r_s=rs, clip_zero=False)
        le0 = pet0.to_numpy() * 2.45e6 / 86400
        ours0 = penman_monteith(a, t0, vpd_from_rh(t0, rh), p, 1 / ra, 1 / rs)
        assert_allclose(ours0, le0, rtol=0.01)  # pyet 1.5.0 pm


_T = st.floats(-5, 40)
_P = st.floats(60, 105)
_A = st.floats(5, 800)
_D = st.floats(0.05, 5)
_GA = st.floats(1e-3, 0.5)
_GS = st.floats(1e-4, 0.1)


@settings(max_examples=300, deadline=None)
@given(a=_A, ta=_T, vpd=_D, p=_P, ga=_GA, gs=_GS)
def test_inversion_round_trip(a, ta, vpd, p, ga, gs):
    """invert(penman_monteith(gs)) == gs to 1e-9 relative (identity; regression)."""
    le = penman_monteith(a, ta, vpd, p, ga, gs)
    gs_back, reason = invert_penman_monteith_with_reason(le, a, ta, vpd, p, ga)
    assert reason == INVERSION_OK
    assert_allclose(gs_back, gs, rtol=1e-9)
    assert_allclose(invert_penman_monteith(le, a, ta, vpd, p, ga), gs, rtol=1e-9)


def test_inversion_round_trip_arrays():
    """The round trip also holds elementwise on arrays (identity)."""
    rng = np.random.default_rng(7)
    n = 10_000
    a, ta = rng.uniform(5, 800, n), rng.uniform(-5, 40, n)
    vpd, p = rng.uniform(0.05, 5, n), rng.uniform(60, 105, n)
    ga, gs = rng.uniform(1e-3, 0.5, n), rng.uniform(1e-4, 0.1, n)
    le = penman_monteith(a, ta, vpd, p, ga, gs)
    assert_allclose(invert_penman_monteith(le, a, ta, vpd, p, ga), gs, rtol=1e-9)


@settings(max_examples=300, deadline=None)
@given(a=st.floats(-200, 800), ta=_T, vpd=_D, p=_P, ga=_GA, gs=_GS)
def test_omega_decomposition_identity(a, ta, vpd, p, ga, gs):
    """λE = Ω λE_eq + (1 − Ω) λE_imp (McNaughton and Jarvis 1983; identity)."""
    le = penman_monteith(a, ta, vpd, p, ga, gs)
    omega = decoupling_coefficient(ta, p, ga, gs)
    eq = equilibrium_latent_heat_flux(a, ta, p)
    imp = imposed_latent_heat_flux(ta, vpd, p, gs)
    assert 0 < omega < 1
    assert_allclose(omega * eq + (1 - omega) * imp, le, rtol=1e-10, atol=1e-9)


def test_omega_limits():
    """Ω → 1 as ga/gs → 0 and Ω → 0 as ga/gs → ∞ (Jarvis and McNaughton 1986)."""
    ratios = np.logspace(-8, 8, 17)
    gs = 0.01
    omega = decoupling_coefficient(20.0, 100.0, ratios * gs, gs)
    assert np.all(np.diff(omega) < 0)
    assert omega[0] > 1 - 1e-7 and omega[-1] < 1e-7
    assert decoupling_coefficient(20.0, 100.0, 0.0, gs) == 1.0  # ga = 0: fully decoupled
    assert decoupling_coefficient(20.0, 100.0, 0.02, 0.0) == 0.0  # gs = 0: fully coupled
    # and λE → equilibrium / imposed in the same limits (McNaughton and Jarvis 1983)
    assert_allclose(penman_monteith(300.0, 20.0, 1.0, 100.0, 1e-9, gs),
                    equilibrium_latent_heat_flux(300.0, 20.0, 100.0), rtol=1e-5)
    assert_allclose(penman_monteith(300.0, 20.0, 1.0, 100.0, 1e9, gs),
                    imposed_latent_heat_flux(20.0, 1.0, 100.0, gs), rtol=1e-5)


def test_penman_monteith_limits():
    """gs = 0 gives λE = 0; gs = ∞ gives the Penman potential (Monteith 1965)."""
    assert penman_monteith(400.0, 20.0, 1.5, 100.0, 0.02, 0.0) == 0.0
    delta = slope_saturation_vapour_pressure(20.0)
    gamma = psychrometric_constant(100.0, 20.0)
    rho_cp = air_density(20.0, 100.0) * 1013.0
    potential = (delta * 400.0 + rho_cp * 1.5 * 0.02) / (delta + gamma)  # Penman 1948 form
    assert_allclose(penman_monteith(400.0, 20.0, 1.5, 100.0, 0.02, np.inf), potential, rtol=1e-12)
    # LE at or above this potential cannot be inverted
    gs, reason = invert_penman_monteith_with_reason(potential * 1.01, 400.0, 20.0, 1.5, 100.0, 0.02)
    assert np.isnan(gs) and reason == INVERSION_ABOVE_POTENTIAL


# Properties (common practice): λE rises with VPD, available energy and gs.


@settings(max_examples=200, deadline=None)
@given(a=_A, ta=_T, vpd=_D, p=_P, ga=_GA, gs=_GS, f=st.floats(1.01, 3))
def test_le_increases_with_drivers(a, ta, vpd, p, ga, gs, f):
    """λE rises with VPD, with available energy and with gs (common practice)."""
    base = penman_monteith(a, ta, vpd, p, ga, gs)
    assert penman_monteith(a, ta, vpd * f, p, ga, gs) > base
    assert penman_monteith(a * f, ta, vpd, p, ga, gs) > base
    assert penman_monteith(a, ta, vpd, p, ga, gs * f) > base


def test_rough_canopy_more_coupled():
    """A rough tall canopy (high ga) has lower Ω than a short smooth one at the same gs
    (common practice; Jarvis and McNaughton 1986: forests 0.1–0.3, grass 0.5–0.9)."""
    wind = 3.0
    ga_grass = aerodynamic_conductance(wind, 0.2)  # smooth: u*/u ≈ 0.07
    ga_forest = aerodynamic_conductance(wind, 0.9, kb_inverse=2.0)  # rough: u*/u ≈ 0.3
    assert ga_forest > ga_grass
    gs = 0.01
    assert decoupling_coefficient(15.0, 95.0, ga_forest, gs) < decoupling_coefficient(
        15.0, 95.0, ga_grass, gs)


# --------------------------------------------------------------------------------------
# Inversion edge cases
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("le", "a", "vpd", "p", "ga", "expected"),
    [
        (np.nan, 300.0, 1.0, 100.0, 0.02, INVERSION_MISSING_INPUT),
        (150.0, np.nan, 1.0, 100.0, 0.02, INVERSION_MISSING_INPUT),
        (150.0, 300.0, np.nan, 100.0, 0.02, INVERSION_MISSING_INPUT),
        (150.0, 300.0, 1.0, np.nan, 0.02, INVERSION_MISSING_INPUT),
        (150.0, 300.0, 1.0, 100.0, np.inf, INVERSION_MISSING_INPUT),
        (150.0, 300.0, 1.0, 100.0, 0.0, INVERSION_GA_NOT_POSITIVE),
        (150.0, 300.0, 1.0, 100.0, -0.01, INVERSION_GA_NOT_POSITIVE),
        (0.0, 300.0, 1.0, 100.0, 0.02, INVERSION_LE_NOT_POSITIVE),
        (-20.0, 300.0, 1.0, 100.0, 0.02, INVERSION_LE_NOT_POSITIVE),
        (50.0, 0.0, 1.0, 100.0, 0.02, INVERSION_ENERGY_NOT_POSITIVE),
        (50.0, -40.0, 1.0, 100.0, 0.02, INVERSION_ENERGY_NOT_POSITIVE),
        (150.0, 300.0, 0.0, 100.0, 0.02, INVERSION_VPD_TOO_LOW),
        (150.0, 300.0, 0.005, 100.0, 0.02, INVERSION_VPD_TOO_LOW),
        (150.0, 300.0, -0.2, 100.0, 0.02, INVERSION_VPD_TOO_LOW),
        (900.0, 300.0, 1.0, 100.0, 0.02, INVERSION_ABOVE_POTENTIAL),
        (150.0, 300.0, 1.0, 100.0, 0.02, INVERSION_OK),
    ],
)
def test_inversion_reasons(le, a, vpd, p, ga, expected):
    """Each edge of the inversion returns NaN with its own reason code (regression)."""
    gs, reason = invert_penman_monteith_with_reason(le, a, 20.0, vpd, p, ga)
    assert reason == expected
    if expected == INVERSION_OK:
        assert np.isfinite(gs) and gs > 0
    else:
        assert np.isnan(gs)


def test_inversion_reason_exact_potential():
    """λE exactly at the potential (denominator 0) is ABOVE_POTENTIAL, not inf."""
    potential = penman_monteith(300.0, 20.0, 1.0, 100.0, 0.02, np.inf)
    gs, reason = invert_penman_monteith_with_reason(potential, 300.0, 20.0, 1.0, 100.0, 0.02)
    assert reason in (INVERSION_ABOVE_POTENTIAL, INVERSION_OK)
    assert np.isnan(gs) or (np.isfinite(gs) and gs > 1.0)  # rounding may leave a huge gs
    le = np.array([potential, potential * (1 + 1e-12), potential * 2])
    gs, reason = invert_penman_monteith_with_reason(le, 300.0, 20.0, 1.0, 100.0, 0.02)
    assert not np.isinf(gs).any()
    assert (reason[1:] == INVERSION_ABOVE_POTENTIAL).all()


def test_inversion_min_vpd_keyword():
    """The VPD guard is a keyword: 0.3 kPa rejects 0.2 kPa (regression)."""
    _, reason = invert_penman_monteith_with_reason(100.0, 300.0, 20.0, 0.2, 100.0, 0.02,
                                                   min_vpd=0.3)
    assert reason == INVERSION_VPD_TOO_LOW
    _, reason = invert_penman_monteith_with_reason(100.0, 300.0, 20.0, 0.2, 100.0, 0.02)
    assert reason == INVERSION_OK


@settings(max_examples=300, deadline=None)
@given(
    le=st.floats(-300, 1200) | st.just(np.nan),
    a=st.floats(-300, 1000) | st.just(np.nan),
    ta=st.floats(-30, 50),
    vpd=st.floats(-0.5, 6),
    p=st.floats(50, 110),
    ga=st.floats(-0.1, 1.0),
)
def test_inversion_never_inf_or_negative(le, a, ta, vpd, p, ga):
    """The inversion never returns inf or a negative gs; NaN exactly where reason != OK."""
    gs, reason = invert_penman_monteith_with_reason(le, a, ta, vpd, p, ga)
    assert not np.isinf(gs)
    assert np.isnan(gs) or gs >= 0
    assert np.isnan(gs) == (reason != INVERSION_OK)
    assert reason in mm.INVERSION_REASON_NAMES


def test_inversion_arrays_and_counts():
    """Reason codes come back as an int8 array that np.bincount can count (regression)."""
    le = np.array([150.0, -5.0, 150.0, 900.0, np.nan])
    a = np.array([300.0, 300.0, -10.0, 300.0, 300.0])
    gs, reason = invert_penman_monteith_with_reason(le, a, 20.0, 1.0, 100.0, 0.02)
    assert reason.dtype == np.int8
    assert list(reason) == [INVERSION_OK, INVERSION_LE_NOT_POSITIVE,
                            INVERSION_ENERGY_NOT_POSITIVE, INVERSION_ABOVE_POTENTIAL,
                            INVERSION_MISSING_INPUT]
    assert np.bincount(reason, minlength=7).sum() == 5
    assert np.isfinite(gs[0]) and np.isnan(gs[1:]).all()


# --------------------------------------------------------------------------------------
# Other derived quantities and array behaviour
# --------------------------------------------------------------------------------------


def test_evaporation_mm():
    """2.45 MJ m-2 d-1 = 1 mm/d at λ = 2.45 MJ/kg (FAO-56 Table 1.1 / ch. 1)."""
    assert_allclose(evaporation_mm(2.45e6 / 86400, T_LAMBDA_245, 86400), 1.0, rtol=1e-9)
    # half-hour: λE 300 W m-2 at 20 degC → 300·1800/2.45378e6 mm (FAO-56 eq. 3-1; regression)
    assert_allclose(evaporation_mm(300.0, 20.0, 1800), 300 * 1800 / 2.45378e6, rtol=1e-9)
    # frozen: sublimation needs more energy per kg, so fewer mm (Rogers and Yau 1989)
    out = evaporation_mm([50.0, 50.0], [-5.0, -5.0], 1800, frozen=[False, True])
    assert out[1] < out[0]
    assert_allclose(out[1], 50 * 1800 / latent_heat_of_sublimation(-5.0), rtol=1e-12)


def test_bowen_and_priestley_taylor():
    """β = H/λE (Bowen 1926), NaN at λE = 0; α = λE/λE_eq (Priestley and Taylor 1972)."""
    assert_allclose(bowen_ratio([100.0, 50.0], [200.0, -25.0]), [0.5, -2.0])
    assert np.isnan(bowen_ratio(100.0, 0.0))
    eq = equilibrium_latent_heat_flux(400.0, 20.0, 100.0)
    assert_allclose(priestley_taylor_alpha(1.26 * eq, 400.0, 20.0, 100.0), 1.26, rtol=1e-12)
    assert np.isnan(priestley_taylor_alpha(50.0, -10.0, 20.0, 100.0))


def test_scalar_list_array_nan():
    """One case as scalar, list and array; NaN propagates (STYLE.md §4; regression)."""
    s = penman_monteith(400.0, 25.0, 1.5, 100.0, 0.02, 0.01)
    assert np.ndim(s) == 0 and isinstance(float(s), float)
    lst = penman_monteith([400.0, np.nan], [25.0, 25.0], 1.5, 100.0, 0.02, 0.01)
    arr = penman_monteith(np.array([400.0, 400.0]), 25.0, np.array([1.5, np.nan]), 100.0,
                          0.02, 0.01)
    assert lst[0] == s and np.isnan(lst[1])
    assert arr[0] == s and np.isnan(arr[1])
    assert np.isnan(penman_monteith(400.0, 25.0, 1.5, 100.0, -0.02, 0.01))  # negative ga
    assert np.isnan(penman_monteith(400.0, 25.0, 1.5, 100.0, 0.02, -0.01))  # negative gs
    for f in (saturation_vapour_pressure, slope_saturation_vapour_pressure,
              latent_heat_of_vaporization, latent_heat_of_sublimation):
        out = f([np.nan, 20.0])
        assert np.isnan(out[0]) and np.isfinite(out[1])
    assert np.isnan(decoupling_coefficient(np.nan, 100.0, 0.02, 0.01))
    assert np.isnan(conductance_to_molar(0.01, np.nan, 100.0))


def test_inputs_not_mutated():
    """Functions do not modify their input arrays (STYLE.md §9)."""
    a = np.array([300.0, -10.0])
    ta = np.array([20.0, 21.0])
    before = a.copy(), ta.copy()
    invert_penman_monteith_with_reason(np.array([100.0, 50.0]), a, ta, 1.0, 100.0, 0.02)
    penman_monteith(a, ta, 1.0, 100.0, 0.02, 0.01)
    assert (a == before[0]).all() and (ta == before[1]).all()
