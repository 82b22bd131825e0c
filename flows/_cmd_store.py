"""Commands that read a run store: ``winnow check``, ``trace``, ``status`` and ``diff``.

They only read (no lock is taken, nothing is written). Bad arguments or an unreadable file
exit with status 2 through :func:`guarded`; ``check`` exits 1 when the store is damaged.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Annotated, Any

import typer

from ._cli_common import guarded

__all__ = ["register"]

_STATE_STYLE = {
    "succeeded": "green",
    "failed": "red",
    "timed_out": "yellow",
    "output_missing": "magenta",
    "not_run": "dim",
}


def _dump(obj: Any) -> None:
    from winnow.tasks.store import to_strict_json

    json.dump(to_strict_json(obj), sys.stdout, indent=2, ensure_ascii=False, allow_nan=False)
    sys.stdout.write("\n")


def _revision_arg(text: str | None) -> str | None:
    return None if text is None or text == "" else text


def _fmt(x: Any) -> str:
    if isinstance(x, float):
        return f"{x:.6g}"
    if isinstance(x, list):
        return "[" + ", ".join(_fmt(v) for v in x) + "]"
    return "-" if x is None else str(x)


class _Node:
    """A rich tree node whose labels are plain text (run ids and messages may hold '[')."""

    def __init__(self, tree: Any) -> None:
        self.tree = tree

    def add_(self, label: str) -> _Node:
        from rich.text import Text

        return _Node(self.tree.add(Text(label)))


_TAIL_LINES = 10  # of a failed attempt's stderr shown by trace and status


def _tail(text: str) -> list[str]:
    return text.rstrip().splitlines()[-_TAIL_LINES:]


def _log_note(path: str) -> str:
    return f"full log: {path}" + ("" if Path(path).is_file() else " (not found here)")


def _add_stderr(node: _Node, tail: str, log: str | None) -> None:
    lines = _tail(tail)
    if lines:
        err = node.add_(f"stderr, last {len(lines)} line(s):")
        for line in lines:
            err.add_(line)
    if log:
        node.add_(_log_note(log))


def _print_trace(t: dict[str, Any]) -> None:
    from rich.console import Console
    from rich.text import Text
    from rich.tree import Tree

    console = Console()
    root = _Node(Tree(Text(f"{t['study']} {t['revision']} ({t['store']})", style="bold")))
    cfg = root.add_(f"config sha256 {t['config']['sha256']}")
    for name, info in t["inputs"].items():
        cfg.add_(f"input {name}: {info['path']} sha256 {info['sha256']}")
    obs = t["observations"]
    if obs is not None:
        root.add_(
            f"observations: {obs['rows']} rows, columns {', '.join(obs['columns'])}; "
            f"file sha256 {obs['file_sha256'] or '-'}"
        )
    c = t["chain"]
    ch = root.add_(
        f"chain row {c['row']} of {c['rows']} (chain {c['chain_index']}, draw "
        f"{c['draw_index']}); source {c['source'] or '-'}; sha256 {c['sha256'][:16]}..."
    )
    for name, v in c["values"].items():
        ch.add_(f"{name} = {_fmt(v['value'])} {v['units']}")
    if c["log_density"] is not None:
        ch.add_(f"log density {_fmt(c['log_density'])}")
    s = t["selection"]
    if s is None:
        root.add_("selection: none in this revision")
    elif not s["selected"]:
        root.add_(f"selection ({s['method']}, seed {_fmt(s['seed'])}): this row was not chosen")
    else:
        root.add_(
            f"selection: {s['method']} (seed {_fmt(s['seed'])}, {s['weights_rule']} weights), "
            f"point {s['position'] + 1} of {s['m']}, weight {_fmt(s['weight'])}; "
            f"kernel {s['kernel']} bandwidth {_fmt(s['bandwidth'])}, {s['feature_map']} "
            f"{s['n_features']} features"
        )
    r = t["run"]
    if r is None:
        root.add_("run: none for this point")
    else:
        run = root.add_(
            f"run {r['run_id']}: {r['state']} in {_fmt(r['seconds'])} s; "
            f"folder {r['run_dir']}; key {r['key'][:16]}..."
        )
        if r["message"]:
            run.add_(f"message: {r['message']}")
        if r["reused_from"]:
            run.add_(f"reused from {r['reused_from']}")
        for d in r["decks"]:
            run.add_(f"deck {d['file']} sha256 {d['sha256']}")
        for a in t["attempts"]:
            node = run.add_(
                f"attempt {a['number']}: {' '.join(a['argv'])} -> exit "
                f"{_fmt(a['exit_status'])}{' (timed out)' if a['timed_out'] else ''}, "
                f"{a['started_utc']} to {a['ended_utc']}"
                + (f"; error: {a['error']}" if a["error"] else "")
            )
            if r["state"] != "succeeded" or a["exit_status"] != 0 or a["timed_out"]:
                _add_stderr(node, a["stderr_tail"], a["stderr_log"])
        origin = t.get("origin")
        if origin:
            o = run.add_(f"origin {origin['ref']}: {'found' if origin['found'] else 'not found'}")
            for a in origin["attempts"]:
                o.add_(
                    f"attempt {a['number']}: {' '.join(a['argv'])} -> exit "
                    f"{_fmt(a['exit_status'])}, {a['started_utc']} to {a['ended_utc']}"
                )
        for q in t["qoi"]:
            run.add_(
                f"QoI {q['name']} = {_fmt(q['value'])} {q['units']} [{q['status']}]"
                + (f" ({q['reason']})" if q["reason"] else "")
            )
    p = t["provenance"]
    root.add_(
        f"written by winnow {p.get('winnow_version')} (Python {p.get('python_version')}, "
        f"numpy {p.get('numpy_version')}, h5py {p.get('h5py_version')}, Prefect "
        f"{p.get('prefect_version')}); flow run {p.get('flow_run_id') or '-'}"
    )
    console.print(root.tree)


def _print_status(path: Path, revision: str | None, st: dict[str, Any]) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console()
    gate = st.get("chain")
    if gate is None:
        console.print("No chain is stored yet: the study stopped before sampling ended.")
    elif gate["passed"] is False:
        console.print(
            "The chain FAILED the convergence gate (sample.checks.on_failure: stop), so no "
            "point was chosen and no solver run started. The failed chain is stored with "
            "its diagnostics (the revision's chain section) for inspection; failed checks:",
            style="bold red",
            markup=False,
            soft_wrap=True,
        )
        for message in gate["messages"]:
            console.print(f"  {message}", markup=False, highlight=False, soft_wrap=True)
    counts = Table(title=f"Runs by state ({path}{', ' + revision if revision else ''})")
    counts.add_column("state")
    counts.add_column("runs", justify="right")
    for state, n in st["counts"].items():
        counts.add_row(f"[{_STATE_STYLE.get(state, '')}]{state}[/]", str(n))
    console.print(counts)
    if st["runs"]:
        runs = Table(title="Runs")
        for col, just in (
            ("run", "left"),
            ("state", "left"),
            ("attempts", "right"),
            ("seconds", "right"),
        ):
            runs.add_column(col, justify=just)  # type: ignore[arg-type]
        for r in st["runs"]:
            style = _STATE_STYLE.get(r["state"], "")
            runs.add_row(
                r["id"], f"[{style}]{r['state']}[/]", str(r["attempts"]), f"{r['seconds']:.1f}"
            )
        console.print(runs)
    _print_failures(console, st["runs"])


_MAX_FAILURES_SHOWN = 20


def _print_failures(console: Any, runs: list[dict[str, Any]]) -> None:
    """Why each run that did not succeed ended so: message, last stderr lines, full log."""
    failed = [r for r in runs if r["state"] not in ("succeeded", "not_run")]
    for r in failed[:_MAX_FAILURES_SHOWN]:
        head = f"{r['id']}: {r['state']}" + (f" ({r['message']})" if r["message"] else "")
        console.print(head, style="bold", markup=False, highlight=False, soft_wrap=True)
        lines = _tail(r.get("stderr_tail", ""))
        if lines:
            console.print(f"  stderr, last {len(lines)} line(s):", markup=False, soft_wrap=True)
            for line in lines:
                console.print(f"    {line}", markup=False, highlight=False, soft_wrap=True)
        if r.get("stderr_log"):
            console.print(
                f"  {_log_note(r['stderr_log'])}", markup=False, highlight=False, soft_wrap=True
            )
    if len(failed) > _MAX_FAILURES_SHOWN:
        console.print(
            f"... and {len(failed) - _MAX_FAILURES_SHOWN} more run(s) that did not succeed "
            "(all of them: --json; one: winnow trace STORE RUN)",
            markup=False,
            soft_wrap=True,
        )


def _print_diff(d: dict[str, Any]) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console()
    a, b = d["revisions"]
    console.print(f"[bold]{a} -> {b}[/bold]")
    c = d["config"]
    console.print(f"config: {'changed' if c['changed'] else 'same'}")
    for line in c["diff"]:
        console.print(f"  {line}", markup=False, highlight=False)
    i = d["inputs"]
    for kind in ("added", "removed", "changed"):
        if i[kind]:
            console.print(f"inputs {kind}: {', '.join(i[kind])}")
    if not (i["added"] or i["removed"] or i["changed"]):
        console.print("inputs: same")
    t = Table(title="Data sections")
    for col in ("section", "changed", f"sha256 {a}", f"sha256 {b}"):
        t.add_column(col)
    for sec, v in d["sections"].items():
        t.add_row(
            sec, "yes" if v["changed"] else "no", _short(v["sha256"][0]), _short(v["sha256"][1])
        )
    console.print(t)
    s = d["selection"]
    console.print(
        f"selection: method {s['method'][0]} -> {s['method'][1]}, seed {s['seed'][0]} -> "
        f"{s['seed'][1]}, points kept {s['points_kept']}, added {len(s['points_added'])}, "
        f"removed {len(s['points_removed'])}"
    )
    if d["estimates"]:
        e = Table(title="Estimates")
        for col in ("quantity", "units", f"mean {a}", f"mean {b}", "change", f"sd {a}", f"sd {b}"):
            e.add_column(col)
        for name, v in d["estimates"].items():
            e.add_row(
                name,
                v["units"],
                _fmt(v["mean"][0]),
                _fmt(v["mean"][1]),
                _fmt(v.get("change")),
                _fmt(v["sd"][0]),
                _fmt(v["sd"][1]),
            )
        console.print(e)


def _short(h: str | None) -> str:
    return "-" if not h else h[:16] + "..."


def register(app: typer.Typer) -> None:
    @app.command("check")
    @guarded
    def check_cmd(
        store: Annotated[Path, typer.Argument(help="Run store (HDF5 file).")],
        as_json: Annotated[bool, typer.Option("--json", help="Print JSON.")] = False,
    ) -> None:
        """Verify a run store's structure and content hashes (exit 1 when damaged)."""
        from winnow.tasks.store import check

        report = check(store)
        if as_json:
            _dump(
                {
                    "store": str(store),
                    "ok": report.ok,
                    "problems": report.problems,
                    "revisions": report.revisions,
                    "datasets_checked": report.datasets_checked,
                }
            )
            if not report.ok:
                raise typer.Exit(1)
            return
        if report.ok:
            print(
                f"{store}: intact ({len(report.revisions)} revision(s), "
                f"{report.datasets_checked} datasets verified)"
            )
            return
        for problem in report.problems:
            print(f"{store}: {problem}")
        raise typer.Exit(1)

    @app.command("trace")
    @guarded
    def trace_cmd(
        store: Annotated[Path, typer.Argument(help="Run store (HDF5 file).")],
        point: Annotated[
            str,
            typer.Argument(
                help="Run id (or its start, e.g. p008982, when only one run id starts so), "
                "or chain row index."
            ),
        ],
        revision: Annotated[
            str | None, typer.Option("--revision", "-r", help="Revision (r0002, 2 or latest).")
        ] = None,
        as_json: Annotated[bool, typer.Option("--json", help="Print JSON.")] = False,
    ) -> None:
        """Show where a point came from: observations, chain row, selection, decks, attempts, QoIs."""
        from winnow.tasks.store import trace

        t = trace(store, point, revision=_revision_arg(revision))
        _dump(t) if as_json else _print_trace(t)

    @app.command("status")
    @guarded
    def status_cmd(
        store: Annotated[Path, typer.Argument(help="Run store (HDF5 file).")],
        revision: Annotated[
            str | None, typer.Option("--revision", "-r", help="Revision (default: latest).")
        ] = None,
        as_json: Annotated[bool, typer.Option("--json", help="Print JSON.")] = False,
    ) -> None:
        """Table of a revision's runs by state."""
        from winnow.tasks.store import status

        st = status(store, revision=_revision_arg(revision))
        _dump(st) if as_json else _print_status(store, revision, st)

    @app.command("diff")
    @guarded
    def diff_cmd(
        store: Annotated[Path, typer.Argument(help="Run store (HDF5 file).")],
        rev1: Annotated[str, typer.Argument(help="Older revision.")],
        rev2: Annotated[str, typer.Argument(help="Newer revision.")],
        as_json: Annotated[bool, typer.Option("--json", help="Print JSON.")] = False,
    ) -> None:
        """Show what changed between two revisions: config, data hashes, points, estimates."""
        from winnow.tasks.store import diff

        d = diff(store, rev1, rev2)
        _dump(d) if as_json else _print_diff(d)
