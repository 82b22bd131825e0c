"""The state of one sampler run: its validated settings, the chains now, the kept draws,
and the checkpoints it writes and resumes from (see :mod:`._sampling`, "Checkpoints")."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._diagnostics import burn_in_count
from ._move import Move
from ._priors import PriorSet
from ._samplers import MOVES

__all__ = ["STATE_FORMAT", "RunPlan", "RunState", "plan_run", "restore"]

# /2: pooled adaptive Metropolis state; /3: random numbers drawn in blocks (block_seed)
STATE_FORMAT = "winnow.sample-state/3"


def _validate_int(value: Any, name: str, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name} must be an integer, got {value!r}")
    if value < minimum:
        raise ValueError(f"{name} must be >= {minimum}, got {value}")
    return int(value)


def _rng_to_text(rng: np.random.Generator) -> str:
    return json.dumps(rng.bit_generator.state)


def _rng_from_text(text: str) -> np.random.Generator:
    state = json.loads(text)
    bitgen = getattr(np.random, state["bit_generator"])()
    bitgen.state = state
    return np.random.Generator(bitgen)


@dataclass(frozen=True)
class RunPlan:
    """The validated settings of one run."""

    sampler: str
    move_cls: type[Move]
    n_chains: int
    chains_rule: str
    n_draws: int
    n_burn: int
    rule: str
    thin: int
    n_kept: int
    checkpoint_every: int


def plan_run(
    sampler: str,
    d: int,
    n_chains: int | None,
    n_draws: int,
    burn_in: int | str,
    thin: int,
    checkpoint_every: int,
) -> RunPlan:
    if sampler not in MOVES:
        raise ValueError(f"sampler must be one of {', '.join(MOVES)}, got {sampler!r}")
    move_cls = MOVES[sampler]
    if n_chains is None:
        n_chains = max(4, 2 * d + 2) if move_cls.ensemble else 4
        chains_rule = (
            f"default: max(4, 2 d + 2) = {n_chains} walkers for {d} parameters"
            if move_cls.ensemble
            else "default: 4 chains"
        )
    else:
        n_chains = _validate_int(n_chains, "n_chains", 1)
        chains_rule = "given"
    n_draws = _validate_int(n_draws, "n_draws", 8)
    thin = _validate_int(thin, "thin", 1)
    checkpoint_every = _validate_int(checkpoint_every, "checkpoint_every", 1)
    if move_cls.ensemble and n_chains < max(4, 2 * d):
        raise ValueError(
            f"sampler {sampler!r} needs n_chains >= max(4, 2 d) = {max(4, 2 * d)} walkers "
            f"for {d} parameters, got {n_chains}; in a study config set sample.chains to at "
            f"least {max(4, 2 * d)} ({2 * d + 2} recommended), or leave n_chains out here"
        )
    n_burn, rule = burn_in_count(n_draws, burn_in)
    n_kept = len(range(n_burn, n_draws, thin))
    if n_kept < 4:
        raise ValueError(
            f"only {n_kept} draws per chain would be kept (n_draws={n_draws}, burn-in "
            f"{n_burn}, thin={thin}); at least 4 are needed"
        )
    if thin > 1:
        rule += f"; then every {thin}th draw kept"
    return RunPlan(
        sampler,
        move_cls,
        n_chains,
        chains_rule,
        n_draws,
        n_burn,
        rule,
        thin,
        n_kept,
        checkpoint_every,
    )


class RunState:
    """The state of a run: the chains now, the kept draws, the counts and generators.

    ``now`` holds ``[u | x | log target | log posterior]`` per chain, so that accepting
    moves is one masked copy per step; ``u``, ``x``, ``lpu``, ``lpx`` are views of it.
    """

    def __init__(self, plan: RunPlan, ps: PriorSet, log_posterior: Any) -> None:
        n, d = plan.n_chains, ps.d
        self.log_posterior = log_posterior
        self.kept = np.empty((n, plan.n_kept, d))
        self.kept_lp = np.empty((n, plan.n_kept))
        self.accepted = np.zeros(n)
        self.last_ap = np.full(n, np.nan)
        self.now = np.empty((n, 2 * d + 2))
        self.u, self.x = self.now[:, :d], self.now[:, d : 2 * d]
        self.lpu, self.lpx = self.now[:, 2 * d], self.now[:, 2 * d + 1]
        self.filled = 0
        self.start = 0
        # The log posterior may have been used before: count this run's evaluations only.
        self.evals0 = -int(getattr(log_posterior, "n_evals", 0))
        self.nonfinite0 = -int(getattr(log_posterior, "n_nonfinite", 0))
        self.gen = np.random.default_rng()
        self.block_seed = 0
        self.settings = {
            "format": STATE_FORMAT,
            "sampler": plan.sampler,
            "n_chains": n,
            "n_draws": plan.n_draws,
            "burn_in": plan.n_burn,
            "thin": plan.thin,
            "names": json.dumps(list(ps.names)),
        }

    def counts(self) -> tuple[int, int]:
        """Model evaluations and non-finite ones of this run (resumed runs included)."""
        f = self.log_posterior
        return (
            self.evals0 + int(getattr(f, "n_evals", 0)),
            self.nonfinite0 + int(getattr(f, "n_nonfinite", 0)),
        )

    def state(self, done: int, move: Move) -> dict[str, Any]:
        """What ``checkpoint`` is given after ``done`` iterations (see the module notes)."""
        n_evals, n_nonfinite = self.counts()
        state: dict[str, Any] = dict(self.settings)
        state.update(
            iteration=done,
            rng=_rng_to_text(self.gen),
            block_seed=self.block_seed,
            u=self.u.copy(),
            lp_u=self.lpu.copy(),
            lp_x=self.lpx.copy(),
            accept_prob=self.last_ap.copy(),
            accepted=self.accepted.copy(),
            draws=self.kept[:, : self.filled].copy(),
            draws_log_density=self.kept_lp[:, : self.filled].copy(),
            n_evals=n_evals,
            n_nonfinite=n_nonfinite,
        )
        state.update({f"move:{k}": v.copy() for k, v in move.state.items()})
        return state


def restore(state: Mapping[str, Any], run: RunState, move: Move) -> None:
    """Check a resume state against this run's settings and load it into ``run``."""
    settings = run.settings
    if not isinstance(state, Mapping):
        raise TypeError(f"resume must be a dict from a checkpoint, got {type(state).__name__}")
    missing = [k for k in (*settings, "iteration", "rng", "u", "lp_u", "lp_x") if k not in state]
    if missing:
        raise ValueError(f"resume: not a sample checkpoint (missing {', '.join(missing)})")
    differ = [
        f"{k}: checkpoint {_plain(state[k])!r} vs now {settings[k]!r}"
        for k in settings
        if _plain(state[k]) != settings[k]
    ]
    if differ:
        raise ValueError(
            "resume: the checkpoint was made with other settings: " + "; ".join(differ)
        )
    if "block_seed" not in state:
        raise ValueError("resume: not a sample checkpoint (missing block_seed)")
    n, d = run.kept.shape[0], run.kept.shape[2]
    u = np.array(state["u"], dtype=np.float64)
    draws = np.asarray(state["draws"], dtype=np.float64)
    if u.shape != (n, d) or draws.ndim != 3 or draws.shape[0] != n or draws.shape[2] != d:
        raise ValueError(
            f"resume: arrays of shape {u.shape} / {draws.shape} do not fit {n} chains of "
            f"{d} parameters"
        )
    for key in move.state:
        if f"move:{key}" not in state:
            raise ValueError(f"resume: the checkpoint lacks the move state {key!r}")
        move.state[key] = np.array(state[f"move:{key}"], dtype=np.float64)
    run.filled = filled = draws.shape[1]
    run.kept[:, :filled] = draws
    run.kept_lp[:, :filled] = np.asarray(state["draws_log_density"], dtype=np.float64)
    run.accepted[:] = np.asarray(state["accepted"], dtype=np.float64)
    run.last_ap[:] = np.asarray(state["accept_prob"], dtype=np.float64)
    run.u[:] = u
    run.lpu[:] = np.asarray(state["lp_u"], dtype=np.float64)
    run.lpx[:] = np.asarray(state["lp_x"], dtype=np.float64)
    run.gen = _rng_from_text(_plain(state["rng"]))
    run.block_seed = int(_plain(state["block_seed"]))
    run.start = int(_plain(state["iteration"]))
    run.evals0 += int(_plain(state.get("n_evals", 0)))
    run.nonfinite0 += int(_plain(state.get("n_nonfinite", 0)))


def _plain(value: Any) -> Any:
    """Undo what a store may have done to a scalar (0-d arrays, numpy ints, bytes)."""
    if isinstance(value, np.ndarray) and value.ndim == 0:
        value = value[()]
    if isinstance(value, bytes):
        return value.decode()
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating):
        return float(value)
    return value
