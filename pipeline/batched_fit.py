"""Many small bounded robust least-squares fits solved together.

The moving-window surface-conductance fit of the Penman–Monteith filling
(:mod:`pipeline.gapfill_penman`) solves one small problem per window: a handful of
parameters, a few hundred residuals, about a hundred windows per site-year (twice: once in
the cross-validation, once for the fill). :func:`scipy.optimize.least_squares` solves one
problem per call, and its per-iteration bookkeeping, not the arithmetic, is what such a
small problem costs (about 3 ms a fit here). :func:`solve_soft_l1` solves all the windows
at once: the residuals of every window are one padded (windows × residuals) array, and
every iteration is a few whole-array operations plus one batched solve of the small normal
equations.

Problem solved, for every window w independently::

    minimise  ½ Σ_i f² ρ(r_wi(θ_w)² / f²)   subject to  lower ≤ θ_w ≤ upper,

with the soft-L1 loss ρ(z) = 2(√(1 + z) − 1) (the loss ``"soft_l1"`` of
:func:`scipy.optimize.least_squares`, which is the oracle of the tests) and scale f.

Method: Levenberg–Marquardt on reweighted normal equations. With φ(r) = ½ f² ρ(r²/f²) the
loss of one residual, the gradient of the cost is Σ φ'(r_i) ∇r_i with φ'(r) = r/√(1 + z),
z = r²/f², and the loss's own curvature is φ''(r) = (1 + z)^(−3/2) > 0; the step solves
(Σ φ''(r_i) ∇r_i ∇r_iᵀ + λ D) δ = −Σ φ'(r_i) ∇r_i, Gauss–Newton in the model and exact in
the loss (weights 1/√(1 + z) in both places would be iteratively reweighted least squares,
Holland and Welsch 1977, with the same fixed point but slower convergence). Marquardt's
damping λ of the diagonal D (Marquardt 1963) is raised when a step does not lower the cost
and lowered when it does, per window. Bounds are kept by projection: a parameter on a bound
whose gradient points out of the box is held there for the step (an active set), and every
trial point is clipped into the box.

References
----------
Marquardt, D. W. (1963). An algorithm for least-squares estimation of nonlinear
parameters. J. Soc. Ind. Appl. Math. 11, 431–441.
Holland, P. W. and Welsch, R. E. (1977). Robust regression using iteratively reweighted
least-squares. Commun. Stat. Theory Methods 6, 813–827.
"""
from __future__ import annotations

from typing import Callable

import numpy as np

__all__ = ["solve_soft_l1", "soft_l1_cost"]


def soft_l1_cost(residuals, valid, f_scale: float) -> np.ndarray:
    """½ Σ f² ρ(r² / f²) per row, ρ(z) = 2(√(1 + z) − 1), over the ``valid`` entries."""
    z = (np.where(valid, residuals, 0.0) / f_scale) ** 2
    return f_scale * f_scale * np.sum(np.sqrt(1.0 + z) - 1.0, axis=-1)


