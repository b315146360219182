"""Penman–Monteith-based filling of LE and energy-balance-residual filling of H.

**LE.** On accepted daytime intervals the surface conductance gs is obtained by inverting
Penman–Monteith (:func:`pipeline.micromet.invert_penman_monteith`). A Jarvis-type
response

    ln gs = a + ln(rg / (rg + k)) − b · vpd + c · (swc − swc_mean)

(hyperbolic light response after Jarvis 1976; exponential decline with VPD, a common
Jarvis-type form; log-linear soil-water term, ours, used only where swc exists) is fitted
by robust least squares on ln gs (soft-L1 loss, all windows solved together by
:func:`pipeline.batched_fit.solve_soft_l1`) in
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

**Wet canopy.** ``penman_monteith_wet_canopy`` (:func:`wet_canopy_fill`): in LE gaps caused
by wetness at a site that rejects LE when wet, LE = c · Penman–Monteith with gs → ∞ (the
evaporation of intercepted water; Monteith 1965, Rutter et al. 1971) while a canopy store
of capacity S (by canopy height) filled by rain still holds water; ``_fill_sd`` is the dry
fill's spread at that interval.

References
----------
Rutter, A. J., Kershaw, K. A., Robins, P. C. and Morton, A. J. (1971). A predictive model
of rainfall interception in forests, 1. Agricultural Meteorology 9, 367–384 [from memory].
Monteith, J. L. (1965). Evaporation and environment. Symp. Soc. Exp. Biol. 19, 205–234.
Jarvis, P. G. (1976). The interpretation of the variations in leaf water potential and
stomatal conductance found in canopies in the field. Phil. Trans. R. Soc. B 273, 593–610.
Wilson, K. et al. (2002). Energy balance closure at FLUXNET sites. Agric. For. Meteorol.
113, 223–243.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from . import batched_fit, micromet
from .gapfill_similar import lower_quality

__all__ = [
    "aerodynamic_conductance_for_filling",
    "conductance_blocks",
    "fit_conductance_response",
    "fit_conductance_responses",
    "penman_monteith_fill",
    "energy_balance_residual_fill",
    "closure_ratio",
    "wet_canopy_storage",
    "intercepted_water_fraction",
    "wet_canopy_fill",
]

# bounds of the observed gs entering the fit, m s-1 (common practice: canopy gs rarely
# exceeds ~0.03 m s-1, Kelliher et al. 1995 [from memory]; 0.1 leaves room)
_GS_RANGE = (1e-4, 0.1)
_MIN_RG_FIT = 50.0  # W m-2, common practice: daytime with a meaningful light response
_MIN_LE_FIT = 5.0  # W m-2, common practice
_MIN_A_FIT = 20.0  # W m-2, common practice
_START_K_RANGE = (20.0, 2000.0)  # W m-2, where window fits start k (ours; well inside the bounds)


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


_FIT_LOWER = np.array([-20.0, np.log(1.0), 0.0, -200.0])  # a, ln k, b, c
_FIT_UPPER = np.array([5.0, np.log(5000.0), 5.0, 200.0])
_FIT_LOSS_SCALE = 0.5  # soft-L1 scale on ln gs: residuals beyond a factor ~1.6 count less (common practice)


def _log_model(theta, rg, vpd, dswc):
    a, lnk, b, c = theta
    return a + np.log(rg / (rg + np.exp(lnk))) - b * vpd + c * dswc


def fit_conductance_responses(gs, rg, vpd, dswc, valid, *, x0_guess=None, use_swc=None):
    """Fit the Jarvis-type response to many windows at once (robust least squares on ln gs).

    Parameters
    ----------
    gs, rg, vpd, dswc : numpy.ndarray
        Windows × m: observed surface conductance [m s-1], global radiation [W m-2], vapour
        pressure deficit [kPa], soil water content minus its window mean [m3 m-3]; rows
        padded where ``valid`` is false.
    valid : numpy.ndarray of bool
        Windows × m.
    x0_guess : array_like, optional
        Starting parameters (a, ln k, b, c) for every window (e.g. the site-wide fit);
        default: a from the window's median ln gs, k = 200 W m-2, b = 0.3 kPa-1, c = 0.
    use_swc : numpy.ndarray of bool, optional
        Per window: fit the soil-water term c (default: no window does; c stays 0).

    Returns
    -------
    theta : numpy.ndarray
        Windows × 4 parameters (a, ln k, b, c).
    ok : numpy.ndarray of bool
        Per window: the fit converged.

    Notes
    -----
    Minimises ½ Σ f² ρ(r²/f²), ρ(z) = 2(√(1 + z) − 1) (soft L1, f = 0.5) of the ln gs
    residuals r within the bounds a ∈ [−20, 5], k ∈ [1, 5000] W m-2, b ∈ [0, 5] kPa-1,
    c ∈ [−200, 200] (m3 m-3)-1, all windows together (:func:`pipeline.batched_fit.solve_soft_l1`;
    the tests check it against :func:`scipy.optimize.least_squares`).
    """
    valid = np.asarray(valid, dtype=bool)
    nw = valid.shape[0]
    y = np.where(valid, np.log(np.where(valid, gs, 1.0)), 0.0)
    rg = np.where(valid, rg, 1.0)
    vpd = np.where(valid, vpd, 0.0)
    d = np.where(valid, dswc, 0.0) if dswc is not None else np.zeros_like(y)
    use_swc = np.zeros(nw, dtype=bool) if use_swc is None else np.asarray(use_swc, dtype=bool)
    if x0_guess is None:
        med = _row_medians(y, valid)
        x0 = np.column_stack([med + 0.3, np.full(nw, np.log(200.0)), np.full(nw, 0.3), np.zeros(nw)])
    else:
        x0 = np.broadcast_to(np.asarray(x0_guess, dtype=float), (nw, 4)).copy()
    x0[~use_swc, 3] = 0.0
    free = np.ones((nw, 4), dtype=bool)
    free[:, 3] = use_swc

    def residual_and_jacobian(theta, rows, with_jacobian):
        k = np.exp(theta[:, 1])[:, None]
        g, v, s = rg[rows], vpd[rows], d[rows]
        rk = g + k
        r = theta[:, :1] + np.log(g / rk) - theta[:, 2:3] * v + theta[:, 3:4] * s - y[rows]
        if not with_jacobian:
            return r, None
        jac = np.stack([np.ones_like(g), -k / rk, -v, s], axis=-1)
        return r, jac

    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return batched_fit.solve_soft_l1(residual_and_jacobian, x0, valid, lower=_FIT_LOWER,
                                         upper=_FIT_UPPER, f_scale=_FIT_LOSS_SCALE, free=free)


def _row_medians(y, valid):
    """Median of the valid entries of every row (0 for a row without any)."""
    have = valid.any(axis=1)
    med = np.zeros(y.shape[0])
    if have.any():
        med[have] = np.nanmedian(np.where(valid[have], y[have], np.nan), axis=1)
    return med


def fit_conductance_response(gs, rg, vpd, dswc=None, *, x0_guess=None):
    """Fit the Jarvis-type response to observed gs by robust least squares on ln gs.

    One window of :func:`fit_conductance_responses`.

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
    gs = np.asarray(gs, dtype=float)[None, :]
    theta, ok = fit_conductance_responses(
        gs, np.asarray(rg, dtype=float)[None, :], np.asarray(vpd, dtype=float)[None, :],
        None if dswc is None else np.asarray(dswc, dtype=float)[None, :],
        np.ones(gs.shape, dtype=bool), x0_guess=x0_guess, use_swc=np.array([dswc is not None]))
    return theta[0] if ok[0] else None


