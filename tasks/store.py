"""The run store: one self-describing HDF5 file per study.

A store holds every revision of a study (``/revisions/r0001``, ``r0002``, ...): the config
text, the hashes of the input files, the observation table, the chain and its diagnostics,
the selection, every run with every attempt, the QoI values and estimates, and the
provenance (content hashes and software versions). The layout is documented in
``docs/store-layout.md``.

Writes are safe: each stage's output is committed in one step (copy-on-write then
``os.replace``), so a crash leaves either the previous state or the new one. One writer at a
time holds an exclusive lock on ``STORE.lock``; readers need no lock.

Examples
--------
>>> RunStore.create("study.h5", "aquifer")                      # doctest: +SKIP
>>> with RunStore.open_for_write("study.h5") as store:           # doctest: +SKIP
...     rev = store.new_revision(config_text, inputs={"observations": obs_path})
...     store.write_chain(rev, chain)
>>> check("study.h5").ok                                         # doctest: +SKIP
True
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from . import _store as S
from ._provenance import hash_chain, hash_config, hash_file, hash_object, version_info
from ._store import SCHEMA_VERSION, SchemaVersionError, StoreBusyError, StoreFormatError
from .records import (
    RUN_STATES,
    Chain,
    QoIEstimate,
    QoIValue,
    RunOutcome,
    RunSpec,
    Selection,
)

__all__ = [
    "SCHEMA_VERSION",
    "CheckReport",
    "RunStore",
    "RunStoreReader",
    "RunStoreWriter",
    "SchemaVersionError",
    "StoreBusyError",
    "StoreFormatError",
    "check",
    "diff",
    "hash_config",
    "hash_file",
    "inputs_changed",
    "load_report_data",
    "status",
    "to_strict_json",
    "trace",
]

_ROOT_ATTRS = ("schema_version", "study", "created", "winnow_version", "description")


def _as_path(path: Any, what: str = "store") -> Path:
    if not isinstance(path, str | Path):
        raise TypeError(f"{what} path must be str or Path, got {type(path).__name__}")
    return Path(path)


# ------------------------------------------------------------------------------------------
# reader
# ------------------------------------------------------------------------------------------
class RunStoreReader:
    """Read access to a store (no lock; sees the file as it was when opened).

    Use as a context manager: ``with RunStore.open_read(path) as store: ...``.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = _as_path(path)
        S.clean_stale_temps(self.path, holding_lock=False)
        self._file: h5py.File | None = S.open_h5(self.path)

    # -- plumbing ----------------------------------------------------------------------------
    @contextmanager
    def _h5(self) -> Iterator[h5py.File]:
        if self._file is None:
            raise ValueError(f"store {str(self.path)!r} is closed")
        yield self._file

    def close(self) -> None:
        if self._file is not None:
            self._file.close()
            self._file = None

    def __enter__(self) -> RunStoreReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _rev(self, f: h5py.File, revision: str | int | None) -> h5py.Group:
        return f["revisions"][S.resolve_revision(f, revision, self.path)]

    # -- study --------------------------------------------------------------------------------
    @property
    def study(self) -> str:
        with self._h5() as f:
            return S.attr_str(f, "study")

    @property
    def description(self) -> str:
        with self._h5() as f:
            return S.attr_str(f, "description", "")

    @property
    def schema_version(self) -> int:
        with self._h5() as f:
            return int(f.attrs["schema_version"])

    def revisions(self) -> list[str]:
        """Names of all revisions, oldest first (``["r0001", "r0002", ...]``)."""
        with self._h5() as f:
            return S.revisions(f)

    def latest_revision(self) -> str | None:
        """Name of the newest revision, or None when the store has none."""
        revs = self.revisions()
        return revs[-1] if revs else None

    def sections(self, revision: str | int | None = None) -> list[str]:
        """Sections present in a revision (``config``, ``chain``, ``selection``, ...)."""
        with self._h5() as f:
            return sorted(self._rev(f, revision))

    def stages_done(self, revision: str | int | None = None) -> set[str]:
        """Stage outputs already stored in a revision: a subset of
        ``{"chain", "selection", "runs", "results"}``."""
        return set(self.sections(revision)) & set(S.DOWNSTREAM)

    # -- records ------------------------------------------------------------------------------
    def read_config_text(self, revision: str | int | None = None) -> str:
        with self._h5() as f:
            return S.get_text(S.need(S.need(self._rev(f, revision), "config"), "text"))

    def read_inputs(self, revision: str | int | None = None) -> dict[str, str]:
        """SHA-256 of each input file of a revision, keyed by input name."""
        with self._h5() as f:
            return {k: v["sha256"] for k, v in S.read_inputs(self._rev(f, revision)).items()}

    def read_input_details(self, revision: str | int | None = None) -> dict[str, dict]:
        """Path, SHA-256 and size of each input file of a revision."""
        with self._h5() as f:
            return S.read_inputs(self._rev(f, revision))

    def read_observations(self, revision: str | int | None = None) -> Any:
        """The observation table as written (structured array, dict of arrays or array),
        or None when the revision has none."""
        with self._h5() as f:
            g = self._rev(f, revision)
            return S.read_observations(g) if "observations" in g else None

    def read_chain(self, revision: str | int | None = None) -> Chain:
        with self._h5() as f:
            return S.read_chain(self._rev(f, revision))

    def read_selection(self, revision: str | int | None = None) -> Selection:
        with self._h5() as f:
            return S.read_selection(self._rev(f, revision))

    def read_runs(
        self, revision: str | int | None = None
    ) -> tuple[list[RunSpec], list[RunOutcome]]:
        with self._h5() as f:
            return S.read_runs(self._rev(f, revision))

    def read_results(
        self, revision: str | int | None = None
    ) -> tuple[list[QoIValue], list[QoIEstimate]]:
        with self._h5() as f:
            return S.read_results(self._rev(f, revision))

    def read_provenance(self, revision: str | int | None = None) -> dict[str, Any]:
        """Content hashes and software versions of a revision, and its flow-run id."""
        with self._h5() as f:
            return S.read_provenance(self._rev(f, revision))

    def load_checkpoint(self, revision: str | int | None, name: str) -> dict[str, Any] | None:
        """The checkpoint dict saved under ``name`` in ``revision``, or None."""
        with self._h5() as f:
            return S.read_checkpoint(self._rev(f, revision), name)

    def successful_runs_by_key(self) -> dict[str, str]:
        """Map each reuse key with a success to the run that produced it, over all revisions.

        Values are ``"<revision>/<run id>"`` of the run that actually ran (a reused success
        points back to its origin). When several revisions ran the same key, the newest wins.
        """
        out: dict[str, str] = {}
        with self._h5() as f:
            for rev in S.revisions(f):
                g = f["revisions"][rev]
                if "runs" not in g:
                    continue
                t = g["runs"]
                ids = S.get_texts(t["run_id"])
                states = S.get_texts(t["state"])
                keys = S.get_texts(t["outcome_key"])
                reused = S.get_texts(t["reused_from"])
                for rid, st, key, ref in zip(ids, states, keys, reused, strict=True):
                    if st == "succeeded":
                        out[key] = ref if ref else f"{rev}/{rid}"
        return out


