"""The multilevel estimate of a QoI and the allocation of runs across levels (issue 16).

Levels ``l = 0..L`` are fidelities of the solver (a cheap model on every chain row may be
level 0), each costlier and closer to the truth than the one below. The finest level's
expectation is the telescoping sum (Giles 2008, Section 2, where the method is set out; Giles
2015 reviews it). The citations are from memory and name sections only: the papers'
equation numbers were not recalled reliably and are not checked, so the ``Eq. (n)`` tags
below number this module's equations, not the papers'.

    E[Q_L] = E[Q_0] + sum_{l=1}^{L} E[Q_l - Q_{l-1}],                            # Eq. (1)

and each term is estimated from its own weighted points: level ``l`` holds ``m_l`` points
``x_i`` with weights ``w_i`` (non-negative, normalised) and the correction
``Y_l(x_i) = Q_l(x_i) - Q_{l-1}(x_i)`` (``Y_0 = Q_0``) at them, so

    estimate = sum_l  sum_i w_i Y_l(x_i).                                        # Eq. (2)

Per level the spread of ``Y_l`` is the weighted variance ``V_l`` (:func:`weighted_mean_sd`)
and its effective number of points is Kish's ``N_l = (sum w)^2 / sum w^2`` (:func:`kish_ess`),
as the project's other weighted estimates use them; the level's standard error is
``sqrt(V_l / N_l)``. Levels on separate points are independent and the combined standard error
is ``sqrt(sum_l V_l / N_l)`` (Giles 2008, Section 2). Levels that share points (the nested
pairing, or a cheap level 0 on the whole chain) are not: for levels ``k < l`` sharing points
``S`` the covariance of their means is ``sum_{i in S} w_i^k w_i^l Cov(Y_k, Y_l)`` under the
same model of the points as draws, and ``2 x`` that is added (with ``Cov`` the weighted
covariance on the shared points, :func:`_shared_covariance`). The independent form is kept
alongside (``se_independent``).

The allocation: with ``v_l`` the variance one run adds at level ``l`` and ``C_l`` the cost of
one sample of its correction, minimising ``sum_l v_l / N_l`` at total cost
``B = sum_l N_l C_l`` (or the cost at variance ``eps^2``) by a Lagrange multiplier gives
``N_l`` proportional to ``sqrt(v_l / C_l)`` (Giles 2008, Section 2; Giles 2015):

    N_l = eps^-2 sqrt(v_l / C_l) sum_k sqrt(v_k C_k)      for variance eps^2,    # Eq. (3)
    N_l = B sqrt(v_l / C_l) / sum_k sqrt(v_k C_k)         for cost B.            # Eq. (4)

Adapted to weighted points: ``v_l = V_l m_l / N_l`` keeps each level's design effect
``m_l / N_l`` (Kish 1965) as it is when runs are added, so ``V_l / N_l`` becomes
``v_l / m_l'`` with ``m_l'`` runs. The shared-point covariances are left out of the
allocation (the published rule assumes independent levels). The target is the standard error
alone: Giles (2008) gives half the mean square error to the variance and half to the finest
level's bias, which the runs here cannot estimate.

References
----------
.. [1] Giles, M. B. (2008). Multilevel Monte Carlo path simulation. Operations Research
   56(3), 607-617.
.. [2] Giles, M. B. (2015). Multilevel Monte Carlo methods. Acta Numerica 24, 259-328.
.. [3] Giles, M. B. (2013). Multilevel Monte Carlo methods. In Monte Carlo and Quasi-Monte
   Carlo Methods 2012, Springer; arXiv:1304.5472. Section 1.1, "Control variates and
   two-level MLMC": two levels are a control variate with coefficient one.
.. [4] Kish, L. (1965). Survey Sampling. Wiley, New York.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from statistics import NormalDist
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from winnow.tasks.errors import InputError

from ._weighted import kish_ess, weighted_mean_sd

__all__ = [
    "Allocation",
    "LevelContribution",
    "LevelValues",
    "MultilevelEstimate",
    "correction_costs",
    "more_runs",
    "multilevel_estimate",
    "optimal_allocation",
]


# --------------------------------------------------------------------------------------------
# validation helpers
# --------------------------------------------------------------------------------------------
def _validate_positive(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float | np.number):
        raise InputError(f"{name}: expected a positive number, got {value!r}")
    v = float(value)
    if not (math.isfinite(v) and v > 0):
        raise InputError(f"{name}: expected a positive finite number, got {value!r}")
    return v


def _validate_vector(name: str, values: npt.ArrayLike, size: int | None = None) -> np.ndarray:
    a = np.asarray(values, dtype=np.float64)
    if a.ndim != 1 or a.size == 0 or (size is not None and a.size != size):
        want = "(L,)" if size is None else f"({size},)"
        raise InputError(f"{name}: expected shape {want}, got {a.shape}")
    if not np.all(np.isfinite(a)):
        raise InputError(f"{name}: expected finite values, got {a.tolist()}")
    return a


def _validate_int(name: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < low:
        raise InputError(f"{name}: expected an integer >= {low}, got {value!r}")
    return int(value)


def _level_arrays(
    where: str,
    indices: npt.ArrayLike,
    weights: npt.ArrayLike,
    fine: npt.ArrayLike,
    coarse: npt.ArrayLike | None,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """The checked arrays of one level (weights normalised to sum to one)."""
    idx = np.asarray(indices)
    if idx.ndim != 1 or idx.size == 0 or not np.issubdtype(idx.dtype, np.integer):
        raise InputError(f"{where}.indices: expected non-empty 1-D integers, got {idx!r}")
    if np.unique(idx).size != idx.size:
        raise InputError(f"{where}.indices: expected distinct chain rows, some repeat")
    m = idx.size
    w = np.asarray(weights, dtype=np.float64)
    if w.shape != (m,) or not np.all(np.isfinite(w)) or np.any(w < 0) or not w.sum() > 0:
        raise InputError(
            f"{where}.weights: expected {m} finite non-negative values with a positive sum, "
            f"got shape {w.shape}"
        )
    out = []
    for name, v in (("fine", fine), ("coarse", coarse)):
        if v is None:
            out.append(None)
            continue
        a = np.asarray(v, dtype=np.float64)
        if a.ndim < 1 or a.shape[0] != m:
            raise InputError(f"{where}.{name}: expected shape ({m}, ...), got {a.shape}")
        bad = np.flatnonzero(~np.all(np.isfinite(a.reshape(m, -1)), axis=1))
        if bad.size:
            raise InputError(
                f"{where}.{name}: expected finite values, non-finite at positions "
                f"{bad[:10].tolist()} (rerun or replace those points, or leave them out)"
            )
        out.append(a)
    if out[1] is not None and out[1].shape != out[0].shape:
        raise InputError(
            f"{where}.coarse: expected the shape of fine {out[0].shape}, got {out[1].shape}"
        )
    return idx.astype(np.int64), w / w.sum(), out[0], out[1]


# --------------------------------------------------------------------------------------------
# records
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class LevelValues:
    """The values one level contributes, at its weighted points.

    Attributes
    ----------
    name : str
        Level name.
    indices : ndarray of int64, shape (m,)
        Chain row of each point (points of different levels with the same row are shared).
    weights : ndarray of float64, shape (m,)
        Non-negative; normalised to sum to one on construction.
    fine : ndarray, shape (m, ...)
        ``Q_l`` at the points.
    coarse : ndarray, shape (m, ...), or None
        ``Q_{l-1}`` at the same points; None for level 0.
    cost : float
        Cost of one run at this level (NaN when unknown); shown, and used by the allocation.
    ess : float or None
        Effective number of the points when it is not Kish's of the weights (e.g. the chain
        ESS for a cheap level 0 on an autocorrelated chain).
    """

    name: str
    indices: np.ndarray
    weights: np.ndarray
    fine: np.ndarray
    coarse: np.ndarray | None = None
    cost: float = float("nan")
    ess: float | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise InputError(f"name: expected a non-empty str, got {self.name!r}")
        where = f"levels[{self.name}]"
        idx, w, fine, coarse = _level_arrays(
            where, self.indices, self.weights, self.fine, self.coarse
        )
        for attr, value in (("indices", idx), ("weights", w), ("fine", fine), ("coarse", coarse)):
            object.__setattr__(self, attr, value)
        if self.ess is not None:
            object.__setattr__(self, "ess", _validate_positive(f"{where}.ess", self.ess))
        cost = float(self.cost)
        if not (math.isnan(cost) or (math.isfinite(cost) and cost > 0)):
            raise InputError(f"{where}.cost: expected a positive number or NaN, got {self.cost!r}")
        object.__setattr__(self, "cost", cost)

    @property
    def correction(self) -> np.ndarray:
        """``Y_l = Q_l - Q_{l-1}`` at the points (``Q_0`` for level 0), shape (m, ...)."""
        return self.fine if self.coarse is None else self.fine - self.coarse

    @property
    def m(self) -> int:
        return int(self.indices.size)


@dataclass(frozen=True, eq=False)
class LevelContribution:
    """One term of the telescoping sum with its uncertainty.

    ``mean`` is ``sum_i w_i Y_l(x_i)``; ``sd`` the weighted sd of ``Y_l``; ``ess`` Kish's
    effective number of the weights (or the one given); ``variance_of_mean = sd^2 / ess``;
    ``se`` its square root; ``variance_per_run = sd^2 m / ess`` (what one more run adds, the
    design effect kept); ``cost`` of one run. Arrays have the QoI's shape.
    """

    name: str
    level: int
    mean: np.ndarray
    sd: np.ndarray
    ess: float
    variance_of_mean: np.ndarray
    se: np.ndarray
    variance_per_run: np.ndarray
    n_points: int
    cost: float


@dataclass(frozen=True, eq=False)
class MultilevelEstimate:
    """The multilevel estimate of ``E[Q_L]`` (Eq. (1)-(2)) and its standard error.

    Attributes
    ----------
    mean : ndarray, shape (...)
        Sum of the levels' weighted mean corrections.
    se : ndarray, shape (...)
        ``sqrt(sum_l V_l / N_l + 2 sum_{k<l} Cov_kl)``: the shared-point covariances included.
    se_independent : ndarray, shape (...)
        ``sqrt(sum_l V_l / N_l)``, the published form for independent levels.
    covariance : ndarray, shape (...)
        ``2 sum_{k<l} Cov_kl``, the shared points' part of the variance (0 when none share).
    levels : tuple of LevelContribution
        Coarse to fine.
    values : tuple of LevelValues
        What the estimate was made from (kept for :meth:`with_level`).
    """

    mean: np.ndarray
    se: np.ndarray
    se_independent: np.ndarray
    covariance: np.ndarray
    levels: tuple[LevelContribution, ...]
    values: tuple[LevelValues, ...] = field(repr=False)

    def interval(self, level: float = 0.9) -> tuple[np.ndarray, np.ndarray]:
        """Normal interval ``mean -/+ z se`` of probability ``level`` (two-sided)."""
        if not isinstance(level, float | int) or not 0.0 < float(level) < 1.0:
            raise InputError(f"level: expected a probability in (0, 1), got {level!r}")
        z = NormalDist().inv_cdf(0.5 + float(level) / 2.0)
        return self.mean - z * self.se, self.mean + z * self.se

    def with_level(self, k: int, values: LevelValues) -> MultilevelEstimate:
        """The estimate with level ``k``'s values replaced (rerun or extended points), the
        other levels' contributions reused; equal to recomputing from all the values."""
        k = _validate_int("k", k, 0)
        if k >= len(self.values):
            raise InputError(f"k: expected a level 0..{len(self.values) - 1}, got {k}")
        if not isinstance(values, LevelValues):
            raise InputError(f"values: expected LevelValues, got {type(values).__name__}")
        _check_level_shape(values, k, self.values)
        new_values = self.values[:k] + (values,) + self.values[k + 1 :]
        contributions = list(self.levels)
        contributions[k] = _contribution(values, k)
        return _combine(tuple(contributions), new_values)


