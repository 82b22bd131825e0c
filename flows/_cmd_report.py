"""``winnow report STORE``: write the collect report of a run store as one HTML file."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._cli_common import UsageError, guarded

__all__ = ["register"]


def _loader():
    try:
        from winnow.tasks.store import load_report_data
    except ImportError as exc:
        raise UsageError(
            f"this installation cannot read report data from a run store ({exc})"
        ) from None
    return load_report_data


def register(app: typer.Typer) -> None:
    @app.command("report")
    @guarded
    def report(
        store: Annotated[Path, typer.Argument(help="HDF5 run store of the study.")],
        revision: Annotated[
            str | None,
            typer.Option("--revision", "-r", help="Store revision to report (default: latest)."),
        ] = None,
        out: Annotated[
            Path | None,
            typer.Option(
                "--out",
                "-o",
                help="Folder for the report (default: '<store name>-report' beside the store, where "
                "winnow run writes it).",
            ),
        ] = None,
        csv: Annotated[
            bool, typer.Option("--csv", help="Also write the chosen points and results as CSV.")
        ] = False,
    ) -> None:
        """Write the HTML report (estimates, uncertainty breakdown, runs) of a run store."""
        if not store.exists():
            raise FileNotFoundError(f"STORE: file not found: {store}")
        if not store.is_file():
            raise UsageError(f"STORE: expected an HDF5 run store file, got a folder: {store}")
        default = store.resolve().with_name(store.stem + "-report")
        out_dir = out if out is not None else default
        if out_dir.exists() and not out_dir.is_dir():
            raise UsageError(f"--out: expected a folder, got an existing file: {out_dir}")
        load_report_data = _loader()
        data = load_report_data(store, revision)  # reads and checks everything first
        from winnow.tasks.collect import build_report, export_csv

        path = build_report(data, out_dir)
        typer.echo(f"report: {path}")
        if csv:
            for p in export_csv(data, out_dir):
                typer.echo(f"csv: {p}")
        typer.echo(
            "Caution: results feed engineering judgement; they do not replace checks under "
            "local codes or licensed professional review."
        )
