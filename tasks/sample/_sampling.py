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
import time
from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from typing import Any, Literal

import numpy as np

from winnow.tasks.records import Chain

from ._diagnostics import _summarise, _validate_thresholds
from ._move import Move, StepContext
from ._posterior import LIKELIHOODS, LogPosterior, build_log_posterior, load_callable
from ._priors import DISTS, Prior, PriorSet, as_prior_set
from ._progress import ProgressHook
from ._run import STATE_FORMAT, RunPlan, RunState, plan_run, restore
from ._samplers import SAMPLERS, SamplerName
from ._trace_plots import plot_trace_pairs

__all__ = [
    "DISTS",
    "LIKELIHOODS",
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

_MAX_START_ROUNDS = 100  # prior draws per chain tried for a finite starting point
_RESET_FRACTIONS = (0.2, 0.4, 0.6)  # points in the burn-in where stray chains are reset
_BLOCK = 64  # iterations whose random numbers are drawn at once (see sample())


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

    def rows(self, u: np.ndarray) -> np.ndarray:
        """Rows ``[u | x(u) | target | log posterior]``, shape (k, 2 d + 2), as the sampler
        keeps its chains; without :meth:`__call__`'s np.errstate (the sampler's inner loop
        sets it once for a LogPosterior; a plain function does not need it)."""
        if self.clean:  # the prior's map, density and Jacobian in one pass
            return self.f.rows_at_unconstrained(u)  # type: ignore[attr-defined]
        rows = self.ps.transform_rows(u, density=False)
        d = self.ps.d
        x = np.ascontiguousarray(rows[:, d : 2 * d])  # a copy: the user's function may write
        lp = np.asarray(self.f(x), dtype=np.float64)
        if lp.shape != (len(u),):
            raise ValueError(
                f"log posterior {self.label} returned shape {lp.shape} for {len(u)} rows; "
                f"expected ({len(u)},)"
            )
        lp = np.where(np.isnan(lp) | (lp == np.inf), -np.inf, lp)
        rows[:, 2 * d] += lp  # the log-Jacobian's column
        rows[:, 2 * d + 1] = lp  # the user's log posterior replaces the log prior
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
        One of :data:`SAMPLERS`.
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
        at the last iteration (see :class:`~winnow.tasks.sample._progress.ProgressHook`).
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
    See :mod:`winnow.tasks.sample._metropolis`, :mod:`winnow.tasks.sample._ensemble` and
    :mod:`winnow.tasks.sample`.
    """
    ps = _resolve_priors(log_posterior, priors)
    d = ps.d
    plan = plan_run(sampler, d, n_chains, n_draws, burn_in, thin, checkpoint_every)
    limits = _validate_thresholds(thresholds)
    for name, f in (("progress", progress), ("checkpoint", checkpoint)):
        if f is not None and not callable(f):
            raise TypeError(f"{name} must be callable, got {type(f).__name__}")

    target = _Target(log_posterior, ps)
    move = plan.move_cls(d, plan.n_chains, ps.unconstrained_scale())
    run = RunState(plan, ps, log_posterior)
    if resume is None:
        run.gen = np.random.default_rng(rng)
        run.u[:], run.lpu[:], run.lpx[:] = _starting_points(target, ps, plan.n_chains, run.gen)
        run.block_seed = int(run.gen.integers(2**63))
    else:
        restore(resume, run, move)
    run.x[:] = ps.to_user(run.u)
    t_start = time.perf_counter()
    # A LogPosterior runs the model with floating-point warnings off (non-finite output
    # is handled by it, see _posterior); set once here instead of at every call.
    with np.errstate(all="ignore") if target.clean else contextlib.nullcontext():
        _iterate(run, plan, move, target, progress, checkpoint)
    seconds = time.perf_counter() - t_start

    return _finish(run, plan, ps, limits, seconds, resume)


def _finish(
    run: RunState,
    plan: RunPlan,
    ps: PriorSet,
    limits: dict[str, float],
    seconds: float,
    resume: Mapping[str, Any] | None,
) -> Chain:
    """The kept draws as a :class:`Chain` with their diagnostics."""
    d = ps.d
    acceptance = run.accepted / max(plan.n_draws - plan.n_burn, 1)
    n_evals, n_nonfinite = run.counts()
    diag = _summarise(
        run.kept,
        ps.names,
        burn_in=plan.n_burn,
        rule=plan.rule,
        acceptance=acceptance,
        thresholds=limits,
    )
    details = {
        "sampler": plan.sampler,
        "n_chains_rule": plan.chains_rule,
        "n_iterations": plan.n_draws,
        "thin": plan.thin,
        "model_evaluations": n_evals,
        "nonfinite_evaluations": n_nonfinite,
        "seconds": seconds,
        "resumed_at": int(resume["iteration"]) if resume is not None else 0,
    }
    n, k = plan.n_chains, plan.n_kept
    return Chain(
        samples=run.kept.reshape(-1, d),
        names=ps.names,
        units=ps.units,
        chain_index=np.repeat(np.arange(n, dtype=np.int64), k),
        draw_index=np.tile(np.arange(k, dtype=np.int64), n),
        log_density=run.kept_lp.reshape(-1),
        source=f"sampled:{plan.sampler}",
        diagnostics=replace(diag, details=details),
    )


def _iterate(
    run: RunState,
    plan: RunPlan,
    move: Move,
    target: _Target,
    progress: Callable[[int, int, str], None] | None,
    checkpoint: Callable[[dict[str, Any]], None] | None,
) -> None:
    """The iterations from ``run.start`` on: propose, evaluate, accept, keep, report."""
    n_chains, n_draws, n_burn, thin = plan.n_chains, plan.n_draws, plan.n_burn, plan.thin
    # Groups of chains updated together, as (context, slice, slice of the others): basic
    # slices give views, which saves a copy of every array at every step.
    if move.ensemble:
        h = n_chains // 2
        first, second = slice(0, h), slice(h, n_chains)
        groups = [(np.arange(h), first, second), (np.arange(h, n_chains), second, first)]
    else:
        groups = [(np.arange(n_chains), slice(None), slice(0, 0))]
    # Per group: its context and views of its rows in every array (made once here).
    steps = [
        (
            StepContext(run.start, g, True, None, burn_in=n_burn, group=k),
            sl,
            run.u[sl],
            run.u[comp],
            run.lpu[sl],
            run.last_ap[sl],
            run.now[sl],
            run.accepted[sl],
        )
        for k, (g, sl, comp) in enumerate(groups)
    ]
    uses_ap, symmetric = move.uses_accept_prob, move.symmetric
    col_target = run.now.shape[1] - 2
    reset_at = {int(f * n_burn) for f in _RESET_FRACTIONS} - {0}
    what = f"sampling ({plan.sampler})"
    report = None if progress is None else ProgressHook(progress, n_draws, what)
    block_end = run.start
    for t in range(run.start, n_draws):
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
            block_rng = np.random.default_rng([run.block_seed, block_start // _BLOCK])
            log_uniform = np.log(block_rng.random((block, n_chains)))
        j = t - block_start
        for ctx, sl, u_g, u_others, lpu_g, ap_g, now_g, accepted_g in steps:
            ctx.iteration, ctx.adapting = t, adapting
            ctx.block, ctx.block_start = block, block_start
            ctx.accept_prob = None if t == 0 or not uses_ap else ap_g
            y, log_q = move.propose(u_g, u_others, block_rng, ctx)
            prop = target.rows(y)  # laid out as `now`
            # the target is finite or -inf, lpu finite: log_alpha is never NaN.
            log_alpha = prop[:, col_target] - lpu_g
            if not symmetric:
                log_alpha += log_q
            acc = log_uniform[j, sl] < log_alpha
            if uses_ap:
                np.exp(np.minimum(log_alpha, 0.0), out=ap_g)
            np.copyto(now_g, prop, where=acc[:, None])
            if not adapting:
                accepted_g += acc
        if t in reset_at:
            _reset_strays(run.u, run.lpu, run.lpx, run.x, target, move.initial_scale, run.gen)
        if t >= n_burn and (t - n_burn) % thin == 0:
            run.kept[:, run.filled] = run.x
            run.kept_lp[:, run.filled] = run.lpx
            run.filled += 1
        done = t + 1
        if checkpoint is not None and done % plan.checkpoint_every == 0 and done < n_draws:
            checkpoint(run.state(done, move))
        if report is not None:
            report(done)