# --------------------------------------------------------------------------------------------
# the estimate
# --------------------------------------------------------------------------------------------
def _check_level_shape(v: LevelValues, k: int, others: Sequence[LevelValues]) -> None:
    if (v.coarse is None) != (k == 0):
        need = "no coarse values (Q_0 alone)" if k == 0 else "coarse values Q_{l-1}"
        raise InputError(f"levels[{v.name}].coarse: level {k} needs {need}")
    shapes = {o.fine.shape[1:] for o in others}
    if others and v.fine.shape[1:] not in shapes:
        raise InputError(
            f"levels[{v.name}].fine: expected the QoI shape {sorted(shapes)[0]}, got "
            f"{v.fine.shape[1:]}"
        )


def _contribution(v: LevelValues, k: int) -> LevelContribution:
    mean, sd = weighted_mean_sd(v.correction, v.weights)
    ess = kish_ess(v.weights) if v.ess is None else float(v.ess)
    var = sd**2 / ess  # V_l / N_l
    return LevelContribution(
        name=v.name,
        level=k,
        mean=mean,
        sd=sd,
        ess=ess,
        variance_of_mean=var,
        se=np.sqrt(var),
        variance_per_run=var * v.m,  # V_l m_l / N_l
        n_points=v.m,
        cost=v.cost,
    )


