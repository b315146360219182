"""Tests of pipeline.aerodynamics: log-profile conductance with Monin–Obukhov stability."""
from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.testing import assert_allclose

from pipeline import aerodynamics as aero
from pipeline.errors import TowerflowWarning
from pipeline.micromet import aerodynamic_conductance, air_density, decoupling_coefficient

K = 0.41  # von Karman constant, FAO-56 eq. 4


def _neutral(wind, z, hc, kb_inverse):
    """k² u / (ln((z − d)/z0m) ln((z − d)/z0h)), FAO-56 eq. 4 form, d = 2/3 h, z0m = 0.123 h."""
    d = 2.0 / 3.0 * hc  # FAO-56 eq. 4 note
    z0m = 0.123 * hc  # FAO-56 eq. 4 note
    z0h = z0m * np.exp(-kb_inverse)
    return K**2 * wind / (np.log((z - d) / z0m) * np.log((z - d) / z0h))


def test_fao56_reference_surface_ra_208():
    """Grass 0.12 m, z = 2 m, z0h = 0.1 z0m: r_a = 208/u2 (FAO-56 eq. 4, Box 4; 207.7 [C])."""
    ga = aero.aerodynamic_conductance_log_profile(
        1.0, np.nan, 20.0, np.nan, 100.0, 2.0, 0.12, kb_inverse=math.log(10), stability=False)
    assert_allclose(1.0 / ga, 208.0, rtol=5e-3)  # FAO-56 eq. 4 → 208/u2
    assert_allclose(1.0 / ga, 207.7, atol=0.05)  # REFERENCES.md §1 [C]


def test_neutral_closed_form_time_series():
    """With H = 0 the log-profile g_a equals the closed form for time-varying heights."""
    wind = np.array([1.0, 2.5, 4.0, 6.0])
    z = np.array([3.0, 3.0, 4.5, 4.5])  # measurement height changes (time series)
    hc = np.array([0.3, 0.8, 1.5, 1.8])  # growing crop
    ga = aero.aerodynamic_conductance_log_profile(
        wind, 0.3, 20.0, 0.0, 100.0, z, hc, warn_roughness_sublayer=False)
    assert_allclose(ga, _neutral(wind, z, hc, 2.0), rtol=1e-12)  # closed form, FAO-56 eq. 4
    no_stab = aero.aerodynamic_conductance_log_profile(
        wind, np.nan, 20.0, np.nan, 100.0, z, hc, stability=False,
        warn_roughness_sublayer=False)
    assert_allclose(no_stab, ga, rtol=1e-12)


def test_log_profile_matches_ustar_form_in_neutral_log_law():
    """If u* follows the neutral log law, u/u*² + kB⁻¹/(k u*) equals the log-profile r_a
    (Verma 1989 excess resistance; identity)."""
    wind, z, hc = np.array([1.0, 3.0, 7.0]), 10.0, 2.0
    d, z0m = 2.0 / 3.0 * hc, 0.123 * hc
    ustar = K * wind / np.log((z - d) / z0m)  # neutral log wind profile
    ga_ustar = aerodynamic_conductance(wind, ustar, kb_inverse=2.0)
    ga_log = aero.aerodynamic_conductance_log_profile(wind, ustar, 15.0, 0.0, 95.0, z, hc,
                                                      kb_inverse=2.0)
    assert_allclose(ga_log, ga_ustar, rtol=1e-12)


def test_stability_direction():
    """Unstable (H > 0) raises g_a, stable (H < 0) lowers it (Monin–Obukhov; common practice)."""
    args = dict(wind=3.0, ustar=0.35, ta=20.0, p_air=100.0, measurement_height_m=3.0,
                canopy_height_m=0.3)
    neutral = aero.aerodynamic_conductance_log_profile(h=0.0, **args)
    unstable = aero.aerodynamic_conductance_log_profile(h=250.0, **args)
    stable = aero.aerodynamic_conductance_log_profile(h=-40.0, **args)
    assert unstable > neutral > stable > 0
    very_stable = aero.aerodynamic_conductance_log_profile(h=-150.0, **{**args, "ustar": 0.05})
    assert np.isfinite(very_stable) and 0 < very_stable < stable


def test_obukhov_length():
    """L = −ρ c_p T u*³ / (k g H) (Obukhov 1946; Stull 1988 eq. 5.7c), signs and limits."""
    from scipy import constants

    rho = air_density(20.0, 100.0)
    expected = -rho * 1013.0 * 293.15 * 0.3**3 / (K * constants.g * 100.0)  # scipy.constants.g
    assert_allclose(aero.obukhov_length(0.3, 20.0, 100.0, 100.0), expected, rtol=1e-12)
    assert_allclose(expected, -23.7, atol=0.05)  # regression
    assert aero.obukhov_length(0.3, 20.0, -50.0, 100.0) > 0  # stable
    assert np.isinf(aero.obukhov_length(0.3, 20.0, 0.0, 100.0))  # neutral
    assert np.isnan(aero.obukhov_length([0.0, np.nan], 20.0, 100.0, 100.0)).all()


