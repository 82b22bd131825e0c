"""The steps a study run and a rerun share: dispatching runs (one path for every runner),
the outcome summary and the end of a flow run.

``winnow run`` (:mod:`winnow.flows.study`) and ``winnow rerun`` (:mod:`winnow.flows.rerun`)
both end here, so a run and a rerun dispatch, count, report and stop in the same way.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from prefect.artifacts import create_progress_artifact, update_progress_artifact

from winnow.flows._study_end import check_study_end, unread_values
from winnow.flows._study_record import _key, _outcomes_artifact, _report
from winnow.tasks.config import StudyConfig, resolve
from winnow.tasks.records import RunOutcome

__all__ = ["StudyResult", "dispatch_runs", "finish", "recorded_values", "summarise"]


@dataclass
class StudyResult:
    """What a study flow run did: where it is recorded and how its runs ended."""

    store: str
    revision: str
    counts: dict[str, int] = field(default_factory=dict)
    reused: int = 0
    estimates: dict[str, dict[str, Any]] = field(default_factory=dict)
    report: str = ""
    up_to_date: bool = False
    caution: str = ""
    #: per QoI, succeeded runs whose value could not be read (see ``unread_values``)
    unread: dict[str, dict[str, Any]] = field(default_factory=dict)
    #: run id -> why it ran in this flow run (see ``run_reasons``); reused runs are not in it
    ran: dict[str, str] = field(default_factory=dict)


def _estimate_summary(est) -> dict[str, Any]:
    def f(x):
        return x.tolist() if hasattr(x, "tolist") else x

    out = {
        "mean": f(est.mean),
        "sd": f(est.sd),
        "units": est.units,
        "quantiles": {str(k): f(v) for k, v in est.quantiles.items()},
        "exceedance": {str(k): f(v) for k, v in est.exceedance.items()},
        "uncertainty": {k: f(v) for k, v in est.uncertainty.items()},
        "n_used": est.n_used,
        "n_missing": est.n_missing,
    }
    if est.control_variate:
        out["control_variate"] = {
            k: f(est.control_variate[k])
            for k in ("mean", "se", "correlation")
            if k in est.control_variate
        }
    h = est.headline
    if h:
        out["headline"] = {
            k: f(h[k])
            for k in (
                "level",
                "estimate",
                "interval_low",
                "interval_high",
                "chain_mean_low",
                "chain_mean_high",
                "rule",
                "flags",
                "reliable",
            )
            if k in h
        }
        comps = h.get("components") or []
        out["headline"]["quantile_intervals"] = {
            str(q): [list(map(float, c["quantile_intervals"][q])) for c in comps]
            for q in (comps[0]["quantile_intervals"] if comps else {})
        }
        out["headline"]["exceedance_intervals"] = {
            str(t): [list(map(float, c["exceedance_intervals"][t])) for c in comps]
            for t in (comps[0]["exceedance_intervals"] if comps else {})
        }
        fc = h.get("forecast")
        if fc:
            out["headline"]["forecast"] = {"now": fc.get("now"), **fc.get("extra_points", {})}
    return out


def summarise(
    store_path: Path,
    rev: str,
    specs,
    outcomes,
    estimates,
    *,
    up_to_date: bool = False,
    values=(),
) -> StudyResult:
    """Counts of the chosen points' run states, reuse, estimates and unread values of one
    revision (``values``: its QoIValue records)."""
    counts: dict[str, int] = {}
    chosen = [outcomes[s.run_id] for s in specs if s.run_id in outcomes]
    for o in chosen:
        counts[o.state] = counts.get(o.state, 0) + 1
    return StudyResult(
        store=str(store_path),
        revision=rev,
        counts=counts,
        reused=sum(1 for o in chosen if o.reused_from),
        estimates={e.name: _estimate_summary(e) for e in estimates},
        up_to_date=up_to_date,
        unread=unread_values(
            values, {s.run_id: outcomes[s.run_id] for s in specs if s.run_id in outcomes}
        ),
    )


def recorded_values(store, outcomes) -> dict[tuple[str, str], Any]:
    """QoI values that earlier revisions recorded for runs reused from them.

    Keyed by ``(reused_from, qoi name)``, where ``reused_from`` is ``"r0001/<run id>"``.
    """
    wanted: dict[str, set[str]] = {}
    for o in outcomes:
        if o.reused_from and "/" in o.reused_from:
            rev, run_id = o.reused_from.split("/", 1)
            wanted.setdefault(rev, set()).add(run_id)
    out: dict[tuple[str, str], Any] = {}
    for rev, run_ids in wanted.items():
        if rev not in store.revisions() or "results" not in store.stages_done(rev):
            continue
        values, _ = store.read_results(rev)
        for v in values:
            if v.run_id in run_ids:
                out[(f"{rev}/{v.run_id}", v.name)] = v
    return out


_DISPATCH_BATCH = 400


def dispatch_runs(
    config: StudyConfig, base: Path, specs, known: dict[str, str], log
) -> dict[str, RunOutcome]:
    """Run every spec not already succeeded; returns an outcome for every spec.

    Runs journalled as succeeded in their folders (a killed study) and runs whose key
    succeeded in any store revision are not run again. An interrupt (Ctrl-C, SIGTERM) ends
    it with :class:`~winnow.tasks.dispatch._process.Interrupted` after the runs in flight were stopped
    and journalled, so the caller commits nothing of this dispatch.
    """
    from winnow.flows._cli_common import note_progress

    note_progress(stage="dispatch", specs=specs)  # what an interrupt report counts
    outcomes = _dispatch_all(config, base, specs, known, log)
    note_progress(specs=None)
    # A success journalled in its own folder by an earlier revision (same point, same key) is
    # a reuse too: it says so, and the summary counts it as reused, not as run.
    for rid, o in outcomes.items():
        if o.state == "succeeded" and not o.reused_from and o.key in known:
            outcomes[rid] = dataclasses.replace(o, reused_from=known[o.key])
    return outcomes


def _dispatch_all(
    config: StudyConfig, base: Path, specs, known: dict[str, str], log
) -> dict[str, RunOutcome]:
    from winnow.flows.dispatch import dispatch_flow
    from winnow.tasks.dispatch import dispatch, make_runner

    total = len(specs)
    progress_id = create_progress_artifact(
        progress=0.0,
        key=f"{_key(config.study.name)}-runs-progress",
        description=f"Solver runs finished for study {config.study.name}",
    )
    finished = [0]

    def on_outcome(o: RunOutcome) -> None:
        finished[0] += 1
        update_progress_artifact(progress_id, 100.0 * finished[0] / max(total, 1))

    d = config.dispatch
    runner = d.runner if isinstance(d.runner, str) else d.runner.model_dump(exclude_none=True)
    common = dict(
        known_successes=known,
        on_outcome=on_outcome,
        timeout=d.timeout,
        retries=d.retries,
        retry_delay=d.retry_delay,
        env=dict(d.env),
        outputs=list(d.outputs),
    )
    if isinstance(runner, dict) and "batch" in runner:
        if runner["batch"].get("template"):
            runner["batch"]["template"] = str(resolve(base / "x", runner["batch"]["template"]))
        result = dispatch(specs, runner=make_runner(runner, concurrency=d.concurrency), **common)
    else:
        # The Prefect server refuses flow-run parameters over 512 KiB (about 1,000 specs), so
        # large studies are dispatched as consecutive subflows of _DISPATCH_BATCH runs, each
        # given only the known successes of its own runs.
        result = []
        for a in range(0, len(specs), _DISPATCH_BATCH):
            batch = list(specs[a : a + _DISPATCH_BATCH])
            keys = {s.key for s in batch}
            part = dict(common, known_successes={k: v for k, v in known.items() if k in keys})
            named = dispatch_flow.with_options(  # not a random name: study and batch
                flow_run_name=f"{_key(config.study.name)}-dispatch-{a // _DISPATCH_BATCH + 1}"
            )
            result.extend(named(batch, runner=runner, concurrency=d.concurrency, **part))
    outcomes = {o.run_id: o for o in result}
    # every run has an outcome now: the bar ends at its true share even when a runner reported
    # some outcomes without the callback (reused runs, runs journalled by a worker)
    update_progress_artifact(progress_id, 100.0 * len(outcomes) / max(total, 1))
    states: dict[str, int] = {}
    for o in result:
        states[o.state] = states.get(o.state, 0) + 1
    log.info(
        "dispatch: %d runs (%s); %d reused without running",
        total,
        ", ".join(f"{k} {v}" for k, v in sorted(states.items())),
        sum(1 for o in result if o.reused_from),
    )
    bad = total - states.get("succeeded", 0)
    if bad:
        log.warning(
            "dispatch: %d of %d runs did not succeed; their outcomes are recorded "
            "(`winnow rerun STORE` runs them again)",
            bad,
            total,
        )
    _outcomes_artifact(config.study.name, specs, outcomes)
    return outcomes


def finish(
    store_path: Path,
    rev: str,
    specs,
    outcomes,
    estimates,
    config: StudyConfig,
    *,
    ran: dict[str, str],
    values=(),
    up_to_date: bool = False,
    again: str = "winnow run CONFIG",
) -> StudyResult:
    """The end of a study or rerun flow run: summary, report, caution, and the stop (an
    exception naming the reason) when the revision's results cannot be used."""
    result = summarise(
        store_path, rev, specs, outcomes, estimates, up_to_date=up_to_date, values=values
    )
    result.report = str(_report(store_path, rev, config.study.name))
    result.caution = config.study.caution
    result.ran = ran
    check_study_end(result, config.study.name, store_path, again=again)
    return result
