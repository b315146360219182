"""Aerodynamic conductance from the logarithmic profile with Monin–Obukhov stability.

The u*-based conductance of the contract (Thom 1972) is
:func:`pipeline.micromet.aerodynamic_conductance`; this module gives the alternative
log-profile form, which uses the measurement height, the zero-plane displacement and the
roughness lengths derived from the canopy height (all may be time series), corrected for
atmospheric stability with the Obukhov length from H, u* and temperature.

Stability functions (ζ = (z − d) / L):

* unstable (ζ < 0): the integrated Businger–Dyer forms of Paulson (1970), with
  φ_m = (1 − 16 ζ)^(-1/4) and φ_h = (1 − 16 ζ)^(-1/2) (Dyer 1974);
* stable, 0 ≤ ζ ≤ 1: the log-linear form ψ_m = ψ_h = −5 ζ (Dyer 1974; Webb 1970);
* very stable, ζ > 1: φ held at its ζ = 1 value (φ = 6), i.e. ψ = −5 − 5 ln ζ, following
  Webb's (1970) observation that the gradients stop growing beyond ζ ≈ 1 (the
  continuation itself is common practice: it keeps the resistance finite and monotonic).

Above tall canopies the measurement often lies in the roughness sublayer (below about two
to three canopy heights), where Monin–Obukhov similarity does not hold and the log profile
underestimates the conductance (Harman and Finnigan 2007); :func:`in_roughness_sublayer`
marks such intervals and the log-profile conductance warns about them.
"""
from __future__ import annotations

import numpy as np

from pipeline.constants import (
    GAS_CONSTANT_DRY_AIR,
    GRAVITY,
    SPECIFIC_HEAT_AIR,
    VON_KARMAN,
    ZERO_CELSIUS,
)
from pipeline.errors import warn

__all__ = [
    "DISPLACEMENT_FRACTION",
    "ROUGHNESS_FRACTION",
    "DEFAULT_KB_INVERSE",
    "ROUGHNESS_SUBLAYER_FACTOR",
    "zero_plane_displacement",
    "roughness_length",
    "roughness_length_heat",
    "obukhov_length",
    "stability_correction_momentum",
    "stability_correction_heat",
    "aerodynamic_conductance_log_profile",
    "in_roughness_sublayer",
]

#: d / h_c [-]: 2/3 (Allen et al. 1998, FAO-56 eq. 4 note; Monteith and Unsworth 2013,
#: ch. 17; common practice for closed canopies).
DISPLACEMENT_FRACTION = 2.0 / 3.0

#: z0m / h_c [-]: 0.123 (Allen et al. 1998, FAO-56 eq. 4 note, after Brutsaert 1975;
#: 0.1 is also common practice).
ROUGHNESS_FRACTION = 0.123

#: kB⁻¹ = ln(z0m / z0h) [-]: 2.0 for vegetation (Garratt and Hicks 1973; Verma 1989).
#: FAO-56 eq. 4 uses z0h = 0.1 z0m, i.e. kB⁻¹ = ln 10 = 2.30.
DEFAULT_KB_INVERSE = 2.0

#: Depth of the roughness sublayer in canopy heights [-]: 2 (Harman and Finnigan 2007 and
#: Raupach et al. 1991 put it at about 2–3 h_c; the lower bound here is common practice).
ROUGHNESS_SUBLAYER_FACTOR = 2.0

# Businger–Dyer coefficients (Dyer 1974, BLM 7:363): φ = (1 − 16 ζ)^-1/4 (momentum),
# ^-1/2 (heat) unstable; φ = 1 + 5 ζ stable (Dyer 1974; Webb 1970).
_GAMMA_UNSTABLE = 16.0
_BETA_STABLE = 5.0
_ZETA_STABLE_LIMIT = 1.0


def _f(x):
    return np.asarray(x, dtype=float)


def _ret(x):
    return x[()] if isinstance(x, np.ndarray) and x.ndim == 0 else x


