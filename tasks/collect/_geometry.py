"""The chain as the error model sees it (:class:`ChainGeometry`): standardised rows, the
covariance kernels of the process and the kernel mean embedding of the chain.

References
----------
.. [1] Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine
   Learning. MIT Press.
.. [2] Briol, F.-X., Oates, C. J., Girolami, M., Osborne, M. A. and Sejdinovic, D. (2019).
   Probabilistic integration: a role in statistical computation? Statistical Science 34(1),
   1-22.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

__all__ = ["ERROR_KERNELS", "ChainGeometry", "ErrorKernelName", "kernel_mean_gaussian"]

ErrorKernelName = Literal["gaussian", "matern52"]


def _k_gaussian(r2: np.ndarray) -> np.ndarray:
    return np.exp(-0.5 * r2)


def _k_matern52(r2: np.ndarray) -> np.ndarray:
    r = np.sqrt(np.maximum(r2, 0.0))
    s5 = np.sqrt(5.0) * r
    return (1.0 + s5 + (5.0 / 3.0) * r2) * np.exp(-s5)  # [1] eq. (4.17), nu = 5/2


ERROR_KERNELS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "gaussian": _k_gaussian,
    "matern52": _k_matern52,
}


def _validate_kernel(kernel: str) -> Callable[[np.ndarray], np.ndarray]:
    try:
        return ERROR_KERNELS[kernel]
    except (KeyError, TypeError):
        raise ValueError(
            f"kernel: expected one of {sorted(ERROR_KERNELS)}, got {kernel!r}"
        ) from None


def _sqdist(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    d = (a * a).sum(1)[:, None] + (b * b).sum(1)[None, :] - 2.0 * (a @ b.T)
    return np.maximum(d, 0.0)


def _spectral_draw(kernel: str, gen: np.random.Generator, count: int, d: int) -> np.ndarray:
    """Frequencies for unit length scale, ``k(r) = E cos(omega . r)`` (Bochner's theorem).

    Gaussian: ``omega ~ N(0, I)``. Matern 5/2: ``omega`` is multivariate Student t with
    ``2 nu = 5`` degrees of freedom and scale ``sqrt(2 nu) / (sqrt(2 nu)) = 1`` for the
    parametrisation of [1]_ eq. (4.14)-(4.15) (Rahimi & Recht 2007 for the features).
    """
    g = gen.standard_normal((count, d))
    if kernel == "matern52":
        g = g * np.sqrt(5.0 / gen.chisquare(5.0, size=(count, 1)))
    return g


class ChainGeometry:
    """The chain as the error model sees it: standardised rows and its kernel mean embedding.

    The error of a weighted rule is measured against the *whole* chain. The double sum
    ``P_n P_n k`` and the kernel means ``P_n k(x, .)`` are computed over every row: exactly
    when ``n <= exact_max_rows`` (an ``n x n`` sum in blocks), otherwise with random Fourier
    features of the error kernel over every row. On the feature path the squared MMD is a
    squared norm in feature space, so it stays non-negative and its terms consistent; a
    random subsample of the chain would not do, because its own mean-embedding error (about
    ``1 / sqrt(s)``) exceeds the MMD of well-chosen points. Embeddings are cached per
    (kernel, length), and lengths come from a fixed grid, so a study pays a bounded number
    of passes over the chain.

    Parameters
    ----------
    chain : array_like, shape (n, d)
        Finite chain rows (in the parameters' own units).
    exact_max_rows : int
        Largest chain summed exactly.
    features : int
        Cosine/sine pairs on the feature path.
    rng : int or numpy.random.Generator, optional
        Seed of the feature draws and of the median-distance subsample.
    """

    def __init__(
        self,
        chain: npt.ArrayLike,
        *,
        exact_max_rows: int = 1_000,
        features: int = 512,
        rng: int | np.random.Generator | None = None,
    ) -> None:
        x = np.asarray(chain, dtype=np.float64)
        if x.ndim == 1:
            x = x[:, None]
        if x.ndim != 2 or x.shape[0] < 2:
            raise ValueError(f"chain: expected shape (n, d) with n >= 2, got {x.shape}")
        if not np.all(np.isfinite(x)):
            raise ValueError("chain: expected finite values (drop non-finite rows first)")
        gen = np.random.default_rng(rng)
        self.center = x.mean(axis=0)
        sc = x.std(axis=0)
        self.scale = np.where(sc > 0, sc, 1.0)
        self.n, self.d = x.shape
        self._x = x
        self.exact = self.n <= exact_max_rows
        self.features = int(features)
        self._seed = int(gen.integers(2**62))
        take = gen.choice(self.n, min(self.n, 2000), replace=False)
        zs = self.standardise(x[take])
        iu = np.triu_indices(zs.shape[0], 1)
        med = float(np.sqrt(np.median(_sqdist(zs, zs)[iu]))) if iu[0].size else 1.0
        self.median_distance = med if med > 0 else 1.0
        self._cache: dict[tuple[str, float], Any] = {}

    def standardise(self, x: npt.ArrayLike) -> np.ndarray:
        xa = np.asarray(x, dtype=np.float64)
        if xa.ndim == 1:
            xa = xa[:, None]
        return (xa - self.center) / self.scale

    def rows(self, index: npt.ArrayLike) -> np.ndarray:
        """Standardised chain rows at ``index``."""
        return self.standardise(self._x[np.asarray(index, dtype=np.int64)])

    def _blocks(self, block: int = 8192):
        for s in range(0, self.n, block):
            yield self.standardise(self._x[s : s + block])

    def _phi(self, omega: np.ndarray, z: np.ndarray) -> np.ndarray:
        t = z @ omega.T
        return np.concatenate([np.cos(t), np.sin(t)], axis=1) / np.sqrt(omega.shape[0])

    def _embedding(self, kernel: str, length: float) -> tuple[np.ndarray, Any]:
        key = (kernel, float(length))
        if key not in self._cache:
            if self.exact:
                kern = ERROR_KERNELS[kernel]
                zall = self.standardise(self._x)
                c = sum(float(kern(_sqdist(b, zall) / length**2).sum()) for b in self._blocks(512))
                self._cache[key] = (zall, c / self.n**2)
            else:
                gen = np.random.default_rng(self._seed)
                om = _spectral_draw(kernel, gen, self.features, self.d) / length
                mu = np.zeros(2 * self.features)
                for b in self._blocks():
                    mu += self._phi(om, b).sum(axis=0)
                self._cache[key] = (om, mu / self.n)
        return self._cache[key]

    def sums(
        self, kernel: str, length: float, z: np.ndarray
    ) -> tuple[np.ndarray, np.ndarray, float]:
        """Gram matrix (m, m), kernel means ``P_n k(z_i, .)`` (m,) and ``P_n P_n k``.

        ``z`` are standardised points. All three come from one representation (exact, or the
        same features), so ``v^T G v - 2 v^T mean + C`` is a squared norm for every ``v``.
        """
        emb = self._embedding(kernel, length)
        if self.exact:
            zall, c = emb
            kern = ERROR_KERNELS[kernel]
            G = kern(_sqdist(z, z) / length**2)
            mean = (
                np.concatenate(
                    [
                        kern(_sqdist(z[i : i + 256], zall) / length**2).mean(axis=1)
                        for i in range(0, z.shape[0], 256)
                    ]
                )
                if z.shape[0]
                else np.zeros(0)
            )
            return G, mean, float(c)
        om, mu = emb
        ph = self._phi(om, z)
        return ph @ ph.T, ph @ mu, float(mu @ mu)

    def mmd2(
        self, kernel: str, length: float, nugget: float, z: np.ndarray, v: np.ndarray
    ) -> float:
        """Squared MMD of the signed rule ``sum_i v_i delta_{z_i}`` to the chain (with nugget)."""
        G, mean, c = self.sums(kernel, length, z)
        val = float(v @ G @ v - 2.0 * v @ mean + c) + nugget * float(v @ v)
        return max(val, 0.0)


def kernel_mean_gaussian(x: npt.ArrayLike, length: float) -> np.ndarray:
    """Closed-form ``E k(x, X)`` for the Gaussian kernel and ``X ~ N(0, I_d)``.

    ``E exp(-|x - X|^2 / (2 l^2)) = (l^2 / (l^2 + 1))^(d/2) exp(-|x|^2 / (2 (l^2 + 1)))``,
    the Gaussian integral of a product of Gaussians (listed in [2]_, Table 1). The tests use
    it as the outside reference for the kernel sums.
    """
    xa = np.atleast_2d(np.asarray(x, dtype=np.float64))
    d = xa.shape[1]
    l2 = float(length) ** 2
    return (l2 / (l2 + 1.0)) ** (d / 2) * np.exp(-(xa * xa).sum(1) / (2 * (l2 + 1.0)))
