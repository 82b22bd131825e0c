"""``winnow diagnose``: convergence diagnostics of a chain file.

Reads a ``.npy``, ``.csv`` or HDF5 chain (see :mod:`winnow.tasks.sample`) and prints
rank-normalised split R-hat, bulk and tail ESS and Monte Carlo standard errors per parameter,
as a table or as JSON. Every draw is kept by default: a chain file written by another sampler
has nearly always had its warm-up removed already, and dropping half of it would throw away
good draws and understate the ESS. ``--burn-in half`` (or a number of draws) drops draws
from the start of each chain. Nothing is written. Bad input exits with status 2; failed
thresholds are reported but the exit status stays 0.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path
from typing import Annotated, Any

import typer

from ._cli_common import UsageError, guarded

__all__ = ["register"]


def _burn_in(text: str) -> int | str:
    t = text.strip().lower()
    if t in ("half", "none"):
        return t
    try:
        n = int(t)
    except ValueError:
        raise UsageError(
            f"--burn-in must be 'half', 'none' or a number of draws, got {text!r}"
        ) from None
    if n < 0:
        raise UsageError(f"--burn-in must be >= 0, got {n}")
    return n


def _num(x: float) -> float | None:
    return None if not math.isfinite(x) else float(x)


def _report(diag: Any) -> dict[str, Any]:
    return {
        "parameters": {
            name: {
                "rhat": _num(p.rhat),
                "ess_bulk": _num(p.ess_bulk),
                "ess_tail": _num(p.ess_tail),
                "mcse_mean": _num(p.mcse_mean),
                "mcse_q05": _num(p.mcse_q05),
                "mcse_q95": _num(p.mcse_q95),
                "mean": _num(p.mean),
                "sd": _num(p.sd),
            }
            for name, p in diag.parameters.items()
        },
        "draws": diag.n_draws,
        "chains": diag.n_chains,
        "burn_in": diag.burn_in,
        "burn_in_rule": diag.burn_in_rule,
        "thresholds": diag.thresholds,
        "passed": diag.passed,
        "messages": list(diag.messages),
    }


def _print_table(path: Path, chain: Any) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    diag = chain.diagnostics
    th = diag.thresholds
    console = Console()
    if not console.is_terminal:  # piped or captured: do not squeeze the numbers
        console = Console(width=max(console.width, 120))
    show_units = any(chain.units)
    table = Table(
        title=f"{path.name}: {diag.n_chains} chain(s) x {diag.n_draws} draws "
        f"(burn-in: {diag.burn_in_rule})"
    )
    table.add_column("parameter", no_wrap=True)
    if show_units:
        table.add_column("units", no_wrap=True)
    for col in ("mean", "sd", "R-hat", "ESS bulk", "ESS tail", "MCSE mean", "MCSE q5", "MCSE q95"):
        table.add_column(col, justify="right", no_wrap=True)
    for (name, p), unit in zip(diag.parameters.items(), chain.units, strict=True):
        bad_r = not (p.rhat < th["rhat_max"])
        table.add_row(
            Text(name),
            *([Text(unit)] if show_units else []),
            f"{p.mean:.6g}",
            f"{p.sd:.4g}",
            Text(f"{p.rhat:.4f}", style="red" if bad_r else ""),
            Text(f"{p.ess_bulk:.0f}", style="red" if not p.ess_bulk > th["ess_bulk_min"] else ""),
            Text(f"{p.ess_tail:.0f}", style="red" if not p.ess_tail > th["ess_tail_min"] else ""),
            f"{p.mcse_mean:.3g}",
            f"{p.mcse_q05:.3g}",
            f"{p.mcse_q95:.3g}",
        )
    console.print(table)
    console.print(
        f"thresholds: R-hat < {th['rhat_max']:g}, bulk ESS > {th['ess_bulk_min']:g}, "
        f"tail ESS > {th['ess_tail_min']:g} (Vehtari et al. 2021)",
        highlight=False,
    )
    if diag.burn_in == 0:
        console.print(
            f"all {diag.n_draws} draws of each chain kept (taken as post-warm-up); "
            "--burn-in half or --burn-in N drops draws from the start of each chain",
            highlight=False,
        )
    if diag.passed:
        console.print(Text("all thresholds met", style="green"))
    else:
        for line in diag.messages:
            console.print(Text(line, style="red"))


def register(app: typer.Typer) -> None:
    """Add ``winnow diagnose`` to the command line."""

    @app.command("diagnose")
    @guarded
    def diagnose_cmd(
        chain_file: Annotated[
            Path, typer.Argument(help="Chain file: .npy, .csv, .h5 or .hdf5.", show_default=False)
        ],
        chains: Annotated[
            int | None,
            typer.Option(
                "--chains",
                help="Split an (N, d) sample into this many consecutive chains of equal length.",
            ),
        ] = None,
        as_json: Annotated[
            bool, typer.Option("--json", help="Print the diagnostics as JSON.")
        ] = False,
        dataset: Annotated[
            str | None, typer.Option("--dataset", help="Dataset path inside an HDF5 file.")
        ] = None,
        burn_in: Annotated[
            str,
            typer.Option(
                "--burn-in",
                help="Draws dropped from the start of each chain: a number, 'half' or 'none' "
                "(default: every draw kept, as a file from another sampler is normally "
                "post-warm-up already).",
            ),
        ] = "none",
        chain_column: Annotated[
            str | None, typer.Option("--chain-column", help="CSV column naming each row's chain.")
        ] = None,
        draw_column: Annotated[
            str | None, typer.Option("--draw-column", help="CSV column with each row's draw.")
        ] = None,
    ) -> None:
        """Print convergence diagnostics (R-hat, ESS, MCSE) of a chain file."""
        from winnow.tasks.sample import diagnose_chain, read_chain_file

        rule = _burn_in(burn_in)
        if chains is not None and chains < 1:
            raise UsageError(f"--chains must be a positive integer, got {chains}")
        chain = read_chain_file(
            chain_file, dataset=dataset, chain_column=chain_column, draw_column=draw_column
        )
        result = diagnose_chain(chain, chains=chains, burn_in=rule)  # type: ignore[arg-type]
        if as_json:
            json.dump(_report(result.diagnostics), sys.stdout, indent=2, allow_nan=False)
            sys.stdout.write("\n")
        else:
            _print_table(chain_file, result)