def _shared_covariance(a: LevelValues, b: LevelValues) -> np.ndarray:
    """``Cov(mean_a, mean_b) = sum_{shared i} w_i^a w_i^b Cov(Y_a, Y_b)``.

    ``Cov(Y_a, Y_b)`` is the weighted covariance on the shared points, weighted by the mean
    of the two levels' weights there (each renormalised on the shared points): with the same
    points and weights it is the weighted covariance those levels' variances use, so levels
    that share everything give exactly the standard error of one level of ``Q_L``.
    """
    shape = a.fine.shape[1:]
    _, ia, ib = np.intersect1d(a.indices, b.indices, assume_unique=True, return_indices=True)
    wa, wb = a.weights[ia], b.weights[ib]
    if ia.size < 2 or not (wa.sum() > 0 and wb.sum() > 0):
        return np.zeros(shape)  # no pair of shared points to see a covariance in
    u = wa / wa.sum() + wb / wb.sum()
    ub = (u / u.sum()).reshape((-1,) + (1,) * len(shape))
    ya, yb = a.correction[ia], b.correction[ib]
    ca = ya - np.sum(ub * ya, axis=0)
    cb = yb - np.sum(ub * yb, axis=0)
    cov = np.sum(ub * ca * cb, axis=0)
    return np.asarray(float(np.sum(wa * wb)) * cov)


