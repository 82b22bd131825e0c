"""Plain data objects passed between the stages (sample -> thin -> dispatch -> collect -> store).

These are the only types the stages share. A stage takes some of them in, returns one out,
and never reaches into another stage's private modules. The run store
(:mod:`winnow.tasks.store`) knows how to write and read each of them.

All arrays are ``numpy.ndarray``; parameter values are always in the user's units.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import numpy as np

__all__ = [
    "Progress",
    "RUN_STATES",
    "Attempt",
    "Chain",
    "Diagnostics",
    "ParameterDiagnostics",
    "QoIEstimate",
    "QoIValue",
    "RunOutcome",
    "RunSpec",
    "RunState",
    "Selection",
]

#: ``progress(done, total, step)``: a stage reports its long steps through this callback.
Progress = Callable[[int, int, str], None]


# --------------------------------------------------------------------------------------------
# sample stage
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class ParameterDiagnostics:
    """Convergence diagnostics of one parameter (Vehtari et al. 2021 definitions)."""

    rhat: float
    ess_bulk: float
    ess_tail: float
    mcse_mean: float
    mcse_q05: float
    mcse_q95: float
    mean: float
    sd: float


@dataclass(frozen=True)
class Diagnostics:
    """Diagnostics of a whole (possibly multi-chain) sample.

    Attributes
    ----------
    parameters : dict of str to ParameterDiagnostics
        Per-parameter diagnostics, keyed by parameter name.
    n_chains, n_draws : int
        Chains and draws per chain after burn-in removal.
    burn_in : int
        Draws removed from the start of every chain, and ``burn_in_rule`` says why.
    acceptance : ndarray, shape (n_chains,)
        Acceptance rate of each chain (NaN for an imported chain without that information).
    passed : bool
        True when every threshold held.
    messages : tuple of str
        One line per failed threshold, naming the parameter, the value and the threshold.
    details : dict
        Run facts worth keeping: sampler, model evaluations, evaluations where the model
        gave non-finite output (taken as log density -inf), thinning, wall time.
    """

    parameters: dict[str, ParameterDiagnostics]
    n_chains: int
    n_draws: int
    burn_in: int
    burn_in_rule: str
    acceptance: np.ndarray
    thresholds: dict[str, float]
    passed: bool
    messages: tuple[str, ...] = ()
    details: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Chain:
    """A posterior sample, flattened to rows.

    Attributes
    ----------
    samples : ndarray, shape (n, d)
        Rows in the user's units, float64.
    names, units : tuple of str, length d
        Parameter names and units.
    chain_index, draw_index : ndarray of int64, shape (n,)
        Which chain each row came from and its draw number within that chain (after burn-in).
    log_density : ndarray, shape (n,), or None
        Unnormalised log posterior of each row when the sampler knows it.
    source : str
        ``"sampled:<sampler name>"`` or ``"imported:<file path>"``.
    diagnostics : Diagnostics or None
    """

    samples: np.ndarray
    names: tuple[str, ...]
    units: tuple[str, ...]
    chain_index: np.ndarray
    draw_index: np.ndarray
    log_density: np.ndarray | None = None
    source: str = ""
    diagnostics: Diagnostics | None = None

    @property
    def n(self) -> int:
        return int(self.samples.shape[0])

    @property
    def d(self) -> int:
        return int(self.samples.shape[1])


# --------------------------------------------------------------------------------------------
# thin stage
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Selection:
    """A weighted subset of chain rows chosen to minimise MMD to the whole chain.

    Attributes
    ----------
    indices : ndarray of int64, shape (m,)
        Row indices into the chain's rows *as given* (before any dedup or filtering).
    weights : ndarray of float64, shape (m,)
        Non-negative, summing to one.
    points : ndarray, shape (m, d)
        The chosen rows in the user's units (``chain.samples[indices]``).
    method : str
        Selector name (a key of ``winnow.tasks.thin.SELECTORS``).
    weights_rule : str
        ``simplex`` (optimal MMD weights) or ``uniform``.
    kernel : str
        Kernel name; ``bandwidth`` is in standardised coordinates.
    feature_map : str
        A key of ``winnow.tasks.thin.FEATURE_MAPS``; ``n_features`` is the number of
        features used.
    seed : int or None
        Seed the selection was made with (None when a Generator was passed).
    mmd_features : float
        MMD estimate in feature space between the weighted points and the whole chain.
    mmd_exact : float
        Exact-kernel MMD; ``mmd_exact_rows`` says how many chain rows it used.
    report : dict
        Everything else worth keeping: rows dropped as non-finite, distinct rows, the
        automatic feature-count history, timings.
    population : list of (ndarray, float), or None
        For the genetic selector: near-optimal index sets and their MMDs.
    """

    indices: np.ndarray
    weights: np.ndarray
    points: np.ndarray
    method: str
    weights_rule: str
    kernel: str
    bandwidth: float
    feature_map: str
    n_features: int
    seed: int | None
    mmd_features: float
    mmd_exact: float
    mmd_exact_rows: int
    report: dict[str, Any] = field(default_factory=dict)
    population: list[tuple[np.ndarray, float]] | None = None

    @property
    def m(self) -> int:
        return int(self.indices.shape[0])


# --------------------------------------------------------------------------------------------
# dispatch stage
# --------------------------------------------------------------------------------------------
RunState = Literal["succeeded", "failed", "timed_out", "output_missing", "not_run"]
RUN_STATES: tuple[str, ...] = ("succeeded", "failed", "timed_out", "output_missing", "not_run")


@dataclass(frozen=True)
class RunSpec:
    """One solver run, fully determined before it starts.

    Attributes
    ----------
    run_id : str
        Stable id of the point, used as the run folder name.
    point_index : int
        Row index into the chain (``Selection.indices[k]``).
    params : dict of str to float
        Parameter values in the user's units.
    weight : float
        The point's weight in the selection.
    run_dir : Path
        The run folder (absolute).
    argv : tuple of str
        The solver command with placeholders already filled in.
    deck_hashes : dict of str to str
        SHA-256 of each rendered deck, keyed by its path relative to ``run_dir``.
    key : str
        SHA-256 over the deck hashes and ``argv``: two runs with the same key give the same
        result, so a success under this key is reused instead of run again.
    """

    run_id: str
    point_index: int
    params: dict[str, float]
    weight: float
    run_dir: Path
    argv: tuple[str, ...]
    deck_hashes: dict[str, str]
    key: str


@dataclass(frozen=True)
class Attempt:
    """One try of a run: the command, how it ended and the tails of its output."""

    number: int
    argv: tuple[str, ...]
    started: float  # Unix time, seconds
    ended: float
    exit_status: int | None  # None when killed on timeout or never started
    timed_out: bool
    stdout_tail: str
    stderr_tail: str
    error: str = ""  # why it could not start, if it could not


@dataclass(frozen=True)
class RunOutcome:
    """How a run ended after all its attempts.

    ``state`` is one of :data:`RUN_STATES`. ``reused_from`` names the store revision whose
    success with the same key was reused instead of running again (empty when it ran).
    """

    run_id: str
    key: str
    state: RunState
    attempts: tuple[Attempt, ...]
    run_dir: Path
    output_hashes: dict[str, str] = field(default_factory=dict)
    message: str = ""
    reused_from: str = ""

    @property
    def seconds(self) -> float:
        return float(sum(a.ended - a.started for a in self.attempts))


# --------------------------------------------------------------------------------------------
# collect stage
# --------------------------------------------------------------------------------------------
QoIStatus = Literal["ok", "missing", "unparsable", "nonfinite", "run_failed"]


@dataclass(frozen=True)
class QoIValue:
    """A quantity of interest read from one run's output.

    ``value`` is a float64 array (shape () for a scalar QoI, (k,) for a vector QoI on a shared
    axis). When ``status`` is not ``"ok"`` the value is NaN-filled and ``reason`` says why.
    """

    run_id: str
    name: str
    value: np.ndarray
    status: QoIStatus
    reason: str = ""


@dataclass(frozen=True)
class QoIEstimate:
    """Weighted estimate of one QoI with its uncertainty broken down by source.

    Attributes
    ----------
    mean, sd : ndarray
        Weighted posterior-predictive mean and standard deviation (shape of the QoI).
    quantiles : dict of float to ndarray
        Weighted quantiles, keyed by probability.
    exceedance : dict of float to ndarray
        Weighted probability that the QoI exceeds each threshold.
    uncertainty : dict of str to ndarray
        Standard errors by labelled source: ``thinning_se`` (the error model's, against the
        chain mean), ``chain_mcse`` (the chain's Monte Carlo error) and ``total_se`` (both, for
        the posterior expectation).
    control_variate : dict or None
        The multi-fidelity estimate: ``mean``, ``se``, ``correlation``.
    n_used, n_missing : int
        Runs that contributed, runs left out.
    weights_resolved : bool
        True when weights were re-solved for surviving points; ``mmd_growth`` says by how much
        the discrepancy grew.
    headline : dict or None
        The one answer to report: ``estimate`` and the interval ``interval_low`` /
        ``interval_high`` at ``level`` for the posterior expectation (``chain_mean_low`` /
        ``chain_mean_high`` for the chain mean), the estimator ``rule``, the error model's
        ``flags`` and ``reliable``, per-component details (``components``), ``assumptions``
        and the ``forecast`` of the error with more points. None when no chain was given.
    """

    name: str
    units: str
    mean: np.ndarray
    sd: np.ndarray
    quantiles: dict[float, np.ndarray]
    exceedance: dict[float, np.ndarray]
    uncertainty: dict[str, np.ndarray]
    control_variate: dict[str, Any] | None
    n_used: int
    n_missing: int
    weights_resolved: bool = False
    mmd_growth: float = 0.0
    details: dict[str, Any] = field(default_factory=dict)
    headline: dict[str, Any] | None = None


def as_float_array(x: Any) -> np.ndarray:
    """Return ``x`` as a float64 array (used by stages when filling records)."""
    return np.asarray(x, dtype=np.float64)


PathLike = str | Path
