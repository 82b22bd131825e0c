"""End to end: the whole study flow on a small version of the aquifer demo.

Runs sample -> thin -> dispatch -> collect through Prefect (session test harness) with real
solver processes, then checks the run store's contents against direct evaluations: the
estimate is recomputed from the run folders' outputs and the chosen weights, one chosen point
is re-run by hand, the hashes are recomputed, and a second run of the same config repeats
nothing. Checks whose reference is a closed form name it; the rest compare against a direct
recomputation outside the flow.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from winnow.tasks.config import parse_config
from winnow.tasks.store import RunStore, check

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "configs" / "aquifer_demo.yaml"

pytestmark = pytest.mark.slow


def small_demo(tmp: Path, **changes) -> tuple[Path, dict]:
    """The demo config made small: 5 points, shorter chains, the solver's coarse grid."""
    data = yaml.safe_load(DEMO.read_text())
    data["budget"] = 5
    data["store"] = str(tmp / "study.h5")
    data["run_root"] = str(tmp / "runs")
    data["sample"]["draws"] = 6000
    data["sample"]["observations"]["file"] = str(ROOT / "examples/aquifer/data/observations.csv")
    data["dispatch"]["template_dir"] = str(ROOT / "examples/aquifer/templates")
    data["dispatch"]["constants"]["grid"] = "coarse"
    data["collect"]["bootstrap"] = 200
    for dotted, value in changes.items():
        node = data
        *head, last = dotted.split(".")
        for k in head:
            node = node[k]
        node[last] = value
    path = tmp / "study.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path, data


def run_study(path: Path):
    from winnow.flows.study import study_flow

    text = path.read_text()
    cfg = parse_config(yaml.safe_load(text), source=str(path))
    return study_flow(cfg, base_dir=str(path.parent), config_text=text, config_path=str(path))


@pytest.fixture(scope="module")
def finished_study(tmp_path_factory, prefect_harness):
    tmp = tmp_path_factory.mktemp("e2e")
    path, data = small_demo(tmp)
    result = run_study(path)
    return tmp, path, data, result


