"""Commands that run studies: ``winnow run``, ``winnow schema``, ``winnow rerun``, ``winnow serve``."""

from __future__ import annotations

import json
import shlex
import sys
from pathlib import Path
from typing import Annotated, NoReturn

import typer

from ._cli_common import UsageError, fail, guarded, interruptible

__all__ = ["register"]


def _load(config_path: Path):
    from winnow.flows.blocks import load_study
    from winnow.tasks.config import ConfigError

    try:
        return load_study(config_path)
    except ConfigError as exc:
        fail(str(exc))


def _fmt(v) -> str:
    if isinstance(v, float):
        return f"{v:.4g}"
    if isinstance(v, list):
        shown = ", ".join(_fmt(x) for x in v[:4])
        return f"[{shown}{', ...' if len(v) > 4 else ''}] ({len(v)} values)"
    return str(v)


def _interval_text(h: dict, u: str) -> str:
    lo, hi = h["interval_low"], h["interval_high"]
    if isinstance(lo, list):
        return f"{len(lo)} values, see the report"
    if lo is None or hi is None or lo != lo or hi != hi:  # NaN: not estimable
        return "not estimable (too few weighted points)"
    return f"[{_fmt(lo)}, {_fmt(hi)}] {u}"


def _left_out_text(n_missing: int, unread: dict | None) -> str:
    """``5 run(s) without a value (3 failed or not run, 2 unreadable)``."""
    text = f"{n_missing} run(s) without a value"
    if unread and unread["unread"]:
        failed = n_missing - unread["unread"]
        text += f" ({failed} failed or not run, {unread['unread']} unreadable)"
    return text


def _print_result(result) -> None:
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    from winnow.tasks.collect import GENERAL_CAUTION, UNCERTAINTY_LABELS

    console = Console()
    state = "up to date (nothing new to run)" if result.up_to_date else "done"
    console.print(f"[bold]{result.revision}[/bold] of {Path(result.store).resolve()}: {state}")
    counts = ", ".join(f"{k} {v}" for k, v in sorted(result.counts.items()))
    console.print(f"solver runs: {counts}; reused from earlier runs: {result.reused}")
    ran = getattr(result, "ran", {}) or {}
    if ran:
        from winnow.flows._study_end import reasons_text

        console.print(escape(reasons_text(ran)), soft_wrap=True)
    unread = getattr(result, "unread", {}) or {}
    for name, e in result.estimates.items():
        u = e["units"]
        h = e.get("headline")
        table = Table(
            title=escape(f"{name} [{u}], weighted over {e['n_used']} chosen points"),
            show_header=False,
            title_justify="left",
        )
        table.add_column("what", style="bold")
        table.add_column("value")
        if h:
            level = f"{float(h['level']):.0%}"
            table.add_row(
                "estimate",
                f"{_fmt(h['estimate'])} {u} ({h['rule']})",
            )
            table.add_row(f"{level} interval, posterior expectation", escape(_interval_text(h, u)))
            chain_h = {"interval_low": h["chain_mean_low"], "interval_high": h["chain_mean_high"]}
            table.add_row(f"{level} interval, chain mean", escape(_interval_text(chain_h, u)))
        table.add_row(
            "weighted mean and sd of the QoI", f"{_fmt(e['mean'])}, sd {_fmt(e['sd'])} {u}"
        )
        qi = (h or {}).get("quantile_intervals", {})
        table.add_row(
            "quantiles" + (f" ({level} intervals)" if qi else ""),
            "; ".join(
                f"{float(k):.0%}: {_fmt(v)}"
                + (f" [{_fmt(qi[k][0][0])}, {_fmt(qi[k][0][1])}]" if k in qi and qi[k] else "")
                for k, v in e["quantiles"].items()
            ),
        )
        pi = (h or {}).get("exceedance_intervals", {})
        for thr, p in e.get("exceedance", {}).items():
            iv = (
                f" ({level} interval [{_fmt(pi[thr][0][0])}, {_fmt(pi[thr][0][1])}])"
                if pi.get(thr)
                else ""
            )
            table.add_row(f"P(> {float(thr):g} {u})", _fmt(p) + iv)
        for key, v in e["uncertainty"].items():
            table.add_row(UNCERTAINTY_LABELS.get(key, key), f"{_fmt(v)} {u}")
        if e["n_missing"]:
            table.add_row("left out", escape(_left_out_text(e["n_missing"], unread.get(name))))
        console.print(table)
        lost = unread.get(name)
        if lost and lost["unread"]:
            console.print(
                f"[yellow]{escape(name)}: {lost['unread']} of {lost['succeeded']} succeeded "
                f"run(s) gave no value; first (run {escape(lost['first_run'])}): "
                f"{escape(lost['first_reason'])}[/yellow]"
            )
        if h and not h.get("reliable", True):
            console.print(f"[bold red]{escape(name)}: NOT RELIABLE[/bold red]")
            for flag in h.get("flags", []):
                console.print(f"  - {escape(flag)}")
        fc = (h or {}).get("forecast")
        if fc and fc.get("now") is not None:
            more = {int(k): v for k, v in fc.items() if k != "now"}
            if more and all(v == v for v in more.values()):
                k = min(more, key=lambda j: abs(j - 10))
                console.print(
                    f"  {k} more runs (`winnow rerun STORE --extend {k}`) would bring the stated "
                    f"thinning sd from {_fmt(fc['now'])} to about {_fmt(more[k])} {u}"
                )
    console.print(f"report: {Path(result.report).resolve()}")
    caution = GENERAL_CAUTION + (f" {result.caution}" if result.caution else "")
    console.print(f"[dim]Caution: {escape(caution)}[/dim]")


