"""One contract for every runner: the same specs end in the same states.

Runs real solver processes through :class:`LocalRunner`, :class:`DaskRunner` on a
``distributed.LocalCluster`` with two worker processes, and :class:`BatchRunner` with a fake
``sbatch`` on PATH that runs the job script in the background.
"""

from __future__ import annotations

import os
import shutil
import stat
import sys
from pathlib import Path

import pytest

from winnow.tasks.dispatch import (
    BatchRunner,
    DaskRunner,
    DeckSpec,
    LocalRunner,
    dispatch,
    make_runner,
    render_run,
)

SOLVER = Path(__file__).parent / "dispatch_solvers" / "fake_solver.py"

# mode -> (expected state, expected attempts) with retries=1 and a 1.5 s timeout.
CASES = {
    "succeed": ("succeeded", 1),
    "fail": ("failed", 2),
    "no_output": ("output_missing", 2),
    "flaky": ("succeeded", 2),
    "sleep": ("timed_out", 2),
    # exits 0 with its output but rewrites the folder winnow rendered: not trusted (the
    # manifest check after a run, the same on every runner)
    "rewrite_manifest": ("output_missing", 2),
}

FAKE_SBATCH = """#!/bin/sh
# Stand-in for Slurm's sbatch: run the job script in the background, print a job id.
nohup /bin/bash "$1" > /dev/null 2>&1 &
echo "Submitted batch job $!"
"""


@pytest.fixture(scope="module")
def dask_address():
    distributed = pytest.importorskip("distributed")
    cluster = distributed.LocalCluster(
        n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0"
    )
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()


@pytest.fixture
def fake_sbatch(tmp_path, monkeypatch):
    if shutil.which("timeout") is None:
        pytest.skip("coreutils timeout not available")
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    script = bin_dir / "sbatch"
    script.write_text(FAKE_SBATCH)
    script.chmod(script.stat().st_mode | stat.S_IXUSR | stat.S_IXGRP | stat.S_IXOTH)
    monkeypatch.setenv("PATH", f"{bin_dir}{os.pathsep}{os.environ['PATH']}")
    return script


def _specs(tmp_path: Path):
    tpl = tmp_path / "templates"
    tpl.mkdir()
    (tpl / "deck.in.j2").write_text("mode = {{ mode }}\nx = {{ x }}\n")
    return [
        render_run(
            {"x": 0.25 * (i + 1)},
            point_index=i,
            weight=0.2,
            run_root=tmp_path / "runs",
            decks=DeckSpec(["deck.in.j2"], constants={"mode": mode}),
            command=[sys.executable, str(SOLVER), "{deck}"],
            template_root=tpl,
        )
        for i, mode in enumerate(CASES)
    ]


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["local", "dask", "batch"])
def test_runner_contract(kind, tmp_path, request):
    if kind == "local":
        runner = LocalRunner(concurrency=3)
    elif kind == "dask":
        runner = DaskRunner(address=request.getfixturevalue("dask_address"))
    else:
        request.getfixturevalue("fake_sbatch")
        runner = BatchRunner(poll_interval=0.1, concurrency=5)
    specs = _specs(tmp_path)
    seen = []
    outs = dispatch(
        specs,
        runner=runner,
        # long enough for a Python solver to start on a loaded 2-core machine (1.5 s was
        # not: a quick mode then timed out), short enough for the sleeping mode
        timeout=6.0,
        retries=1,
        kill_grace=0.5,
        outputs=["result.txt"],
        on_outcome=seen.append,
    )
    assert [o.run_id for o in outs] == [s.run_id for s in specs]
    assert sorted(o.run_id for o in seen) == sorted(s.run_id for s in specs)
    for mode, out in zip(CASES, outs, strict=True):
        state, n_attempts = CASES[mode]
        assert (out.state, len(out.attempts)) == (state, n_attempts), (mode, out)
    by_mode = dict(zip(CASES, outs, strict=True))
    assert by_mode["fail"].attempts[-1].exit_status == 1
    assert "diverged" in by_mode["fail"].attempts[-1].stderr_tail
    assert all(a.timed_out for a in by_mode["sleep"].attempts)
    # The solver writes value = 2*x: the output hash is the same whichever runner ran it.
    import hashlib  # reference library

    assert by_mode["succeed"].output_hashes == {
        "result.txt": hashlib.sha256(f"value = {2 * 0.25!r}\n".encode()).hexdigest()
    }
    # The grandchild of the timed-out run is gone on every runner (process group killed).
    import psutil

    child = int((specs[4].run_dir / "child.pid").read_text())
    try:
        assert psutil.Process(child).status() == psutil.STATUS_ZOMBIE
    except psutil.NoSuchProcess:
        pass


