"""HDF5 layout, atomic commit and writer lock of the run store (private).

The public face is :mod:`winnow.tasks.store`; ``docs/store-layout.md`` documents every group,
dataset and attribute written. This module holds how a change is committed in one step
(copy-on-write + ``os.replace``), how a single writer is enforced (``flock`` on a sidecar lock
file) and how a store is opened, and gathers the layout of each section from the private
modules named for what they hold:

* ``_h5``: constants, errors, tagged JSON, dataset helpers;
* ``_columns``, ``_tables``: the declarative column table of each record type
  and the code that writes and reads records through them;
* ``_provenance``: ``config``, ``inputs``, ``observations``, ``provenance``;
* ``_chain``: ``chain`` with its diagnostics, and ``checkpoints``;
* ``_selection``, ``_runs``, ``_results``: those sections.
"""

from __future__ import annotations

import errno
import fcntl
import os
import re
import shutil
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import h5py
import numpy as np

from winnow.tasks.errors import InputError

from ._chain import (
    read_chain,
    read_checkpoint,
    read_diagnostics,
    validate_chain,
    write_chain,
    write_checkpoint,
    write_diagnostics,
)
from ._columns import build
from ._h5 import (
    DOWNSTREAM,
    LIBVER,
    ONE,
    REV_RE,
    SCHEMA_VERSION,
    STR,
    TEXT,
    SchemaVersionError,
    StoreBusyError,
    StoreFormatError,
    attr_json,
    attr_str,
    from_json,
    get_array,
    get_text,
    get_texts,
    iso_from_unix,
    need,
    now_iso,
    put_array,
    put_group,
    put_text,
    restore_form,
    safe_name,
    to_json,
    unsafe_name,
    value_form,
)
from ._hashes import hash_dataset_content
from ._provenance import (
    normalise_observations,
    read_inputs,
    read_observations,
    read_provenance,
    set_provenance_hash,
    stamp,
    write_config,
    write_inputs,
    write_observations,
    write_provenance,
)
from ._results import hash_results, read_results, validate_results, write_results
from ._runs import hash_runs, read_runs, validate_runs, write_runs
from ._selection import hash_selection, read_selection, validate_selection, write_selection
from ._tables import KNOWN_FIELDS, TABLES, extra_json

__all__ = [
    "DOWNSTREAM",
    "KNOWN_FIELDS",
    "LIBVER",
    "ONE",
    "REV_RE",
    "ROOT_ATTRS",
    "SCHEMA_VERSION",
    "STR",
    "TABLES",
    "TEXT",
    "SchemaVersionError",
    "StoreBusyError",
    "StoreFormatError",
    "WriterLock",
    "as_path",
    "attr_json",
    "attr_str",
    "build",
    "check_schema",
    "clean_stale_temps",
    "commit",
    "extra_json",
    "from_json",
    "get_array",
    "get_text",
    "get_texts",
    "hash_dataset_content",
    "hash_results",
    "hash_runs",
    "hash_selection",
    "iso_from_unix",
    "iter_datasets",
    "lock_path",
    "need",
    "normalise_observations",
    "now_iso",
    "open_h5",
    "put_array",
    "put_group",
    "put_text",
    "read_chain",
    "read_checkpoint",
    "read_diagnostics",
    "read_inputs",
    "read_observations",
    "read_provenance",
    "read_results",
    "read_runs",
    "read_selection",
    "resolve_revision",
    "restore_form",
    "rev_name",
    "revisions",
    "safe_name",
    "set_provenance_hash",
    "stale_temps",
    "stamp",
    "temp_path",
    "to_json",
    "unsafe_name",
    "validate_chain",
    "validate_results",
    "validate_runs",
    "validate_selection",
    "value_form",
    "write_chain",
    "write_checkpoint",
    "write_config",
    "write_diagnostics",
    "write_inputs",
    "write_observations",
    "write_provenance",
    "write_results",
    "write_runs",
    "write_selection",
]