# ------------------------------------------------------------------------------------------
# writer
# ------------------------------------------------------------------------------------------
class RunStoreWriter(RunStoreReader):
    """The single writer of a store; holds ``STORE.lock`` until closed.

    Every ``new_revision`` / ``write_*`` / checkpoint call is one atomic commit. Only the
    latest revision can be written; earlier revisions stay as they were. Writing a section
    removes the sections that descend from it in the same revision (a new chain removes the
    selection, runs and results made from the old one).
    """

    def __init__(self, path: str | Path) -> None:
        self.path = _as_path(path)
        self._file = None
        if not self.path.exists():
            raise FileNotFoundError(
                f"store {str(self.path)!r} does not exist (create it with RunStore.create)"
            )
        self._lock: S.WriterLock | None = S.WriterLock(self.path)
        self._lock.acquire()
        try:
            S.clean_stale_temps(self.path, holding_lock=True)
            S.open_h5(self.path).close()  # refuses newer schemas / non-stores now
        except BaseException:
            self._lock.release()
            self._lock = None
            raise
        self._versions = version_info()

    @contextmanager
    def _h5(self) -> Iterator[h5py.File]:
        if self._lock is None:
            raise ValueError(f"writer of store {str(self.path)!r} is closed")
        f = S.open_h5(self.path)
        try:
            yield f
        finally:
            f.close()

    def close(self) -> None:
        if getattr(self, "_lock", None) is not None:
            self._lock.release()
            self._lock = None

    def __enter__(self) -> RunStoreWriter:
        return self

    def _commit(self, apply: Callable[[h5py.File], None]) -> None:
        if self._lock is None:
            raise ValueError(f"writer of store {str(self.path)!r} is closed")
        S.commit(self.path, apply)

    def _writable(self, revision: str | int | None) -> str:
        with self._h5() as f:
            name = S.resolve_revision(f, revision, self.path)
            latest = S.revisions(f)[-1]
        if name != latest:
            raise ValueError(
                f"revision {name} is not the latest ({latest}); earlier revisions are kept "
                "unchanged, write to the latest one"
            )
        return name

    def _write_section(
        self,
        revision: str | int | None,
        section: str,
        writer: Callable[[h5py.Group], None],
        digest: str,
    ) -> None:
        rev = self._writable(revision)
        wv = self._versions["winnow_version"]

        def apply(f: h5py.File) -> None:
            g = f["revisions"][rev]
            for down in S.DOWNSTREAM[section]:
                if down in g:
                    del g[down]
                S.set_provenance_hash(g, down, "")
            writer(g)
            S.stamp(g[section], wv)
            S.set_provenance_hash(g, section, digest)

        self._commit(apply)

    # -- revisions ----------------------------------------------------------------------------
    def new_revision(
        self,
        config_text: str,
        *,
        inputs: Mapping[str, str | Path] | None = None,
        observations: Any = None,
        flow_run_id: str | None = None,
        observation_units: Mapping[str, str] | None = None,
        description: str = "",
    ) -> str:
        """Start a new revision holding the config, input hashes and observations.

        Parameters
        ----------
        config_text : str
            The study config (YAML) exactly as read.
        inputs : dict of str to path, optional
            Input files (observations, templates, model source) to hash, keyed by name.
        observations : structured ndarray, dict of str to array_like, or ndarray, optional
            The observation table; stored column by column and read back in the same form.
        flow_run_id : str, optional
            The Prefect flow-run id of the run that made this revision.
        observation_units : dict of str to str, optional
            Units of each observation column (stored as the column's ``units`` attribute).

        Returns
        -------
        str
            The new revision's name, e.g. ``"r0002"``.
        """
        if not isinstance(config_text, str):
            raise TypeError(f"config_text must be str, got {type(config_text).__name__}")
        if "\x00" in config_text:
            raise ValueError("config_text contains a NUL character")
        if flow_run_id is not None and not isinstance(flow_run_id, str):
            flow_run_id = str(flow_run_id)  # a UUID object
        if not isinstance(description, str):
            raise TypeError(f"description must be str, got {type(description).__name__}")
        hashed: dict[str, tuple[Path, str, int]] = {}
        for name, p in dict(inputs or {}).items():
            if not isinstance(name, str) or not name:
                raise ValueError(f"input names must be non-empty str, got {name!r}")
            pp = _as_path(p, f"input {name!r}").resolve()
            hashed[name] = (pp, hash_file(pp), pp.stat().st_size)
        if observations is not None:
            S.normalise_observations(observations)  # validate before committing
        source = str(hashed["observations"][0]) if "observations" in hashed else ""
        versions = dict(self._versions)
        out: list[str] = []

        def apply(f: h5py.File) -> None:
            revs = S.revisions(f)
            number = int(revs[-1][1:]) + 1 if revs else 1
            name = S.rev_name(number)
            rg = S.put_group(
                f["revisions"],
                name,
                f"revision {number} of the study" + (f": {description}" if description else ""),
                revision=number,
                created=S.now_iso(),
            )
            S.write_provenance(rg, versions, flow_run_id or "")
            S.set_provenance_hash(rg, "config", S.write_config(rg, config_text))
            S.set_provenance_hash(rg, "inputs", S.write_inputs(rg, hashed))
            if observations is not None:
                digest = S.write_observations(rg, observations, observation_units, source)
                S.set_provenance_hash(rg, "observations", digest)
            for sec in ("config", "inputs", "observations"):
                if sec in rg:
                    S.stamp(rg[sec], versions["winnow_version"])
            out.append(name)

        self._commit(apply)
        return out[0]

    # -- stage outputs ------------------------------------------------------------------------
    def write_chain(self, revision: str | int | None, chain: Chain) -> None:
        """Store the chain (and its diagnostics) of a revision."""
        S.validate_chain(chain)
        digest = hash_chain(chain)
        self._write_section(revision, "chain", lambda g: S.write_chain(g, chain, digest), digest)

    def write_selection(self, revision: str | int | None, sel: Selection) -> None:
        """Store the selection of a revision; indices must be rows of its chain."""
        S.validate_selection(sel)
        rev = self._writable(revision)
        with self._h5() as f:
            g = f["revisions"][rev]
            if "chain" in g and sel.m:
                n = g["chain/samples"].shape[0]
                idx = np.asarray(sel.indices)
                if idx.min() < 0 or idx.max() >= n:
                    raise ValueError(
                        f"selection.indices must lie in [0, {n}) (the chain's rows), "
                        f"got range [{idx.min()}, {idx.max()}]"
                    )
        digest = S.hash_selection(sel)
        self._write_section(rev, "selection", lambda g: S.write_selection(g, sel, digest), digest)

    def write_runs(
        self, revision: str | int | None, specs: Sequence[RunSpec], outcomes: Sequence[RunOutcome]
    ) -> None:
        """Store every run of a revision: its spec and, when it has one, its outcome."""
        specs, outcomes = list(specs), list(outcomes)
        by_id = S.validate_runs(specs, outcomes)
        digest = S.hash_runs(specs, outcomes)
        self._write_section(
            revision, "runs", lambda g: S.write_runs(g, specs, outcomes, by_id, digest), digest
        )

    def write_results(
        self,
        revision: str | int | None,
        values: Sequence[QoIValue],
        estimates: Sequence[QoIEstimate],
    ) -> None:
        """Store the QoI values of every run and the estimate of every QoI."""
        values, estimates = list(values), list(estimates)
        S.validate_results(values, estimates)
        digest = S.hash_results(values, estimates)
        self._write_section(
            revision, "results", lambda g: S.write_results(g, values, estimates, digest), digest
        )

    # -- checkpoints --------------------------------------------------------------------------
    def save_checkpoint(
        self, revision: str | int | None, name: str, state: Mapping[str, Any]
    ) -> None:
        """Save a sampler checkpoint (dict of arrays, scalars and JSON-able values)."""
        if not isinstance(name, str) or not name:
            raise ValueError(f"checkpoint name must be a non-empty str, got {name!r}")
        rev = self._writable(revision)
        S.to_json({k: v for k, v in dict(state).items() if not isinstance(v, np.ndarray)})
        self._commit(lambda f: S.write_checkpoint(f["revisions"][rev], name, state))

    def clear_checkpoint(self, revision: str | int | None, name: str) -> None:
        """Remove a checkpoint (no error when there is none)."""
        rev = self._writable(revision)
        with self._h5() as f:
            g = f["revisions"][rev]
            if "checkpoints" not in g or S.safe_name(name) not in g["checkpoints"]:
                return

        def apply(f: h5py.File) -> None:
            del f["revisions"][rev]["checkpoints"][S.safe_name(name)]

        self._commit(apply)