def _combine(
    contributions: tuple[LevelContribution, ...], values: tuple[LevelValues, ...]
) -> MultilevelEstimate:
    mean = np.sum([c.mean for c in contributions], axis=0)  # Eq. (2)
    var_ind = np.sum([c.variance_of_mean for c in contributions], axis=0)
    cov = np.zeros_like(var_ind)
    for k in range(len(values)):
        for j in range(k + 1, len(values)):
            cov = cov + 2.0 * _shared_covariance(values[k], values[j])
    # a plug-in covariance from few shared points can exceed what the variances allow; the
    # total is never below zero
    total = np.maximum(var_ind + cov, 0.0)
    return MultilevelEstimate(
        mean=np.asarray(mean),
        se=np.sqrt(total),
        se_independent=np.sqrt(var_ind),
        covariance=np.asarray(cov),
        levels=contributions,
        values=values,
    )


def multilevel_estimate(levels: Sequence[LevelValues]) -> MultilevelEstimate:
    """The telescoping estimate of ``E[Q_L]`` from the levels' weighted values.

    Parameters
    ----------
    levels : sequence of LevelValues, length L + 1 >= 1
        Coarse to fine. Level 0 carries ``Q_0`` alone; level ``l >= 1`` carries ``Q_l`` and
        ``Q_{l-1}`` at its own points (with the nested pairing, ``Q_{l-1}`` there is the
        coarser level's run at the same chain row).

    Returns
    -------
    MultilevelEstimate
        Mean, standard error (shared points' covariances included), the independent-levels
        standard error and each level's contribution.

    Notes
    -----
    With a cheap model as level 0 on every chain row (weights ``1/n``) and the costly solver
    as level 1 on the chosen points, the estimate is the discrepancy form of the
    multi-fidelity estimate of :func:`estimate_qoi` (``control_variate["mean"]``).
    """
    levels = tuple(levels)
    if not levels:
        raise InputError("levels: expected at least one level, got none")
    for k, v in enumerate(levels):
        if not isinstance(v, LevelValues):
            raise InputError(f"levels[{k}]: expected LevelValues, got {type(v).__name__}")
        _check_level_shape(v, k, levels[:k])
    names = [v.name for v in levels]
    if len(set(names)) != len(names):
        raise InputError(f"levels: expected distinct names, got {names}")
    contributions = tuple(_contribution(v, k) for k, v in enumerate(levels))
    return _combine(contributions, levels)