def _window_fits(first, last, ok_pos, min_samples, *, gs_obs, rg, vpd, swc, guess):
    """The response fitted in every window with at least ``min_samples`` observed gs.

    Window b holds the intervals ``ok_pos[first[b]:last[b]]``; the fits start from
    ``guess`` (the site-wide fit) and are solved together. Returns {window: parameters} for
    the windows whose fit converged.
    """
    count = last - first
    rows = np.flatnonzero(count >= max(min_samples, 1))
    if rows.size == 0:
        return {}
    width = int(count[rows].max())
    col = np.arange(width)
    valid = col[None, :] < count[rows, None]
    idx = ok_pos[np.minimum(first[rows, None] + col[None, :], ok_pos.size - 1)]
    d = None
    if swc is not None:
        sw = np.where(valid, swc[idx], 0.0)
        d = sw - (sw.sum(axis=1) / count[rows])[:, None]
    if guess is not None:  # a start with k on or near a bound slows the projected steps: k
        # starts within 20-2000 W m-2 (the rest of the site-wide fit as it is)
        guess = np.asarray(guess, dtype=float).copy()
        guess[1] = np.clip(guess[1], np.log(_START_K_RANGE[0]), np.log(_START_K_RANGE[1]))
    theta, converged = fit_conductance_responses(
        gs_obs[idx], rg[idx], vpd[idx], d, valid, x0_guess=guess,
        use_swc=np.full(rows.size, swc is not None))
    return {int(b): theta[i] for i, b in enumerate(rows) if converged[i]}


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

    d_site = (swc_f[ok] - swc_f[ok].mean()) if swc_f is not None else None
    site_theta = fit_conductance_response(gs_obs[ok], rg[ok], vpd[ok], d_site)
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
    # the window fits, all at once: window b holds the intervals ok_pos[first[b]:last[b]]
    ok_pos = np.flatnonzero(ok)
    first = np.searchsorted(ok_pos, lo)
    last = np.searchsorted(ok_pos, hi)
    window_theta = _window_fits(first, last, ok_pos, min_samples, gs_obs=gs_obs, rg=rg, vpd=vpd,
                                swc=swc_f, guess=site_theta)
    # the reference of a window without observed gs (its fit is the site-wide one)
    swc_record_mean = float(np.nanmean(swc_f)) if swc_f is not None else 0.0
    for b in range(lo.size):  # loop over moving windows (tens per year), not over gaps
        u0, u1 = min(lo[b], b_lo[b]), max(hi[b], b_hi[b])
        seg = slice(u0, u1)
        in_block = np.zeros(u1 - u0, dtype=bool)
        in_block[b_lo[b] - u0:b_hi[b] - u0] = True
        targets = apply[seg] & in_block
        sel = ok_pos[first[b]:last[b]]  # window intervals with an observed gs
        theta = window_theta.get(b)
        if theta is None:
            theta = site_theta
            site_wide[b_lo[b]:b_hi[b]] = True
        else:
            info["windows_fitted"] += 1
        if theta is None:
            continue
        ref = swc_f[sel].mean() if (swc_f is not None and sel.size) else swc_record_mean
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


