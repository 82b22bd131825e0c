"""Sample stage: calibrate a cheap model by MCMC and return the posterior as a :class:`Chain`.

The user's model is named ``"module:function"`` (:func:`load_callable`); with priors and
(for a forward model) observations and a likelihood, :func:`build_log_posterior` makes the
log posterior, and :func:`sample` runs several chains of one of the samplers in :data:`SAMPLERS`
from over-dispersed starting points (independent prior draws) in an unconstrained space,
removes the burn-in, and attaches the convergence diagnostics of
:mod:`winnow.tasks.sample`. Results are in the user's units.

Samplers
--------
``adaptive_metropolis``
    Adaptive Metropolis (Haario, Saksman & Tamminen 2001) with the proposal covariance
    pooled over the chains (learnt in windows during burn-in, then plain AM); a global
    proposal scale is tuned during burn-in only. Chains that stray far below the others
    during burn-in are moved back, as ensemble walkers are (see ``_reset_strays``).
``ensemble``
    Affine-invariant ensemble sampler with the stretch move (Goodman & Weare 2010); the
    chains are the walkers of one ensemble (at least ``max(4, 2 d)`` of them; ``2 d + 2``
    when ``n_chains`` is left out).
``de_mcmc``
    Differential-evolution MCMC (ter Braak 2006); walkers as for ``ensemble``.

Checkpoints
-----------
``checkpoint(state)`` is called every ``checkpoint_every`` iterations with a dict of arrays,
numbers and strings holding everything needed to go on: positions, log densities, the random
generator's state (as JSON text) and the seed of the blocks of random numbers the moves and
acceptance tests draw (``_BLOCK`` iterations at a time, each block from its own generator),
the move's adaptation state and the draws so far.
``sample(..., resume=state)`` continues from such a dict and gives the same chain as a run
that was never interrupted (same settings; the ``rng`` argument is then ignored).
"""

from __future__ import annotations

import contextlib
import json
import math
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from typing import Any, Literal

import numpy as np

from winnow.tasks.records import Chain

from ._diagnostics import _summarise, _validate_thresholds, burn_in_count
from ._posterior import LogPosterior, build_log_posterior, load_callable
from ._priors import DISTS, Prior, PriorSet, as_prior_set
from ._samplers import MOVES, Move, ProgressHook, StepContext
from ._trace_plots import plot_trace_pairs

__all__ = [
    "DISTS",
    "SAMPLERS",
    "STATE_FORMAT",
    "LogPosterior",
    "Move",
    "Prior",
    "PriorSet",
    "build_log_posterior",
    "load_callable",
    "plot_trace_pairs",
    "sample",
]

SamplerName = Literal["adaptive_metropolis", "ensemble", "de_mcmc"]
SAMPLERS: tuple[str, ...] = tuple(MOVES)
# /2: pooled adaptive Metropolis state; /3: random numbers drawn in blocks (block_seed)
STATE_FORMAT = "winnow.sample-state/3"
_MAX_START_ROUNDS = 100  # prior draws per chain tried for a finite starting point
_RESET_FRACTIONS = (0.2, 0.4, 0.6)  # points in the burn-in where stray chains are reset
_BLOCK = 64  # iterations whose random numbers are drawn at once (see sample())


