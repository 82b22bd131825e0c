"""The dispatch flow through the Prefect engine: a failing run never fails the flow."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from winnow.tasks.dispatch import DeckSpec, read_outcome, render_run

SOLVER = Path(__file__).parent / "dispatch_solvers" / "fake_solver.py"


def _specs(tmp_path: Path, modes):
    tpl = tmp_path / "templates"
    tpl.mkdir()
    (tpl / "deck.in.j2").write_text("mode = {{ mode }}\nx = {{ x }}\n")
    return [
        render_run(
            {"x": 1.0 + i},
            point_index=10 + i,
            weight=1.0 / len(modes),
            run_root=tmp_path / "runs",
            decks=DeckSpec(["deck.in.j2"], constants={"mode": mode}),
            command=[sys.executable, str(SOLVER), "{deck}"],
            template_root=tpl,
        )
        for i, mode in enumerate(modes)
    ]


def test_flow_returns_every_outcome_and_completes(prefect_harness, tmp_path):
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

    from winnow.flows.dispatch import dispatch_flow

    specs = _specs(tmp_path, ["succeed", "fail", "succeed", "succeed"])
    known = {specs[3].key: "store-rev-1"}
    seen = []
    state = dispatch_flow(
        specs,
        runner="local",
        concurrency=2,
        known_successes=known,
        on_outcome=seen.append,
        outputs=["result.txt"],
        timeout=60,
        return_state=True,
    )
    assert state.is_completed(), state
    outcomes = state.result()
    assert [o.run_id for o in outcomes] == [s.run_id for s in specs]
    assert [o.state for o in outcomes] == ["succeeded", "failed", "succeeded", "succeeded"]
    assert outcomes[1].attempts[0].exit_status == 1
    assert "diverged" in outcomes[1].attempts[0].stderr_tail
    assert outcomes[1] == read_outcome(specs[1].run_dir)  # read back from the journal
    assert outcomes[3].reused_from == "store-rev-1" and outcomes[3].attempts == ()
    assert sorted(o.run_id for o in seen) == sorted(s.run_id for s in specs)

    # One task run per point actually run, named after the point; the failing one is Failed.
    with get_client(sync_client=True) as client:
        task_runs = client.read_task_runs(
            flow_run_filter=FlowRunFilter(
                id=FlowRunFilterId(any_=[state.state_details.flow_run_id])
            )
        )
    states = {tr.name: tr.state.type.value for tr in task_runs}
    assert states == {
        f"run-{specs[0].run_id}": "COMPLETED",
        f"run-{specs[1].run_id}": "FAILED",
        f"run-{specs[2].run_id}": "COMPLETED",
    }


def test_make_task_runner_shapes():
    from prefect.task_runners import ThreadPoolTaskRunner
    from prefect_dask import DaskTaskRunner

    from winnow.flows.dispatch import make_task_runner

    local = make_task_runner("local", concurrency=3)
    assert isinstance(local, ThreadPoolTaskRunner) and local._max_workers == 3
    remote = make_task_runner({"dask": {"address": "tcp://10.0.0.1:8786"}}, concurrency=3)
    assert isinstance(remote, DaskTaskRunner) and remote.address == "tcp://10.0.0.1:8786"
    cluster = make_task_runner({"dask": {"local_cluster": {"n_workers": 2}}}, concurrency=3)
    assert isinstance(cluster, DaskTaskRunner) and cluster.cluster_kwargs["n_workers"] == 2
    with pytest.raises(ValueError, match="exactly one"):
        make_task_runner({"dask": {}}, concurrency=3)
    with pytest.raises(ValueError, match="batch runner"):
        make_task_runner({"batch": {}}, concurrency=3)
