"""``winnow check/trace/status/diff``: exit codes, JSON shapes and the lineage they show.

Expected values are the records written by hand below; hashes are checked against
``hashlib.sha256`` (Python standard library).
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest
from typer.testing import CliRunner

from winnow.flows.cli import app
from winnow.tasks.records import (
    Attempt,
    Chain,
    QoIEstimate,
    QoIValue,
    RunOutcome,
    RunSpec,
    Selection,
)
from winnow.tasks.store import RunStore, check, diff, status, trace

runner = CliRunner()


def _write_revision(w, obs_file: Path, config: str, shift: float, *, reuse: bool) -> str:
    g = np.random.default_rng(int(shift * 10))
    n = 30
    chain = Chain(
        g.normal(size=(n, 2)) + shift,
        ("K", "S"),
        ("m/s", "1"),
        np.repeat([0, 1], n // 2).astype(np.int64),
        np.tile(np.arange(n // 2), 2).astype(np.int64),
        g.normal(size=n),
        "sampled:metropolis",
    )
    rev = w.new_revision(
        config,
        inputs={"observations": obs_file},
        observations={"t": np.array([0.0, 60.0]), "h": np.array([1.0, 1.5 + shift])},
        flow_run_id=f"flow-{config}",
    )
    w.write_chain(rev, chain)
    idx = np.array([4, 11, 20])
    sel = Selection(
        idx,
        np.array([0.5, 0.3, 0.2]),
        chain.samples[idx],
        "greedy",
        "simplex",
        "gaussian",
        0.8,
        "rff",
        256,
        11,
        1e-3,
        2e-3,
        n,
    )
    w.write_selection(rev, sel)
    specs, outcomes, values = [], [], []
    for k, (i, wt) in enumerate(zip(idx, sel.weights, strict=True)):
        rid = f"p{i:06d}-{k:08x}"
        key = hashlib.sha256(f"{i}".encode()).hexdigest()
        specs.append(
            RunSpec(
                rid,
                int(i),
                {"K": float(chain.samples[i, 0])},
                float(wt),
                Path(f"/runs/{rid}"),
                ("solver", "deck.in"),
                {"deck.in": hashlib.sha256(rid.encode()).hexdigest()},
                key,
            )
        )
        if k == 2:
            att = (Attempt(1, ("solver", "deck.in"), 100.0, 130.0, 3, False, "", "boom"),)
            outcomes.append(
                RunOutcome(rid, key, "failed", att, Path(f"/runs/{rid}"), message="exit status 3")
            )
            values.append(QoIValue(rid, "drawdown", np.array(np.nan), "run_failed", "failed"))
        elif reuse:
            outcomes.append(
                RunOutcome(
                    rid, key, "succeeded", (), Path(f"/runs/{rid}"), reused_from=f"r0001/{rid}"
                )
            )
            values.append(QoIValue(rid, "drawdown", np.array(2.0 + k), "ok"))
        else:
            att = (Attempt(1, ("solver", "deck.in"), 1000.0 + k, 1010.5 + k, 0, False, "ok", ""),)
            outcomes.append(
                RunOutcome(rid, key, "succeeded", att, Path(f"/runs/{rid}"), {"out.csv": "e" * 64})
            )
            values.append(QoIValue(rid, "drawdown", np.array(2.0 + k), "ok"))
    w.write_runs(rev, specs, outcomes)
    est = QoIEstimate(
        "drawdown",
        "m",
        np.array(2.0 + shift),
        np.array(0.4),
        {0.5: np.array(2.1)},
        {3.0: np.array(0.1)},
        {"bootstrap_se": np.array(0.05)},
        None,
        2,
        1,
    )
    w.write_results(rev, values, [est])
    return rev


@pytest.fixture(scope="module")
def two_revisions(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    d = tmp_path_factory.mktemp("cli")
    p = d / "study.h5"
    obs = d / "obs.csv"
    obs.write_text("t,h\n0,1.0\n60,1.5\n")
    RunStore.create(p, "cli study")
    with RunStore.open_for_write(p) as w:
        _write_revision(w, obs, "v: 1", 0.0, reuse=False)
        obs.write_text("t,h\n0,1.0\n60,2.0\n")
        _write_revision(w, obs, "v: 2", 0.5, reuse=True)
    return p, obs


def test_check_exit_codes(two_revisions: tuple[Path, Path], tmp_path: Path) -> None:
    p, _ = two_revisions
    res = runner.invoke(app, ["check", str(p)])
    assert res.exit_code == 0, res.output
    assert "intact (2 revision(s)" in res.stdout
    damaged = tmp_path / "damaged.h5"
    damaged.write_bytes(p.read_bytes())
    with h5py.File(damaged, "r+") as f:
        f["revisions/r0001/selection/weights"][0] = 0.9
        f["revisions/r0002/results/values/value_data"][0] = 7.0
    res = runner.invoke(app, ["check", str(damaged)])
    assert res.exit_code == 1
    lines = res.stdout.strip().splitlines()
    assert len(lines) == len(check(damaged).problems) >= 2  # one line per problem
    assert any("/revisions/r0001/selection/weights: data do not match" in x for x in lines)
    assert any("/revisions/r0002/results/values/value_data" in x for x in lines)
    as_json = runner.invoke(app, ["check", str(damaged), "--json"])
    assert as_json.exit_code == 1
    assert json.loads(as_json.stdout)["problems"] == check(damaged).problems
    missing = runner.invoke(app, ["check", str(tmp_path / "nope.h5")])
    assert missing.exit_code == 2 and "does not exist" in missing.stderr
    junk = tmp_path / "junk.h5"
    junk.write_text("not hdf5")
    assert runner.invoke(app, ["check", str(junk)]).exit_code == 2
    newer = tmp_path / "newer.h5"
    newer.write_bytes(p.read_bytes())
    with h5py.File(newer, "r+") as f:
        f.attrs["schema_version"] = 2
    res = runner.invoke(app, ["check", str(newer)])
    assert res.exit_code == 2 and "schema version 2" in res.stderr


def test_status_json_shape(two_revisions: tuple[Path, Path]) -> None:
    p, _ = two_revisions
    res = runner.invoke(app, ["status", str(p), "--json", "--revision", "r0001"])
    assert res.exit_code == 0, res.output
    st = json.loads(res.stdout)
    assert set(st) == {"counts", "runs", "chain"}
    assert st["counts"] == {
        "succeeded": 2,
        "failed": 1,
        "timed_out": 0,
        "output_missing": 0,
        "not_run": 0,
    }
    keys = {"id", "state", "attempts", "seconds", "message", "stderr_tail", "stderr_log"}
    assert [set(r) for r in st["runs"]] == [keys] * 3
    assert st["runs"][0] == {
        "id": "p000004-00000000",
        "state": "succeeded",
        "attempts": 1,
        "seconds": 10.5,
        "message": "",
        "stderr_tail": "",
        "stderr_log": None,
    }
    assert st["runs"][2] == {
        "id": "p000020-00000002",
        "state": "failed",
        "attempts": 1,
        "seconds": 30.0,
        "message": "exit status 3",
        "stderr_tail": "boom",
        "stderr_log": "/runs/p000020-00000002/winnow-stderr.txt",
    }
    assert st == status(p, "r0001")
    latest = json.loads(runner.invoke(app, ["status", str(p), "--json"]).stdout)
    assert latest["runs"][0]["attempts"] == 0  # r0002 reused it
    table = runner.invoke(app, ["status", str(p)])
    assert table.exit_code == 0 and "p000011-00000001" in table.stdout
    bad = runner.invoke(app, ["status", str(p), "--revision", "r0042"])
    assert bad.exit_code == 2 and "r0042" in bad.stderr


def test_trace_lineage_of_a_run(two_revisions: tuple[Path, Path]) -> None:
    p, obs = two_revisions
    res = runner.invoke(app, ["trace", str(p), "p000011-00000001", "-r", "1", "--json"])
    assert res.exit_code == 0, res.output
    t = json.loads(res.stdout)
    assert t["revision"] == "r0001"
    assert t["inputs"]["observations"]["path"] == str(obs.resolve())
    # the first revision's observation file held the old bytes
    assert t["observations"]["file_sha256"] == hashlib.sha256(b"t,h\n0,1.0\n60,1.5\n").hexdigest()
    assert t["chain"]["row"] == 11 and t["chain"]["chain_index"] == 0
    assert t["chain"]["draw_index"] == 11 and t["chain"]["values"]["K"]["units"] == "m/s"
    assert t["selection"] == {
        **t["selection"],
        "selected": True,
        "position": 1,
        "weight": 0.3,
        "method": "greedy",
        "seed": 11,
    }
    assert t["run"]["decks"] == [
        {
            "path": "deck.in",
            "sha256": hashlib.sha256(b"p000011-00000001").hexdigest(),
            "file": "/runs/p000011-00000001/deck.in",
        }
    ]
    assert t["attempts"][0]["argv"] == ["solver", "deck.in"]
    assert t["attempts"][0]["exit_status"] == 0 and t["attempts"][0]["started"] == 1001.0
    assert t["qoi"] == [
        {"name": "drawdown", "value": 3.0, "units": "m", "status": "ok", "reason": ""}
    ]
    assert t["provenance"]["flow_run_id"] == "flow-v: 1"
    assert t == json.loads(json.dumps(trace(p, "p000011-00000001", revision=1)))


def test_trace_by_row_and_reused_origin(two_revisions: tuple[Path, Path]) -> None:
    p, _ = two_revisions
    t = trace(p, 4)  # latest revision, chain row 4 was chosen there too
    assert t["revision"] == "r0002"
    assert t["run"]["run_id"] == "p000004-00000000" and t["run"]["reused_from"] == (
        "r0001/p000004-00000000"
    )
    assert t["origin"]["found"] and t["origin"]["attempts"][0]["ended"] == 1010.5
    unchosen = trace(p, "5")
    assert unchosen["selection"]["selected"] is False and unchosen["run"] is None
    res = runner.invoke(app, ["trace", str(p), "p000020-00000002"])
    assert res.exit_code == 0 and "exit status 3" in res.stdout and "[run_failed]" in res.stdout
    assert runner.invoke(app, ["trace", str(p), "nosuchrun"]).exit_code == 2
    assert runner.invoke(app, ["trace", str(p), "999"]).exit_code == 2


def test_trace_accepts_the_start_of_a_run_id(two_revisions: tuple[Path, Path]) -> None:
    """Tables show run ids shortened to the point (p000011); trace takes that prefix when
    exactly one run id of the revision starts with it (issue 17 item 11)."""
    p, _ = two_revisions
    res = runner.invoke(app, ["trace", str(p), "p000011", "-r", "1", "--json"])
    assert res.exit_code == 0, res.output
    t = json.loads(res.stdout)
    assert t["revision"] == "r0001" and t["run"]["run_id"] == "p000011-00000001"
    assert t == json.loads(json.dumps(trace(p, "p000011-00000001", revision=1)))
    # without -r: the newest revision holding it, as for a whole id
    assert trace(p, "p00002")["run"]["run_id"] == "p000020-00000002"
    assert trace(p, "p00002")["revision"] == "r0002"
    table = runner.invoke(app, ["trace", str(p), "p000020"])
    assert table.exit_code == 0 and "run p000020-00000002: failed" in table.stdout
    # every run id of the fixture starts with p0000: refused, naming the candidates
    amb = runner.invoke(app, ["trace", str(p), "p0000"])
    assert amb.exit_code == 2 and amb.stdout == ""
    assert "r0002" in amb.stderr and "3 run ids" in amb.stderr
    for rid in ("p000004-00000000", "p000011-00000001", "p000020-00000002"):
        assert rid in amb.stderr
    none = runner.invoke(app, ["trace", str(p), "p0001"])
    assert none.exit_code == 2 and "'p0001'" in none.stderr
    assert trace(p, "11")["chain"]["row"] == 11  # digits still name a chain row


@pytest.fixture
def failed_run_store(tmp_path: Path) -> tuple[Path, Path]:
    """A store holding one real solver run that failed twice (exit 3), 40 stderr lines each."""
    from winnow.tasks.dispatch import run_one

    run_dir = tmp_path / "runs" / "p000001-0000abcd"
    run_dir.mkdir(parents=True)
    script = (
        "import os, sys\n"
        "n = 2 if os.path.exists('winnow-stderr.attempt1.txt') else 1\n"
        "for i in range(1, 41):\n"
        "    print(f'attempt {n} line {i}', file=sys.stderr)\n"
        "sys.exit(3)\n"
    )
    argv = (sys.executable, "-c", script)
    spec = RunSpec("p000001-0000abcd", 1, {"K": 0.5}, 1.0, run_dir, argv, {}, "a" * 64)
    outcome = run_one(spec, retries=1, timeout=60, journal=False)
    assert outcome.state == "failed" and len(outcome.attempts) == 2
    g = np.random.default_rng(0)
    chain = Chain(
        g.normal(size=(10, 1)), ("K",), ("m/s",), np.zeros(10, np.int64),
        np.arange(10, dtype=np.int64), g.normal(size=10), "sampled:metropolis",
    )  # fmt: skip
    sel = Selection(
        np.array([1]), np.array([1.0]), chain.samples[[1]], "greedy", "simplex", "gaussian",
        0.8, "rff", 16, 1, 0.0, 0.0, 10,
    )  # fmt: skip
    store = tmp_path / "study.h5"
    RunStore.create(store, "failing study")
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("v: 1")
        w.write_chain(rev, chain)
        w.write_selection(rev, sel)
        w.write_runs(rev, [spec], [outcome])
    return store, run_dir


def _lines(text: str) -> list[str]:
    return [ln.strip() for ln in text.splitlines()]


def test_status_and_trace_show_why_a_run_failed(failed_run_store: tuple[Path, Path]) -> None:
    """A failed run shows its last stderr lines and where the full log is (issue 17 item 4),
    not only "exit status 3". The expected lines are the ones the solver printed."""
    store, run_dir = failed_run_store
    last = [f"attempt 2 line {i}" for i in range(31, 41)]  # the last 10 of 40 lines
    log2, log1 = run_dir / "winnow-stderr.txt", run_dir / "winnow-stderr.attempt1.txt"
    # the logs named are the solver's whole streams, as it wrote them
    assert log2.read_text().splitlines() == [f"attempt 2 line {i}" for i in range(1, 41)]
    assert log1.read_text().splitlines() == [f"attempt 1 line {i}" for i in range(1, 41)]

    st = json.loads(runner.invoke(app, ["status", str(store), "--json"]).stdout)
    (run,) = st["runs"]
    assert run["state"] == "failed" and run["message"] == "exit status 3"
    assert run["stderr_tail"].splitlines() == last
    assert run["stderr_log"] == str(log2)

    wide = {"COLUMNS": "400"}  # rich wraps at the terminal width; keep a long path on one line
    table = runner.invoke(app, ["status", str(store)], env=wide)
    assert table.exit_code == 0, table.output
    shown = _lines(table.stdout)
    assert "p000001-0000abcd: failed (exit status 3)" in shown
    assert all(line in shown for line in last)
    assert "attempt 2 line 30" not in table.stdout  # only the last lines
    assert f"full log: {log2}" in shown

    res = runner.invoke(app, ["trace", str(store), "p000001"], env=wide)
    assert res.exit_code == 0, res.output
    text = res.stdout
    assert f"full log: {log1}" in text and f"full log: {log2}" in text
    assert "not found here" not in text
    for n in (1, 2):
        assert f"attempt {n} line 40" in text and f"attempt {n} line 31" in text
        assert f"attempt {n} line 30" not in text
    t = trace(store, "p000001-0000abcd")
    assert [a["stderr_log"] for a in t["attempts"]] == [str(log1), str(log2)]
    assert [a["stdout_log"] for a in t["attempts"]] == [
        str(run_dir / "winnow-stdout.attempt1.txt"),
        str(run_dir / "winnow-stdout.txt"),
    ]
    assert all(Path(a["stdout_log"]).is_file() for a in t["attempts"])


def test_diff_between_revisions(two_revisions: tuple[Path, Path]) -> None:
    p, _ = two_revisions
    res = runner.invoke(app, ["diff", str(p), "r0001", "r0002", "--json"])
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["revisions"] == ["r0001", "r0002"]
    assert d["config"]["changed"] and "-v: 1" in d["config"]["diff"]
    assert d["inputs"]["changed"] == ["observations"]
    assert d["sections"]["observations"]["changed"] and d["sections"]["chain"]["changed"]
    # same row indices, but the chain moved by 0.5: every point differs by value
    assert d["selection"]["indices"] == [[4, 11, 20], [4, 11, 20]]
    assert d["selection"]["points_kept"] == 0 and len(d["selection"]["points_added"]) == 3
    assert d["estimates"]["drawdown"]["mean"] == [2.0, 2.5]
    assert d["estimates"]["drawdown"]["change"] == pytest.approx(0.5)
    assert d["runs"]["counts"][1]["succeeded"] == 2
    same = diff(p, 2, "latest")
    assert not same["config"]["changed"] and same["selection"]["points_kept"] == 3
    table = runner.invoke(app, ["diff", str(p), "1", "2"])
    assert table.exit_code == 0 and "drawdown" in table.stdout
    assert runner.invoke(app, ["diff", str(p), "1", "r0003"]).exit_code == 2


def test_load_report_data(two_revisions: tuple[Path, Path], tmp_path: Path) -> None:
    from winnow.tasks.store import StoreFormatError, load_report_data

    p, _ = two_revisions
    d1 = load_report_data(p, 1)
    assert (d1.study, d1.revision, d1.chain_rows) == ("cli study", "r0001", 30)
    assert d1.config_hash == hashlib.sha256(b"v: 1").hexdigest() and d1.config_text == "v: 1"
    assert d1.point_run_ids == ("p000004-00000000", "p000011-00000001", "p000020-00000002")
    assert d1.reuse_counts == {"ran": 3, "reused": 0}
    assert [v.run_id for v in d1.qoi_values][0] == "p000004-00000000"
    assert d1.estimates[0].name == "drawdown" and d1.provenance["flow_run_id"] == "flow-v: 1"
    d2 = load_report_data(p, max_plot_rows=7)
    assert d2.revision == "r0002" and d2.reuse_counts == {"ran": 1, "reused": 2}
    with RunStore.open_read(p) as r:
        full = r.read_chain("r0002").samples
    assert d2.chain_samples.shape == (7, 2)
    np.testing.assert_array_equal(d2.chain_samples[[0, -1]], full[[0, -1]])
    damaged = tmp_path / "damaged.h5"
    damaged.write_bytes(p.read_bytes())
    with h5py.File(damaged, "r+") as f:
        f["revisions/r0002/results/values/value_data"][0] = 99.0
    with pytest.raises(StoreFormatError, match="stored results does not match"):
        load_report_data(damaged)
