"""Run store: every record read back equals what was written (odd values included),
revisions, provenance, checkpoints and reuse lookups.

Hashes are checked against ``hashlib.sha256`` (Python standard library) as the reference.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import math
from pathlib import Path, PurePath
from typing import Any

import h5py
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from winnow.tasks.records import (
    Attempt,
    Chain,
    Diagnostics,
    ParameterDiagnostics,
    QoIEstimate,
    QoIValue,
    RunOutcome,
    RunSpec,
    Selection,
)
from winnow.tasks.store import RunStore, check, hash_config, hash_file, inputs_changed


# ------------------------------------------------------------------------------------------
# deep comparison: same types, same values, NaN equal to NaN, dict order kept
# ------------------------------------------------------------------------------------------
def assert_same(a: Any, b: Any, where: str = "record") -> None:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        assert isinstance(a, np.ndarray) and isinstance(b, np.ndarray), where
        assert a.dtype == b.dtype, f"{where}: dtype {a.dtype} != {b.dtype}"
        assert a.shape == b.shape, f"{where}: shape {a.shape} != {b.shape}"
        if a.dtype.kind in "fc":
            assert np.array_equal(a, b, equal_nan=True), where
            # -0.0 must stay -0.0: compare sign bits where not NaN
            ok = ~np.isnan(a)
            assert np.array_equal(np.signbit(a.real[ok]), np.signbit(b.real[ok])), where
        else:
            assert a.tolist() == b.tolist(), where
        return
    if dataclasses.is_dataclass(a):
        assert type(a) is type(b), f"{where}: {type(a)} != {type(b)}"
        for f in dataclasses.fields(a):
            assert_same(getattr(a, f.name), getattr(b, f.name), f"{where}.{f.name}")
        return
    if isinstance(a, dict):
        assert isinstance(b, dict), where
        assert list(a) == list(b), f"{where}: keys {list(a)} != {list(b)}"
        for k in a:
            assert_same(a[k], b[k], f"{where}[{k!r}]")
        return
    if isinstance(a, list | tuple):
        assert type(a) is type(b), f"{where}: {type(a).__name__} != {type(b).__name__}"
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b, strict=True)):
            assert_same(x, y, f"{where}[{i}]")
        return
    if isinstance(a, float) and math.isnan(a):
        assert isinstance(b, float) and math.isnan(b), f"{where}: {b!r} is not NaN"
        return
    if isinstance(a, np.generic) or isinstance(b, np.generic):
        assert type(a) is type(b), f"{where}: {type(a)} != {type(b)}"
        if isinstance(a, np.floating) and np.isnan(a):  # NaN != NaN: a NaN scalar comes back NaN
            assert np.isnan(b), f"{where}: {b!r} is not NaN"
            return
    assert a == b, f"{where}: {a!r} != {b!r}"


# ------------------------------------------------------------------------------------------
# records with odd values
# ------------------------------------------------------------------------------------------
def odd_chain(n: int = 50, *, rng: int = 0, diagnostics: bool = True) -> Chain:
    g = np.random.default_rng(rng)
    samples = g.normal(size=(n, 3))
    samples[0, 0] = np.nan
    samples[1, 1] = np.inf
    samples[2, 2] = -0.0
    samples[3, 0] = 1e-310  # subnormal
    log_density = g.normal(size=n)
    log_density[4] = -np.inf
    diag = None
    if diagnostics:
        diag = Diagnostics(
            parameters={
                "κ_ü": ParameterDiagnostics(1.01, 400.0, 350.5, 0.01, 0.02, 0.03, 1.0, 2.0),
                "S/y": ParameterDiagnostics(np.nan, 0.0, np.inf, 0.0, 0.0, 0.0, -1.0, 0.5),
                "": ParameterDiagnostics(1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0),
            },
            n_chains=4,
            n_draws=n // 4,
            burn_in=100,
            burn_in_rule="first half (rank-normalised R-hat rule)",
            acceptance=np.array([0.23, np.nan, 0.3, 0.41]),
            thresholds={"rhat": 1.01, "ess_bulk": 400.0},
            passed=False,
            messages=("R-hat of κ_ü 1.02 > 1.01", "ESS of S/y 0.0 < 400 \u2014 too small"),
            details={"sampler": "ensemble", "model_evaluations": 12000, "seconds": 1.5},
        )
    return Chain(
        samples=samples,
        names=("κ_ü", "S/y", ""),
        units=("m²/s", "1", "°C"),
        chain_index=np.repeat(np.arange(4, dtype=np.int64), n // 4 + 1)[:n],
        draw_index=np.arange(n, dtype=np.int64),
        log_density=log_density,
        source="imported:/data/çhain file.csv",
        diagnostics=diag,
    )


def odd_selection(chain: Chain, *, seed: int | None = 7, population: Any = "default") -> Selection:
    idx = np.array([5, 0, 17, 3], dtype=np.int64)
    if population == "default":
        population = [(np.array([1, 2, 3, 4]), 0.011), (np.array([9, 8, 7, 6]), float("nan"))]
    return Selection(
        indices=idx,
        weights=np.array([0.5, 0.25, 0.125, 0.125]),
        points=chain.samples[idx],
        method="genetic",
        weights_rule="simplex",
        kernel="gaussian",
        bandwidth=np.float64(0.75),
        feature_map="orf",
        n_features=np.int64(512),
        seed=seed,
        mmd_features=1.25e-3,
        mmd_exact=float("nan"),
        mmd_exact_rows=20000,
        report={
            "dropped_nonfinite": 2,
            "history": np.array([128, 256, 512]),
            "timings": {"select": 0.5, "weights": np.float32(0.25)},
            "notes": ["ünïcode", None, True, (1, 2)],
            "empty": [],
            3: "int key",
            1.5: "float key",
            "__tricky__": {"nan": float("nan"), "inf": float("-inf")},
            "big": 2**80,
        },
        population=population,
    )


def odd_runs() -> tuple[list[RunSpec], list[RunOutcome]]:
    specs = [
        RunSpec(
            run_id=f"p{i:06d}-ab12cd{i:02d}",
            point_index=[5, 0, 17, 3][i],
            params={"κ_ü": np.float64(1.5 + i), "S/y": float("nan"), "": -0.0},
            weight=[0.5, 0.25, 0.125, 0.125][i],
            run_dir=Path(f"/work/runs/p{i:06d} ü"),
            argv=("solver", "--deck", "in put.dat", "", "ü"),
            deck_hashes={} if i == 1 else {"deck.in": "a" * 64, "sub/dir/b.in": "b" * 64},
            key=hashlib.sha256(f"key{i}".encode()).hexdigest(),
        )
        for i in range(4)
    ]
    a_ok = Attempt(1, ("solver", "x"), 1700000000.25, 1700000123.5, 0, False, "done\nü ✓", "")
    a_kill = Attempt(1, ("solver", "x"), 1700000000.0, 1700000600.0, None, True, "", "killed")
    a_err = Attempt(2, ("solver",), 1.0, 1.0, None, False, "", "", "exec format error: ü")
    outcomes = [
        # written in a different order than the specs, and spec 2 has no outcome
        RunOutcome(
            specs[3].run_id,
            specs[3].key,
            "timed_out",
            (a_kill, a_err),
            specs[3].run_dir,
            {},
            "timed out after 600 s",
            "",
        ),
        RunOutcome(
            specs[0].run_id,
            specs[0].key,
            "succeeded",
            (a_ok,),
            specs[0].run_dir,
            {"out/result.csv": "c" * 64},
            "",
            "",
        ),
        RunOutcome(
            specs[1].run_id,
            specs[1].key,
            "succeeded",
            (),
            Path("/old/run/dir"),
            {"out.csv": "d" * 64},
            "reused",
            "r0001/p000001-ab12cd01",
        ),
    ]
    return specs, outcomes


def odd_results(specs: list[RunSpec]) -> tuple[list[QoIValue], list[QoIEstimate]]:
    values = [
        QoIValue(specs[0].run_id, "drawdown", np.array(1.25), "ok"),
        QoIValue(specs[0].run_id, "head", np.array([1.0, -0.0, 3.5]), "ok"),
        QoIValue(specs[3].run_id, "drawdown", np.array(np.nan), "run_failed", "timed out"),
        QoIValue(specs[3].run_id, "head", np.full(3, np.nan), "missing", "no file ü"),
        QoIValue(specs[1].run_id, "empty", np.zeros(0), "unparsable", ""),
    ]
    estimates = [
        QoIEstimate(
            name="drawdown",
            units="m",
            mean=np.array(1.25),
            sd=np.array(0.0),
            quantiles={0.05: np.array(1.0), 0.5: np.array(1.25), 0.95: np.array(np.nan)},
            exceedance={2.0: np.array(0.0), 1.0: np.array(0.75)},
            uncertainty={"thinning_gap": np.array(0.01), "bootstrap_se": np.array(np.inf)},
            control_variate={"mean": np.float64(1.2), "se": 0.05, "correlation": float("nan")},
            n_used=np.int64(2),
            n_missing=1,
            weights_resolved=True,
            mmd_growth=0.125,
            details={"resolved_weights": np.array([0.6, 0.4]), "note": "ü", (1, 2): [None]},
        ),
        QoIEstimate(
            name="head/ü",
            units="m a.s.l.",
            mean=np.array([1.0, 2.0, 3.0]),
            sd=np.array([0.1, np.nan, 0.3]),
            quantiles={},
            exceedance={},
            uncertainty={},
            control_variate=None,
            n_used=0,
            n_missing=0,
        ),
    ]
    return values, estimates


@pytest.fixture
def store(tmp_path: Path) -> Path:
    p = tmp_path / "study.h5"
    RunStore.create(p, "aquifer ü", description="demo store")
    return p


def test_chain_selection_runs_results_round_trip_exactly(store: Path, tmp_path: Path) -> None:
    chain = odd_chain()
    sel = odd_selection(chain)
    specs, outcomes = odd_runs()
    values, estimates = odd_results(specs)
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("study: ü\n")
        w.write_chain(rev, chain)
        w.write_selection(rev, sel)
        w.write_runs(rev, specs, outcomes)
        w.write_results(rev, values, estimates)
    with RunStore.open_read(store) as r:
        assert r.revisions() == ["r0001"]
        assert_same(chain, r.read_chain(rev), "chain")
        assert_same(sel, r.read_selection(rev), "selection")
        got_specs, got_outcomes = r.read_runs(rev)
        assert_same(specs, got_specs, "specs")
        assert_same(outcomes, got_outcomes, "outcomes")
        got_values, got_estimates = r.read_results(rev)
        assert_same(values, got_values, "values")
        assert_same(estimates, got_estimates, "estimates")
        assert r.stages_done(rev) == {"chain", "selection", "runs", "results"}
    report = check(store)
    assert report.ok, report.problems


@pytest.mark.parametrize(
    "variant",
    ["no_log_density", "empty_chain", "seed_none", "huge_seed", "population_empty", "no_runs"],
)
def test_edge_records_round_trip(store: Path, variant: str) -> None:
    chain = odd_chain(diagnostics=False)
    if variant == "no_log_density":
        chain = dataclasses.replace(chain, log_density=None)
    if variant == "empty_chain":
        chain = Chain(
            np.zeros((0, 2)), ("a", "b"), ("m", "s"), np.zeros(0, np.int64), np.zeros(0, np.int64)
        )
    seed = {"seed_none": None, "huge_seed": 2**100}.get(variant, 3)
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("")
        w.write_chain(rev, chain)
        if variant != "empty_chain":
            sel = odd_selection(
                chain, seed=seed, population=[] if variant == "population_empty" else None
            )
            w.write_selection(rev, sel)
        w.write_runs(rev, [], [])
        w.write_results(rev, [], [])
        assert_same(chain, w.read_chain(rev), "chain")
        if variant != "empty_chain":
            assert_same(sel, w.read_selection(rev), "selection")
        assert w.read_runs(rev) == ([], [])
        assert w.read_results(rev) == ([], [])
        assert w.read_config_text(rev) == ""
    assert check(store).ok


def test_observations_forms_and_inputs_hashes(store: Path, tmp_path: Path) -> None:
    obs_file = tmp_path / "obs.csv"
    obs_file.write_bytes(b"t,h\n0,1.5\n60,2.25\n")
    tpl = tmp_path / "deck.j2"
    tpl.write_text("K = {{ K }}\n")
    structured = np.array(
        [(0.0, 1.5, "W-1 ü"), (60.0, 2.25, "W-2")],
        dtype=[("t", "<f8"), ("h", ">f4"), ("well", "<U6")],
    )
    as_dict = {"t": np.array([0, 60], dtype=np.int32), "label": np.array(["a", "bé"])}
    plain = np.arange(6.0).reshape(3, 2)
    with RunStore.open_for_write(store) as w:
        r1 = w.new_revision(
            "a",
            inputs={"observations": obs_file, "template": tpl},
            observations=structured,
            observation_units={"t": "s", "h": "m"},
            flow_run_id="0b8e-ü",
        )
        r2 = w.new_revision("b", observations=as_dict)
        r3 = w.new_revision("c", observations=plain)
        r4 = w.new_revision("d")
        assert (r1, r2, r3, r4) == ("r0001", "r0002", "r0003", "r0004")
        assert_same(structured, w.read_observations(r1), "structured")
        assert_same(as_dict, w.read_observations(r2), "dict")
        assert_same(plain, w.read_observations(r3), "array")
        assert w.read_observations(r4) is None
        # reference digests: hashlib over the file bytes and the config text's UTF-8 bytes
        expect = {
            "observations": hashlib.sha256(obs_file.read_bytes()).hexdigest(),
            "template": hashlib.sha256(tpl.read_bytes()).hexdigest(),
        }
        assert w.read_inputs(r1) == expect
        assert w.read_inputs(r2) == {}
        prov = w.read_provenance(r1)
        assert prov["config_sha256"] == hashlib.sha256(b"a").hexdigest() == hash_config("a")
        assert prov["flow_run_id"] == "0b8e-ü"
        assert w.read_provenance(r2)["flow_run_id"] is None
        assert prov["numpy_version"] == np.__version__
        assert prov["h5py_version"] == h5py.__version__
        assert prov["chain_sha256"] == ""
    with h5py.File(store, "r") as f:
        g = f["revisions/r0001/observations"]
        assert g["t"].attrs["units"] == "s"
        assert g.attrs["source"] == str(obs_file.resolve())
    assert hash_file(obs_file) == expect["observations"]
    assert check(store).ok


def test_every_dataset_is_self_describing(store: Path) -> None:
    chain = odd_chain()
    specs, outcomes = odd_runs()
    values, estimates = odd_results(specs)
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x", observations={"t": [1.0]})
        w.write_chain(rev, chain)
        w.write_selection(rev, odd_selection(chain))
        w.write_runs(rev, specs, outcomes)
        w.write_results(rev, values, estimates)
        w.save_checkpoint(rev, "sample", {"x": np.ones(3), "it": 1})
    seen = []
    with h5py.File(store, "r") as f:
        assert f.attrs["schema_version"] == 1
        assert f.attrs["study"] == "aquifer ü"
        assert f.attrs["description"] == "demo store"
        for a in ("created", "winnow_version"):
            assert a in f.attrs

        def visit(name: str, obj: Any) -> None:
            if isinstance(obj, h5py.Dataset):
                seen.append(name)
                for a in ("units", "description", "sha256"):
                    assert a in obj.attrs, f"{name} lacks {a}"
                assert str(obj.attrs["description"]).strip(), name
                if h5py.check_string_dtype(obj.dtype) is not None:
                    # text is UTF-8 variable length
                    info = h5py.check_string_dtype(obj.dtype)
                    assert info.encoding == "utf-8" and info.length is None, name
            else:
                assert "description" in obj.attrs, f"group {name} lacks a description"

        f.visititems(visit)
    assert "revisions/r0001/chain/samples" in seen
    assert "revisions/r0001/runs/attempts/stdout_tail" in seen
    assert len(seen) > 50


def test_checkpoints_round_trip_and_clear(store: Path) -> None:
    rng = np.random.default_rng(42)
    state = {
        "positions": rng.normal(size=(8, 3)),
        "step": np.float64(0.35),
        "iteration": 1200,
        "accepted": np.array([3, 4], dtype=np.int32),
        "rng_state": rng.bit_generator.state,  # nested dict with 128-bit ints
        "names": ("a", "b"),
        "tuned": True,
        "history": [0.1, float("nan"), None],
        "a/b": "slash key",
    }
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x")
        assert w.load_checkpoint(rev, "sample") is None
        w.save_checkpoint(rev, "sample", state)
        assert_same(state, w.load_checkpoint(rev, "sample"), "checkpoint")
        # a restored generator continues the same stream (numpy bit-generator state API)
        g2 = np.random.default_rng()
        g2.bit_generator.state = w.load_checkpoint(rev, "sample")["rng_state"]
        assert g2.normal() == rng.normal()
        w.save_checkpoint(rev, "sample", {"iteration": 1300})
        assert w.load_checkpoint(rev, "sample") == {"iteration": 1300}
        assert check(store).ok
        w.clear_checkpoint(rev, "sample")
        w.clear_checkpoint(rev, "sample")  # no error the second time
        assert w.load_checkpoint(rev, "sample") is None


def test_new_revision_keeps_old_ones_and_only_latest_is_writable(store: Path) -> None:
    chain = odd_chain(diagnostics=False)
    with RunStore.open_for_write(store) as w:
        r1 = w.new_revision("v: 1\n")
        w.write_chain(r1, chain)
        r2 = w.new_revision("v: 2\n")
        with pytest.raises(ValueError, match="not the latest"):
            w.write_chain(r1, chain)
        w.write_chain("latest", odd_chain(rng=1, diagnostics=False))
        assert_same(chain, w.read_chain(r1), "old chain kept")
        assert w.read_config_text(1) == "v: 1\n"
        assert w.read_config_text(r2) == "v: 2\n"
        assert w.revisions() == ["r0001", "r0002"]
        with pytest.raises(ValueError, match="r0009"):
            w.read_chain("r0009")


def test_rewriting_a_section_removes_what_descends_from_it(store: Path) -> None:
    chain = odd_chain(diagnostics=False)
    specs, outcomes = odd_runs()
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x")
        w.write_chain(rev, chain)
        w.write_selection(rev, odd_selection(chain))
        w.write_runs(rev, specs, outcomes)
        w.write_results(rev, *odd_results(specs))
        w.write_runs(rev, specs, outcomes)
        assert w.stages_done(rev) == {"chain", "selection", "runs"}
        w.write_chain(rev, chain)
        assert w.stages_done(rev) == {"chain"}
        prov = w.read_provenance(rev)
        assert prov["selection_sha256"] == prov["runs_sha256"] == ""
    assert check(store).ok


def test_successful_runs_by_key_spans_revisions(store: Path) -> None:
    specs, outcomes = odd_runs()
    with RunStore.open_for_write(store) as w:
        w.new_revision("a")
        w.write_runs("r0001", specs, outcomes)
        got = w.successful_runs_by_key()
        # spec 0 ran and succeeded; spec 1 succeeded by reuse, so it points to its origin
        assert got == {
            specs[0].key: f"r0001/{specs[0].run_id}",
            specs[1].key: "r0001/p000001-ab12cd01",
        }
        w.new_revision("b")
        ok = RunOutcome(specs[3].run_id, specs[3].key, "succeeded", (), specs[3].run_dir)
        w.write_runs("r0002", [specs[3]], [ok])
        got = w.successful_runs_by_key()
        assert got[specs[3].key] == f"r0002/{specs[3].run_id}"
        assert got[specs[0].key] == f"r0001/{specs[0].run_id}"


def test_inputs_changed(tmp_path: Path) -> None:
    p = tmp_path / "s.h5"
    obs = tmp_path / "obs.csv"
    obs.write_text("1\n")
    assert inputs_changed(p, {"observations": obs})  # no store yet
    RunStore.create(p, "s")
    assert inputs_changed(p, {"observations": obs})  # no revision yet
    with RunStore.open_for_write(p) as w:
        w.new_revision("x", inputs={"observations": obs})
    assert not inputs_changed(p, {"observations": obs})
    assert inputs_changed(p, {"observations": obs, "extra": obs})
    obs.write_text("2\n")
    assert inputs_changed(p, {"observations": obs})


def test_bad_input_raises_before_writing(store: Path, tmp_path: Path) -> None:
    before = store.read_bytes()
    with RunStore.open_for_write(store) as w:
        with pytest.raises(FileNotFoundError, match="nope.csv"):
            w.new_revision("x", inputs={"observations": tmp_path / "nope.csv"})
        with pytest.raises(ValueError, match="no revisions"):
            w.write_chain(None, odd_chain())
        rev = w.new_revision("x")
        after_rev = store.read_bytes()
        bad = dataclasses.replace(odd_chain(), names=("a",))
        with pytest.raises(ValueError, match="chain.names must have length d=3"):
            w.write_chain(rev, bad)
        with pytest.raises(TypeError, match="selection must be a Selection"):
            w.write_selection(rev, "greedy")  # type: ignore[arg-type]
        specs, outcomes = odd_runs()
        with pytest.raises(ValueError, match="has no RunSpec"):
            w.write_runs(rev, specs[:1], outcomes)
        with pytest.raises(TypeError, match="cannot store a value of type object"):
            w.save_checkpoint(rev, "s", {"x": object()})
        w.write_chain(rev, odd_chain())
        sel = dataclasses.replace(odd_selection(odd_chain()), indices=np.array([0, 1, 2, 999]))
        with pytest.raises(ValueError, match=r"selection.indices must lie in \[0, 50\)"):
            w.write_selection(rev, sel)
    assert before != after_rev
    assert check(store).ok


def test_nul_in_output_tail_is_replaced_elsewhere_refused(store: Path) -> None:
    specs, _ = odd_runs()
    a = Attempt(1, ("s",), 0.0, 1.0, 0, False, "bin\x00ary", "")
    o = RunOutcome(specs[0].run_id, specs[0].key, "succeeded", (a,), specs[0].run_dir)
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x")
        w.write_runs(rev, specs[:1], [o])
        _, outs = w.read_runs(rev)
        assert outs[0].attempts[0].stdout_tail == "bin\ufffdary"
        with pytest.raises(ValueError, match="NUL"):
            w.new_revision("a\x00b")


def test_hash_object_is_order_free_and_type_tagged() -> None:
    from winnow.tasks.store._hashes import hash_object

    assert hash_object({"a": 1, "b": 2}) == hash_object({"b": 2, "a": 1})
    assert hash_object(np.float64(0.5)) == hash_object(0.5)  # HDF5 attrs come back as numpy
    assert hash_object(1) != hash_object(1.0)
    assert hash_object((1, 2)) != hash_object([1, 2])
    assert hash_object(np.arange(3, dtype=np.int32)) != hash_object(np.arange(3, dtype=np.int64))
    big = np.arange(6, dtype=">f8")
    assert hash_object(big) == hash_object(big.astype("<f8"))  # byte order is canonicalised
    assert hash_object(PurePath("a")) != hash_object("a")


def test_rewriting_a_section_reuses_freed_space(store: Path) -> None:
    # HDF5 keeps freed space only with persistent free-space tracking (h5py fs_persist);
    # without it every rewrite of the chain would add the chain's size to the file.
    g = np.random.default_rng(3)
    n = 20000
    chain = Chain(
        g.normal(size=(n, 5)),
        tuple("abcde"),
        ("1",) * 5,
        np.zeros(n, np.int64),
        np.arange(n, dtype=np.int64),
    )
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x")
        w.write_chain(rev, chain)
        size = store.stat().st_size
        for _ in range(3):
            w.write_chain(rev, chain)
    assert store.stat().st_size < size + chain.samples.nbytes // 2


def test_fields_added_to_records_later_round_trip(store: Path, monkeypatch) -> None:
    # records.py lets stages add fields with defaults; the store keeps unknown fields in its
    # extra_json column/attribute. Simulate such a field on QoIValue and Chain.
    from winnow.tasks import records
    from winnow.tasks.store import _tables as tables

    @dataclasses.dataclass(frozen=True)
    class QoIValue(records.QoIValue):
        units_seen: str = ""
        samples_read: int = 0

    @dataclasses.dataclass(frozen=True)
    class Chain(records.Chain):
        thinning: int = 1

    monkeypatch.setattr(tables.QOI_VALUE, "record", QoIValue)
    monkeypatch.setattr(tables.CHAIN, "record", Chain)
    base = odd_chain(diagnostics=False)
    chain = Chain(**{f.name: getattr(base, f.name) for f in dataclasses.fields(base)}, thinning=5)
    v = QoIValue("p1", "q", np.array(1.0), "ok", "", units_seen="m ü", samples_read=3)
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x")
        w.write_chain(rev, chain)
        w.write_results(rev, [v], [])
        assert_same(chain, w.read_chain(rev), "chain")
        assert_same([v], w.read_results(rev)[0], "values")
    assert check(store).ok


STORED_RECORDS = (
    "Chain",
    "Diagnostics",
    "ParameterDiagnostics",
    "Selection",
    "RunSpec",
    "RunOutcome",
    "Attempt",
    "QoIValue",
    "QoIEstimate",
)
# a value of a field added later: nested, with types tagged JSON must keep (tuple, numpy)
ADDED_VALUE = {"k": (1, np.float32(2.5)), "a": np.arange(3)}


def _retype(obj: Any, target: str, sub: type) -> Any:
    """``obj`` with every record of class ``target`` (nested anywhere) made a ``sub`` with the
    added field set to ``ADDED_VALUE``."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        kw = {f.name: _retype(getattr(obj, f.name), target, sub) for f in dataclasses.fields(obj)}
        if type(obj).__name__ == target:
            return sub(**kw, added_later=ADDED_VALUE)
        return type(obj)(**kw)
    if isinstance(obj, dict):
        return {k: _retype(v, target, sub) for k, v in obj.items()}
    if isinstance(obj, tuple):
        return tuple(_retype(v, target, sub) for v in obj)
    if isinstance(obj, list):
        return [_retype(v, target, sub) for v in obj]
    return obj