def test_store_holds_every_stage(finished_study):
    tmp, path, data, result = finished_study
    assert result.revision == "r0001"
    assert result.counts == {"succeeded": 5}
    with RunStore.open_read(tmp / "study.h5") as store:
        assert store.revisions() == ["r0001"]
        assert store.stages_done("r0001") == {"chain", "selection", "runs", "results"}
        chain = store.read_chain()
        sel = store.read_selection()
        specs, outcomes = store.read_runs()
        values, estimates = store.read_results()
        prov = store.read_provenance()
        assert store.read_config_text() == path.read_text()
    # chain: 4 chains x 3000 kept draws (burn-in: first half), parameters as configured
    assert chain.names == ("log10_T", "log10_S")
    assert chain.samples.shape == (4 * 3000, 2)
    assert chain.diagnostics is not None and chain.diagnostics.passed
    # the calibration recovers the invented true values (make_data.py: T = 5e-3 m2/s,
    # S = 2e-4) within a 99.9 % posterior interval
    lo, hi = np.quantile(chain.samples, [0.0005, 0.9995], axis=0)
    truth = np.log10([5e-3, 2e-4])
    assert np.all((lo <= truth) & (truth <= hi)), (lo, hi, truth)
    # selection: distinct rows, weights on the simplex, points are those rows
    assert sel.m == 5 and len(set(sel.indices.tolist())) == 5
    assert np.all(sel.weights >= 0) and sel.weights.sum() == pytest.approx(1.0, abs=1e-12)
    np.testing.assert_array_equal(sel.points, chain.samples[sel.indices])
    # runs: one per point, succeeded, decks on disk hash to what the store says
    assert [s.point_index for s in specs] == sel.indices.tolist()
    assert {o.state for o in outcomes} == {"succeeded"}
    for s in specs:
        for rel, digest in s.deck_hashes.items():
            assert hashlib.sha256((s.run_dir / rel).read_bytes()).hexdigest() == digest
    # provenance: the config hash is the SHA-256 of the file's text
    assert prov["config_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert prov["winnow_version"]
    assert check(tmp / "study.h5").ok
    # results: one value per run, all read
    assert len(values) == 5 and {v.status for v in values} == {"ok"}
    assert [e.name for e in estimates] == ["drawdown_spring"]


def test_estimate_matches_direct_evaluation(finished_study):
    tmp, _, _, result = finished_study
    with RunStore.open_read(tmp / "study.h5") as store:
        sel = store.read_selection()
        specs, _ = store.read_runs()
        _, (est,) = store.read_results()
    # direct: read each run folder's result.json and weight it by the chosen weights
    q = np.array(
        [
            json.loads((s.run_dir / "result.json").read_text())["qoi"]["drawdown_spring"]
            for s in specs
        ]
    )
    w = sel.weights
    mean = float(np.sum(w * q))
    sd = float(np.sqrt(np.sum(w * (q - mean) ** 2)))
    assert float(est.mean) == pytest.approx(mean, rel=1e-12)
    assert float(est.sd) == pytest.approx(sd, rel=1e-9, abs=1e-15)
    assert result.estimates["drawdown_spring"]["mean"] == pytest.approx(mean, rel=1e-12)
    assert 0.0 < mean < 5.0


def _theis_drawdown(theta: np.ndarray) -> np.ndarray:
    """Cheap model recomputed outside winnow: Theis (1935) drawdown at the spring ignoring
    the river, s = Q / (4 pi T) W(u), u = r^2 S / (4 T t), with W = E1 from scipy.special.exp1
    (the scenario of configs/aquifer_demo.yaml: Q = 0.02 m3/s, spring at (400, 300) m,
    t = 30 days)."""
    from scipy.special import exp1

    t_m2s, s = 10.0 ** theta[:, 0], 10.0 ** theta[:, 1]
    r, q, t = np.hypot(400.0, 300.0), 0.02, 30.0 * 86400.0
    return q / (4.0 * np.pi * t_m2s) * exp1(r * r * s / (4.0 * t_m2s * t))


def test_multi_fidelity_estimate_matches_direct_computation(finished_study):
    """The control-variate estimate (Peherstorfer, Willcox & Gunzburger 2016, discrepancy
    form with coefficient 1): the chain mean of the cheap model over the stored chain plus
    the weighted mean of (costly - cheap) at the chosen points, recomputed here from the
    store's chain and selection, the run folders' outputs and an independent cheap model."""
    tmp, _, _, result = finished_study
    with RunStore.open_read(tmp / "study.h5") as store:
        chain = store.read_chain()
        sel = store.read_selection()
        specs, _ = store.read_runs()
        _, (est,) = store.read_results()
    assert [s.point_index for s in specs] == sel.indices.tolist()  # weights line up with runs
    costly = np.array(
        [
            json.loads((s.run_dir / "result.json").read_text())["qoi"]["drawdown_spring"]
            for s in specs
        ]
    )
    cheap_chain = _theis_drawdown(chain.samples)
    cheap_points = cheap_chain[sel.indices]
    w = sel.weights
    chain_mean = float(np.mean(cheap_chain))
    expected = chain_mean + float(np.sum(w * (costly - cheap_points)))
    # Tolerance: scipy's exp1 and winnow's own E1 (examples/aquifer/theis.py) agree to 6e-14
    # relative on u in [1e-8, 30] (measured when this test was written); the summations of
    # 12,000 chain rows add at most n * eps = 2.7e-12 relative (Higham 2002, sec. 4.2).
    # 1e-10 of the drawdown covers both with margin, and is many orders below the size of the
    # correction checked next, so a wrong formula cannot pass.
    tol = 1e-10 * float(np.max(np.abs(cheap_chain)))
    cv = est.control_variate
    assert cv is not None
    assert float(cv["mean"]) == pytest.approx(expected, abs=tol)
    assert float(cv["cheap_chain_mean"]) == pytest.approx(chain_mean, abs=tol)
    assert result.estimates["drawdown_spring"]["control_variate"]["mean"] == pytest.approx(
        expected, abs=tol
    )
    # the river supplies water, so the costly drawdown is below the cheap Theis prediction
    # that ignores it (method of images, Ferris et al. 1962): the correction moves the
    # estimate down from the cheap model's chain mean, by far more than the tolerance
    assert np.all(costly < cheap_points)
    assert chain_mean - float(cv["mean"]) > 1e6 * tol
    # and it is not the plain weighted mean of the costly runs (the thinning gap of the
    # cheap model separates the two)
    gap = float(np.sum(w * cheap_points)) - chain_mean
    assert abs(gap) > 1e3 * tol
    assert abs(float(cv["mean"]) - float(np.sum(w * costly))) > 1e3 * tol


def test_one_point_rerun_by_hand_gives_the_stored_value(finished_study, tmp_path):
    tmp, _, _, _ = finished_study
    with RunStore.open_read(tmp / "study.h5") as store:
        specs, _ = store.read_runs()
        values, _ = store.read_results()
    spec = specs[0]
    deck = tmp_path / "deck.txt"
    deck.write_bytes((spec.run_dir / "aquifer.deck").read_bytes())
    subprocess.run(
        [sys.executable, "-m", "winnow.examples.aquifer.solver", str(deck)],
        cwd=tmp_path,
        check=True,
        capture_output=True,
    )
    direct = json.loads((tmp_path / "result.json").read_text())["qoi"]["drawdown_spring"]
    stored = next(v for v in values if v.run_id == spec.run_id)
    assert float(stored.value) == direct  # same deck, same deterministic solver: bit-equal


def test_second_run_of_same_config_repeats_nothing(finished_study):
    tmp, path, _, first = finished_study
    mtimes = {p: p.stat().st_mtime_ns for p in (tmp / "runs").rglob("winnow-outcome.json")}
    again = run_study(path)
    assert again.revision == "r0001" and again.up_to_date
    assert again.estimates == first.estimates
    assert {p: p.stat().st_mtime_ns for p in (tmp / "runs").rglob("winnow-outcome.json")} == mtimes


def test_artifacts_appear_with_stable_keys(finished_study):
    """Prefect artifacts of the flow run, read back from the API by their keys."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

    keys = [
        "aquifer-demo-chain-diagnostics",
        "aquifer-demo-chosen-points",
        "aquifer-demo-runs-progress",
        "aquifer-demo-run-outcomes",
        "aquifer-demo-estimates",
        "aquifer-demo-estimates-table",
    ]
    tmp = finished_study[0]
    with RunStore.open_read(tmp / "study.h5") as store:
        flow_run_id = store.read_provenance()["flow_run_id"]
    with get_client(sync_client=True) as client:
        found = client.read_artifacts(
            artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=keys))
        )
    # other tests of the session run studies of the same name (some interrupted part-way):
    # only the artifacts of this study's flow run count
    by_key = {}
    for a in found:
        if str(a.flow_run_id) == flow_run_id:
            by_key.setdefault(a.key, a)
    assert set(by_key) == set(keys)
    assert by_key["aquifer-demo-runs-progress"].data == 100.0
    points = json.loads(by_key["aquifer-demo-chosen-points"].data)
    assert len(points) == 5
    assert "drawdown_spring" in by_key["aquifer-demo-estimates"].data
    assert "licensed" in by_key["aquifer-demo-estimates"].data  # the caution travels with it


def test_run_names_show_study_revision_and_point(finished_study):
    """Flow and task runs in the Prefect API carry the study, the revision and point ids."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

    tmp, _, _, _ = finished_study
    with RunStore.open_read(tmp / "study.h5") as store:
        flow_run_id = store.read_provenance("r0001")["flow_run_id"]
        specs, _ = store.read_runs("r0001")
    with get_client(sync_client=True) as client:
        run = client.read_flow_run(flow_run_id)
        tasks = client.read_task_runs(
            flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[run.id]))
        )
        solver_runs = client.read_task_runs()
    assert run.name == "aquifer-demo-r0001"
    names = {t.name for t in tasks}
    assert {
        "sample-aquifer-demo-r0001",
        "thin-aquifer-demo-r0001",
        "collect-aquifer-demo-r0001",
    } <= names
    assert {f"run-{s.run_id}" for s in specs} <= {t.name for t in solver_runs}
