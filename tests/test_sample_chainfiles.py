"""Chain import from .npy, .csv and HDF5 files (tasks/sample/_chainfiles.py).

Round trips are checked against numpy's own writers/readers (``numpy.save``/``numpy.load``,
``h5py``) as the outside reference; error cases check that the message names the file and
the problem.
"""

from __future__ import annotations

import h5py
import numpy as np
import pytest

from winnow.tasks.sample import nonfinite_rows, read_chain_file, write_chain_csv, write_chain_npy


@pytest.fixture
def draws3():
    return np.random.default_rng(1).normal(size=(3, 5, 2))


def test_npy_2d_and_3d(tmp_path, draws3):
    p3 = tmp_path / "c3.npy"
    np.save(p3, draws3)
    ch = read_chain_file(p3, names=["a", "b"], units=["m", "s"])
    assert ch.samples.shape == (15, 2)
    np.testing.assert_array_equal(ch.samples, draws3.reshape(15, 2))
    np.testing.assert_array_equal(ch.chain_index, np.repeat([0, 1, 2], 5))
    np.testing.assert_array_equal(ch.draw_index, np.tile(np.arange(5), 3))
    assert ch.names == ("a", "b") and ch.units == ("m", "s")
    assert ch.source == f"imported:{p3}"
    p2 = tmp_path / "c2.npy"
    np.save(p2, draws3.reshape(15, 2))
    ch2 = read_chain_file(p2)
    assert ch2.names == ("x0", "x1")
    assert np.all(ch2.chain_index == 0)
    np.testing.assert_array_equal(ch2.draw_index, np.arange(15))


def test_npy_errors(tmp_path):
    p = tmp_path / "one.npy"
    np.save(p, np.arange(5.0))
    with pytest.raises(ValueError, match=r"one\.npy.*shape \(5,\)"):
        read_chain_file(p)
    p0 = tmp_path / "empty.npy"
    p0.write_bytes(b"")
    with pytest.raises(ValueError, match="empty"):
        read_chain_file(p0)
    with pytest.raises(FileNotFoundError, match="nothere.npy"):
        read_chain_file(tmp_path / "nothere.npy")
    pz = tmp_path / "z.npy"
    np.save(pz, np.zeros((0, 3)))
    with pytest.raises(ValueError, match="empty"):
        read_chain_file(pz)
    pw = tmp_path / "w.npy"
    np.save(pw, np.zeros((4, 3)))
    with pytest.raises(ValueError, match="3 parameter column.*2 names"):
        read_chain_file(pw, names=["a", "b"])
    pt = tmp_path / "t.txt"
    pt.write_text("1,2\n")
    with pytest.raises(ValueError, match="unknown suffix"):
        read_chain_file(pt)


def test_csv_round_trip_with_chain_and_draw(tmp_path, draws3):
    ch = read_chain_file(_save(tmp_path, draws3), names=["k", "s"], units=["m/d", "-"])
    p = write_chain_csv(tmp_path / "c.csv", ch)
    back = read_chain_file(p, chain_column="chain", draw_column="draw")
    np.testing.assert_array_equal(back.samples, ch.samples)  # repr() round-trips exactly
    np.testing.assert_array_equal(back.chain_index, ch.chain_index)
    np.testing.assert_array_equal(back.draw_index, ch.draw_index)
    assert back.names == ("k", "s") and back.units == ("m/d", "-")


def test_csv_interleaved_chains_and_labels(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("# comment\nwalker,a,b\n7,1,2\n3,3,4\n7,5,6\n3,nan,8\n")
    ch = read_chain_file(p, chain_column="walker")
    # labels 3, 7 -> 0, 1 (sorted); draws counted in file order within each chain
    np.testing.assert_array_equal(ch.chain_index, [1, 0, 1, 0])
    np.testing.assert_array_equal(ch.draw_index, [0, 0, 1, 1])
    assert ch.names == ("a", "b")
    assert nonfinite_rows(ch) == 1  # kept, only counted
    assert ch.samples.shape == (4, 2)


@pytest.mark.parametrize(
    ("text", "pattern"),
    [
        ("a,b\n1,2\n3\n", r"line 3: 1 cells.*header \(line 1\) has 2"),
        ("a,b\n1,2\n3,x\n", r"line 3, column 2 \('b'\): 'x' is not a number"),
        ("a,b\n1,\n", r"line 2, column 2 \('b'\): '' is not a number"),
        ("a,b\n", "no data rows"),
        ("\n\n", "no header"),
        ("a,a\n1,2\n", "repeated column names"),
    ],
)
def test_csv_errors(tmp_path, text, pattern):
    p = tmp_path / "bad.csv"
    p.write_text(text)
    with pytest.raises(ValueError, match=pattern) as info:
        read_chain_file(p)
    assert "bad.csv" in str(info.value)


def test_csv_chain_column_errors(tmp_path):
    p = tmp_path / "c.csv"
    p.write_text("chain,a\n0.5,1\n1,2\n")
    with pytest.raises(ValueError, match="no column 'walker'.*columns: chain, a"):
        read_chain_file(p, chain_column="walker")
    with pytest.raises(ValueError, match="must hold integers; data row 1"):
        read_chain_file(p, chain_column="chain")


def test_hdf5(tmp_path, draws3):
    p = tmp_path / "c.h5"
    with h5py.File(p, "w") as fh:
        ds = fh.create_dataset("posterior/draws", data=draws3)
        ds.attrs["names"] = np.array([b"logT", b"logS"])
        ds.attrs["units"] = "log10(m2/s), -"
        fh.create_dataset("flat", data=np.c_[np.repeat([0, 1], 3), np.ones((6, 1))])
    ch = read_chain_file(p, dataset="posterior/draws")
    assert ch.names == ("logT", "logS") and ch.units == ("log10(m2/s)", "-")
    np.testing.assert_array_equal(ch.samples, draws3.reshape(-1, 2))
    flat = read_chain_file(p, dataset="/flat", chain_column=0, names=["y"])
    np.testing.assert_array_equal(flat.chain_index, [0, 0, 0, 1, 1, 1])
    assert flat.names == ("y",)
    with pytest.raises(ValueError, match=r"no dataset 'nope'.*posterior/draws \(3, 5, 2\)"):
        read_chain_file(p, dataset="nope")
    with pytest.raises(ValueError, match="no column names; give chain_column as a column"):
        read_chain_file(p, dataset="flat", chain_column="chain")


def test_hdf5_truncated(tmp_path, draws3):
    p = tmp_path / "c.h5"
    with h5py.File(p, "w") as fh:
        fh.create_dataset("d", data=np.ones((2000, 3)))
    raw = p.read_bytes()
    q = tmp_path / "cut.h5"
    q.write_bytes(raw[: len(raw) // 3])
    with pytest.raises(ValueError, match=r"cut\.h5.*(truncated or corrupt|cannot be read)"):
        read_chain_file(q, dataset="d")
    r = tmp_path / "junk.hdf5"
    r.write_bytes(b"not an hdf5 file at all")
    with pytest.raises(ValueError, match="not a readable HDF5 file"):
        read_chain_file(r, dataset="d")


def test_write_npy_round_trip(tmp_path, draws3):
    ch = read_chain_file(_save(tmp_path, draws3))
    p = write_chain_npy(tmp_path / "o.npy", ch)
    np.testing.assert_array_equal(np.load(p), draws3)


def _save(tmp_path, arr):
    p = tmp_path / "in.npy"
    np.save(p, arr)
    return p