# ------------------------------------------------------------------------------------------
# writer lock
# ------------------------------------------------------------------------------------------
def lock_path(store: Path) -> Path:
    # through symlinks, so that every path to one store shares one lock file
    real = store.resolve()
    return real.with_name(real.name + ".lock")


class WriterLock:
    """Exclusive ``flock`` on ``STORE.lock`` held for a writer's whole session."""

    def __init__(self, store: Path) -> None:
        self.store = store
        self.path = lock_path(store)
        self.fd: int | None = None

    def acquire(self) -> None:
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            if exc.errno not in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                os.close(fd)
                raise
            holder = os.pread(fd, 256, 0).decode("utf-8", "replace").split()
            os.close(fd)
            pid = holder[0] if holder else "unknown"
            since = holder[1] if len(holder) > 1 else "unknown time"
            raise StoreBusyError(
                f"store {self.store} is being written by another process (pid {pid} since {since})"
            ) from None
        os.ftruncate(fd, 0)
        os.pwrite(fd, f"{os.getpid()} {now_iso()}\n".encode(), 0)
        self.fd = fd

    def release(self) -> None:
        if self.fd is None:
            return
        try:
            os.ftruncate(self.fd, 0)
            fcntl.flock(self.fd, fcntl.LOCK_UN)
        finally:
            os.close(self.fd)
            self.fd = None


# ------------------------------------------------------------------------------------------
# atomic commit (copy-on-write)
# ------------------------------------------------------------------------------------------
#: Test hook called with the stage name at each step of a commit ("copied", "applied",
#: "synced", "replaced"); lets a test kill the process between steps.
commit_hook: Callable[[str], None] | None = None


def _hook(stage: str) -> None:
    if commit_hook is not None:
        commit_hook(stage)


def temp_path(store: Path) -> Path:
    return store.with_name(f".{store.name}.tmp-{os.getpid()}")


def _fsync_path(path: Path, directory: bool = False) -> None:
    fd = os.open(path, os.O_RDONLY | (os.O_DIRECTORY if directory else 0))
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def commit(store: Path, apply: Callable[[h5py.File], None], *, new: bool = False) -> None:
    """Apply ``apply`` to a copy of ``store`` and move the copy over it in one step.

    The copy lives in the same folder (``.STORE.tmp-<pid>``), is flushed, closed and
    fsynced before ``os.replace``; the folder is fsynced after. A crash at any point leaves
    either the old file or the new one; a leftover temp file is removed on the next open.
    With ``new=True`` the temp file starts empty (store creation).
    """
    store = store.resolve()  # replace a symlink's target, never the symlink itself
    tmp = temp_path(store)
    try:
        if not new:
            shutil.copyfile(store, tmp)
            shutil.copymode(store, tmp)  # keep the store's permission bits
        _hook("copied")
        # a new file tracks its free space persistently, so that space freed by rewriting a
        # section is reused by later commits instead of growing the file
        kw = {"fs_strategy": "fsm", "fs_persist": True} if new else {}
        with h5py.File(tmp, "w" if new else "r+", libver=LIBVER, **kw) as f:
            apply(f)
            f.flush()
            _hook("applied")
        _fsync_path(tmp)
        _hook("synced")
        os.replace(tmp, store)
        _hook("replaced")
        _fsync_path(store.parent, directory=True)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def stale_temps(store: Path) -> list[Path]:
    store = store.resolve()
    return sorted(store.parent.glob(f".{glob_escape(store.name)}.tmp-*"))


def glob_escape(name: str) -> str:
    return re.sub(r"([*?\[])", r"[\1]", name)


def clean_stale_temps(store: Path, *, holding_lock: bool) -> list[Path]:
    """Remove temp files left by crashed commits.

    A writer holding the lock removes them all (only a lock holder commits). A reader removes
    only those whose process is gone (same host assumed).
    """
    removed = []
    for p in stale_temps(store):
        pid_text = p.name.rsplit("-", 1)[-1]
        if not holding_lock:
            if not pid_text.isdigit() or _pid_alive(int(pid_text)):
                continue
        try:
            p.unlink()
            removed.append(p)
        except FileNotFoundError:
            pass
    return removed


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


