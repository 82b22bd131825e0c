"""The study flow's records of its progress: run-log lines per stage, Prefect artifacts, the report."""

import time
from pathlib import Path
from typing import Any

from prefect.artifacts import (
    create_markdown_artifact,
    create_progress_artifact,
    create_table_artifact,
    update_progress_artifact,
)


# --------------------------------------------------------------------------------------------
# run logs: one INFO line per stage; WARNING for what makes the result less trustworthy
# --------------------------------------------------------------------------------------------
def _log_chain(log, chain, *, stored: bool) -> None:
    d = chain.diagnostics
    origin = "read from the store" if stored else chain.source
    if d is None:
        log.info("sample: %d rows (%s)", len(chain.samples), origin)
        return
    log.info(
        "sample: %d chains x %d draws after %d burn-in (%s); convergence checks %s",
        d.n_chains,
        d.n_draws,
        d.burn_in,
        origin,
        "passed" if d.passed else "FAILED",
    )
    if not d.passed:
        for message in d.messages:
            log.warning("convergence check failed: %s", message)
        log.warning(
            "the chain did not converge and the study goes on (sample.checks.on_failure: "
            "warn); treat its estimates with caution"
        )


def _log_selection(log, selection, *, stored: bool) -> None:
    log.info(
        "thin: %d points chosen by %s (%s weights); MMD %.4g (exact kernel)%s",
        selection.m,
        selection.method,
        selection.weights_rule,
        selection.mmd_exact,
        " (read from the store)" if stored else "",
    )


def _log_estimates(log, estimates, *, stored: bool) -> None:
    for e in estimates:
        h = e.headline or {}
        if "estimate" in h:
            what = f"estimate {_fmt_value(h['estimate'])} {e.units} ({h.get('rule', '')})"
        else:
            what = f"weighted mean {_fmt_value(e.mean)} {e.units}"
        log.info(
            "collect: %s: %s over %d runs%s",
            e.name,
            what,
            e.n_used,
            " (read from the store)" if stored else "",
        )
        if e.n_missing:
            log.warning(
                "collect: %s: %d run(s) left out (no value: failed, timed out or unreadable)",
                e.name,
                e.n_missing,
            )
        for flag in h.get("flags") or ():
            log.warning("collect: %s: error model flag: %s", e.name, flag)
        if h and not h.get("reliable", True):
            log.warning("collect: %s: the stated interval is NOT RELIABLE (see the flags)", e.name)


def _fmt_value(x: Any) -> str:
    v = x.tolist() if hasattr(x, "tolist") else x
    if isinstance(v, list):
        shown = ", ".join(f"{float(a):.4g}" for a in v[:4])
        return f"[{shown}{', ...' if len(v) > 4 else ''}]"
    try:
        return f"{float(v):.4g}"
    except (TypeError, ValueError):
        return str(v)


# --------------------------------------------------------------------------------------------
# artifacts (keys: lowercase letters, digits and dashes, stable per study)
# --------------------------------------------------------------------------------------------
def _key(name: str) -> str:
    out = "".join(c if c.isalnum() else "-" for c in name.lower())
    return "-".join(p for p in out.split("-") if p) or "study"


class _StageProgress:
    """``progress(done, total, what)`` callback of the sample and thin stages: a progress
    artifact ``<study>-<stage>-progress`` (updated at most once a second) and the step's name
    in the flow run log at INFO (at most every :attr:`LOG_EVERY` seconds).

    It is called from the stage's own threads, so it logs through the flow run's logger
    taken when it was made, and a failed artifact update never stops the study.
    """

    LOG_EVERY = 5.0
    UPDATE_EVERY = 1.0

    def __init__(self, study: str, stage: str, log) -> None:
        self.stage, self.log = stage, log
        self.artifact = create_progress_artifact(
            progress=0.0,
            key=f"{_key(study)}-{stage}-progress",
            description=f"{stage.capitalize()} stage of study {study}",
        )
        self._logged = self._updated = -float("inf")

    def __call__(self, done: int, total: int, what: str) -> None:
        now = time.monotonic()
        pct = 100.0 * min(done / max(total, 1), 1.0)
        if now - self._logged >= self.LOG_EVERY:
            self._logged = now
            self.log.info("%s: %s (%.0f%%)", self.stage, what, pct)
        if done >= total or now - self._updated >= self.UPDATE_EVERY:
            self._updated = now
            try:
                update_progress_artifact(self.artifact, pct)
            except Exception as exc:  # noqa: BLE001 - progress is cosmetic
                self.log.debug("could not update the %s progress: %s", self.stage, exc)


def _tables(**fields: Any) -> dict[str, list[dict[str, Any]]]:
    """The collect stage's report tables of a partly filled report record."""
    from winnow.tasks.collect import ReportData, report_tables

    return report_tables(ReportData(**fields))


def _diagnostics_artifact(chain, study: str) -> None:
    d = chain.diagnostics
    if d is None:
        return
    rows = _tables(
        study=study, chain_names=chain.names, chain_units=chain.units, chain_diagnostics=d
    )["diagnostics"]
    create_table_artifact(
        rows,
        key=f"{_key(study)}-chain-diagnostics",
        description=f"Convergence of the chain ({d.n_chains} chains x {d.n_draws} draws; "
        f"{'passed' if d.passed else 'FAILED'} the thresholds)",
    )


def _selection_artifact(chain, selection, study: str) -> None:
    rows = _tables(
        study=study, chain_names=chain.names, chain_units=chain.units, selection=selection
    )["points"]
    create_table_artifact(
        rows,
        key=f"{_key(study)}-chosen-points",
        description=f"{selection.m} points chosen by {selection.method} "
        f"({selection.weights_rule} weights); MMD {selection.mmd_exact:.4g} (exact kernel)",
    )


def _outcomes_artifact(study: str, specs, outcomes) -> None:
    rows = _tables(study=study, outcomes=[outcomes[s.run_id] for s in specs])["outcomes"]
    create_table_artifact(
        rows, key=f"{_key(study)}-run-outcomes", description="How each solver run ended"
    )


def _report_artifacts(data, study: str, rev: str) -> None:
    from winnow.tasks.collect import report_markdown, report_tables

    create_markdown_artifact(
        report_markdown(data),
        key=f"{_key(study)}-estimates",
        description=f"Estimates of study {study} {rev} with their uncertainty",
    )
    create_table_artifact(
        report_tables(data)["estimates"],
        key=f"{_key(study)}-estimates-table",
        description=f"Estimates of study {study} {rev}, one row per quantity",
    )


def _report(store_path: Path, rev: str, study: str) -> Path:
    """Write the HTML report and CSV exports beside the store; create the artifacts."""
    from winnow.tasks.collect import build_report, export_csv
    from winnow.tasks.store import load_report_data

    data = load_report_data(store_path, rev)
    out_dir = store_path.with_name(store_path.stem + "-report")
    path = build_report(data, out_dir)
    export_csv(data, out_dir)
    _report_artifacts(data, study, rev)
    return path
