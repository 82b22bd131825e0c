"""A tiny misbehaving solver for the fault, bad-input and load tests.

Usage: ``python fault_solver.py DECK``. The deck holds ``name = value`` lines written by the
study's template: ``mode``, ``fault_below``, ``state`` (a folder outside the run folders),
``x``, ``y`` and the timing constants. The fault ``mode`` applies to points with
``x < fault_below``; the others behave (mode ``ok``). A file ``STATE/modes.json`` mapping
``repr(x)`` to a mode overrides both for the points it names. A good run writes ``out.json`` with
``{"q": x + 2 y}`` in its working folder (the run folder).

Every invocation first appends one line ``<run folder name> <pid> <mode> <parent pid>`` to
``STATE/calls.log`` (one ``write`` on a file opened with ``O_APPEND``: lines from concurrent
solvers do not interleave), so a test can count how often each point was solved.

Modes
-----
ok            write out.json, exit 0
exit          print a message on stderr, exit 3
hang          spawn a grandchild that sleeps (pid appended to STATE/grandchildren.log), sleep
no_output     exit 0, write nothing
truncated     write half a JSON document
nonnumeric    write ``{"q": "abc"}``
nan           write ``{"q": NaN}``
spam          print 4 MiB on stdout and on stderr, then succeed
delete_folder remove the own run folder, exit 0
rewrite       overwrite the run folder's manifest, append a line to the deck, then succeed
flaky         fail the first time this deck is solved, succeed afterwards (marker in STATE)
slow          wait ``slow_s`` seconds or until ``STATE/release`` exists, then succeed
load          sleep a pseudo-random 0..``max_sleep_ms`` ms and fail with probability
              ``fail_rate``; both drawn from SHA-256 of the point (x, y) and the number of
              earlier attempts of this point (counter in STATE), so a run is reproducible and
              a rerun of a failed point draws afresh (it may fail again); with
              ``fail_once = 1`` only a point's first attempt can fail
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
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


def _count(state: Path, digest: str) -> int:
    """Earlier attempts of this deck; records this one (one line per attempt)."""
    f = state / f"{digest}.attempts"
    n = len(f.read_text().splitlines()) if f.exists() else 0
    _append(f, f"{os.getpid()}\n")
    return n


def _write(q: object) -> None:
    Path("out.json").write_text(json.dumps({"q": q}))


def main() -> int:
    deck = Path(sys.argv[1])
    text = deck.read_text()
    values = {}
    for line in text.splitlines():
        if "=" in line:
            name, value = line.split("=", 1)
            values[name.strip()] = value.strip()
    x, y = float(values["x"]), float(values["y"])
    mode = values.get("mode", "ok")
    if x >= float(values.get("fault_below", "inf")):
        mode = "ok"
    state = Path(values["state"])
    modes = state / "modes.json"  # optional per-point modes, keyed by repr(x)
    if modes.exists():
        mode = json.loads(modes.read_text()).get(repr(x), mode)
    here = Path.cwd()
    _append(state / "calls.log", f"{here.name} {os.getpid()} {mode} {os.getppid()}\n")
    # the point, not the deck text (which holds the STATE path): same draws in every folder
    digest = hashlib.sha256(f"{x!r},{y!r}".encode()).hexdigest()
    q = x + 2.0 * y

    if mode == "exit":
        print("fault solver: diverged at step 17", file=sys.stderr)
        return 3
    if mode == "hang":
        child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(300)"])
        _append(state / "grandchildren.log", f"{child.pid}\n")
        time.sleep(300)
        return 0
    if mode == "no_output":
        return 0
    if mode == "truncated":
        Path("out.json").write_text('{"q": 1.2')
        return 0
    if mode == "nonnumeric":
        _write("abc")
        return 0
    if mode == "nan":
        _write(float("nan"))  # json.dumps writes the bare token NaN
        return 0
    if mode == "spam":
        block = ("s" * 1023 + "\n") * 1024  # 1 MiB
        for _ in range(4):
            sys.stdout.write(block)
            sys.stderr.write(block)
        sys.stdout.write("fault solver: last stdout line\n")
        sys.stderr.write("fault solver: last stderr line\n")
        _write(q)
        return 0
    if mode == "delete_folder":
        os.chdir(here.parent)
        shutil.rmtree(here)
        return 0
    if mode == "rewrite":
        (here / "winnow-manifest.json").write_text("rewritten by the solver\n")
        with deck.open("a") as fh:
            fh.write("\n# edited by the solver\n")
        _write(q)
        return 0
    if mode == "flaky":
        if _count(state, digest) == 0:
            print("fault solver: first attempt fails", file=sys.stderr)
            return 1
        _write(q)
        return 0
    if mode == "slow":
        t_end = time.monotonic() + float(values.get("slow_s", "5"))
        while time.monotonic() < t_end and not (state / "release").exists():
            time.sleep(0.05)
        _write(q)
        return 0
    if mode == "load":
        n = _count(state, digest)
        h = hashlib.sha256(f"{digest}:{n}".encode()).digest()
        u_sleep = int.from_bytes(h[:8], "little") / 2.0**64
        u_fail = int.from_bytes(h[8:16], "little") / 2.0**64
        time.sleep(u_sleep * float(values.get("max_sleep_ms", "200")) / 1000.0)
        once = values.get("fail_once", "0") not in ("0", "0.0", "False")
        if u_fail < float(values.get("fail_rate", "0.1")) and (n == 0 or not once):
            print(f"fault solver: random failure (u={u_fail:.4f})", file=sys.stderr)
            return 1
        _write(q)
        return 0
    _write(q)
    return 0


if __name__ == "__main__":
    sys.exit(main())