# ------------------------------------------------------------------------------------------
# entry points
# ------------------------------------------------------------------------------------------
class RunStore:
    """Create and open run stores."""

    @staticmethod
    def create(path: str | Path, study: str, *, force: bool = False, description: str = "") -> None:
        """Create an empty store for ``study``.

        Raises
        ------
        FileExistsError
            When ``path`` exists and ``force`` is False.
        StoreBusyError
            When another process is writing the store.
        """
        p = _as_path(path)
        if not isinstance(study, str) or not study.strip():
            raise ValueError(f"study must be a non-empty str, got {study!r}")
        if not isinstance(description, str):
            raise TypeError(f"description must be str, got {type(description).__name__}")
        if p.is_dir():
            raise IsADirectoryError(f"store {str(p)!r} is a folder, expected a file path")
        if p.exists() and not force:
            raise FileExistsError(f"store {str(p)!r} already exists; pass force=True to replace it")
        if p.parent.exists() and not p.parent.is_dir():
            raise NotADirectoryError(f"{str(p.parent)!r} (folder of the store) is a file")
        versions = version_info()

        def apply(f: h5py.File) -> None:
            f.attrs["schema_version"] = SCHEMA_VERSION
            f.attrs["study"] = study
            f.attrs["created"] = S.now_iso()
            f.attrs["winnow_version"] = versions["winnow_version"]
            f.attrs["description"] = description
            f.attrs["format"] = "winnow run store; layout in docs/store-layout.md"
            S.put_group(f, "revisions", "one group per revision of the study, r0001 first")

        p.parent.mkdir(parents=True, exist_ok=True)  # e.g. a fresh clone's studies/ folder
        lock = S.WriterLock(p)
        lock.acquire()
        try:
            if p.exists() and not force:  # created by someone else meanwhile
                raise FileExistsError(
                    f"store {str(p)!r} already exists; pass force=True to replace it"
                )
            S.clean_stale_temps(p, holding_lock=True)
            S.commit(p, apply, new=True)
        finally:
            lock.release()

    @staticmethod
    def open_for_write(path: str | Path) -> RunStoreWriter:
        """Open the store as its single writer (a context manager holding the lock)."""
        return RunStoreWriter(path)

    @staticmethod
    def open_read(path: str | Path) -> RunStoreReader:
        """Open the store for reading (a context manager; no lock)."""
        return RunStoreReader(path)