def test_stability_functions_values():
    """ψ(0) = 0; stable ψ = −5ζ (Dyer 1974); unstable ψ_h > ψ_m > 0 (Paulson 1970)."""
    zeta = np.array([-2.0, -0.5, -0.1, 0.0, 0.3, 1.0, 4.0])
    pm = aero.stability_correction_momentum(zeta)
    ph = aero.stability_correction_heat(zeta)
    assert pm[3] == 0 and ph[3] == 0
    assert_allclose(pm[4:6], [-1.5, -5.0])  # Dyer 1974: −5 ζ
    assert_allclose(pm[6], -5 - 5 * math.log(4.0))  # φ = 6 beyond ζ = 1 (common practice)
    assert (ph[:3] > pm[:3]).all() and (pm[:3] > 0).all()
    assert np.isnan(aero.stability_correction_heat(np.nan))


@settings(max_examples=100, deadline=None)
@given(zeta=st.floats(-5.0, 5.0).filter(lambda x: abs(x) > 1e-3 and abs(x - 1) > 1e-3))
def test_stability_functions_integrate_phi(zeta):
    """dψ/dζ = (1 − φ(ζ))/ζ with the Businger–Dyer φ (Dyer 1974; Paulson 1970 derivation)."""
    h = 1e-6 * max(1.0, abs(zeta))
    if zeta < 0:
        phi_m = (1 - 16 * zeta) ** -0.25  # Dyer 1974
        phi_h = (1 - 16 * zeta) ** -0.5  # Dyer 1974
    else:
        phi_m = phi_h = 1 + 5 * min(zeta, 1.0)  # Dyer 1974 / Webb 1970; held at 6 beyond 1
    for func, phi in ((aero.stability_correction_momentum, phi_m),
                      (aero.stability_correction_heat, phi_h)):
        slope = (func(zeta + h) - func(zeta - h)) / (2 * h)
        assert_allclose(slope, (1 - phi) / zeta, rtol=1e-5, atol=1e-7)


def test_stability_functions_continuous():
    """ψ is continuous at ζ = 0 and ζ = 1 (regression)."""
    eps = 1e-9
    for func in (aero.stability_correction_momentum, aero.stability_correction_heat):
        assert abs(func(-eps) - func(eps)) < 1e-7
        assert abs(func(1 - eps) - func(1 + eps)) < 1e-7


def test_roughness_sublayer_flag_and_warning():
    """z < 2 h_c is in the roughness sublayer (Harman and Finnigan 2007; common practice)."""
    assert aero.in_roughness_sublayer(30.0, 20.0)
    assert not aero.in_roughness_sublayer(2.0, 0.3)
    out = aero.in_roughness_sublayer([30.0, 45.0, np.nan], [20.0, 20.0, 20.0])
    assert out.tolist() == [True, False, False]
    assert aero.in_roughness_sublayer(50.0, 20.0, factor=3.0)
    with pytest.warns(TowerflowWarning, match="roughness sublayer"):
        aero.aerodynamic_conductance_log_profile(3.0, 0.5, 20.0, 100.0, 100.0,
                                                 [30.0, 50.0], 20.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        aero.aerodynamic_conductance_log_profile(3.0, 0.5, 20.0, 100.0, 100.0, 50.0, 20.0)


def test_displacement_and_roughness():
    """d = 2/3 h and z0m = 0.123 h (FAO-56 eq. 4 note); z0h = z0m e^(−kB⁻¹)."""
    assert_allclose(aero.zero_plane_displacement([0.12, 30.0]), [0.08, 20.0])
    assert_allclose(aero.roughness_length([0.12, 30.0]), [0.01476, 3.69])
    assert_allclose(aero.roughness_length(1.0, fraction=0.1), 0.1)  # common practice
    assert_allclose(aero.roughness_length_heat(0.1, kb_inverse=math.log(10)), 0.01)


def test_invalid_geometry_gives_nan():
    """Measurement height not above d + z0m, zero wind or missing input give NaN."""
    ga = aero.aerodynamic_conductance_log_profile(
        [3.0, 0.0, 3.0, np.nan], 0.4, 20.0, 50.0, 100.0,
        [0.5, 5.0, 5.0, 5.0], [1.0, 1.0, np.nan, 1.0], warn_roughness_sublayer=False)
    assert np.isnan(ga).all()


def test_tall_rough_canopy_lower_omega():
    """A forest (h 20 m, z 35 m) has higher g_a and lower Ω than grass (0.12 m, 2 m) at the
    same wind and g_s (common practice; Jarvis and McNaughton 1986)."""
    ga_forest = aero.aerodynamic_conductance_log_profile(
        3.0, 0.6, 15.0, 0.0, 95.0, 35.0, 20.0, warn_roughness_sublayer=False)
    ga_grass = aero.aerodynamic_conductance_log_profile(3.0, 0.2, 15.0, 0.0, 95.0, 2.0, 0.12)
    assert ga_forest > 3 * ga_grass
    gs = 0.008
    om_forest = decoupling_coefficient(15.0, 95.0, ga_forest, gs)
    om_grass = decoupling_coefficient(15.0, 95.0, ga_grass, gs)
    assert om_forest < om_grass
    # typical ranges: forest 0.1–0.3, grass 0.5–0.9 (REFERENCES.md §2, from memory)
    assert om_forest < 0.4 and om_grass > 0.4