# ------------------------------------------------------------------------------------------
# opening
# ------------------------------------------------------------------------------------------
#: Root attributes of every store (docs/store-layout.md, "Root").
ROOT_ATTRS = ("schema_version", "study", "created", "winnow_version", "description")


def as_path(path: Any, what: str = "store") -> Path:
    if not isinstance(path, str | Path):
        raise TypeError(f"{what} path must be str or Path, got {type(path).__name__}")
    return Path(path)


def open_h5(path: Path) -> h5py.File:
    """Open a store read-only after checking it exists, is HDF5 and has a schema we read."""
    if not path.exists():
        raise FileNotFoundError(f"store {str(path)!r} does not exist")
    if path.is_dir():
        raise IsADirectoryError(f"store {str(path)!r} is a folder, expected an HDF5 file")
    try:
        f = h5py.File(path, "r")
    except OSError as exc:
        raise StoreFormatError(
            f"cannot read store {str(path)!r}: not a readable HDF5 file ({exc})"
        ) from None
    try:
        check_schema(f, path)
    except BaseException:
        f.close()
        raise
    return f


def check_schema(f: h5py.File, path: Path) -> int:
    if "schema_version" not in f.attrs:
        raise StoreFormatError(
            f"{str(path)!r} is not a winnow run store (root attribute 'schema_version' missing)"
        )
    v = int(f.attrs["schema_version"])
    if v > SCHEMA_VERSION:
        raise SchemaVersionError(
            f"store {str(path)!r} has schema version {v}, newer than version {SCHEMA_VERSION} "
            "that this winnow reads; upgrade winnow to read it"
        )
    return v


def revisions(f: h5py.File) -> list[str]:
    if "revisions" not in f:
        return []
    names = [n for n in f["revisions"] if REV_RE.match(n)]
    return sorted(names, key=lambda n: int(n[1:]))


def rev_name(number: int) -> str:
    return f"r{number:04d}"


def resolve_revision(f: h5py.File, revision: str | int | None, path: Path) -> str:
    """Turn ``None``/``"latest"``, ``3``, ``"3"`` or ``"r0003"`` into a stored revision name."""
    revs = revisions(f)
    if revision is None or revision == "latest":
        if not revs:
            raise InputError(f"store {str(path)!r} has no revisions yet")
        return revs[-1]
    if isinstance(revision, bool):
        raise TypeError(f"revision must be str or int, got {revision!r}")
    if isinstance(revision, int | np.integer):
        name = rev_name(int(revision))
    elif isinstance(revision, str):
        s = revision.strip()
        name = rev_name(int(s)) if s.isdigit() else s
    else:
        raise TypeError(f"revision must be str or int, got {type(revision).__name__}")
    if name not in revs:
        known = ", ".join(revs) if revs else "none"
        raise InputError(f"revision {revision!r} not in store {str(path)!r} (revisions: {known})")
    return name


def iter_datasets(f: h5py.File, problems: list[str]) -> Iterator[tuple[str, h5py.Dataset]]:
    """Every dataset of the file; damage met while walking it is added to ``problems``."""
    found: list[tuple[str, h5py.Dataset]] = []

    def walk(group: h5py.Group) -> None:
        try:
            names = list(group)
        except Exception as exc:  # damaged group index: many error types
            problems.append(f"{group.name}: members cannot be listed ({exc})")
            return
        for name in names:
            try:
                obj = group[name]
            except Exception as exc:
                problems.append(f"{group.name.rstrip('/')}/{name}: cannot be opened ({exc})")
                continue
            if isinstance(obj, h5py.Dataset):
                found.append((obj.name.lstrip("/"), obj))
            elif isinstance(obj, h5py.Group):
                walk(obj)

    walk(f)
    yield from found
