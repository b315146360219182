"""The batched bounded soft-L1 solver against scipy.optimize.least_squares (the oracle).

Every expected value here comes from :func:`scipy.optimize.least_squares` (loss
``"soft_l1"``, the same bounds and scale, tolerances tightened to 1e-12) fitted to the same
invented data, one problem per call.
"""
from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import optimize

from pipeline.batched_fit import soft_l1_cost, solve_soft_l1
from pipeline.gapfill_penman import (_FIT_LOWER, _FIT_UPPER, _log_model, fit_conductance_response,
                                     fit_conductance_responses)


def _scipy_fit(gs, rg, vpd, dswc):
    """The oracle: one window by scipy.optimize.least_squares."""
    y = np.log(gs)
    npar = 3 if dswc is None else 4
    d = np.zeros_like(y) if dswc is None else dswc

    def full(p):
        return np.concatenate([p, np.zeros(4 - npar)])

    def jac(p):
        k = np.exp(p[1])
        return np.column_stack([np.ones_like(rg), -k / (rg + k), -vpd, d][:npar])

    x0 = np.array([np.median(y) + 0.3, np.log(200.0), 0.3, 0.0])[:npar]
    res = optimize.least_squares(lambda p: _log_model(full(p), rg, vpd, d) - y, x0, jac=jac,
                                 bounds=(_FIT_LOWER[:npar], _FIT_UPPER[:npar]), loss="soft_l1",
                                 f_scale=0.5, xtol=1e-12, ftol=1e-12, gtol=1e-12)
    return full(res.x)


def _invented_window(rng, n, *, with_swc, vpd_slope=None):
    rg = rng.uniform(50.0, 1000.0, n)
    vpd = rng.uniform(0.1, 4.0, n)
    dswc = rng.normal(0.0, 0.03, n) if with_swc else None
    b = rng.uniform(0.0, 1.0) if vpd_slope is None else vpd_slope
    truth = np.array([np.log(0.015), np.log(rng.uniform(20.0, 800.0)), b, rng.uniform(-5.0, 5.0)])
    noise = 0.3 * rng.standard_t(3, n)  # heavy tails: the robust loss matters
    gs = np.exp(_log_model(truth, rg, vpd, dswc if with_swc else np.zeros(n)) + noise)
    return gs, rg, vpd, dswc


def _ln_gs(theta, rg, vpd, dswc):
    return _log_model(theta, rg, vpd, np.zeros_like(rg) if dswc is None else dswc)


@pytest.mark.parametrize("with_swc", [False, True])
def test_single_window_matches_scipy(with_swc):
    rng = np.random.default_rng(7)
    for _ in range(20):
        gs, rg, vpd, dswc = _invented_window(rng, int(rng.integers(30, 600)), with_swc=with_swc)
        ours = fit_conductance_response(gs, rg, vpd, dswc)
        oracle = _scipy_fit(gs, rg, vpd, dswc)
        # the fitted ln gs agree closely (k alone can be weakly determined; the fit is judged
        # by what it predicts)
        np.testing.assert_allclose(_ln_gs(ours, rg, vpd, dswc), _ln_gs(oracle, rg, vpd, dswc), atol=1e-5)
        if not with_swc:
            assert ours[3] == 0.0


def test_bound_held_when_gs_rises_with_vpd():
    """With gs rising with VPD the decline b would be negative: it stays on its bound 0."""
    rng = np.random.default_rng(3)
    gs, rg, vpd, _ = _invented_window(rng, 300, with_swc=False, vpd_slope=0.0)
    gs = gs * np.exp(0.2 * vpd)  # gs increasing with vpd
    ours = fit_conductance_response(gs, rg, vpd)
    oracle = _scipy_fit(gs, rg, vpd, None)
    assert ours[2] == 0.0
    assert oracle[2] == pytest.approx(0.0, abs=1e-6)
    np.testing.assert_allclose(_ln_gs(ours, rg, vpd, None), _ln_gs(oracle, rg, vpd, None), atol=1e-5)


def test_many_windows_at_once_equal_one_by_one():
    """Padding and batching do not change a window's fit."""
    rng = np.random.default_rng(11)
    windows = [_invented_window(rng, int(rng.integers(20, 400)), with_swc=True) for _ in range(12)]
    width = max(w[0].size for w in windows)
    arrays = np.ones((4, len(windows), width))
    valid = np.zeros((len(windows), width), dtype=bool)
    for i, w in enumerate(windows):
        for j in range(4):
            arrays[j, i, :w[0].size] = w[j]
        valid[i, :w[0].size] = True
    theta, ok = fit_conductance_responses(*arrays, valid, use_swc=np.ones(len(windows), bool))
    assert ok.all()
    for i, (gs, rg, vpd, dswc) in enumerate(windows):
        oracle = _scipy_fit(gs, rg, vpd, dswc)
        np.testing.assert_allclose(_ln_gs(theta[i], rg, vpd, dswc), _ln_gs(oracle, rg, vpd, dswc), atol=1e-5)


@settings(max_examples=30, deadline=None)
@given(slope=st.floats(-3.0, 3.0), intercept=st.floats(-5.0, 5.0), seed=st.integers(0, 2**32 - 1))
def test_soft_l1_line_fit_matches_scipy(slope, intercept, seed):
    """A straight line with outliers, unbounded: the generic solver against scipy."""
    rng = np.random.default_rng(seed)
    x = np.linspace(0.0, 10.0, 60)
    y = intercept + slope * x + rng.normal(0.0, 0.2, x.size)
    y[rng.choice(x.size, 6, replace=False)] += rng.normal(0.0, 5.0, 6)  # outliers

    def rj(theta, rows, with_jacobian):
        r = theta[:, :1] + theta[:, 1:2] * x[None, :] - y[None, :]
        jac = np.stack([np.ones((rows.size, x.size)), np.broadcast_to(x, (rows.size, x.size))], axis=-1)
        return r, (jac if with_jacobian else None)

    theta, ok = solve_soft_l1(rj, np.zeros((1, 2)), np.ones((1, x.size), bool),
                              lower=[-np.inf, -np.inf], upper=[np.inf, np.inf], f_scale=1.0)
    res = optimize.least_squares(lambda p: p[0] + p[1] * x - y, np.zeros(2), loss="soft_l1",
                                 f_scale=1.0, xtol=1e-12, ftol=1e-12, gtol=1e-12)
    assert ok[0]
    np.testing.assert_allclose(theta[0], res.x, atol=1e-6)
    # the cost is scipy's: ½ Σ f² ρ(r²/f²)
    r = res.x[0] + res.x[1] * x - y
    assert soft_l1_cost(r[None, :], np.ones((1, x.size), bool), 1.0)[0] == pytest.approx(res.cost, rel=1e-9)
