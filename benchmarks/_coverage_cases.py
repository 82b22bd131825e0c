"""Targets, functions and exact truths for the coverage benchmark (``bench_coverage.py``).

Every target has a known stationary distribution and is sampled as autocorrelated chains
(a latent AR(1) process with coefficient ``phi``, so each chain is stationary from its first
row): the chains look like MCMC output without the cost of running a sampler per seed.
Every function's posterior expectation is computed by a fine tensor-grid quadrature of the
latent two-dimensional Gaussian (trapezoidal rule on [-9, 9]^2, spectrally accurate for
these smooth integrands; the sharp bump is resolved by the grid spacing of 0.009, well below
its width). All values are invented for the benchmark; nothing here is data.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

PHI = 0.9  # latent AR(1) coefficient: integrated autocorrelation time (1+phi)/(1-phi) = 19


def _ar1(gen: np.random.Generator, n_chains: int, n: int, d: int) -> np.ndarray:
    z = np.empty((n_chains, n, d))
    z[:, 0] = gen.standard_normal((n_chains, d))
    eps = gen.standard_normal((n_chains, n, d)) * np.sqrt(1 - PHI**2)
    for t in range(1, n):
        z[:, t] = PHI * z[:, t - 1] + eps[:, t]
    return z


@dataclass(frozen=True)
class Target:
    name: str
    dim: int
    draw: Callable[[np.random.Generator, int, int], np.ndarray]  # -> (chains*n, dim)
    # latent 2-D Gaussian components: list of (weight, map z (k,2) -> the two coordinates the
    # functions read)
    latent: list[tuple[float, Callable[[np.ndarray], np.ndarray]]]
    project: Callable[[np.ndarray], np.ndarray]  # chain rows (k, dim) -> (k, 2)


def _gauss2() -> Target:
    A = np.array([[1.0, 0.0], [1.4, 1.428]])  # sds 1 and 2, correlation 0.7

    def draw(gen, c, n):
        return (_ar1(gen, c, n, 2) @ A.T).reshape(-1, 2)

    return Target("gauss-2d", 2, draw, [(1.0, lambda z: z @ A.T)], lambda x: x)


def _banana() -> Target:
    b = 0.5

    def fwd(z):
        return np.column_stack([z[:, 0], z[:, 1] + b * (z[:, 0] ** 2 - 1.0)])

    def draw(gen, c, n):
        return fwd(_ar1(gen, c, n, 2).reshape(-1, 2))

    return Target("banana-2d", 2, draw, [(1.0, fwd)], lambda x: x)


_MIX = [(0.5, (-2.0, 0.0)), (0.3, (2.0, 0.5)), (0.2, (0.0, 3.0))]
_MIX_SD = 0.6


def _mixture() -> Target:
    weights = np.array([w for w, _ in _MIX])
    means = np.array([mu for _, mu in _MIX])

    def draw(gen, c, n):
        z = _ar1(gen, c, n, 2)
        lab = np.empty((c, n), dtype=int)
        lab[:, 0] = gen.choice(3, size=c, p=weights)
        jump = gen.random((c, n)) < 0.01  # leaves weights stationary: jump to a fresh draw
        fresh = gen.choice(3, size=(c, n), p=weights)
        for t in range(1, n):
            lab[:, t] = np.where(jump[:, t], fresh[:, t], lab[:, t - 1])
        return (means[lab] + _MIX_SD * z).reshape(-1, 2)

    def shifted(mu: tuple[float, float]) -> Callable[[np.ndarray], np.ndarray]:
        return lambda z: np.asarray(mu) + _MIX_SD * z

    latent = [(float(w), shifted(mu)) for w, mu in _MIX]
    return Target("mixture-3", 2, draw, latent, lambda x: x)


def _gauss6() -> Target:
    g = np.random.default_rng(20261203)
    M = g.standard_normal((6, 6))
    cov = M @ M.T / 6 + 0.3 * np.eye(6)
    A = np.linalg.cholesky(cov)
    P = np.zeros((6, 2))
    P[:, 0] = [1, 0.5, 0, 0.3, 0, 0]
    P[:, 1] = [0, 0.2, 1, 0, 0.4, 0.3]
    S = P.T @ cov @ P
    sd = np.sqrt(np.diag(S))
    P = P / sd  # the two read coordinates have unit variance
    S2 = np.linalg.cholesky(P.T @ cov @ P)

    def draw(gen, c, n):
        return (_ar1(gen, c, n, 6) @ A.T).reshape(-1, 6)

    return Target("gauss-6d", 6, draw, [(1.0, lambda z: z @ S2.T)], lambda x: x @ P)


TARGETS: dict[str, Callable[[], Target]] = {
    "gauss-2d": _gauss2,
    "banana-2d": _banana,
    "mixture-3": _mixture,
    "gauss-6d": _gauss6,
}


# functions of the two read coordinates u = (u1, u2)
def cheap(u: np.ndarray) -> np.ndarray:
    return np.sin(0.8 * u[:, 0]) + 0.5 * u[:, 1] + 0.15 * u[:, 0] * u[:, 1]


def _g_indep(u: np.ndarray) -> np.ndarray:
    return 0.6 * np.cos(1.1 * u[:, 1] - 0.3) + 0.4 * np.sin(0.9 * u[:, 0] + 0.5 * u[:, 1])


DISCREPANCIES: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    # smooth: a slowly varying correction (what a finer solver usually adds)
    "smooth": lambda u: 0.3 * np.cos(0.7 * u[:, 0] - 0.4 * u[:, 1]) + 0.1 * u[:, 0],
    # sharp: a narrow localised bump in a region of moderate posterior density
    "sharp": lambda u: 1.5 * np.exp(-((u[:, 0] - 0.6) ** 2 + (u[:, 1] - 0.9) ** 2) / (2 * 0.2**2)),
    # poor: the costly model keeps a fifth of the cheap one plus an unrelated smooth part
    "poor": lambda u: -0.8 * cheap(u) + _g_indep(u),
}


def costly(kind: str) -> Callable[[np.ndarray], np.ndarray]:
    d = DISCREPANCIES[kind]
    return lambda u: cheap(u) + d(u)


def truth(target: Target, f: Callable[[np.ndarray], np.ndarray], grid: int = 2001) -> float:
    """Posterior expectation of ``f(u)`` by the trapezoidal rule over the latent Gaussian."""
    t = np.linspace(-9.0, 9.0, grid)
    h = t[1] - t[0]
    z1, z2 = np.meshgrid(t, t, indexing="ij")
    z = np.column_stack([z1.ravel(), z2.ravel()])
    dens = np.exp(-0.5 * (z * z).sum(1)) / (2 * np.pi) * h * h
    total = 0.0
    for w, fwd in target.latent:
        total += w * float(np.sum(dens * f(fwd(z))))
    return total
