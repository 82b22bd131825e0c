"""Run store section ``runs``: one row per run with its outcome, and ``runs/attempts``
(private).

Columns come from the tables ``RUN_SPEC``, ``RUN_OUTCOME`` and ``ATTEMPT`` of
:mod:`._tables`; the links between the tables (``outcome_row``, ``run_row``) are
written here. Layout in ``docs/store-layout.md``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import h5py
import numpy as np

from winnow.tasks.records import RUN_STATES, Attempt, RunOutcome, RunSpec

from ._columns import build_row, put_column, write_columns
from ._h5 import ONE, StoreFormatError, get_array, need, put_group
from ._hashes import hash_object
from ._tables import ATTEMPT, RUN_OUTCOME, RUN_SPEC


def validate_runs(specs: Sequence[RunSpec], outcomes: Sequence[RunOutcome]) -> dict[str, int]:
    """Check the run records and return, for each run id, the index of its outcome."""
    seen: set[str] = set()
    for i, s in enumerate(specs):
        if not isinstance(s, RunSpec):
            raise TypeError(f"specs[{i}] must be a RunSpec, got {type(s).__name__}")
        if s.run_id in seen:
            raise ValueError(f"specs: run id {s.run_id!r} appears twice")
        seen.add(s.run_id)
    by_id: dict[str, int] = {}
    for j, o in enumerate(outcomes):
        if not isinstance(o, RunOutcome):
            raise TypeError(f"outcomes[{j}] must be a RunOutcome, got {type(o).__name__}")
        if o.run_id not in seen:
            raise ValueError(f"outcomes[{j}]: run id {o.run_id!r} has no RunSpec")
        if o.run_id in by_id:
            raise ValueError(f"outcomes: run id {o.run_id!r} appears twice")
        if o.state not in RUN_STATES:
            raise ValueError(
                f"outcomes[{j}].state must be one of {', '.join(RUN_STATES)}, got {o.state!r}"
            )
        for k, a in enumerate(o.attempts):
            if not isinstance(a, Attempt):
                raise TypeError(f"outcomes[{j}].attempts[{k}] must be an Attempt")
        by_id[o.run_id] = j
    return by_id


def write_runs(
    rev: h5py.Group,
    specs: Sequence[RunSpec],
    outcomes: Sequence[RunOutcome],
    by_id: Mapping[str, int],
    digest: str,
) -> None:
    g = put_group(
        rev,
        "runs",
        "one row per solver run: its spec and how it ended",
        n_runs=len(specs),
        n_outcomes=len(outcomes),
        sha256=digest,
    )
    outs = [outcomes[by_id[s.run_id]] if s.run_id in by_id else None for s in specs]
    write_columns(g, RUN_SPEC, specs)
    put_column(
        g,
        "outcome_row",
        [by_id.get(s.run_id, -1) for s in specs],
        ONE,
        "position of this run's outcome in the list written (-1: no outcome)",
        np.int64,
    )
    write_columns(g, RUN_OUTCOME, outs)
    att = put_group(g, "attempts", "one row per attempt of every run")
    rows = [(r, a) for r, o in enumerate(outs) if o for a in o.attempts]
    put_column(
        att, "run_row", [r for r, _ in rows], ONE, "row of the run in the runs table", np.int64
    )
    write_columns(att, ATTEMPT, [a for _, a in rows])


def _columns(g: h5py.Group, table: str, expect: int) -> dict[str, np.ndarray]:
    cols = {k: get_array(v) for k, v in g.items() if isinstance(v, h5py.Dataset)}
    for k, v in cols.items():
        if len(v) != expect:
            raise StoreFormatError(
                f"{g.name}: column {table}/{k} has {len(v)} rows, expected {expect}"
            )
    return cols


def read_runs(rev: h5py.Group) -> tuple[list[RunSpec], list[RunOutcome]]:
    g = need(rev, "runs")
    n = int(g.attrs["n_runs"])
    t = _columns(g, "runs", n)
    att = need(g, "attempts")
    a = _columns(att, "runs/attempts", len(att["run_row"]) if "run_row" in att else 0)
    specs = [build_row(RUN_SPEC, t, i, g.name) for i in range(n)]
    attempts: dict[int, list[Attempt]] = {}
    for j in range(len(a["run_row"])):
        attempts.setdefault(int(a["run_row"][j]), []).append(build_row(ATTEMPT, a, j, att.name))
    n_out = int(g.attrs["n_outcomes"])
    outcomes: list[RunOutcome | None] = [None] * n_out
    for i in range(n):
        row = int(t["outcome_row"][i])
        if row < 0:
            continue
        if row >= n_out:
            raise StoreFormatError(f"{g.name}: outcome_row {row} out of range")
        outcomes[row] = build_row(
            RUN_OUTCOME,
            t,
            i,
            g.name,
            run_id=specs[i].run_id,
            attempts=tuple(attempts.get(i, ())),
        )
    if any(o is None for o in outcomes):
        raise StoreFormatError(f"{g.name}: outcome rows are not a permutation")
    return specs, outcomes  # type: ignore[return-value]


def hash_runs(specs: Sequence[RunSpec], outcomes: Sequence[RunOutcome]) -> str:
    return hash_object({"specs": list(specs), "outcomes": list(outcomes)})