def inputs_changed(path: str | Path, inputs: Mapping[str, str | Path]) -> bool:
    """True when the input files' hashes differ from those of the latest revision.

    Also True when the store does not exist or has no revision yet, or when the set of input
    names differs.
    """
    p = _as_path(path)
    current = {k: hash_file(v) for k, v in dict(inputs).items()}
    if not p.exists():
        return True
    with RunStore.open_read(p) as r:
        if r.latest_revision() is None:
            return True
        return r.read_inputs() != current


# ------------------------------------------------------------------------------------------
# check
# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class CheckReport:
    """Outcome of :func:`check`: ``ok`` is True when ``problems`` is empty."""

    path: str
    ok: bool
    problems: list[str] = field(default_factory=list)
    revisions: list[str] = field(default_factory=list)
    datasets_checked: int = 0


def _short(h: Any) -> str:
    s = str(h)
    return s[:12] + "..." if len(s) > 12 else (s or "(none)")


def _section_checks() -> dict[str, tuple[Callable[[h5py.Group], Any], Callable[[Any], str]]]:
    return {
        "config": (lambda g: S.get_text(S.need(g["config"], "text")), hash_config),
        "inputs": (
            lambda g: {k: v["sha256"] for k, v in S.read_inputs(g).items()},
            hash_object,
        ),
        "observations": (
            lambda g: S.normalise_observations(S.read_observations(g))[1],
            hash_object,
        ),
        "chain": (S.read_chain, hash_chain),
        "selection": (S.read_selection, S.hash_selection),
        "runs": (S.read_runs, lambda r: S.hash_runs(*r)),
        "results": (S.read_results, lambda r: S.hash_results(*r)),
    }


def check(path: str | Path) -> CheckReport:
    """Verify a store's structure and every content hash.

    Every dataset's data are re-hashed and compared with its ``sha256`` attribute (a changed
    byte is reported with the dataset's name); every section is read back as records and its
    record hash compared with the section's and the provenance's; cross references
    (selection rows, run points) are checked against the chain.

    Raises
    ------
    FileNotFoundError, StoreFormatError, SchemaVersionError
        When the file is missing, not a readable winnow store, or from a newer schema.
    """
    p = _as_path(path)
    problems: list[str] = []
    n_ds = 0
    with S.open_h5(p) as f:
        for a in _ROOT_ATTRS:
            if a not in f.attrs:
                problems.append(f"/: root attribute {a!r} is missing")
        if "revisions" not in f:
            problems.append("/revisions: group is missing")
            return CheckReport(str(p), False, problems, [], 0)
        for name in f["revisions"]:
            if not S.REV_RE.match(name):
                problems.append(f"/revisions/{name}: not a revision name (expected r0001 ...)")
        for name, ds in S.iter_datasets(f, problems):
            n_ds += 1
            for a in ("units", "description", "sha256"):
                if a not in ds.attrs:
                    problems.append(f"/{name}: attribute {a!r} is missing")
            if "sha256" not in ds.attrs:
                continue
            try:
                got = S.hash_dataset_content(ds)
            except Exception as exc:  # damaged storage raises many kinds of error
                problems.append(f"/{name}: cannot be read ({exc})")
                continue
            stored = S.attr_str(ds, "sha256")
            if got != stored:
                problems.append(
                    f"/{name}: data do not match their sha256 "
                    f"(stored {_short(stored)}, computed {_short(got)})"
                )
        revs = S.revisions(f)
        for rev in revs:
            problems.extend(_check_revision(f["revisions"][rev], rev))
    return CheckReport(str(p), not problems, problems, revs, n_ds)


def _check_revision(g: h5py.Group, rev: str) -> list[str]:
    out: list[str] = []
    base = f"/revisions/{rev}"
    prov = g.get("provenance")
    for required in ("config", "inputs", "provenance"):
        if required not in g:
            out.append(f"{base}/{required}: group is missing")
    records: dict[str, Any] = {}
    for section, (reader, hasher) in _section_checks().items():
        if section not in g:
            if prov is not None and S.attr_str(prov, f"{section}_sha256", ""):
                out.append(f"{base}/{section}: missing although provenance records its hash")
            continue
        try:
            rec = reader(g)
            digest = hasher(rec)
        except Exception as exc:
            out.append(f"{base}/{section}: cannot be read back ({type(exc).__name__}: {exc})")
            continue
        records[section] = rec
        stored = S.attr_str(g[section], "sha256", "")
        if digest != stored:
            out.append(
                f"{base}/{section}: content does not match its sha256 "
                f"(stored {_short(stored)}, computed {_short(digest)})"
            )
        if prov is not None and S.attr_str(prov, f"{section}_sha256", "") != digest:
            out.append(f"{base}/provenance: {section}_sha256 does not match the stored {section}")
    if "chain" in g and "diagnostics" in g["chain"]:
        d = g["chain/diagnostics"]
        try:
            if hash_object(S.read_diagnostics(d)) != S.attr_str(d, "sha256", ""):
                out.append(f"{base}/chain/diagnostics: content does not match its sha256")
        except Exception as exc:
            out.append(f"{base}/chain/diagnostics: cannot be read back ({exc})")
    for name in g.get("checkpoints", {}):
        try:
            state = S.read_checkpoint(g, S.unsafe_name(name))
            if hash_object(state) != S.attr_str(g["checkpoints"][name], "sha256", ""):
                out.append(f"{base}/checkpoints/{name}: content does not match its sha256")
        except Exception as exc:
            out.append(f"{base}/checkpoints/{name}: cannot be read back ({exc})")
    chain = records.get("chain")
    sel = records.get("selection")
    if chain is not None and sel is not None:
        idx = np.asarray(sel.indices)
        if idx.size and (idx.min() < 0 or idx.max() >= chain.n):
            out.append(f"{base}/selection/indices: rows outside the chain's {chain.n} rows")
        elif not np.array_equal(np.asarray(sel.points), chain.samples[idx], equal_nan=True):
            out.append(f"{base}/selection/points: differ from the chain rows they index")
    if chain is not None and "runs" in records:
        bad = [s.run_id for s in records["runs"][0] if not 0 <= s.point_index < chain.n]
        if bad:
            out.append(f"{base}/runs/point_index: runs {', '.join(bad)} point outside the chain")
    return out