def zero_plane_displacement(canopy_height_m, *, fraction=DISPLACEMENT_FRACTION):
    """Zero-plane displacement height from canopy height.

    Parameters
    ----------
    canopy_height_m : float or array_like
        Canopy height h_c [m].
    fraction : float, optional
        d / h_c [-]; default 2/3 (common practice).

    Returns
    -------
    float or ndarray
        d [m].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 4 (d = 2/3 h).
    Monteith, J. L. and Unsworth, M. H. (2013). Principles of Environmental Physics, 4th
    ed., ch. 17.
    """
    return _ret(fraction * _f(canopy_height_m))


def roughness_length(canopy_height_m, *, fraction=ROUGHNESS_FRACTION):
    """Roughness length for momentum from canopy height.

    Parameters
    ----------
    canopy_height_m : float or array_like
        Canopy height h_c [m].
    fraction : float, optional
        z0m / h_c [-]; default 0.123 (FAO-56; 0.1 is also common practice).

    Returns
    -------
    float or ndarray
        z0m [m].

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 4 (z_om = 0.123 h).
    Brutsaert, W. (1975). Comments on surface roughness parameters and the height of dense
    vegetation. J. Meteorol. Soc. Jpn. 53:96–97.
    """
    return _ret(fraction * _f(canopy_height_m))


def roughness_length_heat(z0m, *, kb_inverse=DEFAULT_KB_INVERSE):
    """Roughness length for heat and vapour from z0m and kB⁻¹.

    Parameters
    ----------
    z0m : float or array_like
        Roughness length for momentum [m].
    kb_inverse : float or array_like, optional
        kB⁻¹ = ln(z0m / z0h) [-]; default 2.0.

    Returns
    -------
    float or ndarray
        z0h = z0m exp(−kB⁻¹) [m].

    References
    ----------
    Garratt, J. R. and Hicks, B. B. (1973). Momentum, heat and water vapour transfer to and
    from natural and artificial surfaces. Q. J. R. Meteorol. Soc. 99:680–687.
    Verma (1989), IAHS Publ. 177:13–20.
    """
    return _ret(_f(z0m) * np.exp(-_f(kb_inverse)))


def obukhov_length(ustar, ta, h, p_air):
    """Obukhov length from friction velocity, air temperature and sensible heat flux.

    Parameters
    ----------
    ustar : float or array_like
        Friction velocity [m s-1]; ≤ 0 gives NaN.
    ta : float or array_like
        Air temperature [degC].
    h : float or array_like
        Sensible heat flux [W m-2] (upward positive); 0 gives an infinite L (neutral).
    p_air : float or array_like
        Air pressure [kPa].

    Returns
    -------
    float or ndarray
        L = −ρ c_p T u*³ / (k g H) [m]: negative unstable, positive stable.

    Notes
    -----
    Obukhov (1946); Stull (1988), ch. 5, with the kinematic heat flux H / (ρ c_p).
    The buoyancy contribution of the water-vapour flux is neglected (the working frame's
    H is the sensible heat flux, not the buoyancy flux); it makes |L| a few per cent too
    large over strongly evaporating surfaces. ρ is that of dry air and c_p = 1013 J kg-1
    K-1, as in :mod:`pipeline.micromet`.

    References
    ----------
    Obukhov, A. M. (1946, translated 1971). Turbulence in an atmosphere with a
    non-uniform temperature. Boundary-Layer Meteorol. 2:7–29.
    Stull, R. B. (1988). An Introduction to Boundary Layer Meteorology. Kluwer, ch. 5.
    """
    ustar = _f(ustar)
    ta = _f(ta)
    h = _f(h)
    p_air = _f(p_air)
    tk = ta + ZERO_CELSIUS
    rho_cp = p_air * 1e3 / (GAS_CONSTANT_DRY_AIR * tk) * SPECIFIC_HEAT_AIR
    with np.errstate(divide="ignore", invalid="ignore"):
        u = np.where(ustar > 0, ustar, np.nan)
        length = -rho_cp * tk * u**3 / (VON_KARMAN * GRAVITY * h)
        # H = 0 exactly: neutral, L = +inf (sign irrelevant for ζ = 0)
        length = np.where(h == 0, np.where(np.isnan(u), np.nan, np.inf), length)
    return _ret(length)


