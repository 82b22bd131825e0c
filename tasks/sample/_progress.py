"""The driver's progress reports at a bounded rate."""

from __future__ import annotations

import math
import time
from collections.abc import Callable

__all__ = ["ProgressHook"]


class ProgressHook:
    """The driver's ``progress(done, total, what)`` at a bounded rate.

    A call goes through at the first iteration that completes 1 % of the run, then only
    once both another 1 % of the iterations and 0.5 s have passed (whichever is rarer: a
    fast run reports a few times, a slow one about 100 times), and always at the last
    iteration. ``done`` only increases. Checking costs one comparison per iteration.
    """

    share, seconds = 0.01, 0.5

    def __init__(
        self, progress: Callable[[int, int, str], None], total: int, what: str, *, clock=None
    ) -> None:
        self.progress, self.total, self.what = progress, int(total), what
        self.clock = clock if clock is not None else time.perf_counter
        self.step = max(1, int(math.ceil(self.share * self.total)))
        self.next = self.step  # the next iteration count that may report
        self.last_t: float | None = None

    def __call__(self, done: int) -> None:
        if done < self.next and done != self.total:
            return
        now = self.clock()
        if done != self.total and self.last_t is not None and now - self.last_t < self.seconds:
            self.next = done + 1  # 1 % has passed, the time has not: look again next time
            return
        self.last_t = now
        self.next = done + self.step
        self.progress(int(done), self.total, self.what)
