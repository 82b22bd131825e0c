"""The files of a run folder: winnow's own names, the manifest, the journal, confined paths.

Shared by deck rendering and by the runners: everything that writes into a run folder goes
through :func:`_validate_relative` / :func:`_confined` (no path leaves the folder) and
:func:`write_json_atomic` (no file is ever half-written).
"""

from __future__ import annotations

import json
import os
import re
import tempfile
from pathlib import Path, PurePosixPath
from typing import Any

MANIFEST_NAME = "winnow-manifest.json"
OUTCOME_NAME = "winnow-outcome.json"
STDOUT_NAME = "winnow-stdout.txt"
STDERR_NAME = "winnow-stderr.txt"
#: File names the dispatch stage writes into a run folder; a deck may not use them.
RESERVED_NAMES = frozenset({MANIFEST_NAME, OUTCOME_NAME, STDOUT_NAME, STDERR_NAME})


class DeckError(ValueError):
    """A deck could not be rendered: the message names the template and what went wrong."""


def _validate_relative(path: str, *, what: str, fix: str = "") -> PurePosixPath:
    """Return ``path`` as a clean relative path, refusing absolute paths and ``..``.

    ``fix`` is appended to the message of a refused ``..`` (what to write instead).
    """
    text = os.fspath(path)
    pure = PurePosixPath(text.replace("\\", "/"))
    if pure.is_absolute() or re.match(r"^[A-Za-z]:", text):
        raise DeckError(f"{what}: path {text!r} is absolute; it must stay inside the run folder")
    if any(part == ".." for part in pure.parts):
        raise DeckError(
            f"{what}: path {text!r} contains '..'; it must stay inside the run folder{fix}"
        )
    parts = [p for p in pure.parts if p not in ("", ".")]
    if not parts:
        raise DeckError(f"{what}: path {text!r} names no file")
    clean = PurePosixPath(*parts)
    if len(parts) == 1 and clean.name in RESERVED_NAMES:
        raise DeckError(f"{what}: path {text!r} is reserved for winnow's own files")
    return clean


def _confined(run_dir: Path, rel: PurePosixPath, *, what: str) -> Path:
    """Join ``rel`` to ``run_dir`` and check that no link on the way leads out of it."""
    root = run_dir.resolve()
    target = root.joinpath(*rel.parts)
    # Resolve the parent: a symlinked folder inside the run folder must not carry the file out.
    parent = target.parent.resolve()
    if parent != root and root not in parent.parents:
        raise DeckError(f"{what}: path {str(rel)!r} leads out of the run folder {root}")
    if target.is_symlink():
        raise DeckError(f"{what}: path {str(rel)!r} is already a link in the run folder")
    return target


def read_manifest(run_dir: Path) -> dict[str, Any] | None:
    """The manifest of a run folder, or None when absent or unreadable."""
    try:
        with open(Path(run_dir) / MANIFEST_NAME, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def _read_outcome_state(run_dir: Path) -> tuple[str, str] | None:
    try:
        with open(run_dir / OUTCOME_NAME, encoding="utf-8") as fh:
            data = json.load(fh)
        return str(data["state"]), str(data["key"])
    except (OSError, ValueError, KeyError, TypeError):
        return None


def write_json_atomic(path: Path, data: Any) -> None:
    """Write ``data`` as JSON next to ``path`` and move it into place (never half-written)."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=2, sort_keys=True)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        raise