def _psi(zeta, heat):
    zeta = _f(zeta)
    with np.errstate(invalid="ignore", divide="ignore"):
        unstable = zeta < 0
        zu = np.where(unstable, zeta, 0.0)
        x = (1.0 - _GAMMA_UNSTABLE * zu) ** 0.25  # Dyer 1974
        if heat:
            psi_u = 2.0 * np.log((1.0 + x * x) / 2.0)  # Paulson 1970
        else:
            psi_u = (2.0 * np.log((1.0 + x) / 2.0) + np.log((1.0 + x * x) / 2.0)
                     - 2.0 * np.arctan(x) + np.pi / 2.0)  # Paulson 1970
        zs = np.where(unstable, 0.0, zeta)
        psi_s = np.where(
            zs <= _ZETA_STABLE_LIMIT,
            -_BETA_STABLE * zs,  # Dyer 1974; Webb 1970
            # φ fixed at 1 + 5 for ζ > 1 (Webb 1970 levelling off; common practice)
            -_BETA_STABLE - _BETA_STABLE * np.log(np.maximum(zs, _ZETA_STABLE_LIMIT)),
        )
        out = np.where(unstable, psi_u, psi_s)
        out = np.where(np.isnan(zeta), np.nan, out)
    return _ret(out)


def stability_correction_momentum(zeta):
    """Integrated stability correction for momentum ψ_m(ζ).

    Parameters
    ----------
    zeta : float or array_like
        Stability parameter ζ = (z − d) / L [-].

    Returns
    -------
    float or ndarray
        ψ_m [-]: positive unstable, negative stable, 0 neutral.

    Notes
    -----
    Unstable: x = (1 − 16 ζ)^(1/4), ψ_m = 2 ln((1 + x)/2) + ln((1 + x²)/2) − 2 atan x + π/2
    (Paulson 1970; coefficients of Dyer 1974). Stable: −5 ζ for ζ ≤ 1 (Dyer 1974;
    Webb 1970), −5 − 5 ln ζ beyond (φ_m held at 6; common practice).

    References
    ----------
    Paulson, C. A. (1970). The mathematical representation of wind speed and temperature
    profiles in the unstable atmospheric surface layer. J. Appl. Meteorol. 9:857–861.
    Dyer, A. J. (1974). A review of flux-profile relationships. Boundary-Layer Meteorol.
    7:363–372.
    Webb, E. K. (1970). Profile relationships: the log-linear range, and extension to strong
    stability. Q. J. R. Meteorol. Soc. 96:67–90.
    """
    return _psi(zeta, heat=False)


def stability_correction_heat(zeta):
    """Integrated stability correction for heat and water vapour ψ_h(ζ).

    Parameters
    ----------
    zeta : float or array_like
        Stability parameter ζ = (z − d) / L [-].

    Returns
    -------
    float or ndarray
        ψ_h [-].

    Notes
    -----
    Unstable: ψ_h = 2 ln((1 + x²)/2), x = (1 − 16 ζ)^(1/4) (Paulson 1970; Dyer
    1974). Stable: as :func:`stability_correction_momentum`.

    References
    ----------
    Paulson (1970), J. Appl. Meteorol. 9:857–861. Dyer (1974), Boundary-Layer Meteorol.
    7:363–372. Webb (1970), Q. J. R. Meteorol. Soc. 96:67–90.
    """
    return _psi(zeta, heat=True)


def in_roughness_sublayer(measurement_height_m, canopy_height_m, *,
                          factor=ROUGHNESS_SUBLAYER_FACTOR):
    """Whether the measurement height lies in the roughness sublayer.

    Parameters
    ----------
    measurement_height_m : float or array_like
        Measurement height z above ground [m].
    canopy_height_m : float or array_like
        Canopy height h_c [m].
    factor : float, optional
        Roughness-sublayer depth in canopy heights [-]; default 2 (the sublayer reaches
        about 2–3 h_c: Raupach et al. 1991, Harman and Finnigan 2007; common practice).

    Returns
    -------
    bool or ndarray of bool
        True where z < factor · h_c. Missing heights give False.

    References
    ----------
    Harman, I. N. and Finnigan, J. J. (2007). A simple unified theory for flow in the
    canopy and roughness sublayer. Boundary-Layer Meteorol. 123:339–363.
    Raupach, M. R., Antonia, R. A. and Rajagopalan, S. (1991). Rough-wall turbulent
    boundary layers. Appl. Mech. Rev. 44:1–25.
    """
    z = _f(measurement_height_m)
    hc = _f(canopy_height_m)
    with np.errstate(invalid="ignore"):
        return _ret(z < factor * hc)


