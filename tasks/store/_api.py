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

from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from winnow.tasks.records import Chain, QoIEstimate, QoIValue, RunOutcome, RunSpec, Selection

from . import _core as S
from ._core import SCHEMA_VERSION, SchemaVersionError, StoreBusyError, StoreFormatError
from ._hashes import hash_chain, hash_config, hash_file, version_info
from ._inspect import CheckReport, check, diff, status, to_strict_json, trace
from ._report_data import load_report_data

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

_ROOT_ATTRS = S.ROOT_ATTRS
_as_path = S.as_path


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
