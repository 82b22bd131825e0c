"""Inspection of a run store (private): ``check``, ``status``, ``trace`` and ``diff``.

The public names are re-exported by :mod:`winnow.tasks.store`; the commands ``winnow check``,
``winnow status``, ``winnow trace`` and ``winnow diff`` call them. What they verify and show
is described in ``docs/store-layout.md`` ("Hashes", "Lineage").
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, NoReturn

import h5py
import numpy as np

from winnow.tasks.errors import InputError
from winnow.tasks.records import RUN_STATES, QoIEstimate, RunOutcome, RunSpec, Selection

from . import _core as S
from ._core import ROOT_ATTRS as _ROOT_ATTRS
from ._core import as_path as _as_path
from ._hashes import hash_chain, hash_config, hash_object

if TYPE_CHECKING:
    from ._api import RunStoreReader


def _open_read(path: Path) -> RunStoreReader:
    # the store API re-exports this module, so it is imported when first used, not at import
    from ._api import RunStore

    return RunStore.open_read(path)


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
# winnow-stderr.attempt<k>.txt when the next one starts (tasks/dispatch/_process.py, _rotate_logs).
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
        they are ``""`` and ``None``. ``chain`` is ``None`` before a chain is stored, else
        ``{"passed": bool or None (no diagnostics), "messages": [failed checks]}``: a chain
        that failed the convergence gate is stored and the study stopped before thinning.
    """
    with _open_read(path) as r:
        rev = r.latest_revision() if revision is None else revision
        counts = dict.fromkeys(RUN_STATES, 0)
        runs: list[dict[str, Any]] = []
        chain = None
        if rev is not None and "chain" in r.sections(rev):  # sections() checks the name
            d = r.read_chain(rev).diagnostics
            chain = {
                "passed": None if d is None else bool(d.passed),
                "messages": [] if d is None else list(d.messages),
            }
        if rev is None or "runs" not in r.sections(rev):
            return {"counts": counts, "runs": runs, "chain": chain}
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
    return {"counts": counts, "runs": runs, "chain": chain}


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


def _validate_point_error(message: str, kind: type[Exception] = InputError) -> NoReturn:
    """Raise the error of a POINT (or revision) that names nothing in the store. Bad input,
    not a bug: raised from a ``_validate_`` helper as DEVELOPERS.md asks, so that the command
    line tells the two apart wherever the caller lives."""
    raise kind(message)


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
        _validate_point_error(
            f"point must be a run id (str) or a chain row (int), got {point!r}", TypeError
        )
    p = _as_path(path)
    with _open_read(p) as r:
        revs = r.revisions()
        if not revs:
            _validate_point_error(f"store {str(p)!r} has no revisions yet")
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
                _validate_point_error(
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
            _validate_point_error(
                f"point {point!r} is the start of {len(hits)} run ids in revision {rev}: "
                f"{shown}{more}; give more of the id"
            )
    return None


def _rev_name(r: RunStoreReader, revision: str | int) -> str:
    with r._h5() as f:
        return S.resolve_revision(f, revision, r.path)


# One straight pass upstream to downstream, each block filling one key of the lineage in the
# order docs/store-layout.md ("Lineage") lists them; split up it would pass the same open file
# and half-built dict through every piece.
# long: one pass filling the lineage keys in their documented order
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
            _validate_point_error(f"revision {rev} has no chain to trace point {row} in")
        cg = g["chain"]
        n = cg["samples"].shape[0]
        if not 0 <= row < n:
            _validate_point_error(f"chain row must lie in [0, {n}), got {row}")
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
    with _open_read(path) as r:
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