def test_every_record_field_is_stored_by_a_column_or_kept_as_extra() -> None:
    # The column tables are the one statement of what is stored: every field they name must
    # be a field of the record, restored by one column at most (else reading is ambiguous).
    from winnow.tasks import records
    from winnow.tasks.store import _tables as tables

    assert set(tables.TABLES) == set(STORED_RECORDS)
    for name, table in tables.TABLES.items():
        cls = getattr(records, name)
        assert table.record is cls
        fields = {f.name for f in dataclasses.fields(cls)}
        assert table.known <= fields, (name, table.known - fields)
        restored = [f for c in table.columns for f in c.fields] + list(table.linked)
        assert len(restored) == len(set(restored)), (name, restored)
        names = [c.name for c in table.columns] + [table.extra]
        assert len(names) == len(set(names)), (name, names)
        assert tables.KNOWN_FIELDS[name] == table.known
    # today only QoIEstimate.headline lives in extra_json (docs/store-layout.md)
    unstored = {
        n: {f.name for f in dataclasses.fields(getattr(records, n))} - t.known
        for n, t in tables.TABLES.items()
    }
    assert {n: v for n, v in unstored.items() if v} == {"QoIEstimate": {"headline"}}


@pytest.mark.parametrize("target", STORED_RECORDS)
def test_a_field_added_to_any_record_survives_the_round_trip(
    store: Path, monkeypatch, target: str
) -> None:
    # records.py lets stages add fields with defaults. Whatever record gains one, with a
    # non-default value, reads back equal: its table either stores it or sends it to
    # extra_json. Records nested in others (Attempt, ParameterDiagnostics, Diagnostics) too.
    from winnow.tasks import records
    from winnow.tasks.store import _tables as tables

    base = getattr(records, target)
    sub = dataclasses.make_dataclass(
        target,
        [("added_later", Any, dataclasses.field(default=None))],
        bases=(base,),
        frozen=True,
    )
    monkeypatch.setattr(tables.TABLES[target], "record", sub)
    chain = odd_chain()
    sel = odd_selection(chain)
    specs, outcomes = odd_runs()
    values, estimates = odd_results(specs)
    chain, sel, specs, outcomes, values, estimates = _retype(
        (chain, sel, specs, outcomes, values, estimates), target, sub
    )
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("study: x\n")
        w.write_chain(rev, chain)
        w.write_selection(rev, sel)
        w.write_runs(rev, specs, outcomes)
        w.write_results(rev, values, estimates)
    with RunStore.open_read(store) as r:
        got = (r.read_chain(rev), r.read_selection(rev), *r.read_runs(rev), *r.read_results(rev))
    assert_same((chain, sel, specs, outcomes, values, estimates), got, target)
    assert check(store).ok


