"""`winnow rerun`: only unsuccessful runs run again; `--replace` swaps in thin-stage substitutes.

Contract of issue 5 (rerun and replace) checked against the run store's records and a log of
every solver call; the re-solved weights are checked against the thin stage's own optimal
weights for the surviving points (tests/test_thin_reweight.py checks those against the QP).
"""

from __future__ import annotations

import sys
from collections import Counter
from pathlib import Path

import numpy as np
import pytest

from winnow.tasks.store import RunStore, check

sys.path.insert(0, str(Path(__file__).parent / "study_models"))
from make_study import make_study  # noqa: E402

pytestmark = pytest.mark.slow


def _calls(folder: Path) -> Counter:
    log = folder / "runs" / "calls.log"
    return Counter(log.read_text().split()) if log.exists() else Counter()


def _first_run(folder: Path, budget: int):
    from winnow.flows.study import study_flow
    from winnow.tasks.config import load_config

    path = make_study(folder, budget=budget)
    (folder / "runs").mkdir(parents=True)
    (folder / "runs" / "FLAKY").touch()
    cfg, text = load_config(path)
    return study_flow(cfg, base_dir=str(folder), config_text=text, config_path=str(path))


def test_rerun_runs_only_what_failed(prefect_harness, tmp_path):
    from winnow.flows.rerun import rerun_flow

    folder = tmp_path / "study"
    first = _first_run(folder, budget=9)
    failed = first.counts.get("failed", 0)
    assert 0 < failed < 9, first.counts  # the test fault hits about a third of the points
    calls_before = _calls(folder)
    (folder / "runs" / "FLAKY").unlink()  # the cause is fixed
    again = rerun_flow(str(folder / "study.h5"))
    assert again.counts == {"succeeded": 9}
    with RunStore.open_read(folder / "study.h5") as store:
        specs, outcomes = store.read_runs()
        values, (est,) = store.read_results()
    new_calls = _calls(folder) - calls_before
    by_state = {o.run_id: o for o in outcomes}
    # exactly the failed runs ran again, once each; no succeeded run repeated
    assert sum(new_calls.values()) == failed
    assert all(len(by_state[r].attempts) == 1 for r in new_calls)
    assert {o.state for o in outcomes} == {"succeeded"} and len(outcomes) == 9
    assert est.n_used == 9 and {v.status for v in values} == {"ok"}
    assert check(folder / "study.h5").ok


def test_rerun_replace_swaps_failed_points_for_substitutes(prefect_harness, tmp_path):
    from winnow.flows.rerun import rerun_flow
    from winnow.tasks.thin import reweight

    folder = tmp_path / "study"
    _first_run(folder, budget=9)
    with RunStore.open_read(folder / "study.h5") as store:
        sel0 = store.read_selection()
        specs0, outcomes0 = store.read_runs()
    state0 = {o.run_id: o.state for o in outcomes0}
    failed_points = {s.point_index for s in specs0 if state0[s.run_id] != "succeeded"}
    survivors = [int(i) for i in sel0.indices if int(i) not in failed_points]
    assert failed_points and survivors
    (folder / "runs" / "FLAKY").unlink()
    calls_before = _calls(folder)
    result = rerun_flow(str(folder / "study.h5"), replace=True)
    with RunStore.open_read(folder / "study.h5") as store:
        sel = store.read_selection()
        chain = store.read_chain()
        specs, outcomes = store.read_runs()
        _, (est,) = store.read_results()
    # survivors kept first, failed points gone, substitutes are new distinct rows
    assert sel.indices[: len(survivors)].tolist() == survivors
    assert failed_points.isdisjoint(sel.indices.tolist())
    assert len(set(sel.indices.tolist())) == 9
    # only the substitutes ran
    new_calls = _calls(folder) - calls_before
    assert sum(new_calls.values()) == len(failed_points)
    # replaced runs stay recorded, with a note; the chosen points all succeeded
    states = {o.run_id: o for o in outcomes}
    replaced = [s for s in specs if s.point_index in failed_points]
    assert len(replaced) == len(failed_points)
    assert all("replaced by rerun" in states[s.run_id].message for s in replaced)
    assert result.counts == {"succeeded": 9} and est.n_used == 9
    # the store's weights are the thin stage's optimal weights for the new set
    again = reweight(chain.samples, sel, np.arange(9))
    np.testing.assert_allclose(sel.weights, again.weights, atol=1e-12)
    assert check(folder / "study.h5").ok


def test_rerun_extend_adds_points_and_runs_only_them(prefect_harness, tmp_path):
    # `winnow rerun --extend k` (issue 14): k points added by the thin stage's extend with the
    # earlier points kept first; only the new points (and any failed run) run; the weights
    # are re-solved over all points (checked against the thin stage's reweight).
    from winnow.flows.rerun import rerun_flow
    from winnow.tasks.thin import reweight

    folder = tmp_path / "study"
    _first_run(folder, budget=6)
    (folder / "runs" / "FLAKY").unlink()
    with RunStore.open_read(folder / "study.h5") as store:
        sel0 = store.read_selection()
        _, outcomes0 = store.read_runs()
    failed = sum(o.state != "succeeded" for o in outcomes0)
    calls_before = _calls(folder)
    result = rerun_flow(str(folder / "study.h5"), extend=3)
    with RunStore.open_read(folder / "study.h5") as store:
        sel = store.read_selection()
        chain = store.read_chain()
        _, outcomes = store.read_runs()
        _, (est,) = store.read_results()
    assert sel.indices[: sel0.m].tolist() == sel0.indices.tolist()
    assert sel.m >= sel0.m + 1 and len(set(sel.indices.tolist())) == sel.m
    new_calls = _calls(folder) - calls_before
    assert sum(new_calls.values()) == (sel.m - sel0.m) + failed
    assert result.counts == {"succeeded": sel.m} and est.n_used == sel.m
    again = reweight(chain.samples, sel, np.arange(sel.m))
    np.testing.assert_allclose(sel.weights, again.weights, atol=1e-12)
    assert check(folder / "study.h5").ok
    with pytest.raises(ValueError, match="extend: expected a whole number"):
        rerun_flow.fn(str(folder / "study.h5"), extend=-1)