def solve_soft_l1(residual_and_jacobian: Callable, x0, valid, *, lower, upper, f_scale: float,
                  free=None, max_iterations: int = 200, ftol: float = 1e-12,
                  xtol: float = 1e-10):
    """Solve many bounded soft-L1 least-squares problems at once.

    Parameters
    ----------
    residual_and_jacobian : callable
        ``f(theta, rows, with_jacobian) -> (r, J)``: for the windows ``rows`` (an index
        array) at parameters ``theta`` (len(rows) × p), the residuals ``r`` (len(rows) × m)
        and, when ``with_jacobian``, their derivatives ``J`` (len(rows) × m × p; otherwise
        None). Entries outside ``valid`` are ignored.
    x0 : array_like
        Starting parameters, windows × p (clipped into the bounds).
    valid : numpy.ndarray of bool
        Windows × m: which residuals belong to each window (rows are padded).
    lower, upper : array_like
        Bounds, shape (p,).
    f_scale : float
        Scale of the soft-L1 loss (residuals beyond it count less than quadratically).
    free : numpy.ndarray of bool, optional
        Windows × p: parameters to fit; the others stay at their value in ``x0``
        (default: all free).
    max_iterations : int, optional
        Most Levenberg–Marquardt iterations per window.
    ftol, xtol : float, optional
        A window has converged when an accepted step lowers its cost by less than
        ``ftol`` × cost, or changes no parameter by more than ``xtol`` × (1 + |θ|).

    Returns
    -------
    theta : numpy.ndarray
        Windows × p fitted parameters.
    converged : numpy.ndarray of bool
        Per window: converged within ``max_iterations`` with finite parameters.
    """
    lower = np.asarray(lower, dtype=float)
    upper = np.asarray(upper, dtype=float)
    theta = np.clip(np.array(x0, dtype=float, ndmin=2), lower, upper)
    nw, p = theta.shape
    valid = np.asarray(valid, dtype=bool)
    free = np.ones((nw, p), dtype=bool) if free is None else np.asarray(free, dtype=bool)
    eye = np.eye(p)
    damping = np.full(nw, 1e-3)
    active = np.any(valid, axis=1) & np.any(free, axis=1)
    converged = ~active & np.all(np.isfinite(theta), axis=1)
    # residuals and derivatives at the current parameters of every window; a trial point is
    # evaluated with its derivatives, which the next iteration reuses where it is accepted
    r_now, jac_now = residual_and_jacobian(theta, np.arange(nw), True)
    cost = soft_l1_cost(r_now, valid, f_scale)
    for _ in range(max_iterations):
        if not active.any():
            break
        rows = np.flatnonzero(active)
        th = theta[rows]
        r, jac = r_now[rows], jac_now[rows]
        ok = valid[rows]
        weight = np.where(ok, 1.0 / np.sqrt(1.0 + (np.where(ok, r, 0.0) / f_scale) ** 2), 0.0)
        wr = weight * np.where(ok, r, 0.0)
        jac_t = jac.transpose(0, 2, 1)
        grad = (jac_t @ wr[:, :, None])[:, :, 0]
        normal = (jac_t * (weight ** 3)[:, None, :]) @ jac  # curvature of the loss: (1 + z)^(-3/2)
        # active set: a parameter on a bound whose descent direction leaves the box stays
        hold = ~free[rows] | ((th <= lower) & (grad > 0)) | ((th >= upper) & (grad < 0))
        grad = np.where(hold, 0.0, grad)
        normal = np.where(hold[:, :, None] | hold[:, None, :], 0.0, normal)
        diag = np.einsum("wpp->wp", normal)
        scale = np.where(hold, 1.0, np.maximum(diag, 1e-12 * (1.0 + diag.max(axis=1, keepdims=True))))
        lhs = normal + (damping[rows, None] * scale)[:, :, None] * eye + np.where(hold, 1.0, 0.0)[:, :, None] * eye
        try:
            step = -np.linalg.solve(lhs, grad[:, :, None])[:, :, 0]
        except np.linalg.LinAlgError:
            step = -np.stack([np.linalg.lstsq(a, b, rcond=None)[0] for a, b in zip(lhs, grad)])
        trial = np.clip(th + step, lower, upper)
        r_trial, jac_trial = residual_and_jacobian(trial, rows, True)
        cost_trial = soft_l1_cost(r_trial, ok, f_scale)
        better = np.isfinite(cost_trial) & (cost_trial <= cost[rows])
        moved = np.abs(trial - th)
        small_step = np.all(moved <= xtol * (1.0 + np.abs(th)), axis=1)
        small_gain = better & (cost[rows] - cost_trial <= ftol * np.maximum(cost[rows], 1e-300))
        theta[rows] = np.where(better[:, None], trial, th)
        taken = rows[better]
        r_now[taken] = r_trial[better]
        jac_now[taken] = jac_trial[better]
        cost[rows] = np.where(better, cost_trial, cost[rows])
        damping[rows] = np.where(better, np.maximum(damping[rows] / 3.0, 1e-12), damping[rows] * 4.0)
        done = (better & (small_gain | small_step)) | (~better & small_step) | (damping[rows] > 1e12)
        converged[rows[done]] = True
        active[rows[done]] = False
    converged &= np.all(np.isfinite(theta), axis=1)
    return theta, converged