# --------------------------------------------------------------------------------------------
# the allocation
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Allocation:
    """Runs per level, coarse to fine.

    ``runs`` are whole runs (``>= minimum``), ``exact`` the real-valued optimum before
    rounding, ``extra`` the runs to add to ``current`` (all of ``runs`` for a fresh plan),
    ``cost`` the cost of ``runs`` and ``predicted_se`` the standard error they give under the
    independent-levels model; ``rule`` says how they were found.
    """

    runs: tuple[int, ...]
    exact: tuple[float, ...]
    extra: tuple[int, ...]
    current: tuple[int, ...]
    cost: float
    predicted_se: float
    rule: str


def correction_costs(costs: Sequence[float], pairing: Literal["nested", "disjoint"]) -> np.ndarray:
    """Cost of one sample of each level's correction, from the cost of one run per level.

    Nested: a level-``l`` point already has its ``Q_{l-1}`` run (the coarser level holds the
    same point), so a sample costs ``C_l``. Disjoint: it needs both runs,
    ``C_l + C_{l-1}`` (``C_0`` for level 0).
    """
    c = _validate_vector("costs", costs)
    if np.any(c <= 0):
        raise InputError(f"costs: expected positive values, got {c.tolist()}")
    rules = {"nested": lambda c: c.copy(), "disjoint": lambda c: c + np.r_[0.0, c[:-1]]}
    if pairing not in rules:
        raise InputError(f"pairing: expected one of {sorted(rules)}, got {pairing!r}")
    return rules[pairing](c)


def _plan_inputs(
    variance_per_run: npt.ArrayLike, costs: npt.ArrayLike, minimum: int
) -> tuple[np.ndarray, np.ndarray, int]:
    v = _validate_vector("variance_per_run", variance_per_run)
    c = _validate_vector("costs", costs, v.size)
    if np.any(v < 0):
        raise InputError(f"variance_per_run: expected values >= 0, got {v.tolist()}")
    if np.any(c <= 0):
        raise InputError(f"costs: expected positive values, got {c.tolist()}")
    return v, c, _validate_int("minimum", minimum, 1)


def _finish(
    exact: np.ndarray,
    runs: np.ndarray,
    current: np.ndarray,
    v: np.ndarray,
    c: np.ndarray,
    nested: bool,
    rule: str,
) -> Allocation:
    runs = runs.astype(np.int64)
    if nested:
        # a finer level's points are a subset of the coarser level's: N_{l-1} >= N_l
        for k in range(runs.size - 1, 0, -1):
            runs[k - 1] = max(runs[k - 1], runs[k])
        rule += "; coarser levels raised to the finer level's runs (nested)"
    var = float(np.sum(v / runs))
    return Allocation(
        runs=tuple(int(r) for r in runs),
        exact=tuple(float(e) for e in exact),
        extra=tuple(int(r - n) for r, n in zip(runs, current, strict=True)),
        current=tuple(int(n) for n in current),
        cost=float(np.sum(runs * c)),
        predicted_se=math.sqrt(var),
        rule=rule,
    )


