"""A tiny stand-in for a costly solver, used by the dispatch tests.

Usage: ``python fake_solver.py DECK``. The deck holds ``name = value`` lines; ``mode`` picks
the behaviour and ``x`` is the parameter. The solver writes ``result.txt`` (``value = 2*x``)
in its working folder.

Modes: ``succeed``; ``fail`` (exit 1); ``sleep`` (spawn a grandchild that sleeps, record its
pid in ``child.pid``, then sleep past any timeout); ``no_output`` (exit 0, write nothing);
``nan`` (write ``value = nan``); ``spam`` (5 MB on stdout and stderr, then succeed);
``flaky`` (fail on the first attempt, succeed on the second, via a marker file);
``delete_folder`` (remove its own run folder, exit 0); ``rewrite_manifest`` (overwrite the
run folder's manifest); ``env`` (write $WINNOW_TEST_VALUE).
"""

import os
import shutil
import subprocess
import sys
import time


def main() -> int:
    deck = sys.argv[1]
    values = {}
    with open(deck) as fh:
        for line in fh:
            if "=" in line:
                name, value = line.split("=", 1)
                values[name.strip()] = value.strip()
    mode = values.get("mode", "succeed")
    x = float(values.get("x", "0"))
    print(f"fake solver: mode={mode} x={x!r}", flush=True)

    def write(value: str) -> None:
        with open("result.txt", "w") as fh:
            fh.write(f"value = {value}\n")

    if mode == "succeed":
        write(repr(2 * x))
        return 0
    if mode == "fail":
        print("fake solver: diverged", file=sys.stderr)
        return 1
    if mode == "sleep":
        child = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(120)"])
        with open("child.pid.tmp", "w") as fh:
            fh.write(str(child.pid))
        os.replace("child.pid.tmp", "child.pid")
        time.sleep(120)
        return 0
    if mode == "no_output":
        return 0
    if mode == "nan":
        write("nan")
        return 0
    if mode == "spam":
        block = ("x" * 1023 + "\n") * 1024  # 1 MiB
        for _ in range(5):
            sys.stdout.write(block)
            sys.stderr.write(block)
        print("LAST STDOUT LINE", flush=True)
        print("LAST STDERR LINE", file=sys.stderr, flush=True)
        write(repr(2 * x))
        return 0
    if mode == "flaky":
        if not os.path.exists("first-attempt.marker"):
            open("first-attempt.marker", "w").close()
            print("fake solver: first attempt fails", file=sys.stderr)
            return 1
        write(repr(2 * x))
        return 0
    if mode == "delete_folder":
        shutil.rmtree(os.path.dirname(os.path.abspath(deck)))
        return 0
    if mode == "rewrite_manifest":
        write(repr(2 * x))
        with open(
            os.path.join(os.path.dirname(os.path.abspath(deck)), "winnow-manifest.json"), "w"
        ) as fh:
            fh.write("{}")
        return 0
    if mode == "env":
        write(os.environ.get("WINNOW_TEST_VALUE", "unset"))
        return 0
    print(f"fake solver: unknown mode {mode!r}", file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(main())
