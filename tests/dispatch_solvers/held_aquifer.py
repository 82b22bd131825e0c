"""The demo's aquifer solver behind a gate, for the signal tests (tests/test_signals.py).

Usage: ``python held_aquifer.py STATE DECK``. Each invocation appends ``<run folder name>
<pid>`` to ``STATE/calls.log`` (one ``write`` with ``O_APPEND``). The first ``STATE/free``
invocations (a number in that file, default 0) run the aquifer solver at once. Later ones,
while ``STATE/hold`` exists, are held: the solver starts a grandchild in its process group
that ignores SIGTERM (its pid written to ``STATE/grandchild-<solver pid>`` once it ignores
it), appends its own pid to ``STATE/held.log`` and waits until ``STATE/hold`` is removed.
With ``STATE/stubborn`` present the held solver ignores SIGTERM too. Afterwards (or when not
held) the process becomes ``python -m winnow.examples.aquifer.solver DECK``.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path


def _append(path: Path, line: str) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
    try:
        os.write(fd, line.encode())
    finally:
        os.close(fd)


GRANDCHILD = """
import os, signal, sys, time
signal.signal(signal.SIGTERM, signal.SIG_IGN)
with open(sys.argv[1] + ".tmp", "w") as fh:
    fh.write(str(os.getpid()))
os.replace(sys.argv[1] + ".tmp", sys.argv[1])
time.sleep(300)
"""


def main() -> int:
    state, deck = Path(sys.argv[1]), sys.argv[2]
    me = f"{Path.cwd().name} {os.getpid()}\n"
    _append(state / "calls.log", me)
    order = (state / "calls.log").read_text().splitlines(keepends=True).index(me)
    free_file = state / "free"
    free = int(free_file.read_text()) if free_file.exists() else 0
    if order >= free and (state / "hold").exists():
        if (state / "stubborn").exists():
            signal.signal(signal.SIGTERM, signal.SIG_IGN)
        mark = state / f"grandchild-{os.getpid()}"
        subprocess.Popen([sys.executable, "-c", GRANDCHILD, str(mark)])
        while not mark.exists():
            time.sleep(0.02)
        _append(state / "held.log", f"{os.getpid()}\n")
        while (state / "hold").exists():
            time.sleep(0.05)
    os.execv(sys.executable, [sys.executable, "-m", "winnow.examples.aquifer.solver", deck])
    return 0  # not reached


if __name__ == "__main__":
    sys.exit(main())
