"""A solver that records when it ran, for the concurrency tests.

Usage: ``python timed_solver.py DECK`` with a deck of ``name = value`` lines holding ``state``
(a folder outside the run folders), ``slow_s``, ``x`` and ``y`` (the fault kit's template,
``tests/fault_solvers/kit.py``). It sleeps ``slow_s`` seconds, writes ``out.json`` with
``{"q": x + 2 y}`` and appends one line ``<run folder name> <start> <end>`` (``time.time()``)
to ``STATE/times.log`` in one ``write`` on a file opened with ``O_APPEND``, so lines from
concurrent solvers do not interleave.
"""

from __future__ import annotations

import json
import os
import sys
import time
from pathlib import Path


def main() -> int:
    values = {}
    for line in Path(sys.argv[1]).read_text().splitlines():
        if "=" in line:
            name, value = line.split("=", 1)
            values[name.strip()] = value.strip()
    start = time.time()
    time.sleep(float(values["slow_s"]))
    x, y = float(values["x"]), float(values["y"])
    Path("out.json").write_text(json.dumps({"q": x + 2.0 * y}))
    end = time.time()
    fd = os.open(Path(values["state"]) / "times.log", os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
    try:
        os.write(fd, f"{Path.cwd().name} {start!r} {end!r}\n".encode())
    finally:
        os.close(fd)
    return 0


if __name__ == "__main__":
    sys.exit(main())