# ------------------------------------------------------------------------------------------
# status, trace, diff
# ------------------------------------------------------------------------------------------
def _plain(x: Any) -> Any:
    """Plain Python (JSON-ready apart from non-finite floats) from arrays and numpy scalars."""
    if isinstance(x, np.ndarray):
        return _plain(x.tolist())
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, dict):
        return {(k if isinstance(k, str) else str(_plain(k))): _plain(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_plain(v) for v in x]
    if isinstance(x, Path):
        return str(x)
    return x


# Log files of an attempt in its run folder (DEVELOPERS.md, "Where things are recorded"): the
# last attempt's streams keep these names, an earlier attempt k's are renamed to
# winnow-stderr.attempt<k>.txt when the next one starts (tasks/_process.py, _rotate_logs).
_RUN_LOG_NAMES = {"stdout": "winnow-stdout.txt", "stderr": "winnow-stderr.txt"}
# Lines of a stored stream tail that status() gives for a run that did not succeed.
_TAIL_LINES = 10


def _log_file(run_dir: str | Path, stream: str, number: int, last: int) -> str:
    """Path of the full log of attempt ``number`` (of ``last``) in its run folder."""
    name = _RUN_LOG_NAMES[stream]
    if number != last:
        stem, suffix = name.rsplit(".", 1)
        name = f"{stem}.attempt{number}.{suffix}"
    return str(Path(run_dir) / name)


def _last_lines(text: str, n: int = _TAIL_LINES) -> str:
    """The last ``n`` lines of a stream tail, trailing blank lines dropped."""
    return "\n".join(text.rstrip().splitlines()[-n:]) if n > 0 else ""


def status(path: str | Path, revision: str | int | None = None) -> dict[str, Any]:
    """Runs of a revision (default: the latest) by state.

    Returns
    -------
    dict
        ``{"counts": {state: n}, "runs": [{"id", "state", "attempts", "seconds", "message",
        "stderr_tail", "stderr_log"}]}``; counts list every state of
        :data:`~winnow.tasks.records.RUN_STATES` (zeros included); a run without an outcome
        counts as ``not_run``. For a run that ran and did not succeed, ``stderr_tail`` holds
        the last 10 lines of its last attempt's stderr as stored and
        ``stderr_log`` the path of that attempt's full stderr in the run folder; otherwise
        they are ``""`` and ``None``.
    """
    with RunStore.open_read(path) as r:
        rev = r.latest_revision() if revision is None else revision
        counts = dict.fromkeys(RUN_STATES, 0)
        runs: list[dict[str, Any]] = []
        if rev is None or "runs" not in r.sections(rev):
            if rev is not None:
                r.sections(rev)  # validates the revision name
            return {"counts": counts, "runs": runs}
        specs, outcomes = r.read_runs(rev)
    by_id = {o.run_id: o for o in outcomes}
    for s in specs:
        o = by_id.get(s.run_id)
        state = o.state if o else "not_run"
        counts[state] = counts.get(state, 0) + 1
        tail, log = "", None
        if o is not None and state != "succeeded" and o.attempts:
            a = o.attempts[-1]
            tail = _last_lines(a.stderr_tail)
            log = _log_file(o.run_dir, "stderr", int(a.number), int(a.number))
        runs.append(
            {
                "id": s.run_id,
                "state": state,
                "attempts": len(o.attempts) if o else 0,
                "seconds": float(o.seconds) if o else 0.0,
                "message": o.message if o else "",
                "stderr_tail": tail,
                "stderr_log": log,
            }
        )
    return {"counts": counts, "runs": runs}


def _attempt_dict(a: Any, run_dir: str | Path, last: int) -> dict[str, Any]:
    return {
        "number": int(a.number),
        "argv": list(a.argv),
        "started": float(a.started),
        "ended": float(a.ended),
        "started_utc": S.iso_from_unix(float(a.started)),
        "ended_utc": S.iso_from_unix(float(a.ended)),
        "seconds": float(a.ended - a.started),
        "exit_status": a.exit_status,
        "timed_out": bool(a.timed_out),
        "error": a.error,
        "stdout_tail": a.stdout_tail,
        "stderr_tail": a.stderr_tail,
        "stdout_log": _log_file(run_dir, "stdout", int(a.number), last),
        "stderr_log": _log_file(run_dir, "stderr", int(a.number), last),
    }


def _attempt_dicts(o: RunOutcome) -> list[dict[str, Any]]:
    last = max((int(a.number) for a in o.attempts), default=0)
    return [_attempt_dict(a, o.run_dir, last) for a in o.attempts]


def trace(path: str | Path, point: str | int, revision: str | int | None = None) -> dict[str, Any]:
    """The lineage of one point: observations -> chain row -> selection -> decks -> attempts
    -> QoI values.

    Parameters
    ----------
    point : str or int
        A run id, or the start of exactly one run id (``p008982`` for ``p008982-1a2b3c4d``),
        or a chain row index (int or a string of digits that is not a run id).
    revision : str or int, optional
        Revision to look in. By default, for a run id the newest revision that has it, for a
        row index the latest revision.

    Raises
    ------
    ValueError
        ``point`` names no run and no chain row, or starts several run ids of the revision
        (the message lists them).
    """
    if isinstance(point, bool) or not isinstance(point, str | int | np.integer):
        raise TypeError(f"point must be a run id (str) or a chain row (int), got {point!r}")
    p = _as_path(path)
    with RunStore.open_read(p) as r:
        revs = r.revisions()
        if not revs:
            raise ValueError(f"store {str(p)!r} has no revisions yet")
        if revision is not None:
            candidates = [_rev_name(r, revision)]
        else:
            candidates = list(reversed(revs))
        rev, spec, outcome, row = None, None, None, None
        if isinstance(point, str):
            found = _find_run(r, candidates, point)
            if found is not None:
                rev, spec, outcome = found
                row = int(spec.point_index)
        if rev is None:
            if isinstance(point, str) and not point.strip().isdigit():
                where = f"revision {candidates[0]}" if revision is not None else "any revision"
                raise ValueError(
                    f"point {point!r} is neither a run id (or the start of one) in {where} "
                    "nor a row index"
                )
            row = int(point)
            rev = candidates[0]
            if "runs" in r.sections(rev):
                specs, outcomes = r.read_runs(rev)
                spec = next((s for s in specs if int(s.point_index) == row), None)
                if spec is not None:
                    outcome = next((o for o in outcomes if o.run_id == spec.run_id), None)
        return _lineage(r, rev, row, spec, outcome)


_MAX_SHOWN = 10  # candidates listed when a run id prefix is ambiguous


def _find_run(
    r: RunStoreReader, revisions: Sequence[str], point: str
) -> tuple[str, RunSpec, RunOutcome | None] | None:
    """The run named by ``point`` in the first of ``revisions`` that has it: an exact run id
    first (in any of them), else an unambiguous prefix of one (tables show ids shortened,
    e.g. ``p008982``). A prefix that fits several run ids of that revision is refused,
    naming them."""
    cache: dict[str, tuple[list[RunSpec], list[RunOutcome]]] = {}

    def runs() -> Iterator[tuple[str, tuple[list[RunSpec], list[RunOutcome]]]]:
        for rev in revisions:
            if rev not in cache:
                cache[rev] = r.read_runs(rev) if "runs" in r.sections(rev) else ([], [])
            yield rev, cache[rev]

    def outcome_of(outcomes: list[RunOutcome], rid: str) -> RunOutcome | None:
        return next((o for o in outcomes if o.run_id == rid), None)

    for rev, (specs, outcomes) in runs():
        hit = next((s for s in specs if s.run_id == point), None)
        if hit is not None:
            return rev, hit, outcome_of(outcomes, hit.run_id)
    if not point or point.strip().isdigit():
        return None  # digits name a chain row
    for rev, (specs, outcomes) in runs():
        hits = [s for s in specs if s.run_id.startswith(point)]
        if len(hits) == 1:
            return rev, hits[0], outcome_of(outcomes, hits[0].run_id)
        if hits:
            shown = ", ".join(s.run_id for s in hits[:_MAX_SHOWN])
            more = f" and {len(hits) - _MAX_SHOWN} more" if len(hits) > _MAX_SHOWN else ""
            raise ValueError(
                f"point {point!r} is the start of {len(hits)} run ids in revision {rev}: "
                f"{shown}{more}; give more of the id"
            )
    return None


def _rev_name(r: RunStoreReader, revision: str | int) -> str:
    with r._h5() as f:
        return S.resolve_revision(f, revision, r.path)


def _lineage(
    r: RunStoreReader, rev: str, row: int, spec: RunSpec | None, outcome: RunOutcome | None
) -> dict[str, Any]:
    sections = r.sections(rev)
    details = r.read_input_details(rev)
    out: dict[str, Any] = {
        "store": str(r.path),
        "study": r.study,
        "revision": rev,
        "config": {"sha256": hash_config(r.read_config_text(rev))},
        "inputs": details,
        "observations": None,
    }
    with r._h5() as f:
        g = f["revisions"][rev]
        if "observations" in g:
            og = g["observations"]
            cols = [str(c) for c in og.attrs["columns"]]
            first = og[S.safe_name(cols[0])] if cols else None
            out["observations"] = {
                "file": details.get("observations", {}).get("path", S.attr_str(og, "source", "")),
                "file_sha256": details.get("observations", {}).get("sha256"),
                "table_sha256": S.attr_str(og, "sha256", ""),
                "columns": cols,
                "rows": int(first.shape[0]) if first is not None and first.ndim else 0,
            }
        if "chain" not in g:
            raise ValueError(f"revision {rev} has no chain to trace point {row} in")
        cg = g["chain"]
        n = cg["samples"].shape[0]
        if not 0 <= row < n:
            raise ValueError(f"chain row must lie in [0, {n}), got {row}")
        names = [str(x) for x in cg["samples"].attrs["names"]]
        units = [str(x) for x in cg["samples"].attrs["units"]]
        values = cg["samples"][row]
        out["chain"] = {
            "source": S.attr_str(cg, "source", ""),
            "sha256": S.attr_str(cg, "sha256", ""),
            "rows": int(n),
            "row": int(row),
            "chain_index": int(cg["chain_index"][row]),
            "draw_index": int(cg["draw_index"][row]),
            "log_density": float(cg["log_density"][row]) if "log_density" in cg else None,
            "values": {
                nm: {"value": float(v), "units": u}
                for nm, v, u in zip(names, values, units, strict=True)
            },
        }
    out["selection"] = None
    if "selection" in sections:
        sel = r.read_selection(rev)
        pos = np.flatnonzero(np.asarray(sel.indices) == row)
        out["selection"] = {
            "selected": bool(pos.size),
            "position": int(pos[0]) if pos.size else None,
            "weight": float(sel.weights[pos[0]]) if pos.size else None,
            "method": sel.method,
            "seed": sel.seed,
            "weights_rule": sel.weights_rule,
            "kernel": sel.kernel,
            "bandwidth": float(sel.bandwidth),
            "feature_map": sel.feature_map,
            "n_features": int(sel.n_features),
            "mmd_exact": float(sel.mmd_exact),
            "m": sel.m,
            "sha256": S.hash_selection(sel),
        }
    out["run"] = None
    out["attempts"] = []
    out["origin"] = None
    out["qoi"] = []
    if spec is not None:
        out["run"] = {
            "run_id": spec.run_id,
            "key": spec.key,
            "run_dir": str(spec.run_dir),
            "params": _plain(spec.params),
            "weight": float(spec.weight),
            "argv": list(spec.argv),
            "decks": [
                {"path": k, "sha256": v, "file": str(Path(spec.run_dir) / k)}
                for k, v in spec.deck_hashes.items()
            ],
            "state": outcome.state if outcome else "not_run",
            "message": outcome.message if outcome else "",
            "reused_from": outcome.reused_from if outcome else "",
            "output_hashes": dict(outcome.output_hashes) if outcome else {},
            "seconds": float(outcome.seconds) if outcome else 0.0,
        }
        if outcome is not None:
            out["attempts"] = _attempt_dicts(outcome)
            if outcome.reused_from:
                out["origin"] = _origin(r, outcome.reused_from)
        if "results" in sections:
            values, estimates = r.read_results(rev)
            units = {e.name: e.units for e in estimates}
            out["qoi"] = [
                {
                    "name": v.name,
                    "value": _plain(v.value),
                    "units": units.get(v.name, ""),
                    "status": v.status,
                    "reason": v.reason,
                }
                for v in values
                if v.run_id == spec.run_id
            ]
    out["provenance"] = _plain(r.read_provenance(rev))
    return out


def _origin(r: RunStoreReader, ref: str) -> dict[str, Any]:
    """Where a reused run actually ran (``"r0001/<run id>"``) and its attempts."""
    rev, _, rid = ref.partition("/")
    info: dict[str, Any] = {"ref": ref, "found": False, "attempts": []}
    try:
        if "runs" not in r.sections(rev):
            return info
        _, outcomes = r.read_runs(rev)
    except ValueError:
        return info
    o = next((o for o in outcomes if o.run_id == rid), None)
    if o is not None:
        info.update(
            found=True,
            state=o.state,
            run_dir=str(o.run_dir),
            attempts=_attempt_dicts(o),
        )
    return info


def _section_hash(prov: Mapping[str, Any], name: str) -> str | None:
    return prov.get(f"{name}_sha256") or None


def diff(path: str | Path, rev1: str | int, rev2: str | int) -> dict[str, Any]:
    """What changed between two revisions: config, input and data hashes, chosen points,
    run states and estimates."""
    with RunStore.open_read(path) as r:
        a, b = _rev_name(r, rev1), _rev_name(r, rev2)
        pa, pb = r.read_provenance(a), r.read_provenance(b)
        ca, cb = r.read_config_text(a), r.read_config_text(b)
        ia, ib = r.read_inputs(a), r.read_inputs(b)
        out: dict[str, Any] = {"revisions": [a, b]}
        out["config"] = {
            "changed": ca != cb,
            "sha256": [hash_config(ca), hash_config(cb)],
            "diff": list(
                difflib.unified_diff(
                    ca.splitlines(), cb.splitlines(), f"{a}/config", f"{b}/config", lineterm=""
                )
            ),
        }
        out["inputs"] = {
            "added": sorted(set(ib) - set(ia)),
            "removed": sorted(set(ia) - set(ib)),
            "changed": sorted(k for k in set(ia) & set(ib) if ia[k] != ib[k]),
            "sha256": {k: [ia.get(k), ib.get(k)] for k in sorted(set(ia) | set(ib))},
        }
        for sec in ("observations", "chain", "selection", "runs", "results"):
            ha, hb = _section_hash(pa, sec), _section_hash(pb, sec)
            out.setdefault("sections", {})[sec] = {"changed": ha != hb, "sha256": [ha, hb]}
        sa = r.read_selection(a) if "selection" in r.sections(a) else None
        sb = r.read_selection(b) if "selection" in r.sections(b) else None
        out["selection"] = _diff_selection(sa, sb)
        out["runs"] = {"counts": [status(r.path, a)["counts"], status(r.path, b)["counts"]]}
        ea = r.read_results(a)[1] if "results" in r.sections(a) else []
        eb = r.read_results(b)[1] if "results" in r.sections(b) else []
    out["estimates"] = _diff_estimates(ea, eb)
    return out


def _diff_selection(sa: Selection | None, sb: Selection | None) -> dict[str, Any]:
    def rows(s: Selection | None) -> list[tuple[float, ...]]:
        return [] if s is None else [tuple(float(v) for v in p) for p in np.asarray(s.points)]

    ra, rb = rows(sa), rows(sb)
    set_a, set_b = set(ra), set(rb)
    return {
        "present": [sa is not None, sb is not None],
        "method": [s.method if s else None for s in (sa, sb)],
        "seed": [s.seed if s else None for s in (sa, sb)],
        "m": [s.m if s else 0 for s in (sa, sb)],
        "mmd_exact": [float(s.mmd_exact) if s else None for s in (sa, sb)],
        "indices": [_plain(s.indices) if s else [] for s in (sa, sb)],
        "points_kept": sum(1 for p in rb if p in set_a),
        "points_added": [list(p) for p in rb if p not in set_a],
        "points_removed": [list(p) for p in ra if p not in set_b],
    }


def _diff_estimates(ea: list[QoIEstimate], eb: list[QoIEstimate]) -> dict[str, Any]:
    da, db = {e.name: e for e in ea}, {e.name: e for e in eb}
    out: dict[str, Any] = {}
    for name in list(da) + [n for n in db if n not in da]:
        x, y = da.get(name), db.get(name)
        entry: dict[str, Any] = {
            "units": (y or x).units,  # type: ignore[union-attr]
            "mean": [_plain(x.mean) if x else None, _plain(y.mean) if y else None],
            "sd": [_plain(x.sd) if x else None, _plain(y.sd) if y else None],
            "n_used": [x.n_used if x else None, y.n_used if y else None],
        }
        if x is not None and y is not None and np.shape(x.mean) == np.shape(y.mean):
            entry["change"] = _plain(np.asarray(y.mean, float) - np.asarray(x.mean, float))
        out[name] = entry
    return out


# ------------------------------------------------------------------------------------------
# report data
# ------------------------------------------------------------------------------------------
def _config_qoi_info(config_text: str) -> tuple[dict[str, str], dict[str, dict[str, Any]]]:
    """QoI descriptions and axes from the stored config text (tolerant: a config that no
    longer parses gives none)."""
    import yaml

    try:
        cfg = yaml.safe_load(config_text)
        qois = cfg["collect"]["qoi"]
        if not isinstance(qois, list):
            return {}, {}
    except Exception:  # any YAML or shape problem: the report just lacks descriptions
        return {}, {}
    descriptions: dict[str, str] = {}
    axes: dict[str, dict[str, Any]] = {}
    for q in qois:
        if not isinstance(q, dict) or not isinstance(q.get("name"), str):
            continue
        if isinstance(q.get("description"), str) and q["description"]:
            descriptions[q["name"]] = q["description"]
        axis = q.get("axis")
        if isinstance(axis, dict):
            entry = {k: axis[k] for k in ("name", "units") if isinstance(axis.get(k), str)}
            if "values" in axis:
                try:
                    entry["values"] = np.asarray(axis["values"], dtype=np.float64)
                except (TypeError, ValueError):
                    pass
            axes[q["name"]] = entry
    return descriptions, axes


def load_report_data(
    path: str | Path, revision: str | int | None = None, *, max_plot_rows: int = 20000
) -> Any:
    """Everything the collect report shows for one revision (default: the latest).

    Reads every section first and checks that the chain, selection, runs and results still
    match the hashes recorded in the revision's provenance, so a damaged store is reported
    (``StoreFormatError``; ``winnow check`` names the damage) instead of turned into a report.

    Parameters
    ----------
    max_plot_rows : int
        At most this many chain rows are passed for plotting, evenly spaced over the chain
        (``chain_rows`` keeps the full count).

    Returns
    -------
    winnow.tasks.collect.ReportData
    """
    from .collect import ReportData  # the collect stage owns the report record

    if isinstance(max_plot_rows, bool) or not isinstance(max_plot_rows, int) or max_plot_rows < 1:
        raise ValueError(f"max_plot_rows must be a positive int, got {max_plot_rows!r}")
    p = _as_path(path)
    with RunStore.open_read(p) as r:
        rev = _rev_name(r, "latest" if revision is None else revision)
        secs = set(r.sections(rev))
        text = r.read_config_text(rev)
        chain = r.read_chain(rev) if "chain" in secs else None
        sel = r.read_selection(rev) if "selection" in secs else None
        specs, outcomes = r.read_runs(rev) if "runs" in secs else ([], [])
        values, estimates = r.read_results(rev) if "results" in secs else ([], [])
        prov = r.read_provenance(rev)
        inputs = r.read_input_details(rev)
        study, description = r.study, r.description
    recomputed = {
        "config": hash_config(text),
        "chain": hash_chain(chain) if chain is not None else "",
        "selection": S.hash_selection(sel) if sel is not None else "",
        "runs": S.hash_runs(specs, outcomes) if "runs" in secs else "",
        "results": S.hash_results(values, estimates) if "results" in secs else "",
    }
    for name, digest in recomputed.items():
        if (prov.get(f"{name}_sha256") or "") != digest:
            raise StoreFormatError(
                f"store {str(p)!r} {rev}: the stored {name} does not match the hash recorded "
                f"in its provenance; run `winnow check {p}` to see the damage"
            )
    samples = None
    if chain is not None:
        samples = chain.samples
        if chain.n > max_plot_rows:
            rows = np.linspace(0, chain.n - 1, max_plot_rows).round().astype(np.int64)
            samples = chain.samples[rows]
    run_of_point = {int(s.point_index): s.run_id for s in specs}
    point_run_ids = (
        tuple(run_of_point.get(int(i), "") for i in np.asarray(sel.indices)) if sel else ()
    )
    reuse = {
        "ran": sum(1 for o in outcomes if not o.reused_from and o.attempts),
        "reused": sum(1 for o in outcomes if o.reused_from),
    }
    not_run = len(outcomes) - reuse["ran"] - reuse["reused"]
    if not_run:
        reuse["not run"] = not_run
    descriptions, axes = _config_qoi_info(text)
    provenance: dict[str, Any] = {"store": str(p.resolve()), "revision": rev}
    for k, v in prov.items():
        if k != "revision" and v not in (None, ""):
            provenance[k] = v
    for name, info in inputs.items():
        provenance[f"input {name}"] = f"{info['path']} (sha256 {info['sha256']})"
    return ReportData(
        study=study,
        revision=rev,
        config_hash=recomputed["config"],
        config_text=text,
        description=description,
        chain_names=tuple(chain.names) if chain is not None else (),
        chain_units=tuple(chain.units) if chain is not None else (),
        chain_diagnostics=chain.diagnostics if chain is not None else None,
        chain_samples=samples,
        chain_rows=chain.n if chain is not None else 0,
        chain_source=chain.source if chain is not None else "",
        selection=sel,
        point_run_ids=point_run_ids,
        outcomes=list(outcomes),
        qoi_values=list(values),
        estimates=list(estimates),
        qoi_axes=axes,
        qoi_descriptions=descriptions,
        reuse_counts=reuse,
        provenance=provenance,
        created=S.now_iso(),
    )


def _finite_or_str(x: Any) -> Any:
    """Replace non-finite floats by strings so that output is strict JSON."""
    if isinstance(x, float) and not math.isfinite(x):
        return "NaN" if math.isnan(x) else ("Infinity" if x > 0 else "-Infinity")
    if isinstance(x, dict):
        return {k: _finite_or_str(v) for k, v in x.items()}
    if isinstance(x, list | tuple):
        return [_finite_or_str(v) for v in x]
    return x


def to_strict_json(x: Any) -> Any:
    """``_plain`` then non-finite floats as strings: ready for ``json.dumps(allow_nan=False)``."""
    return _finite_or_str(_plain(x))