def _expected_stops() -> tuple[type[BaseException], ...]:
    """Ends of a study that are not bugs: one message, no traceback on the terminal."""
    from winnow.flows._study_end import StudyFailed, StudyRefused
    from winnow.tasks.sample import ConvergenceError

    return ConvergenceError, StudyFailed, StudyRefused


def _stopped(exc: BaseException, log) -> NoReturn:
    """Print an expected stop's one-line message (and where its log is); exit 2 for a refusal
    (nothing written), else 1."""
    from winnow.flows._study_end import StudyRefused

    print(f"winnow: {'error: ' if isinstance(exc, StudyRefused) else ''}{exc}", file=sys.stderr)
    if log.where():
        print(f"winnow: {log.where()}", file=sys.stderr)
    raise SystemExit(2 if isinstance(exc, StudyRefused) else 1) from None


def _run(
    config: Annotated[Path, typer.Argument(help="Study config (YAML).")],
    force: Annotated[bool, typer.Option("--force", help="Replace an existing run store.")] = False,
) -> None:
    """Run a study end to end (or resume it): sample, thin, dispatch, collect.

    Ctrl-C or SIGTERM stops it: running solvers are terminated and journalled, nothing
    half-done is committed, and the same command resumes it. Prefect's log, tracebacks
    included, goes to STORE-logs/ beside the run store; the terminal shows it without them.
    """
    # --force would start the study afresh, so the resume hint never repeats it
    with interruptible(f"winnow run {shlex.quote(str(config))}"):
        cfg, text = _load(config)
        from winnow.flows._logs import command_log
        from winnow.tasks.config import resolve
        from winnow.tasks.preflight import preflight

        base = config.resolve().parent
        preflight(cfg, base)  # bad input is reported here, before anything is written
        from winnow.flows.study import study_flow

        with command_log(resolve(config, cfg.store), "run") as log:
            try:
                result = study_flow(
                    cfg, base_dir=str(base), config_text=text, force=force, config_path=str(config)
                )
            except _expected_stops() as exc:
                _stopped(exc, log)
        _print_result(result)


