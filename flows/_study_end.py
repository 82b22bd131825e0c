"""How a study (or rerun) flow ends: values that could not be read, and the expected stops.

A study whose QoI could be read from none of its succeeded runs has no answer, however well
its runs went: it must not end green (issue 17 item 3). Everything is recorded before the
flow fails, so fixing the reader and running the config again reuses every succeeded run.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from winnow.tasks.dispatch import point_of_run
from winnow.tasks.errors import InputError

__all__ = ["StudyFailed", "StudyRefused", "check_study_end", "unread_values"]

# statuses of a value that a succeeded run should have given (a failed run's is "run_failed")
_READ_FAILURES = ("missing", "unparsable", "nonfinite")


class StudyFailed(RuntimeError):
    """A study that ran to the end without an answer (everything is recorded).

    No run succeeded, or a QoI could be read from none of the succeeded runs.
    """


class StudyRefused(InputError):
    """A rerun or continuation refused before anything was written (exit status 2)."""


def unread_values(values: Iterable[Any], outcomes: Mapping[str, Any]) -> dict[str, dict]:
    """Per QoI, how many succeeded runs gave no value, and the first reason.

    Parameters
    ----------
    values : iterable of QoIValue
        Every value of the revision (one per QoI and run).
    outcomes : mapping of run id to RunOutcome
        Only values of these runs count (runs replaced by ``rerun --replace`` stay out).

    Returns
    -------
    dict
        ``{qoi name: {"succeeded": n, "read": k, "unread": n - k, "first_run": run id,
        "first_reason": reason, "status": status}}``, ``first_*`` from the first run (in the
        order of ``values``) whose value could not be read; a QoI without a succeeded run
        has ``succeeded == 0``.
    """
    out: dict[str, dict] = {}
    for v in values:
        if v.run_id not in outcomes:
            continue
        row = out.setdefault(
            v.name,
            {"succeeded": 0, "read": 0, "unread": 0, "first_run": "", "first_reason": ""},
        )
        if v.status == "run_failed":
            continue
        row["succeeded"] += 1
        if v.status == "ok":
            row["read"] += 1
        elif v.status in _READ_FAILURES:
            row["unread"] += 1
            if not row["first_run"]:
                row.update(first_run=v.run_id, first_reason=v.reason, status=v.status)
    return out


def check_study_end(result: Any, study: str, store_path: Any, *, again: str) -> None:
    """Raise :class:`StudyFailed` when the revision has no answer; else return.

    ``result`` is the flow's :class:`~winnow.flows.study.StudyResult` (its ``counts`` and
    ``unread``), ``again`` the command that continues once the cause is fixed.
    """
    where = f"study {study} {result.revision}"
    if result.counts.get("succeeded", 0) == 0:
        raise StudyFailed(
            f"{where}: no run succeeded ({result.counts}); every outcome is recorded in "
            f"{store_path} -- see `winnow status {store_path}`"
        )
    dead = {n: u for n, u in result.unread.items() if u["read"] == 0 and u["unread"] > 0}
    if not dead:
        return
    lines = [
        f"collect.qoi[{name}].reader: no value could be read from any of the "
        f"{u['succeeded']} succeeded run(s); first error (run {u['first_run']}): "
        f"{u['first_reason']}"
        for name, u in dead.items()
    ]
    raise StudyFailed(
        f"{where}: no answer: " + "; ".join(lines) + f". Every run is recorded in {store_path}; "
        f"fix the reader in the config and run `{again}` (succeeded runs are reused, not run "
        "again)"
    )


# --------------------------------------------------------------------------------------------
# continuing after a fix (issue 17 item 1): what is run again, and why
# --------------------------------------------------------------------------------------------
def _canonical_argv(spec: Any) -> list[str]:
    # each run's own folder written as {run_dir}, as the run key does: a new folder for a
    # new solver setup is not a changed command
    root = str(spec.run_dir)
    return [a.replace(root, "{run_dir}") for a in spec.argv]


def _changed_decks(old: Any, new: Any) -> str:
    """Why a point's run key changed: the deck files (or staged inputs) and the command."""
    files = sorted(
        f
        for f in set(old.deck_hashes) | set(new.deck_hashes)
        if old.deck_hashes.get(f) != new.deck_hashes.get(f)
    )
    parts = [f"{', '.join(files)} changed"] if files else []
    if _canonical_argv(old) != _canonical_argv(new):
        parts.append("the command changed")
    return "; ".join(parts) or "its run key changed"


def run_reasons(
    specs: Iterable[Any],
    outcomes: Mapping[str, Any],
    earlier: Mapping[str, tuple[str, Any, Any]],
) -> dict[str, str]:
    """Why each run of this flow run ran (runs reused or found finished are left out).

    Parameters
    ----------
    specs : iterable of RunSpec
        The runs of the revision.
    outcomes : mapping of run id to RunOutcome
        Their outcomes after dispatch.
    earlier : mapping of point id to (revision, RunSpec, RunOutcome or None)
        The newest earlier record of each point (the same index and parameter values,
        whatever the solver setup; see :func:`earlier_runs`).

    Returns
    -------
    dict of run id to reason
        ``"new point"``, ``"failed in r0001"`` (the run did not succeed before) or
        ``"template.j2 changed since r0001"`` (its decks or command differ from the run kept
        there, which stays recorded in that revision).
    """
    out: dict[str, str] = {}
    for s in specs:
        o = outcomes.get(s.run_id)
        if o is None or o.reused_from or not o.attempts:
            continue  # not run by this flow run
        prev = earlier.get(point_of_run(s.run_id))
        if prev is None:
            out[s.run_id] = "new point"
            continue
        rev, old_spec, old_outcome = prev
        if old_spec.key != s.key:
            out[s.run_id] = f"{_changed_decks(old_spec, s)} since {rev}"
        elif old_outcome is None or old_outcome.state != "succeeded":
            state = "not run" if old_outcome is None else old_outcome.state
            out[s.run_id] = f"{state} in {rev}"
        else:
            out[s.run_id] = f"run again (its folder no longer held the {rev} run)"
    return out


def reasons_text(ran: Mapping[str, str], limit: int = 6) -> str:
    """``ran 3 run(s): failed in r0001 (2: p000001-..., p000002-...); new point (1: ...)``."""
    if not ran:
        return ""
    groups: dict[str, list[str]] = {}
    for rid, why in ran.items():
        groups.setdefault(why, []).append(rid)
    parts = []
    for why, ids in groups.items():
        shown = ", ".join(ids[:limit]) + (
            f", ... ({len(ids) - limit} more)" if len(ids) > limit else ""
        )
        parts.append(f"{why} ({len(ids)}: {shown})")
    return f"ran {len(ran)} run(s): " + "; ".join(parts)


def earlier_runs(store: Any, rev: str) -> dict[str, tuple[str, Any, Any]]:
    """The newest record of each point in the store's revisions other than ``rev``:
    ``{point id: (revision, RunSpec, RunOutcome or None)}``.

    Keyed by the point's part of the run id: a changed solver setup gives the point a new run
    folder (:func:`~winnow.tasks.dispatch.run_id_for`), and the reason it ran again is found
    by comparing with the point's run under the old setup.
    """
    out: dict[str, tuple[str, Any, Any]] = {}
    for r in store.revisions():
        if r == rev or "runs" not in store.stages_done(r):
            continue
        specs, outcomes = store.read_runs(r)
        by_id = {o.run_id: o for o in outcomes}
        for s in specs:
            out[point_of_run(s.run_id)] = (r, s, by_id.get(s.run_id))
    return out
