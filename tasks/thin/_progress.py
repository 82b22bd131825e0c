"""Progress reports of the thin stage: ``progress(done, total, step)`` at a bounded rate."""

from __future__ import annotations

import time
from collections.abc import Callable

__all__ = ["Progress", "StepProgress"]

Progress = Callable[[int, int, str], None]

# progress: at most one call per 1 % of a step and per 0.5 s, whichever is rarer (plus the
# first and last call of each step)
_PROGRESS_SHARE, _PROGRESS_SECONDS = 0.01, 0.5
# the names the inner steps report under, as the thin stage's progress shows them
_STEP_NAMES = {
    "mean embedding": "feature pass (mean embedding of the chain)",
    "greedy": "selection (greedy)",
    "swap": "selection (swap sweeps)",
    "genetic": "selection (genetic generations)",
}


class StepProgress:
    """The thin stage's ``progress(done, total, step)``, at a bounded rate.

    Each long step reports under its own name (see ``_STEP_NAMES`` for the inner ones);
    within a step ``done`` only increases: a call is passed on when it is the step's first
    or last (``done == total``), or when both 1 % of the step and 0.5 s have passed since
    the last one passed on.
    """

    def __init__(self, progress: Progress | None) -> None:
        self.progress = progress
        self.last: dict[str, tuple[int, float]] = {}

    def __call__(self, done: int, total: int, what: str) -> None:
        if self.progress is None:
            return
        what = _STEP_NAMES.get(what, what)
        now = time.perf_counter()
        seen = self.last.get(what)
        if seen is not None:
            last_done, last_t = seen
            if done <= last_done:
                return
            if done < total and (
                done - last_done < _PROGRESS_SHARE * total or now - last_t < _PROGRESS_SECONDS
            ):
                return
        self.last[what] = (done, now)
        self.progress(int(done), int(total), what)

    def step(self, what: str) -> Callable[[], None]:
        """Report the start of a one-piece step (0 of 1); the returned call reports its end."""
        self(0, 1, what)
        return lambda: self(1, 1, what)