def _rerun(
    store: Annotated[Path, typer.Argument(help="Run store (HDF5) of the study.")],
    replace: Annotated[
        bool,
        typer.Option(
            "--replace",
            help="Instead of running failed points again, run the best substitutes for "
            "them given the surviving points.",
        ),
    ] = False,
    extend: Annotated[
        int,
        typer.Option(
            "--extend",
            min=0,
            help="Also add this many points, chosen to shrink the error most with the "
            "earlier points kept, and run them.",
        ),
    ] = 0,
) -> None:
    """Run again only the failed, timed-out and unfinished runs of the latest revision."""
    if not store.is_file():
        raise UsageError(f"STORE: run store not found: {store}")
    from winnow.tasks.store import check

    report = check(store)  # also refuses a file that is not a run store (exit 2)
    if not report.ok:
        raise UsageError(
            f"STORE: {store} is damaged; see `winnow check {store}`:\n  "
            + "\n  ".join(report.problems)
        )
    from winnow.flows._logs import command_log
    from winnow.flows.rerun import rerun_flow, rerun_refusal

    refusal = rerun_refusal(store)  # decided before anything is written (issue 17 item 1)
    if refusal is not None:
        raise UsageError(refusal)

    again = f"winnow rerun {shlex.quote(str(store))}" + (" --replace" if replace else "")
    with interruptible(again), command_log(store, "rerun") as log:
        try:
            result = rerun_flow(str(store), replace=replace, extend=extend)
        except _expected_stops() as exc:
            _stopped(exc, log)
    _print_result(result)


def _validate(config: Annotated[Path, typer.Argument(help="Study config (YAML).")]) -> None:
    """Check a study config, its files, model and templates without running anything."""
    cfg, _ = _load(config)
    from winnow.tasks.preflight import preflight

    preflight(cfg, config.resolve().parent)
    print(f"{config}: valid")


def _serve(
    config: Annotated[Path, typer.Argument(help="Study config (YAML).")],
    cron: Annotated[
        str, typer.Option("--cron", help='Cron schedule, e.g. "0 6 * * *" (server time).')
    ],
    name: Annotated[
        str | None, typer.Option("--name", help="Deployment name (default: the study name).")
    ] = None,
) -> None:
    """Serve a study on a schedule; each run makes a new revision only when inputs changed."""
    cfg, _ = _load(config)
    from winnow.tasks.preflight import preflight

    preflight(cfg, config.resolve().parent)
    _check_cron(cron)
    from prefect.settings import PREFECT_API_URL

    if not PREFECT_API_URL.value():
        raise UsageError(
            "winnow serve needs a running Prefect server (the temporary one does not run "
            "schedules): start one with `prefect server start` and set PREFECT_API_URL, e.g. "
            "`prefect config set PREFECT_API_URL=http://127.0.0.1:4200/api`"
        )
    from prefect.client.schemas.objects import ConcurrencyLimitConfig

    from winnow.flows.schedule import scheduled_study

    # One run at a time: a study longer than its schedule period would otherwise start a
    # second run at each tick, which fails on the run store's writer lock. ENQUEUE holds the
    # next tick until the running one ends (it then finds the study up to date or resumes).
    scheduled_study.serve(
        name=name or f"{cfg.study.name}-schedule",
        cron=cron,
        global_limit=ConcurrencyLimitConfig(limit=1, collision_strategy="ENQUEUE"),
        parameters={"config_path": str(config.resolve())},
        description=cfg.study.description or None,
        tags=["winnow", cfg.study.name],
    )


def _schema() -> None:
    """Print the JSON Schema of a study config."""
    from winnow.tasks.config import config_schema

    json.dump(config_schema(), sys.stdout, indent=2)
    sys.stdout.write("\n")


def register(app: typer.Typer) -> None:
    app.command("schema")(_schema)
    app.command("run")(guarded(_run))
    app.command("rerun")(guarded(_rerun))
    app.command("validate")(guarded(_validate))
    app.command("serve")(guarded(_serve))


def _check_cron(cron: str) -> None:
    """Refuse a malformed cron string before anything is registered."""
    from prefect.client.schemas.schedules import CronSchedule

    try:
        CronSchedule(cron=cron)
    except ValueError:
        raise UsageError(
            f"--cron: not a valid cron schedule: {cron!r}; expected five fields "
            "'minute hour day-of-month month day-of-week', e.g. '0 6 * * *'"
        ) from None