def _validate_int(value: Any, name: str, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise TypeError(f"{name} must be an integer, got {value!r}")
    if value < minimum:
        raise ValueError(f"{name} must be >= {minimum}, got {value}")
    return int(value)


def _resolve_priors(
    log_posterior: Callable[[np.ndarray], np.ndarray],
    priors: PriorSet | Sequence[Prior | Mapping[str, Any]] | None,
) -> PriorSet:
    if isinstance(log_posterior, LogPosterior):
        ps = log_posterior.priors
        if priors is not None:
            given = as_prior_set(priors).names
            if ps.names[: len(given)] != given:
                raise ValueError(
                    f"priors {list(given)} do not match the log posterior's parameters "
                    f"{list(ps.names)}"
                )
        return ps
    if not callable(log_posterior):
        raise TypeError(f"log_posterior must be callable, got {type(log_posterior).__name__}")
    if priors is None:
        raise ValueError("priors are needed with a plain log_posterior function")
    return as_prior_set(priors)


class _Target:
    """Log posterior in the unconstrained space: ``log p(x(u)) + log|dx/du|``."""

    def __init__(self, log_posterior: Callable[[np.ndarray], np.ndarray], ps: PriorSet):
        self.f = log_posterior
        self.ps = ps
        self.clean = isinstance(log_posterior, LogPosterior)
        self.label = getattr(log_posterior, "model", None) or getattr(
            log_posterior, "__qualname__", "log_posterior"
        )

    def __call__(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Return (target at u, log posterior at x(u), x(u))."""
        with np.errstate(all="ignore") if self.clean else contextlib.nullcontext():
            rows = self.rows(u)
        d = self.ps.d
        return rows[:, 2 * d], rows[:, 2 * d + 1], rows[:, d : 2 * d]

    def lists(self, u: np.ndarray) -> list[list[float]] | None:
        """:meth:`rows` as lists of Python floats when the log posterior offers them (a
        few rows of a row-by-row model, see ``LogPosterior.lists_at_unconstrained``)."""
        return self.f.lists_at_unconstrained(u) if self.clean else None  # type: ignore[attr-defined]

    def rows(self, u: np.ndarray) -> np.ndarray:
        """Rows ``[u | x(u) | target | log posterior]``, shape (k, 2 d + 2), as the sampler
        keeps its chains; without :meth:`__call__`'s np.errstate (the sampler's inner loop
        sets it once for a LogPosterior; a plain function does not need it)."""
        if self.clean:  # the prior's map, density and Jacobian in one pass
            return self.f.rows_at_unconstrained(u)  # type: ignore[attr-defined]
        x = self.ps.to_user(u)
        lp = np.asarray(self.f(x), dtype=np.float64)
        if lp.shape != (len(u),):
            raise ValueError(
                f"log posterior {self.label} returned shape {lp.shape} for {len(u)} rows; "
                f"expected ({len(u)},)"
            )
        lp = np.where(np.isnan(lp) | (lp == np.inf), -np.inf, lp)
        d = self.ps.d
        rows = np.empty((len(u), 2 * d + 2))
        rows[:, :d] = u
        rows[:, d : 2 * d] = x
        rows[:, 2 * d] = lp + self.ps.log_jacobian(u)
        rows[:, 2 * d + 1] = lp
        return rows


def _starting_points(
    target: _Target, ps: PriorSet, n_chains: int, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Independent prior draws with a finite log posterior, one per chain (over-dispersed
    with respect to the posterior whenever the data are informative)."""
    d = ps.d
    u = np.empty((n_chains, d))
    lpu = np.empty(n_chains)
    lpx = np.empty(n_chains)
    filled = np.zeros(n_chains, dtype=bool)
    tried = 0
    for _ in range(_MAX_START_ROUNDS):
        need = np.flatnonzero(~filled)
        if need.size == 0:
            break
        cand = ps.to_unconstrained(ps.draw(need.size, rng))
        ok_u = np.isfinite(cand).all(axis=1)
        cand = np.where(ok_u[:, None], cand, 0.0)
        lu, lx, _ = target(cand)
        tried += need.size
        ok = ok_u & np.isfinite(lu)
        u[need[ok]], lpu[need[ok]], lpx[need[ok]] = cand[ok], lu[ok], lx[ok]
        filled[need[ok]] = True
    if not filled.all():
        raise ValueError(
            f"model {target.label}: the log posterior was -inf or NaN at all {tried} "
            f"parameter sets drawn from the prior for {int((~filled).sum())} of "
            f"{n_chains} chains; check that the model returns finite values inside the prior"
        )
    return u, lpu, lpx


def _reset_strays(
    u: np.ndarray,
    lpu: np.ndarray,
    lpx: np.ndarray,
    x: np.ndarray,
    target: _Target,
    scale: np.ndarray,
    rng: np.random.Generator,
) -> None:
    """Bring stray chains (ensemble walkers) back (during burn-in only).

    An ensemble walker can be caught far out in a tail where the others' positions give it
    no useful direction (e.g. along a bound mapped to infinity), and differences between
    walkers scattered over the prior can be far too large for a narrow posterior. An
    adaptive Metropolis chain still walking in from an over-dispersed start on a badly
    scaled target pollutes the pooled covariance estimate and may need thousands of draws
    to arrive. A chain
    whose log density is below the best one by more than the 1 - 1e-6 quantile of
    chi^2_d / 2 (what a Gaussian posterior would allow) is a stray. With at least d + 1 good
    walkers each stray moves to the position of a random good one; otherwise the strays are
    re-drawn in a small Gaussian ball (1e-3 of the prior scale) around the best walker, as
    ensemble samplers are commonly started. Done only while the draws are discarded as
    burn-in, so the kept draws are untouched (common practice; not part of Goodman & Weare
    2010, ter Braak 2006 or Haario et al. 2001).
    """
    from scipy import stats

    d = u.shape[1]
    gap = 0.5 * float(stats.chi2.isf(1e-6, d))
    stray = lpu < lpu.max() - gap
    good = np.flatnonzero(~stray)
    if not stray.any():
        return
    if good.size >= d + 1:
        src = good[rng.integers(good.size, size=int(stray.sum()))]
        u[stray], lpu[stray], lpx[stray], x[stray] = u[src], lpu[src], lpx[src], x[src]
        return
    best = u[int(np.argmax(lpu))]
    ball = best + 1e-3 * scale * rng.standard_normal((int(stray.sum()), d))
    lu, lx, xb = target(ball)
    ok = np.isfinite(lu)
    idx = np.flatnonzero(stray)[ok]
    u[idx], lpu[idx], lpx[idx], x[idx] = ball[ok], lu[ok], lx[ok], xb[ok]


def _rng_to_text(rng: np.random.Generator) -> str:
    return json.dumps(rng.bit_generator.state)


def _rng_from_text(text: str) -> np.random.Generator:
    state = json.loads(text)
    bitgen = getattr(np.random, state["bit_generator"])()
    bitgen.state = state
    return np.random.Generator(bitgen)


def sample(
    log_posterior: Callable[[np.ndarray], np.ndarray],
    priors: PriorSet | Sequence[Prior | Mapping[str, Any]] | None = None,
    *,
    sampler: SamplerName = "adaptive_metropolis",
    n_chains: int | None = None,
    n_draws: int = 4000,
    burn_in: int | Literal["half", "none"] = "half",
    thin: int = 1,
    rng: int | np.random.Generator | None = None,
    progress: Callable[[int, int, str], None] | None = None,
    checkpoint: Callable[[dict[str, Any]], None] | None = None,
    checkpoint_every: int = 500,
    resume: Mapping[str, Any] | None = None,
    thresholds: Mapping[str, float] | None = None,
) -> Chain:
    """Run MCMC chains on a log posterior and return the draws with their diagnostics.

    Parameters
    ----------
    log_posterior : LogPosterior or callable
        Unnormalised log posterior in the user's units, ``(k, d) -> (k,)``. A
        :class:`LogPosterior` carries its own priors (including an estimated noise scale).
    priors : sequence of Prior or dict, optional
        The parameters' priors (transforms, support, starting points). With a
        :class:`LogPosterior` they may be left out; if given they must be its leading ones.
    sampler : {"adaptive_metropolis", "ensemble", "de_mcmc"}
    n_chains : int, optional
        Chains (ensemble walkers). Ensemble samplers need at least ``max(4, 2 d)``. Left
        out: 4 for ``adaptive_metropolis`` and ``2 d + 2`` (at least 4) walkers for the
        ensemble samplers; ``diagnostics.details["n_chains_rule"]`` says which applied.
    n_draws : int
        Iterations per chain, burn-in included.
    burn_in : "half", "none" or int
        Draws dropped from the start of every chain (default: the first half).
    thin : int
        Keep every ``thin``-th draw after the burn-in.
    rng : int or numpy.random.Generator, optional
    progress : callable, optional
        ``progress(done, total, what)`` with the iterations done (burn-in included) of
        ``n_draws``: at most once per 1 % of them and per 0.5 s (whichever is rarer), and
        at the last iteration (see :class:`~winnow.tasks.sample._samplers.ProgressHook`).
    checkpoint : callable, optional
        ``checkpoint(state)`` every ``checkpoint_every`` iterations (see the module notes).
    checkpoint_every : int
    resume : dict, optional
        A state passed to ``checkpoint`` by an earlier run with the same settings.
    thresholds : dict, optional
        ``rhat_max``, ``ess_bulk_min``, ``ess_tail_min`` (see
        :func:`winnow.tasks.sample.diagnose`).

    Returns
    -------
    Chain
        Rows ``(n_chains * kept, d)`` in the user's units, chain by chain;
        ``log_density`` the log posterior of each row (without the Jacobian);
        ``source`` ``"sampled:<sampler>"``; ``diagnostics`` filled in (``acceptance`` over
        the kept iterations, ``details`` with evaluation counts).

    Raises
    ------
    ValueError, TypeError
        Bad settings, a resume state that does not match, or a model that gives no finite
        log posterior at any starting point.

    References
    ----------
    See :mod:`winnow.tasks.sample._samplers` and :mod:`winnow.tasks.sample`.
    """
    ps = _resolve_priors(log_posterior, priors)
    d = ps.d
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
    limits = _validate_thresholds(thresholds)
    for name, f in (("progress", progress), ("checkpoint", checkpoint)):
        if f is not None and not callable(f):
            raise TypeError(f"{name} must be callable, got {type(f).__name__}")

    target = _Target(log_posterior, ps)
    move = move_cls(d, n_chains, ps.unconstrained_scale())
    kept = np.empty((n_chains, n_kept, d))
    kept_lp = np.empty((n_chains, n_kept))
    accepted = np.zeros(n_chains)
    last_ap = np.full(n_chains, np.nan)
    settings = {
        "format": STATE_FORMAT,
        "sampler": sampler,
        "n_chains": n_chains,
        "n_draws": n_draws,
        "burn_in": n_burn,
        "thin": thin,
        "names": json.dumps(list(ps.names)),
    }
    # The log posterior may have been used before: count this run's evaluations only.
    evals0 = -int(getattr(log_posterior, "n_evals", 0))
    nonfinite0 = -int(getattr(log_posterior, "n_nonfinite", 0))
    if resume is None:
        gen = np.random.default_rng(rng)
        u, lpu, lpx = _starting_points(target, ps, n_chains, gen)
        start, filled = 0, 0
        block_seed = int(gen.integers(2**63))
    else:
        gen, u, lpu, lpx, start, filled = _restore(
            resume, settings, move, kept, kept_lp, accepted, last_ap
        )
        block_seed = int(_plain(resume["block_seed"]))
        evals0 += int(_plain(resume.get("n_evals", 0)))
        nonfinite0 += int(_plain(resume.get("n_nonfinite", 0)))

    # The chains' current state in one array, [u | x | log target | log posterior] per chain, so
    # that accepting moves is one masked copy per step; u, x, lpu, lpx are views of it.
    now = np.empty((n_chains, 2 * d + 2))
    now[:, :d] = u
    now[:, d : 2 * d] = ps.to_user(u)
    now[:, 2 * d] = lpu
    now[:, 2 * d + 1] = lpx
    u, x, lpu, lpx = now[:, :d], now[:, d : 2 * d], now[:, 2 * d], now[:, 2 * d + 1]
    # Groups of chains updated together, as (context, slice, slice of the others): basic
    # slices give views, which saves a copy of every array at every step.
    if move_cls.ensemble:
        h = n_chains // 2
        first, second = slice(0, h), slice(h, n_chains)
        groups = [(np.arange(h), first, second), (np.arange(h, n_chains), second, first)]
    else:
        groups = [(np.arange(n_chains), slice(None), slice(0, 0))]
    # Per group: its context and views of its rows in every array (made once here).
    uses_ap = move.uses_accept_prob
    steps = [
        (
            StepContext(start, g, True, None, burn_in=n_burn, group=k),
            sl,
            u[sl],
            u[comp],
            lpu[sl],
            last_ap[sl],
            now[sl],
            accepted[sl],
        )
        for k, (g, sl, comp) in enumerate(groups)
    ]
    col_target = 2 * d
    no_ratio = [0.0] * n_chains  # the log proposal ratio of a symmetric move
    reset_at = {int(f * n_burn) for f in _RESET_FRACTIONS} - {0}
    report = None if progress is None else ProgressHook(progress, n_draws, f"sampling ({sampler})")
    block_end = start
    t_start = time.perf_counter()
    # A LogPosterior runs the model with floating-point warnings off (non-finite output
    # is handled by it, see _posterior); set once here instead of at every call.
    quiet = np.errstate(all="ignore") if target.clean else contextlib.nullcontext()
    with quiet:
        for t in range(start, n_draws):
            adapting = t < n_burn
            block = 0
            if t == block_end:
                # The random numbers of the moves and of the acceptance tests are drawn for
                # iterations [b * _BLOCK, (b + 1) * _BLOCK) at once, from a generator of their
                # own seeded by (block_seed, b): the chain does not depend on where checkpoints
                # fall, and a run resumed inside a block draws that block again.
                block_start = t - t % _BLOCK
                block_end = min(block_start + _BLOCK, n_draws)
                block = block_end - block_start
                block_rng = np.random.default_rng([block_seed, block_start // _BLOCK])
                log_uniform = np.log(block_rng.random((block, n_chains)))
                log_uniform_rows = log_uniform.tolist()
            j = t - block_start
            for ctx, sl, u_g, u_others, lpu_g, ap_g, now_g, accepted_g in steps:
                ctx.iteration, ctx.adapting = t, adapting
                ctx.block, ctx.block_start = block, block_start
                ctx.accept_prob = None if t == 0 or not uses_ap else ap_g
                y, log_q = move.propose(u_g, u_others, block_rng, ctx)
                listed = target.lists(y)
                if listed is not None:
                    # A few rows as Python floats: the same test and updates, row by row
                    # (after a slow model each numpy call costs several microseconds).
                    current = lpu_g.tolist()
                    ratio = no_ratio if move.symmetric else log_q.tolist()
                    log_u_g = log_uniform_rows[j][sl]
                    probs = []
                    for i, row in enumerate(listed):
                        log_alpha_i = row[col_target] - current[i] + ratio[i]
                        if uses_ap:
                            probs.append(math.exp(min(log_alpha_i, 0.0)))
                        if log_u_g[i] < log_alpha_i:
                            now_g[i] = row
                            if not adapting:
                                accepted_g[i] += 1.0
                    if uses_ap:
                        ap_g[:] = probs
                    continue
                prop = target.rows(y)  # laid out as `now`
                # the target is finite or -inf, lpu finite: log_alpha is never NaN.
                log_alpha = prop[:, col_target] - lpu_g
                log_alpha += log_q
                acc = log_uniform[j, sl] < log_alpha
                if uses_ap:
                    np.exp(np.minimum(log_alpha, 0.0), out=ap_g)
                np.copyto(now_g, prop, where=acc[:, None])
                if not adapting:
                    accepted_g += acc
            if t in reset_at:
                _reset_strays(u, lpu, lpx, x, target, move.initial_scale, gen)
            if t >= n_burn and (t - n_burn) % thin == 0:
                kept[:, filled] = x
                kept_lp[:, filled] = lpx
                filled += 1
            done = t + 1
            if checkpoint is not None and done % checkpoint_every == 0 and done < n_draws:
                state = dict(settings)
                state.update(
                    iteration=done,
                    rng=_rng_to_text(gen),
                    block_seed=block_seed,
                    u=u.copy(),
                    lp_u=lpu.copy(),
                    lp_x=lpx.copy(),
                    accept_prob=last_ap.copy(),
                    accepted=accepted.copy(),
                    draws=kept[:, :filled].copy(),
                    draws_log_density=kept_lp[:, :filled].copy(),
                    n_evals=evals0 + int(getattr(log_posterior, "n_evals", 0)),
                    n_nonfinite=nonfinite0 + int(getattr(log_posterior, "n_nonfinite", 0)),
                )
                state.update({f"move:{k}": v.copy() for k, v in move.state.items()})
                checkpoint(state)
            if report is not None:
                report(done)
    seconds = time.perf_counter() - t_start

    acceptance = accepted / max(n_draws - n_burn, 1)
    n_evals = evals0 + int(getattr(log_posterior, "n_evals", 0))
    n_nonfinite = nonfinite0 + int(getattr(log_posterior, "n_nonfinite", 0))
    diag = _summarise(
        kept, ps.names, burn_in=n_burn, rule=rule, acceptance=acceptance, thresholds=limits
    )
    details = {
        "sampler": sampler,
        "n_chains_rule": chains_rule,
        "n_iterations": n_draws,
        "thin": thin,
        "model_evaluations": n_evals,
        "nonfinite_evaluations": n_nonfinite,
        "seconds": seconds,
        "resumed_at": int(resume["iteration"]) if resume is not None else 0,
    }
    diag = replace(diag, details=details)
    return Chain(
        samples=kept.reshape(-1, d),
        names=ps.names,
        units=ps.units,
        chain_index=np.repeat(np.arange(n_chains, dtype=np.int64), n_kept),
        draw_index=np.tile(np.arange(n_kept, dtype=np.int64), n_chains),
        log_density=kept_lp.reshape(-1),
        source=f"sampled:{sampler}",
        diagnostics=diag,
    )


def _restore(
    state: Mapping[str, Any],
    settings: dict[str, Any],
    move: Move,
    kept: np.ndarray,
    kept_lp: np.ndarray,
    accepted: np.ndarray,
    last_ap: np.ndarray,
) -> tuple[np.random.Generator, np.ndarray, np.ndarray, np.ndarray, int, int]:
    """Check a resume state against this run's settings and load it in place."""
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
    n, d = kept.shape[0], kept.shape[2]
    u = np.array(state["u"], dtype=np.float64)
    draws = np.asarray(state["draws"], dtype=np.float64)
    if u.shape != (n, d) or draws.ndim != 3 or draws.shape[0] != n or draws.shape[2] != d:
        raise ValueError(
            f"resume: arrays of shape {u.shape} / {draws.shape} do not fit {n} chains of "
            f"{d} parameters"
        )
    filled = draws.shape[1]
    kept[:, :filled] = draws
    kept_lp[:, :filled] = np.asarray(state["draws_log_density"], dtype=np.float64)
    accepted[:] = np.asarray(state["accepted"], dtype=np.float64)
    last_ap[:] = np.asarray(state["accept_prob"], dtype=np.float64)
    for key in move.state:
        if f"move:{key}" not in state:
            raise ValueError(f"resume: the checkpoint lacks the move state {key!r}")
        move.state[key] = np.array(state[f"move:{key}"], dtype=np.float64)
    return (
        _rng_from_text(_plain(state["rng"])),
        u,
        np.array(state["lp_u"], dtype=np.float64),
        np.array(state["lp_x"], dtype=np.float64),
        int(_plain(state["iteration"])),
        filled,
    )


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