def aerodynamic_conductance_log_profile(
    wind, ustar, ta, h, p_air, measurement_height_m, canopy_height_m, *,
    kb_inverse=DEFAULT_KB_INVERSE, stability=True, warn_roughness_sublayer=True,
):
    """Aerodynamic conductance for heat from the log profile with stability corrections.

    Parameters
    ----------
    wind : float or array_like
        Wind speed at the measurement height [m s-1].
    ustar : float or array_like
        Friction velocity [m s-1] (enters through the Obukhov length only).
    ta : float or array_like
        Air temperature [degC].
    h : float or array_like
        Sensible heat flux [W m-2].
    p_air : float or array_like
        Air pressure [kPa].
    measurement_height_m : float or array_like
        Measurement height z above ground [m] (may vary in time).
    canopy_height_m : float or array_like
        Canopy height h_c [m] (may vary in time); d = 2/3 h_c, z0m = 0.123 h_c.
    kb_inverse : float or array_like, optional
        ln(z0m / z0h) [-]; default 2.0 (Garratt and Hicks 1973; Verma 1989).
    stability : bool, optional
        Apply the Monin–Obukhov corrections (default). False gives the neutral form.
    warn_roughness_sublayer : bool, optional
        Emit a :class:`~pipeline.errors.TowerflowWarning` if any measurement height lies
        in the roughness sublayer (:func:`in_roughness_sublayer`).

    Returns
    -------
    float or ndarray
        g_a [m s-1]; NaN where z − d ≤ z0m, wind ≤ 0 or an input is missing. Without
        ``stability`` ustar and h may be NaN.

    Notes
    -----
    r_a = [ln((z − d)/z0m) − ψ_m(ζ) + ψ_m(z0m/L)] [ln((z − d)/z0h) − ψ_h(ζ) + ψ_h(z0h/L)]
    / (k² u), ζ = (z − d)/L (Monteith and Unsworth 2013, ch. 17, with the stability terms
    of Paulson 1970 and Dyer 1974; neutral form = FAO-56 eq. 4 with z_h = z_m).

    References
    ----------
    Allen et al. (1998), FAO-56, eq. 4.
    Monteith and Unsworth (2013), Principles of Environmental Physics, ch. 17.
    Paulson (1970); Dyer (1974); Webb (1970); Garratt and Hicks (1973); Verma (1989).
    """
    wind = _f(wind)
    z = _f(measurement_height_m)
    hc = _f(canopy_height_m)
    d = zero_plane_displacement(hc)
    z0m = _f(roughness_length(hc))
    z0h = _f(roughness_length_heat(z0m, kb_inverse=kb_inverse))
    with np.errstate(invalid="ignore", divide="ignore"):
        zd = z - d
        zd = np.where(zd > z0m, zd, np.nan)
        wind = np.where(wind > 0, wind, np.nan)
        log_m = np.log(zd / z0m)
        log_h = np.log(zd / z0h)
        if stability:
            length = _f(obukhov_length(ustar, ta, h, p_air))
            zeta = zd / length
            log_m = (log_m - _f(stability_correction_momentum(zeta))
                     + _f(stability_correction_momentum(z0m / length)))
            log_h = (log_h - _f(stability_correction_heat(zeta))
                     + _f(stability_correction_heat(z0h / length)))
        ga = VON_KARMAN**2 * wind / (log_m * log_h)
        # extreme instability can in principle drive a log term to ≤ 0: no conductance then
        ga = np.where((log_m > 0) & (log_h > 0), ga, np.nan)
    if warn_roughness_sublayer:
        rsl = np.asarray(in_roughness_sublayer(z, hc))
        if rsl.any():
            warn(
                f"measurement height lies in the roughness sublayer (below "
                f"{ROUGHNESS_SUBLAYER_FACTOR:g} canopy heights) for {int(rsl.sum())} of "
                f"{rsl.size} values: the log-profile aerodynamic conductance is biased low there"
            )
    return _ret(ga)