def optimal_allocation(
    variance_per_run: npt.ArrayLike,
    costs: npt.ArrayLike,
    *,
    target_se: float | None = None,
    cost_budget: float | None = None,
    minimum: int = 2,
    nested: bool = False,
) -> Allocation:
    """Runs per level minimising the cost for a standard error, or the error for a cost.

    Parameters
    ----------
    variance_per_run : array_like, shape (L + 1,)
        ``v_l``: the variance of a level's mean times its runs
        (:attr:`LevelContribution.variance_per_run`, one QoI component).
    costs : array_like, shape (L + 1,)
        ``C_l``: cost of one sample of the level's correction (:func:`correction_costs`).
    target_se : float, optional
        ``eps``: Eq. (3), rounded up so the target is met.
    cost_budget : float, optional
        ``B``: Eq. (4), rounded down so the budget holds (unless ``minimum`` forces more).
    minimum : int
        Fewest runs of a level (2: a level's variance needs two).
    nested : bool
        Raise coarser levels to at least the next finer level's runs.

    Returns
    -------
    Allocation

    References
    ----------
    Giles (2008), Section 2; Giles (2015).
    """
    v, c, minimum = _plan_inputs(variance_per_run, costs, minimum)
    if (target_se is None) == (cost_budget is None):
        raise InputError("target_se and cost_budget: give exactly one")
    total = float(np.sum(np.sqrt(v * c)))
    ratio = np.sqrt(v / c)
    if target_se is not None:
        eps = _validate_positive("target_se", target_se)
        exact = ratio * total / eps**2  # Eq. (3)
        runs = np.maximum(np.ceil(exact - 1e-9 * np.maximum(exact, 1.0)), minimum)
        rule = f"Giles (2008) optimum for standard error {eps:g}, rounded up"
    else:
        budget = _validate_positive("cost_budget", cost_budget)
        exact = budget * ratio / total if total > 0 else np.full(v.size, budget / c.sum())
        runs = np.maximum(np.floor(exact + 1e-9 * np.maximum(exact, 1.0)), minimum)  # Eq. (4)
        rule = f"Giles (2008) optimum for cost {budget:g}, rounded down"
    rule += f", at least {minimum} per level"
    return _finish(exact, runs, np.zeros(v.size, np.int64), v, c, nested, rule)


def more_runs(
    current: Sequence[int],
    variance_per_run: npt.ArrayLike,
    costs: npt.ArrayLike,
    target_se: float,
    *,
    minimum: int = 2,
    nested: bool = False,
) -> Allocation:
    """How many more runs per level reach ``target_se`` at least cost, keeping the runs made.

    Minimises ``sum_l C_l N_l`` subject to ``sum_l v_l / N_l <= eps^2`` and ``N_l >= n_l``
    (the runs already made). The KKT conditions give ``N_l = max(n_l, sqrt(lambda v_l / C_l))``
    with one multiplier ``lambda``: where Eq. (3)'s optimum is below ``n_l`` a level keeps its
    runs and the others share what is left of ``eps^2``. The constraint is decreasing in
    ``lambda`` and of the form ``A + B / sqrt(lambda)`` between the levels' break points
    ``lambda_l = n_l^2 C_l / v_l``, so ``lambda`` is found exactly on the right piece. The
    result is rounded up.

    Parameters
    ----------
    current : sequence of int, length L + 1
        Runs made per level (each >= 1).
    variance_per_run, costs, target_se, minimum, nested
        As for :func:`optimal_allocation`.

    Returns
    -------
    Allocation
        ``extra`` is the answer (zeros when ``target_se`` is already reached).
    """
    v, c, minimum = _plan_inputs(variance_per_run, costs, minimum)
    eps = _validate_positive("target_se", target_se)
    if len(current) != v.size:
        raise InputError(f"current: expected {v.size} run counts, got {len(current)}")
    n = np.array([_validate_int(f"current[{k}]", x, 1) for k, x in enumerate(current)], float)
    eps2 = eps**2
    with np.errstate(divide="ignore"):
        brk = np.where(v > 0, n**2 * c / np.where(v > 0, v, 1.0), np.inf)  # lambda_l

    def constraint(lam: float) -> float:
        return float(np.sum(v / np.maximum(n, np.sqrt(lam * v / c))))

    lam = 0.0
    if constraint(0.0) > eps2:
        order = np.sort(np.unique(brk[np.isfinite(brk)]))
        lo = 0.0
        for hi in [*order.tolist(), math.inf]:
            if hi == math.inf or constraint(hi) <= eps2:
                free = brk <= lo  # levels above their runs on (lo, hi)
                a = float(np.sum(v[~free] / n[~free]))
                b = float(np.sum(np.sqrt(v[free] * c[free])))
                lam = (b / (eps2 - a)) ** 2 if b > 0 else hi  # A + B / sqrt(lambda) = eps^2
                break
            lo = hi
    exact = np.maximum(n, np.sqrt(lam * v / c))
    runs = np.maximum(np.ceil(exact - 1e-9 * np.maximum(exact, 1.0)), np.maximum(n, minimum))
    rule = (
        f"least cost for standard error {eps:g} keeping the runs made (Giles 2008 optimum "
        f"with N_l >= n_l), rounded up, at least {minimum} per level"
    )
    return _finish(exact, runs, n.astype(np.int64), v, c, nested, rule)