def test_prefect_version_read_without_importing_prefect() -> None:
    import subprocess
    import sys
    from importlib.metadata import version

    code = (
        "import sys\n"
        "from winnow.tasks.store import RunStore\n"
        "from winnow.tasks.store._hashes import version_info\n"
        "v = version_info()\n"
        "assert not [m for m in sys.modules if m.split('.')[0] == 'prefect'], 'imported'\n"
        "print(v['prefect_version'])\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == version("prefect")


# tagged JSON: any nested value built from the types records carry comes back equal
_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(min_value=-(2**100), max_value=2**100),
    st.floats(allow_nan=True, allow_infinity=True),
    st.text(),
    st.builds(np.float32, st.floats(width=32)),
    st.builds(np.int16, st.integers(-(2**15), 2**15 - 1)),
    st.builds(np.array, st.lists(st.floats(), max_size=5)),
)
_keys = st.one_of(st.text(), st.integers(-5, 5), st.floats(allow_nan=False))
_values = st.recursive(
    _scalars,
    lambda inner: st.one_of(
        st.lists(inner, max_size=4),
        st.tuples(inner, inner),
        st.dictionaries(_keys, inner, max_size=4),
    ),
    max_leaves=12,
)


@settings(max_examples=100, deadline=None)
@given(_values)
def test_tagged_json_round_trip(value: Any) -> None:
    from winnow.tasks.store._core import from_json, to_json

    text = to_json(value)

    def bare(name: str) -> None:
        raise AssertionError(f"bare {name} in the JSON text")

    json.loads(text, parse_constant=bare)  # strict JSON (json would accept NaN otherwise)
    assert_same(value, from_json(text), "value")