def _closure_sample(h_obs, le_obs, a, is_day):
    """Daytime intervals with H, LE and a meaningful available energy accepted."""
    with np.errstate(invalid="ignore"):
        return is_day & np.isfinite(h_obs) & np.isfinite(le_obs) & np.isfinite(a) & (a > _MIN_A_FIT)


def closure_ratio(h_obs, le_obs, available_energy, is_day, *, index, window, step, min_samples):
    """The site's moving-window closure ratio c = Σ(H + LE) / ΣA for every interval.

    Parameters
    ----------
    h_obs, le_obs : numpy.ndarray
        Accepted H and LE [W m-2] (NaN elsewhere).
    available_energy : numpy.ndarray
        A [W m-2] (NaN where not accepted).
    is_day : numpy.ndarray of bool
    index : pandas.DatetimeIndex
    window, step : pandas.Timedelta
        Moving window and the blocks sharing one ratio (as for the conductance fit).
    min_samples : int
        Fewest daytime intervals with H, LE and A accepted for a window's ratio; windows
        with fewer take the site-wide ratio.

    Returns
    -------
    c : numpy.ndarray or None
        Closure ratio [-] per interval; None when the whole record has fewer than
        ``min_samples`` such intervals.
    info : dict
        ``ratio`` (site-wide) and ``n`` (intervals used).

    References
    ----------
    Wilson, K. et al. (2002). Energy balance closure at FLUXNET sites. Agric. For.
    Meteorol. 113, 223–243 (the ratio Σ(H + LE) / Σ(Rn − G)).
    """
    a = available_energy
    both = _closure_sample(h_obs, le_obs, a, is_day)
    info = {"ratio": None, "n": int(both.sum())}
    if both.sum() < min_samples:
        return None, info
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
    return c_block[labels], info


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
    c, info = closure_ratio(h_obs, le_obs, available_energy, is_day, index=index, window=window,
                            step=step, min_samples=min_samples)
    if c is None:
        return est, sd, method, quality, info
    both = _closure_sample(h_obs, le_obs, a, is_day)
    labels, lo, hi = conductance_blocks(index, step, window)
    cnt = np.concatenate(([0], np.cumsum(both)))
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


