"""Run the ``winnow`` command line, pausing at a chosen point so a test can SIGKILL it there.

Usage: ``python pause_driver.py WHERE MARKER winnow-args...``. When the process reaches
WHERE it writes its pid to MARKER and sleeps (the test kills it); otherwise it is exactly
``winnow winnow-args...``. WHERE is one of

``checkpoint``  just after the sampler's first checkpoint was committed to the store
``thin``        when the thin stage starts (the process is inside the thin task)
``runs-commit`` inside the commit that records the runs, after the change was applied to the
                temporary copy and before it replaces the store (``_store.commit_hook``)
``none``        never
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path


def main() -> None:
    where, marker = sys.argv[1], Path(sys.argv[2])

    def reached() -> None:
        marker.write_text(str(os.getpid()))
        time.sleep(600)  # the test kills the process here

    from winnow.tasks import prefect_tasks
    from winnow.tasks.store import RunStoreWriter
    from winnow.tasks.store import _core as _store

    if where == "checkpoint":
        save = RunStoreWriter.save_checkpoint

        def save_then_pause(self, *args, **kwargs):
            save(self, *args, **kwargs)
            reached()

        RunStoreWriter.save_checkpoint = save_then_pause
    elif where == "thin":
        thin_stage = prefect_tasks.thin_stage

        def pause_in_thin(*args, **kwargs):
            reached()
            return thin_stage(*args, **kwargs)

        prefect_tasks.thin_stage = pause_in_thin
    elif where == "runs-commit":
        write_runs = RunStoreWriter.write_runs
        armed = []

        def arm(self, *args, **kwargs):
            armed.append(True)
            return write_runs(self, *args, **kwargs)

        def hook(step: str) -> None:
            if armed and step == "applied":
                reached()

        RunStoreWriter.write_runs = arm
        _store.commit_hook = hook
    elif where != "none":
        raise SystemExit(f"pause_driver: unknown WHERE {where!r}")

    from winnow.flows.cli import app

    sys.argv = ["winnow", *sys.argv[3:]]
    app()


if __name__ == "__main__":
    main()
