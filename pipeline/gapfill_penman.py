"""Penman–Monteith-based filling of LE and energy-balance-residual filling of H.

**LE.** On accepted daytime intervals the surface conductance gs is obtained by inverting
Penman–Monteith (:func:`pipeline.micromet.invert_penman_monteith`). A Jarvis-type
response

    ln gs = a + ln(rg / (rg + k)) − b · vpd + c · (swc − swc_mean)

(hyperbolic light response after Jarvis 1976; exponential decline with VPD, a common
Jarvis-type form; log-linear soil-water term, ours, used only where swc exists) is fitted
by robust least squares on ln gs (:func:`scipy.optimize.least_squares`, soft-L1 loss) in
moving windows (``[gapfill] conductance_window`` centred on blocks of
``conductance_step``). In a gap gs is predicted from the gap's own rg, vpd (and swc), and
LE is computed forward with :func:`pipeline.micromet.penman_monteith` from the gap's
available energy, ta, vpd, air pressure, ga and the predicted gs. Method name:
``penman_monteith_conductance``; it applies by day only, not on snow or frozen ground,
and where the available energy was measured. The uncertainty ``_fill_sd`` is the
standard deviation of (predicted − measured) LE over the window's accepted daytime
intervals.

**ga.** Where u* and wind were accepted, ga = :func:`pipeline.micromet.aerodynamic_conductance`.
When the sonic anemometer is out (u* missing), ga comes from the wind speed through the
relation ln ga = α + β ln(wind) fitted at the site on intervals with both; without wind
too, the site's median ga is used. A Penman–Monteith fill is ``good``, lowered one class
where it rests on such a ga, on the site-wide gs fit (too few data in its window) or on
filled rg, ta or vpd.

**H.** ``energy_balance_residual``: H = c · A − LE_filled, with c = Σ(H + LE) / ΣA over the
accepted daytime intervals of the moving window (the site's own closure), by day only.
Its ``_fill_sd`` is the standard deviation of the residual over those intervals. The
quality is ``good`` where LE was measured, otherwise that of the LE fill lowered one class.

References
----------
Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19, 205–234.
Jarvis, P. G. (1976). The interpretation of the variations in leaf water potential and
stomatal conductance found in canopies in the field. Phil. Trans. R. Soc. B 273, 593–610.
Wilson, K. et al. (2002). Energy balance closure at FLUXNET sites. Agric. For. Meteorol.
113, 223–243.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import optimize

from . import micromet
from .gapfill_similar import lower_quality

__all__ = [
    "aerodynamic_conductance_for_filling",
    "conductance_blocks",
    "fit_conductance_response",
    "penman_monteith_fill",
    "energy_balance_residual_fill",
]

# bounds of the observed gs entering the fit, m s-1 (common practice: canopy gs rarely
# exceeds ~0.03 m s-1, Kelliher et al. 1995 [from memory]; 0.1 leaves room)
_GS_RANGE = (1e-4, 0.1)
_MIN_RG_FIT = 50.0  # W m-2, common practice: daytime with a meaningful light response
_MIN_LE_FIT = 5.0  # W m-2, common practice
_MIN_A_FIT = 20.0  # W m-2, common practice


def aerodynamic_conductance_for_filling(wind, ustar):
    """ga for every interval, with its source.

    Parameters
    ----------
    wind, ustar : numpy.ndarray
        Accepted wind speed and friction velocity [m s-1] (NaN where not accepted).

    Returns
    -------
    ga : numpy.ndarray
        Aerodynamic conductance [m s-1].
    source : numpy.ndarray of object
        ``measured`` (from u* and wind), ``wind_relation`` or ``site_median``.
    relation : dict
        The fitted ln ga = alpha + beta ln(wind) and its sample size.
    """
    wind = np.asarray(wind, dtype=float)
    ustar = np.asarray(ustar, dtype=float)
    ga = np.asarray(micromet.aerodynamic_conductance(wind, ustar), dtype=float)
    ga = np.where(np.isfinite(ga) & (ga > 0), ga, np.nan)
    source = np.where(np.isfinite(ga), "measured", "").astype(object)
    pair = np.isfinite(ga) & np.isfinite(wind) & (wind > 0.2)
    relation = {"alpha": None, "beta": None, "n": int(pair.sum())}
    if pair.sum() >= 10:
        beta, alpha = np.polyfit(np.log(wind[pair]), np.log(ga[pair]), 1)
        relation.update(alpha=float(alpha), beta=float(beta))
        use = ~np.isfinite(ga) & np.isfinite(wind) & (wind > 0)
        ga[use] = np.exp(alpha) * wind[use] ** beta
        source[use] = "wind_relation"
    if np.isfinite(ga).any():
        rest = ~np.isfinite(ga)
        ga[rest] = np.nanmedian(ga[source == "measured"]) if (source == "measured").any() else np.nan
        source[rest & np.isfinite(ga)] = "site_median"
    return ga, source, relation


def conductance_blocks(index: pd.DatetimeIndex, step: pd.Timedelta, window: pd.Timedelta):
    """Block label of every interval and, per block, the [lo, hi) index range of its window."""
    interval = index[1] - index[0] if len(index) > 1 else pd.Timedelta(minutes=30)
    per_block = max(1, int(step // interval))
    n = len(index)
    labels = np.arange(n) // per_block
    n_blocks = int(labels[-1]) + 1 if n else 0
    centre = (np.arange(n_blocks) * per_block + per_block / 2.0)
    half = int(window // interval) / 2.0
    lo = np.clip(np.floor(centre - half), 0, n).astype(int)
    hi = np.clip(np.ceil(centre + half), 0, n).astype(int)
    return labels, lo, hi


def _log_model(theta, rg, vpd, dswc):
    a, lnk, b, c = theta
    return a + np.log(rg / (rg + np.exp(lnk))) - b * vpd + c * dswc


def fit_conductance_response(gs, rg, vpd, dswc=None, *, x0_guess=None):
    """Fit the Jarvis-type response to observed gs by robust least squares on ln gs.

    Parameters
    ----------
    gs : numpy.ndarray
        Observed surface conductance [m s-1].
    rg : numpy.ndarray
        Global radiation [W m-2].
    vpd : numpy.ndarray
        Vapour pressure deficit [kPa].
    dswc : numpy.ndarray, optional
        Soil water content minus its window mean [m3 m-3]; None leaves c at 0.
    x0_guess : array_like, optional
        Starting parameters (e.g. the site-wide fit).

    Returns
    -------
    numpy.ndarray or None
        (a, ln k, b, c), or None if the fit fails.
    """
    y = np.log(gs)
    use_swc = dswc is not None
    d = dswc if use_swc else np.zeros_like(y)
    x0 = np.array([float(np.median(y)) + 0.3, np.log(200.0), 0.3, 0.0])
    lower = np.array([-20.0, np.log(1.0), 0.0, -200.0])
    upper = np.array([5.0, np.log(5000.0), 5.0, 200.0])
    if x0_guess is not None:
        x0 = np.clip(np.asarray(x0_guess, dtype=float), lower + 1e-6, upper - 1e-6)
    npar = 4 if use_swc else 3  # without swc the soil-water term is left out, c = 0

    def full(p):
        return np.concatenate([p, np.zeros(4 - npar)])

    def resid(p):
        return _log_model(full(p), rg, vpd, d) - y

    def jac(p):
        k = np.exp(p[1])
        cols = [np.ones_like(rg), -k / (rg + k), -vpd, d][:npar]
        return np.column_stack(cols)

    try:
        res = optimize.least_squares(resid, x0[:npar], jac=jac, bounds=(lower[:npar], upper[:npar]),
                                     loss="soft_l1", f_scale=0.5)
    except (ValueError, np.linalg.LinAlgError):
        return None
    if not res.success or not np.all(np.isfinite(res.x)):
        return None
    return full(res.x)


def penman_monteith_fill(le_obs, to_fill, *, index, rg, ta, vpd, p_air, available_energy, ga,
                         ga_source, is_day, snow, swc, drivers_filled, window, step, min_samples):
    """LE from Penman–Monteith with gs predicted by the moving-window response fit.

    Parameters
    ----------
    le_obs : numpy.ndarray
        Accepted LE [W m-2] (NaN elsewhere, including intervals hidden for validation).
    to_fill : numpy.ndarray of bool
        Intervals to estimate.
    index : pandas.DatetimeIndex
    rg, ta, vpd, p_air, available_energy, ga : numpy.ndarray
        Complete drivers [W m-2, degC, kPa, kPa, W m-2, m s-1].
    ga_source : numpy.ndarray of object
        From :func:`aerodynamic_conductance_for_filling`.
    is_day, snow : numpy.ndarray of bool
    swc : numpy.ndarray or None
        Soil water content [m3 m-3], gaps allowed.
    drivers_filled : dict of str to numpy.ndarray of bool
    window, step : pandas.Timedelta
    min_samples : int
        Fewest observed gs for a window fit; otherwise the site-wide fit is used.

    Returns
    -------
    estimate, sd : numpy.ndarray
    method, quality : numpy.ndarray of object
    info : dict
        Number of window fits made and failed.
    """
    n = le_obs.size
    est = np.full(n, np.nan)
    sd = np.full(n, np.nan)
    method = np.full(n, "", dtype=object)
    quality = np.full(n, "", dtype=object)
    info = {"windows": 0, "windows_fitted": 0, "site_wide_fit": False}
    gs_obs = np.asarray(micromet.invert_penman_monteith(le_obs, available_energy, ta, vpd, p_air, ga),
                        dtype=float)
    ok = (is_day & ~snow & np.isfinite(gs_obs) & (gs_obs > _GS_RANGE[0]) & (gs_obs < _GS_RANGE[1])
          & (rg > _MIN_RG_FIT) & (le_obs > _MIN_LE_FIT) & (available_energy > _MIN_A_FIT)
          & np.isfinite(vpd))
    if swc is not None and np.isfinite(swc).mean() > 0.5:
        swc_f = pd.Series(swc).interpolate(limit_area="inside").ffill().bfill().to_numpy()
    else:
        swc_f = None
    if ok.sum() < min_samples:
        info["reason"] = f"fewer than {min_samples} intervals with an observed surface conductance"
        return est, sd, method, quality, info

    def fit(sel, guess=None):
        d = None
        if swc_f is not None:
            d = swc_f[sel] - swc_f[sel].mean()
        return fit_conductance_response(gs_obs[sel], rg[sel], vpd[sel], d, x0_guess=guess)

    site_theta = fit(ok)
    labels, lo, hi = conductance_blocks(index, step, window)
    apply = to_fill & is_day & ~snow & np.isfinite(available_energy) & np.isfinite(ga) \
        & np.isfinite(ta) & np.isfinite(vpd) & np.isfinite(rg) & np.isfinite(p_air)
    site_wide = np.zeros(n, dtype=bool)
    obs_day = is_day & np.isfinite(le_obs)
    info["windows"] = int(lo.size)
    # block b is the contiguous range [b_lo, b_hi) (labels ascend); each window works on the
    # slice covering its block and its window only, so the loop costs O(n) in all, not
    # O(n × windows); the same elements in the same order give the same fits
    b_lo = np.searchsorted(labels, np.arange(lo.size), side="left")
    b_hi = np.searchsorted(labels, np.arange(lo.size), side="right")
    for b in range(lo.size):  # loop over moving windows (tens per year), not over gaps
        u0, u1 = min(lo[b], b_lo[b]), max(hi[b], b_hi[b])
        seg = slice(u0, u1)
        in_block = np.zeros(u1 - u0, dtype=bool)
        in_block[b_lo[b] - u0:b_hi[b] - u0] = True
        targets = apply[seg] & in_block
        sel = lo[b] + np.flatnonzero(ok[lo[b]:hi[b]])  # window intervals with an observed gs
        theta = fit(sel, site_theta) if sel.size >= min_samples else None
        if theta is None:
            theta = site_theta
            site_wide[b_lo[b]:b_hi[b]] = True
        else:
            info["windows_fitted"] += 1
        if theta is None:
            continue
        ref = swc_f[sel].mean() if (swc_f is not None and sel.size) else (
            np.nanmean(swc_f) if swc_f is not None else 0.0)
        win = np.zeros(u1 - u0, dtype=bool)
        win[lo[b] - u0:hi[b] - u0] = True
        need_local = targets | (win & obs_day[seg])
        need = u0 + np.flatnonzero(need_local)
        dsw = (swc_f[need] - ref) if swc_f is not None else np.zeros(need.size)
        with np.errstate(divide="ignore", invalid="ignore"):
            gs_pred = np.exp(_log_model(theta, np.maximum(rg[need], 0.0), vpd[need], dsw))
        le_pred = np.full(u1 - u0, np.nan)
        le_pred[need_local] = micromet.penman_monteith(available_energy[need], ta[need], vpd[need],
                                                       p_air[need], ga[need], gs_pred)
        check = win & obs_day[seg]
        resid = le_pred[check] - le_obs[seg][check]
        resid = resid[np.isfinite(resid)]
        spread = float(np.std(resid, ddof=1)) if resid.size > 1 else np.nan
        est[seg][targets] = le_pred[targets]
        sd[seg][targets] = spread
    done = np.isfinite(est)
    if (done & ~np.isfinite(sd)).any():  # windows without enough residuals: the median spread
        spreads = sd[done & np.isfinite(sd)]
        sd[done & ~np.isfinite(sd)] = np.median(spreads) if spreads.size else np.nan
    method[done] = "penman_monteith_conductance"
    lower = site_wide | (ga_source != "measured")
    for name in ("rg", "ta", "vpd"):
        lower |= drivers_filled.get(name, np.zeros(n, bool))
    quality[done] = lower_quality(np.full(int(done.sum()), "good", dtype=object), lower[done])
    info["site_wide_fit"] = bool(site_wide[done].any())
    return est, sd, method, quality, info


def energy_balance_residual_fill(h_obs, le_obs, le_filled, le_quality, to_fill, *, index,
                                 available_energy, is_day, window, step, min_samples):
    """H = c · A − LE_filled with the closure ratio c of the moving window (daytime only).

    Parameters
    ----------
    h_obs, le_obs : numpy.ndarray
        Accepted H and LE [W m-2].
    le_filled : numpy.ndarray
        LE measured or filled [W m-2].
    le_quality : numpy.ndarray of object
        ``measured`` / good / fair / poor of ``le_filled``.
    to_fill : numpy.ndarray of bool
    index : pandas.DatetimeIndex
    available_energy : numpy.ndarray
        A [W m-2] (NaN where not accepted).
    is_day : numpy.ndarray of bool
    window, step : pandas.Timedelta
    min_samples : int
        Fewest daytime intervals with H, LE and A accepted for a window's closure ratio.

    Returns
    -------
    estimate, sd : numpy.ndarray
    method, quality : numpy.ndarray of object
    closure : dict
        Site-wide closure ratio and sample size.
    """
    n = h_obs.size
    est = np.full(n, np.nan)
    sd = np.full(n, np.nan)
    method = np.full(n, "", dtype=object)
    quality = np.full(n, "", dtype=object)
    a = available_energy
    both = is_day & np.isfinite(h_obs) & np.isfinite(le_obs) & np.isfinite(a) & (a > _MIN_A_FIT)
    info = {"ratio": None, "n": int(both.sum())}
    if both.sum() < min_samples:
        return est, sd, method, quality, info
    site_c = float(np.sum(h_obs[both] + le_obs[both]) / np.sum(a[both]))
    info["ratio"] = site_c
    labels, lo, hi = conductance_blocks(index, step, window)
    # window sums by cumulative sums: vectorised over blocks
    num = np.concatenate(([0.0], np.cumsum(np.where(both, h_obs + le_obs, 0.0))))
    den = np.concatenate(([0.0], np.cumsum(np.where(both, a, 0.0))))
    cnt = np.concatenate(([0], np.cumsum(both)))
    with np.errstate(invalid="ignore", divide="ignore"):
        c_block = (num[hi] - num[lo]) / (den[hi] - den[lo])
    c_block = np.where((cnt[hi] - cnt[lo]) >= min_samples, c_block, site_c)
    c = c_block[labels]
    resid = np.where(both, h_obs - (c * a - le_obs), np.nan)
    r1 = np.concatenate(([0.0], np.cumsum(np.where(both, resid, 0.0))))
    r2 = np.concatenate(([0.0], np.cumsum(np.where(both, resid * resid, 0.0))))
    k = (cnt[hi] - cnt[lo]).astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_r = (r1[hi] - r1[lo]) / k
        var = ((r2[hi] - r2[lo]) - k * mean_r ** 2) / (k - 1)
    sd_block = np.sqrt(np.clip(var, 0.0, None))
    site_resid = resid[both]
    site_sd = float(np.std(site_resid, ddof=1)) if site_resid.size > 1 else np.nan
    sd_block = np.where(k >= min_samples, sd_block, site_sd)
    apply = to_fill & is_day & np.isfinite(a) & np.isfinite(le_filled)
    est[apply] = c[apply] * a[apply] - le_filled[apply]
    sd[apply] = sd_block[labels][apply]
    method[apply] = "energy_balance_residual"
    q = np.where(le_quality == "measured", "good", le_quality).astype(object)
    lowered = lower_quality(q, le_quality != "measured")
    quality[apply] = lowered[apply]
    return est, sd, method, quality, info
