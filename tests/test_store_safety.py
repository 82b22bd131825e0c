"""Run store safety: a killed commit leaves the previous state, damage is detected and named,
one writer at a time, newer schemas and existing stores are refused.

The killed-commit tests run a child Python process that stops at a named step of the commit
(through ``winnow.tasks.store._core.commit_hook``) and is then SIGKILLed, as a crash would.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from winnow.tasks.records import Chain
from winnow.tasks.store import RunStore, SchemaVersionError, StoreBusyError, StoreFormatError, check

CHILD = textwrap.dedent(
    """
    import os, sys, time
    from pathlib import Path
    import numpy as np
    from winnow.tasks.store import _core as _store
    from winnow.tasks.records import Chain
    from winnow.tasks.store import RunStore

    store, stage, marker = sys.argv[1], sys.argv[2], Path(sys.argv[3])

    def hook(step):
        if step == stage:
            marker.write_text(str(os.getpid()))
            time.sleep(600)  # killed here by the test

    _store.commit_hook = hook
    with RunStore.open_for_write(store) as w:
        rev = w.new_revision("second: revision\\n")
        w.write_chain(rev, Chain(np.ones((4, 1)), ("a",), ("m",), np.zeros(4, np.int64),
                                 np.arange(4)))
    marker.write_text("finished")
    """
)


def _chain(n: int = 40, seed: int = 0) -> Chain:
    g = np.random.default_rng(seed)
    return Chain(
        g.normal(size=(n, 2)),
        ("K", "S"),
        ("m/s", "1"),
        np.zeros(n, np.int64),
        np.arange(n, dtype=np.int64),
        g.normal(size=n),
        "sampled:test",
    )


def _store_with_one_revision(tmp_path: Path) -> tuple[Path, Chain]:
    p = tmp_path / "study.h5"
    RunStore.create(p, "safety")
    chain = _chain()
    with RunStore.open_for_write(p) as w:
        rev = w.new_revision("first: revision\n")
        w.write_chain(rev, chain)
    return p, chain


def _wait_for(marker: Path, proc: subprocess.Popen, timeout: float = 90.0) -> str:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if marker.exists() and marker.read_text():
            return marker.read_text()
        if proc.poll() is not None:
            raise AssertionError(f"child ended early: {proc.stderr.read()}")
        time.sleep(0.05)
    proc.kill()
    raise AssertionError("child never reached the commit step")


@pytest.mark.parametrize("stage", ["copied", "applied", "synced", "replaced"])
def test_killed_commit_leaves_old_or_new_state(tmp_path: Path, stage: str) -> None:
    p, chain = _store_with_one_revision(tmp_path)
    before = p.read_bytes()
    marker = tmp_path / "marker"
    proc = subprocess.Popen(
        [sys.executable, "-c", CHILD, str(p), stage, str(marker)],
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        pid = _wait_for(marker, proc)
        assert pid == str(proc.pid)
        # while the child holds the writer lock, a second writer is refused at once and
        # told who holds it; readers still work and see a complete store
        with pytest.raises(
            StoreBusyError, match=rf"being written by another process \(pid {pid} since"
        ):
            RunStore.open_for_write(p)
        with RunStore.open_read(p) as r:
            assert r.revisions() in (["r0001"], ["r0001", "r0002"])
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    if stage == "replaced":
        # the first commit (new revision) was killed after os.replace: the new state stands
        with RunStore.open_read(p) as r:
            assert r.revisions() == ["r0001", "r0002"]
            assert r.read_config_text("r0002") == "second: revision\n"
            assert r.stages_done("r0002") == set()
    else:
        # the temp file of the killed commit is left behind; the store itself is untouched
        assert p.read_bytes() == before
        assert list(tmp_path.glob(".study.h5.tmp-*"))
        with RunStore.open_read(p) as r:
            assert r.revisions() == ["r0001"]
            np.testing.assert_array_equal(r.read_chain("r0001").samples, chain.samples)
        assert not list(tmp_path.glob(".study.h5.tmp-*")), "stale temp not cleaned on open"
    report = check(p)
    assert report.ok, report.problems
    # the lock died with the child: a new writer gets in
    with RunStore.open_for_write(p) as w:
        w.new_revision("third\n")


def test_changed_dataset_value_is_detected_and_named(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    assert check(p).ok
    with h5py.File(p, "r+") as f:  # bypass the API
        f["revisions/r0001/chain/samples"][3, 1] = 42.0
    report = check(p)
    assert not report.ok
    assert any(
        x.startswith("/revisions/r0001/chain/samples: data do not match") for x in report.problems
    )
    assert any("/revisions/r0001/chain: content does not match" in x for x in report.problems)
    assert not any("log_density" in x for x in report.problems)


def test_flipped_byte_in_raw_file_is_detected_and_named(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    with h5py.File(p, "r") as f:
        ds = f["revisions/r0001/chain/log_density"]
        # h5py DatasetID.get_offset(): byte offset of a contiguous dataset's raw data in the
        # file (None for chunked/compact storage); the store writes contiguous datasets
        offset = ds.id.get_offset()
        assert offset is not None
    with open(p, "r+b") as fh:
        fh.seek(offset + 5)
        b = fh.read(1)
        fh.seek(offset + 5)
        fh.write(bytes([b[0] ^ 0x01]))
    report = check(p)
    assert not report.ok
    # float64 data: one flipped bit changes one value, so exactly this dataset is named
    named = [x for x in report.problems if x.startswith("/revisions/r0001/chain/log_density:")]
    assert len(named) == 1, report.problems
    assert not any("chain/samples" in x for x in report.problems)


def test_changed_attribute_is_detected(tmp_path: Path) -> None:
    p, chain = _store_with_one_revision(tmp_path)
    with h5py.File(p, "r+") as f:
        f["revisions/r0001/chain"].attrs["source"] = "imported:elsewhere.csv"
        f["revisions/r0001/provenance"].attrs["config_sha256"] = "0" * 64
    problems = check(p).problems
    assert any("/revisions/r0001/chain: content does not match" in x for x in problems)
    assert any("provenance: config_sha256 does not match" in x for x in problems)


def test_second_writer_refused_in_same_process(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    with RunStore.open_for_write(p):
        with pytest.raises(StoreBusyError) as exc:
            RunStore.open_for_write(p)
        msg = str(exc.value)
        assert f"store {p} is being written by another process (pid {os.getpid()} since" in msg
        with pytest.raises(StoreBusyError):
            RunStore.create(p, "again", force=True)
    with RunStore.open_for_write(p) as w:  # released on exit
        assert w.revisions() == ["r0001"]
    with pytest.raises(ValueError, match="closed"):
        w.new_revision("after close")


def test_newer_schema_refused(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    with h5py.File(p, "r+") as f:
        f.attrs["schema_version"] = 7
    for opener in (RunStore.open_read, RunStore.open_for_write, check):
        with pytest.raises(SchemaVersionError) as exc:
            opener(p)
        msg = str(exc.value)
        assert str(p) in msg and "schema version 7" in msg and "version 1" in msg


def test_existing_store_not_overwritten_without_force(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    before = p.read_bytes()
    with pytest.raises(FileExistsError, match="study.h5.*already exists.*force=True"):
        RunStore.create(p, "other")
    assert p.read_bytes() == before
    RunStore.create(p, "other", force=True)
    with RunStore.open_read(p) as r:
        assert r.study == "other" and r.revisions() == []


def test_create_makes_missing_folders(tmp_path: Path) -> None:
    p = tmp_path / "studies" / "new" / "s.h5"
    RunStore.create(p, "fresh")
    with RunStore.open_read(p) as r:
        assert r.study == "fresh" and r.schema_version == 1
    blocker = tmp_path / "file"
    blocker.write_text("x")
    with pytest.raises(NotADirectoryError, match="is a file"):
        RunStore.create(blocker / "s.h5", "x")


def test_not_a_store_is_refused(tmp_path: Path) -> None:
    plain = tmp_path / "plain.h5"
    with h5py.File(plain, "w") as f:
        f["x"] = np.arange(3)
    with pytest.raises(StoreFormatError, match="not a winnow run store"):
        RunStore.open_read(plain)
    text = tmp_path / "notes.txt"
    text.write_text("hello")
    with pytest.raises(StoreFormatError, match="not a readable HDF5 file"):
        check(text)
    with pytest.raises(FileNotFoundError, match="missing.h5"):
        RunStore.open_for_write(tmp_path / "missing.h5")


def test_stale_temp_files_cleaned(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    dead = tmp_path / ".study.h5.tmp-999999999"  # beyond pid_max: no such process
    mine = tmp_path / f".study.h5.tmp-{os.getpid()}"
    dead.write_bytes(b"partial")
    mine.write_bytes(b"partial")
    with RunStore.open_read(p):
        pass
    assert not dead.exists()
    assert mine.exists()  # a reader never removes a live process's temp file
    with RunStore.open_for_write(p):
        pass
    assert not mine.exists()  # the lock holder removes them all


def test_deleted_dataset_and_section_are_reported(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    with h5py.File(p, "r+") as f:
        del f["revisions/r0001/chain/draw_index"]
        del f["revisions/r0001/inputs"]
    problems = check(p).problems
    assert any(x.startswith("/revisions/r0001/chain: cannot be read back") for x in problems)
    assert any("draw_index is missing" in x for x in problems)
    assert "/revisions/r0001/inputs: group is missing" in problems


def test_reader_keeps_a_consistent_snapshot_during_commits(tmp_path: Path) -> None:
    p, chain = _store_with_one_revision(tmp_path)
    with RunStore.open_read(p) as r:
        with RunStore.open_for_write(p) as w:
            w.new_revision("second\n")
            w.write_chain("r0002", _chain(seed=9))
        # the open reader still sees the file as it was when opened
        assert r.revisions() == ["r0001"]
        np.testing.assert_array_equal(r.read_chain("r0001").samples, chain.samples)
    with RunStore.open_read(p) as r:
        assert r.revisions() == ["r0001", "r0002"]


def test_symlinked_store_and_permissions_survive_commits(tmp_path: Path) -> None:
    p, _ = _store_with_one_revision(tmp_path)
    p.chmod(0o640)
    link = tmp_path / "link.h5"
    link.symlink_to(p)
    with RunStore.open_for_write(link) as w:
        # one lock for every path to the store
        with pytest.raises(StoreBusyError):
            RunStore.open_for_write(p)
        w.new_revision("via link\n")
    assert link.is_symlink() and link.resolve() == p.resolve()
    assert (p.stat().st_mode & 0o777) == 0o640
    with RunStore.open_read(p) as r:
        assert r.revisions() == ["r0001", "r0002"]
    assert check(link).ok
