"""The sampler's progress hook: bounded rate, increasing counts (issue 17 item 9)."""

from __future__ import annotations

import numpy as np
import pytest

from winnow.tasks.sample import sample
from winnow.tasks.sample._progress import ProgressHook

PRIORS = [{"name": "a", "dist": "normal", "mu": 0.0, "sigma": 1.0},
          {"name": "b", "dist": "normal", "mu": 0.0, "sigma": 1.0}]  # fmt: skip


def _logp(x):
    return -0.5 * np.sum(x**2, axis=1)


class _Clock:
    def __init__(self, step: float) -> None:
        self.t, self.step = 0.0, step

    def __call__(self) -> float:
        self.t += self.step
        return self.t


def _run(n: int, seconds_per_iteration: float) -> list[tuple[int, int, str]]:
    calls: list[tuple[int, int, str]] = []
    clock = _Clock(seconds_per_iteration)
    hook = ProgressHook(lambda *a: calls.append(a), n, "sampling", clock=clock)
    for done in range(1, n + 1):
        hook(done)
    return calls


def test_slow_iterations_report_every_percent():
    """1 s per iteration: the 1 % rule is the rarer one, 100 calls for 1000 iterations."""
    calls = _run(1000, 1.0)
    assert [c[0] for c in calls] == list(range(10, 1001, 10))
    assert all(c[1:] == (1000, "sampling") for c in calls)


def test_fast_iterations_report_every_half_second():
    """1 ms per iteration (the clock is read only at 1 % marks): 0.5 s is the rarer rule,
    about one call per 500 iterations, plus the first 1 % mark and the end."""
    calls = _run(10_000, 0.001)
    dones = [c[0] for c in calls]
    assert dones == sorted(set(dones)) and dones[0] == 100 and dones[-1] == 10_000
    assert 15 <= len(calls) <= 25  # 10 s of iterations / 0.5 s, with the 1 % granularity
    gaps = np.diff(dones[:-1])
    assert gaps.min() >= 100


@pytest.mark.parametrize("sampler", ["adaptive_metropolis", "ensemble", "de_mcmc"])
def test_sampler_progress_increases_and_ends_at_total(sampler):
    calls: list[tuple[int, int, str]] = []
    sample(_logp, PRIORS, sampler=sampler, n_draws=300, rng=2,
           progress=lambda *a: calls.append(a),
           thresholds={"ess_bulk_min": 1, "ess_tail_min": 1, "rhat_max": 10.0})  # fmt: skip
    dones = [c[0] for c in calls]
    assert dones == sorted(set(dones))
    assert calls[-1] == (300, 300, f"sampling ({sampler})")
    assert len(calls) <= 100
