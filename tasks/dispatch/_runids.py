"""Run ids and run keys: which folder a run lives in, and what makes two runs the same.

A run's *key* is the SHA-256 of its rendered decks and its command: two runs with the same key
are the same computation, whichever revision asked for it, so a finished one is reused. A run's
*id* (its folder name) is the point's id (index and exact parameter values) followed by a short
digest of the solver setup (templates, staged inputs, constants, formats, command): a changed
template or solver setting gives new folders, so no finished run is ever overwritten and a
changed study can always be run (issue 18 item 5).
"""

from __future__ import annotations

import hashlib
import json
import math
import numbers
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

__all__ = ["point_of_run", "point_run_id", "run_id_for", "run_key", "setup_digest_of"]

#: ``-s`` and 6 hex digits of the solver-setup digest end every id the stage makes
_SETUP_SUFFIX = re.compile(r"-s[0-9a-f]{6}$")


def _validate_params(params: Any) -> dict[str, float]:
    if not isinstance(params, Mapping):
        raise TypeError(f"params must be a mapping of name to number, got {type(params).__name__}")
    out: dict[str, float] = {}
    for name, value in params.items():
        if not isinstance(name, str) or not name.isidentifier():
            raise ValueError(f"parameter names must be identifiers, got {name!r}")
        if isinstance(value, bool) or not isinstance(value, numbers.Real):
            raise TypeError(
                f"parameter {name!r} must be a real number, got {type(value).__name__} {value!r}"
            )
        value = float(value)
        if not math.isfinite(value):
            raise ValueError(f"parameter {name!r} must be a finite number, got {value!r}")
        out[name] = value
    if not out:
        raise ValueError("params must hold at least one parameter, got an empty mapping")
    return out


def _params_digest(params: Mapping[str, float]) -> str:
    canon = json.dumps({k: repr(float(v)) for k, v in sorted(params.items())}, sort_keys=True)
    return hashlib.sha256(canon.encode()).hexdigest()


def point_run_id(point_index: int, params: Mapping[str, float]) -> str:
    """Stable id of a point: ``"p<index, 6 digits>-<8 hex of the parameter hash>"``.

    The same point index and parameter values (exact floats) always give the same id, so a
    rerun finds its own run folder again.
    """
    if isinstance(point_index, bool) or not isinstance(point_index, numbers.Integral):
        raise TypeError(f"point_index must be an int, got {point_index!r}")
    if point_index < 0:
        raise ValueError(f"point_index must be >= 0, got {point_index}")
    clean = _validate_params(params)
    return f"p{int(point_index):06d}-{_params_digest(clean)[:8]}"


def run_key(deck_hashes: Mapping[str, str], argv: Sequence[str], run_dir: Path | str) -> str:
    """SHA-256 over the deck hashes and the command.

    The run folder in ``argv`` is written as ``{run_dir}`` before hashing, so the key of a
    point does not depend on where the study folder lives.
    """
    root = str(run_dir)
    canon_argv = [a.replace(root, "{run_dir}") for a in argv]
    payload = json.dumps(
        {"decks": dict(sorted(deck_hashes.items())), "argv": canon_argv}, sort_keys=True
    )
    return hashlib.sha256(payload.encode()).hexdigest()


def _sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def setup_digest_of(parts: Mapping[str, Any]) -> str:
    """SHA-256 (hex) of a JSON-able description of the solver setup.

    ``parts`` holds what decides every run key except the point: the template sources, the
    staged inputs, constants, formats and the command (see
    :func:`~winnow.tasks.dispatch.setup_digest`).
    """
    payload = json.dumps(parts, sort_keys=True, default=repr)
    return hashlib.sha256(payload.encode()).hexdigest()


def run_id_for(point_index: int, params: Mapping[str, float], setup: str) -> str:
    """Run id ``"p<index>-<8 hex of the parameters>-s<6 hex of the setup digest>"``.

    The same point under the same solver setup always gets the same id (a rerun finds its
    folder again); a changed setup gets a new folder next to the old one.
    """
    if not isinstance(setup, str) or not re.fullmatch(r"[0-9a-f]{6,64}", setup):
        raise ValueError(f"setup must be a hex digest (6 to 64 digits), got {setup!r}")
    return f"{point_run_id(point_index, params)}-s{setup[:6]}"


def point_of_run(run_id: str) -> str:
    """The point part of a run id: the id without its setup suffix (unchanged if none)."""
    return _SETUP_SUFFIX.sub("", run_id)
