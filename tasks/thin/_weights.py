"""Simplex-constrained optimal weights for a fixed set of points.

For points with features ``Phi`` (rows) and the chain's mean embedding ``mu`` the squared
feature-space MMD of weights ``w`` is ``|Phi^T w - mu|^2`` (Gretton et al. 2012, Eq. 6 in
feature space), a convex quadratic in ``w``. Optimal weights solve

    minimise  1/2 w^T G w - c^T w,   G = Phi Phi^T,  c = Phi mu
    subject to w >= 0, sum(w) = 1.

The problem is solved exactly by the primal active-set method for convex QP (Nocedal & Wright
2006, Algorithm 16.3): each iteration solves the equality-constrained problem on the current
free set through its KKT system and either steps to it (dropping a blocking weight to zero) or,
at a stationary point, releases the bound whose Lagrange multiplier is most negative. It ends
when every KKT condition holds. The start is a non-negative least-squares solution with the sum
constraint as a heavily weighted extra row (scipy.optimize.nnls, Lawson & Hanson 1974),
rescaled onto the simplex, which makes the active-set phase a few iterations in practice.

References
----------
.. [1] Nocedal, J. and Wright, S. J. (2006). Numerical Optimization, 2nd ed. Springer,
   Section 16.5, Algorithm 16.3.
.. [2] Lawson, C. L. and Hanson, R. J. (1974). Solving Least Squares Problems. Prentice-Hall.
.. [3] Gretton, A. et al. (2012). A kernel two-sample test. JMLR 13, 723-773.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

__all__ = ["feature_mmd", "optimal_weights", "solve_simplex_qp"]


def feature_mmd(phi_points: np.ndarray, mean_embedding: np.ndarray, weights: np.ndarray) -> float:
    """Feature-space MMD ``|Phi^T w - mu|`` (float64 arithmetic)."""
    r = np.asarray(weights, dtype=np.float64) @ np.asarray(phi_points, dtype=np.float64)
    r -= mean_embedding
    return float(np.sqrt(r @ r))


def _validate_features(phi: npt.ArrayLike, mu: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    a = np.asarray(phi, dtype=np.float64)
    b = np.asarray(mu, dtype=np.float64)
    if a.ndim != 2 or a.shape[0] < 1:
        raise ValueError(f"phi_points must be a non-empty 2-D array (m, F), got shape {a.shape}")
    if b.shape != (a.shape[1],):
        raise ValueError(
            f"mean_embedding must have shape ({a.shape[1]},) to match phi_points, got {b.shape}"
        )
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        raise ValueError("phi_points and mean_embedding must be finite")
    return a, b


def optimal_weights(
    phi_points: npt.ArrayLike, mean_embedding: npt.ArrayLike, *, max_iter: int | None = None
) -> np.ndarray:
    """Weights on the simplex minimising the feature-space MMD, solved exactly.

    Parameters
    ----------
    phi_points : array_like, shape (m, F)
        Feature vectors of the chosen points.
    mean_embedding : array_like, shape (F,)
        Mean feature vector of the whole chain.
    max_iter : int, optional
        Cap on active-set iterations (default ``5 m + 50``).

    Returns
    -------
    ndarray of float64, shape (m,)
        ``w >= 0`` with ``sum(w) == 1`` satisfying the KKT conditions of the QP.

    References
    ----------
    Nocedal & Wright (2006), Algorithm 16.3; Lawson & Hanson (1974) for the NNLS start.
    """
    a, mu = _validate_features(phi_points, mean_embedding)
    m = a.shape[0]
    if m == 1:
        return np.ones(1)
    return solve_simplex_qp(a @ a.T, a @ mu, max_iter=max_iter)


def solve_simplex_qp(g: np.ndarray, c: np.ndarray, *, max_iter: int | None = None) -> np.ndarray:
    """Minimise ``1/2 w^T G w - c^T w`` over the simplex (G symmetric positive semi-definite).

    Same method as :func:`optimal_weights`, from the Gram matrix ``G`` and ``c`` directly.
    """
    g = np.asarray(g, dtype=np.float64)
    c = np.asarray(c, dtype=np.float64)
    m = g.shape[0]
    if m == 1:
        return np.ones(1)
    w = _nnls_start(g, c)
    return _active_set(g, c, w, max_iter=max_iter if max_iter is not None else 5 * m + 50)


def _nnls_start(g: np.ndarray, c: np.ndarray) -> np.ndarray:
    """Warm start: with ``G + eps I = L L^T``, ``|L^T w - L^{-1} c|^2`` equals the QP
    objective up to a constant and the ridge, so NNLS on it (plus a heavy sum row) lands
    near the simplex optimum."""
    from scipy.linalg import cho_factor, solve_triangular
    from scipy.optimize import nnls

    m = g.shape[0]
    ridge = 1e-10 * max(float(np.trace(g)) / m, 1e-300)
    try:
        low, _ = cho_factor(g + ridge * np.eye(m), lower=True)
    except np.linalg.LinAlgError:
        return np.full(m, 1.0 / m)
    low = np.tril(low)
    a = low.T
    b = solve_triangular(low, c, lower=True)
    rho = 1e3 * np.sqrt(max(float(np.trace(g)) / m, 1e-300))
    lhs = np.vstack([a, np.full((1, m), rho)])
    rhs = np.concatenate([b, [rho]])
    try:
        w, _ = nnls(lhs, rhs, maxiter=50 * m)
    except RuntimeError:  # iteration cap: the active-set phase still finishes the job
        w = np.zeros(m)
    total = float(np.sum(w))
    if not np.isfinite(total) or total <= 0.0:
        return np.full(m, 1.0 / m)
    return w / total


def _active_set(g: np.ndarray, c: np.ndarray, w: np.ndarray, *, max_iter: int) -> np.ndarray:
    scale = max(float(np.max(np.abs(np.diag(g)))), 1e-300)
    tol_mult = 1e-11 * scale
    free = w > 0.0
    w = np.where(free, w, 0.0)
    for _ in range(max_iter):
        idx = np.flatnonzero(free)
        k = idx.size
        # KKT system of the equality-constrained subproblem on the free set:
        #   G_FF w_F - nu 1 = c_F,  1^T w_F = 1   (Nocedal & Wright Eq. 16.4)
        kkt = np.empty((k + 1, k + 1))
        kkt[:k, :k] = g[np.ix_(idx, idx)]
        kkt[:k, k] = -1.0
        kkt[k, :k] = 1.0
        kkt[k, k] = 0.0
        rhs = np.concatenate([c[idx], [1.0]])
        try:
            sol = np.linalg.solve(kkt, rhs)
            if not np.all(np.isfinite(sol)):
                raise np.linalg.LinAlgError
        except np.linalg.LinAlgError:
            sol = np.linalg.lstsq(kkt, rhs, rcond=None)[0]  # singular G_FF: any minimiser
        target, nu = sol[:k], sol[k]
        p = target - w[idx]
        if np.max(np.abs(p)) <= 1e-12:
            # stationary on the free set: multipliers of the bounds w_i >= 0
            lam = g[~free] @ w - c[~free] - nu  # lambda_i = (G w - c)_i - nu  (Eq. 16.42)
            if lam.size == 0 or np.min(lam) >= -tol_mult:
                break
            free[np.flatnonzero(~free)[np.argmin(lam)]] = True
            continue
        neg = p < 0.0
        alpha = 1.0
        block = -1
        if np.any(neg):
            ratios = -w[idx][neg] / p[neg]
            j = int(np.argmin(ratios))
            if ratios[j] < 1.0:
                alpha = float(ratios[j])
                block = int(idx[np.flatnonzero(neg)[j]])
        w[idx] += alpha * p
        if block >= 0:
            w[block] = 0.0
            free[block] = False
    np.maximum(w, 0.0, out=w)
    return w / np.sum(w)