def test_scalars_in_array_fields_come_back_as_given(store: Path) -> None:
    # Stages may fill ndarray-typed fields with numpy scalars or Python numbers; the record
    # hash tells these apart from 0-d arrays, so the store must give back the same kind.
    specs, _ = odd_runs()
    values = [
        QoIValue(specs[0].run_id, "a", np.float64(1.5), "ok"),
        QoIValue(specs[0].run_id, "b", 2.5, "ok"),  # type: ignore[arg-type]
        QoIValue(specs[0].run_id, "c", np.array(3.5), "ok"),
        QoIValue(specs[0].run_id, "d", [1.0, 2.0], "ok"),  # type: ignore[arg-type]
    ]
    est = QoIEstimate(
        name="a",
        units="m",
        mean=np.float64(1.5),  # type: ignore[arg-type]
        sd=0.25,  # type: ignore[arg-type]
        quantiles={0.5: np.float32(1.5), 0.95: 2.0},  # type: ignore[dict-item]
        exceedance={1.0: np.array(0.5)},
        uncertainty={"bootstrap_se": np.float64(np.nan)},  # type: ignore[dict-item]
        control_variate=None,
        n_used=1,
        n_missing=0,
    )
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("x")
        w.write_results(rev, values, [est])
        got_values, got_estimates = w.read_results(rev)
    assert_same(values, got_values, "values")
    assert_same([est], got_estimates, "estimates")
    assert type(got_estimates[0].sd) is float and type(got_values[3].value) is list
    assert check(store).ok


def test_stored_config_qoi_axes_are_read_through_the_config_model():
    """The report's QoI descriptions and axes come back from the stored config text as written
    (a round trip); an entry the config model refuses is left out, not guessed at."""
    import yaml

    from winnow.tasks.store._report_data import _config_qoi_info

    text = yaml.safe_dump(
        {
            "collect": {
                "qoi": [
                    {
                        "name": "head",
                        "units": "m",
                        "description": "head at the well",
                        "reader": {"csv": {"file": "o.csv", "column": "h", "row": "all"}},
                        "axis": {"name": "t", "units": "s", "values": [0, 3600, 7200]},
                    },
                    {"name": "bad", "units": "m", "reader": {"xml": {"file": "o.xml"}}},
                ]
            }
        }
    )
    descriptions, axes = _config_qoi_info(text)
    assert descriptions == {"head": "head at the well"}
    assert set(axes) == {"head"}
    assert axes["head"]["name"] == "t" and axes["head"]["units"] == "s"
    np.testing.assert_array_equal(axes["head"]["values"], [0.0, 3600.0, 7200.0])  # exact: ints