def wet_canopy_storage(canopy_height_m, *, short_mm, tall_mm, tall_height_m):
    """Canopy water storage capacity [mm] by canopy height: ``tall_mm`` from ``tall_height_m`` up."""
    hc = np.asarray(canopy_height_m, dtype=float)
    return np.where(np.isfinite(hc) & (hc >= tall_height_m), float(tall_mm), float(short_mm))


def intercepted_water_fraction(wetting, refill_mm, evaporation_mm, storage_mm):
    """Share of each interval during which the canopy holds intercepted water.

    A bucket of capacity ``storage_mm`` is filled by each wetting interval (rain up to the
    free capacity; an interval with ``refill_mm`` = inf, e.g. irrigation of unknown depth,
    fills it) and emptied by the wet-canopy evaporation (Rutter et al. 1971 [from memory],
    without the free throughfall or drainage terms: all rain is held until the store is
    full, an upper bound on the store).

    Parameters
    ----------
    wetting : numpy.ndarray of bool
        Intervals of rain or irrigation.
    refill_mm : numpy.ndarray
        Water reaching the canopy in the interval [mm] (NaN counts as 0; inf fills the store).
    evaporation_mm : numpy.ndarray
        Potential evaporation of the wet canopy in the interval [mm] (≥ 0; NaN counts as 0,
        i.e. the store is not emptied where the rate is unknown).
    storage_mm : numpy.ndarray
        Storage capacity [mm] per interval.

    Returns
    -------
    numpy.ndarray
        Wet fraction in [0, 1]: 1 where the store outlasts the interval, the share of the
        interval's potential evaporation the remaining store supplies where it runs dry, 0
        where the store is empty.
    """
    n = wetting.size
    frac = np.zeros(n)
    refill = np.where(np.isfinite(refill_mm) | np.isposinf(refill_mm), refill_mm, 0.0)
    evap = np.where(np.isfinite(evaporation_mm), np.maximum(evaporation_mm, 0.0), 0.0)
    cap = np.asarray(storage_mm, dtype=float)
    store = 0.0
    # sequential by nature (the store carries over), but only from the first wetting on and
    # with scalar work per interval (a few ms per year of half-hours)
    first = np.flatnonzero(wetting)
    for i in range(int(first[0]) if first.size else n, n):
        if wetting[i]:
            store = min(cap[i], store + refill[i])
        if store <= 0.0:
            continue
        e = evap[i]
        frac[i] = 1.0 if e <= store else store / e
        store = max(store - e, 0.0)
    return frac