def test_batch_job_script_from_replaceable_template(tmp_path, fake_sbatch):
    specs = _specs(tmp_path)[:1]
    custom = tmp_path / "my_job.sh.j2"
    custom.write_text(
        "#!/bin/bash\n# site {{ job_name }}\ncd {{ cwd | q }}\n"
        "{{ command }} > {{ stdout | q }} 2> {{ stderr | q }}\n"
        "printf 'exit_status=%s\\n' $? > {{ marker_tmp | q }}; mv {{ marker_tmp | q }} {{ marker | q }}\n"
    )
    runner = BatchRunner(template=custom, poll_interval=0.05, directives=["--partition=x"])
    outs = dispatch(specs, runner=runner, outputs=["result.txt"])
    assert outs[0].state == "succeeded"
    script = (specs[0].run_dir / "winnow-job.sh").read_text()
    assert f"# site winnow-{specs[0].run_id}" in script

    default = BatchRunner(directives=["--partition=short"]).render_job_script(
        specs[0], make_options(timeout=3600)
    )
    assert "#SBATCH --partition=short" in default
    # 3600 s + 5 s grace + 60 s margin = 01:01:05 (Slurm --time format HH:MM:SS, common practice)
    assert "#SBATCH --time=01:01:05" in default
    assert "timeout --kill-after=5 3600 " in default


def make_options(**kw):
    from winnow.tasks.dispatch import RunOptions

    return RunOptions(**kw)


def test_batch_submission_failure_is_a_failed_run(tmp_path):
    specs = _specs(tmp_path)[:1]
    runner = BatchRunner(submit=["false"], poll_interval=0.05)
    (out,) = dispatch(specs, runner=runner, retries=2)
    assert out.state == "failed" and "submission failed" in out.message
    assert len(out.attempts) == 1


@pytest.mark.parametrize(
    ("value", "cls", "attrs"),
    [
        ("local", LocalRunner, {"concurrency": 3}),
        (None, LocalRunner, {"concurrency": 3}),
        (
            {"dask": {"address": "tcp://10.0.0.1:8786"}},
            DaskRunner,
            {"address": "tcp://10.0.0.1:8786"},
        ),
        (
            {"dask": {"local_cluster": {"n_workers": 2}}},
            DaskRunner,
            {"local_cluster": {"n_workers": 2}},
        ),
        ({"batch": {"poll_interval": 30}}, BatchRunner, {"poll_interval": 30.0}),
    ],
)
def test_make_runner_shapes(value, cls, attrs):
    runner = make_runner(value, concurrency=3)
    assert type(runner) is cls
    for name, expected in attrs.items():
        assert getattr(runner, name) == expected


@pytest.mark.parametrize(
    ("value", "match"),
    [
        ("cloud", "valid"),
        ("dask", "needs options"),
        ({"dask": {"address": "a", "local_cluster": {}}}, "exactly one"),
        ({"dask": {"addr": "a"}}, "valid"),
        ({"local": {}, "dask": {}}, "one of"),
        ({"batch": {"sumbit": ["x"]}}, "valid"),
        (42, "string or a dict"),
    ],
)
def test_make_runner_rejects_other_shapes(value, match):
    with pytest.raises((ValueError, TypeError), match=match):
        make_runner(value, concurrency=2)


def test_dask_runner_starts_and_closes_its_own_cluster(tmp_path):
    pytest.importorskip("distributed")
    # In-process workers keep this quick; the contract test above uses worker processes.
    runner = make_runner(
        {"dask": {"local_cluster": {"n_workers": 1, "processes": False}}}, concurrency=1
    )
    specs = [s for s in _specs(tmp_path) if "p000000" in s.run_id or "p000001" in s.run_id]
    outs = dispatch(specs, runner=runner, outputs=["result.txt"])
    assert [o.state for o in outs] == ["succeeded", "failed"]
    from distributed import Client

    with pytest.raises(ValueError, match="No clients found"):
        Client.current()  # nothing left registered as the default client


def test_interrupted_batch_dispatch_returns_at_once(tmp_path, fake_sbatch):
    from winnow.tasks.dispatch import RunOptions, read_outcome

    specs = _specs(tmp_path)
    quick, sleeper = specs[0], specs[4]
    # cancel=["true"]: the fake scheduler has no scancel; the job's own 3 s timeout ends it.
    runner = BatchRunner(poll_interval=0.05, concurrency=2, cancel=["true"])
    gen = runner._iter_outcomes([quick, sleeper], RunOptions(timeout=3, kill_grace=0.5))
    spec, outcome = next(gen)
    assert spec == quick and outcome.state == "succeeded"
    gen.close()  # what Ctrl-C in the dispatcher does to the generator
    journal = read_outcome(sleeper.run_dir)
    assert journal.state == "not_run" and journal.message.startswith("interrupted"), journal
    marker = sleeper.run_dir / "winnow-exit-status"
    import time

    deadline = time.monotonic() + 30  # let the job end under its own timeout (no leftovers)
    while not marker.exists() and time.monotonic() < deadline:
        time.sleep(0.1)
    assert "timed_out=1" in marker.read_text()