def wet_canopy_fill(base_estimate, base_sd, wet_gap, *, wetting, refill_mm, storage_mm, ta, vpd,
                    p_air, available_energy, ga, ga_source, closure, snow, drivers_filled,
                    interval_seconds):
    """LE in wet-canopy gaps: evaporation of intercepted water at the wet-surface rate.

    Evaporation from a wet canopy proceeds at the Penman–Monteith rate with zero surface
    resistance (gs → ∞; Monteith 1965; Rutter et al. 1971 [from memory]) while intercepted
    water remains. The rate is computed from the interval's own (filled) drivers and ga and
    scaled by the site's closure ratio c, so that the fill matches the site's unclosed
    measured fluxes. The store (:func:`intercepted_water_fraction`) is emptied by the
    unscaled (energy-closed) rate, the water that actually evaporates. Where the store runs
    dry within an interval, the fill blends the wet rate and ``base_estimate`` (the dry
    fill) by the wet fraction; where it is empty the dry fill stays. Only ``wet_gap``
    intervals are filled, so the wet period ends at the end of QC's wet window or when the
    store is empty, whichever comes first.

    Parameters
    ----------
    base_estimate, base_sd : numpy.ndarray
        The dry fill and its spread [W m-2] (similar conditions or the dry Penman–Monteith
        response, whichever strategy the site chose).
    wet_gap : numpy.ndarray of bool
        Intervals that are gaps because of wetness with no accepted wet analogue.
    wetting, refill_mm, storage_mm
        See :func:`intercepted_water_fraction`.
    ta, vpd, p_air, available_energy, ga : numpy.ndarray
        Complete drivers [degC, kPa, kPa, W m-2, m s-1].
    ga_source : numpy.ndarray of object
        From :func:`aerodynamic_conductance_for_filling`.
    closure : numpy.ndarray
        Closure ratio c per interval [-] (:func:`closure_ratio`).
    snow : numpy.ndarray of bool
        Snow or frozen conditions: not filled here (no liquid intercepted water).
    drivers_filled : dict of str to numpy.ndarray of bool
    interval_seconds : float

    Returns
    -------
    estimate, sd : numpy.ndarray
        NaN where this method does not apply.
    method, quality : numpy.ndarray of object
        ``penman_monteith_wet_canopy``; ``fair``, ``poor`` where rg, ta or vpd were filled or
        ga does not rest on a measured u*.
    info : dict
        Intervals filled and the wet-canopy share of their LE.
    """
    n = wet_gap.size
    est = np.full(n, np.nan)
    sd = np.full(n, np.nan)
    method = np.full(n, "", dtype=object)
    quality = np.full(n, "", dtype=object)
    le_wet_closed = np.asarray(micromet.penman_monteith(available_energy, ta, vpd, p_air, ga, np.inf),
                               dtype=float)
    evap = np.asarray(micromet.evaporation_mm(np.maximum(np.nan_to_num(le_wet_closed, nan=0.0), 0.0),
                                              np.where(np.isfinite(ta), ta, 10.0), interval_seconds),
                      dtype=float)
    evap = np.where(np.isfinite(le_wet_closed) & ~snow, evap, np.nan)
    frac = intercepted_water_fraction(np.asarray(wetting, dtype=bool), np.asarray(refill_mm, dtype=float),
                                      evap, storage_mm)
    le_wet = closure * le_wet_closed
    base_ok = np.isfinite(base_estimate)
    apply = (wet_gap & ~snow & (frac > 0) & np.isfinite(le_wet) & ((frac >= 1.0) | base_ok))
    est[apply] = np.where(frac[apply] >= 1.0, le_wet[apply],
                          frac[apply] * le_wet[apply] + (1.0 - frac[apply]) * np.nan_to_num(base_estimate[apply]))
    spread = np.asarray(base_sd, dtype=float)
    fallback = np.nanmedian(spread[np.isfinite(spread)]) if np.isfinite(spread).any() else np.nan
    sd[apply] = np.where(np.isfinite(spread[apply]), spread[apply], fallback)
    method[apply] = "penman_monteith_wet_canopy"
    lower = ga_source != "measured"
    for name in ("rg", "ta", "vpd"):
        lower = lower | drivers_filled.get(name, np.zeros(n, bool))
    quality[apply] = lower_quality(np.full(int(apply.sum()), "fair", dtype=object), lower[apply])
    info = {"intervals": int(apply.sum()),
            "wet_gap_intervals": int(wet_gap.sum()),
            "mean_wet_fraction": float(frac[apply].mean()) if apply.any() else None}
    return est, sd, method, quality, info
