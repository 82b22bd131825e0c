"""The ``winnow thin`` command: thin a chain file to a few weighted points.

``winnow thin CHAIN --budget M --out FILE`` reads ``.npy`` (n x d), ``.csv`` (header row of
parameter names) or ``.h5``/``.hdf5`` (``--dataset PATH``), runs
:func:`winnow.tasks.thin.thin` and writes ``FILE.json`` or ``FILE.csv`` (chosen by the
suffix). Everything is validated before anything is written; an existing ``--out`` is kept
unless ``--force``. Heavy modules (numpy, scipy, the thinning engine) are imported inside the
command so that ``winnow --help`` stays fast.
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from ._cli_common import UsageError, guarded

__all__ = ["register"]

_OUT_SUFFIXES = (".json", ".csv")
_CHAIN_SUFFIXES = (".npy", ".csv", ".h5", ".hdf5")


def _check_paths(chain: Path, out: Path, force: bool, dataset: str | None) -> None:
    if chain.suffix.lower() not in _CHAIN_SUFFIXES:
        raise UsageError(
            f"CHAIN must end in one of {', '.join(_CHAIN_SUFFIXES)}, got {chain.name!r}"
        )
    if not chain.is_file():
        raise UsageError(f"CHAIN {str(chain)!r} does not exist or is not a file")
    if chain.suffix.lower() in (".h5", ".hdf5") and not dataset:
        raise UsageError("--dataset PATH is required for an HDF5 chain")
    if out.suffix.lower() not in _OUT_SUFFIXES:
        raise UsageError(f"--out must end in .json or .csv, got {out.name!r}")
    if out.exists() and not force:
        raise UsageError(f"--out {str(out)!r} exists; pass --force to overwrite it")
    if not out.parent.is_dir():
        raise UsageError(f"--out folder {str(out.parent)!r} does not exist")


def _write(out: Path, sel, names: tuple[str, ...], seed: int) -> None:
    import csv
    import json
    import math

    if out.suffix.lower() == ".json":

        def num(v: float) -> float | None:
            return float(v) if math.isfinite(v) else None  # JSON has no NaN

        doc = {
            "indices": [int(i) for i in sel.indices],
            "weights": [float(w) for w in sel.weights],
            "points": [[float(v) for v in row] for row in sel.points],
            "names": list(names),
            "mmd_features": num(sel.mmd_features),
            "mmd_exact": num(sel.mmd_exact),
            "mmd_exact_rows": sel.mmd_exact_rows,
            "features": sel.n_features,
            "feature_map": sel.feature_map,
            "method": sel.method,
            "weights_rule": sel.weights_rule,
            "kernel": sel.kernel,
            "bandwidth": sel.bandwidth,
            "seed": seed,
            "n_rows": sel.report["n_rows"],
            "n_nonfinite_dropped": sel.report["n_nonfinite_dropped"],
            "n_distinct": sel.report["n_distinct"],
        }
        tmp = out.with_name(out.name + ".part")
        tmp.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
        tmp.replace(out)
        return
    tmp = out.with_name(out.name + ".part")
    with tmp.open("w", newline="", encoding="utf-8") as fh:
        writer = csv.writer(fh)
        writer.writerow(["index", "weight", *names])
        for i, w, row in zip(sel.indices, sel.weights, sel.points, strict=True):
            writer.writerow([int(i), repr(float(w)), *(repr(float(v)) for v in row)])
    tmp.replace(out)


def _thin_default(name: str):
    """A thin setting's default, read from the settings model (declared once there)."""
    from winnow.tasks.config import ThinSettings

    return ThinSettings.model_fields[name].default


_EXACT_ROWS_DEFAULT = _thin_default("exact_max_rows")


def register(app: typer.Typer) -> None:
    """Add ``winnow thin`` to ``app``."""

    @app.command("thin")
    @guarded
    def thin_command(
        chain: Annotated[Path, typer.Argument(help="Chain file: .npy, .csv or .h5/.hdf5.")],
        budget: Annotated[int, typer.Option("--budget", help="Number of points to choose.")],
        out: Annotated[Path, typer.Option("--out", help="Result file, .json or .csv.")],
        kernel: Annotated[
            str, typer.Option(help="gaussian, laplace, matern32 or matern52.")
        ] = "gaussian",
        method: Annotated[
            str, typer.Option(help="greedy, swap, genetic, random or stride.")
        ] = "greedy",
        weights: Annotated[str, typer.Option(help="simplex (optimal) or uniform.")] = "simplex",
        features: Annotated[
            str, typer.Option(help="Number of random frequencies, or 'auto'.")
        ] = "auto",
        feature_map: Annotated[str, typer.Option(help="orf, rff or qmc.")] = "orf",
        bandwidth: Annotated[
            float | None, typer.Option(help="Kernel bandwidth (standardised units).")
        ] = None,
        seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
        dataset: Annotated[
            str | None, typer.Option(help="Dataset path inside an HDF5 chain.")
        ] = None,
        exact_rows: Annotated[
            int, typer.Option(help="Rows used for the exact-kernel MMD check (0 skips it).")
        ] = _EXACT_ROWS_DEFAULT,
        force: Annotated[bool, typer.Option(help="Overwrite an existing --out.")] = False,
        quiet: Annotated[bool, typer.Option(help="No progress bar.")] = False,
    ) -> None:
        """Choose BUDGET weighted points of CHAIN closest to it in MMD and write them."""
        _check_paths(chain, out, force, dataset)
        n_features: int | str = "auto"
        if features != "auto":
            try:
                n_features = int(features)
            except ValueError:
                raise UsageError(
                    f"--features must be an integer or 'auto', got {features!r}"
                ) from None
        from winnow.tasks.sample import read_chain_file
        from winnow.tasks.thin import thin

        data = read_chain_file(chain, dataset=dataset)
        options = dict(
            kernel=kernel, method=method, weights=weights, n_features=n_features,
            feature_map=feature_map, bandwidth=bandwidth, exact_max_rows=exact_rows,
        )  # fmt: skip
        if quiet:
            sel = thin(data, budget, rng=seed, **options)
        else:
            from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

            with Progress(
                TextColumn("{task.description}"),
                BarColumn(),
                TextColumn("{task.completed}/{task.total}"),
                TimeElapsedColumn(),
                transient=True,
            ) as bar:
                tasks: dict[str, int] = {}

                def progress(done: int, total: int, what: str) -> None:
                    if what not in tasks:
                        tasks[what] = bar.add_task(what, total=total)
                    bar.update(tasks[what], completed=done, total=total)

                sel = thin(data, budget, rng=seed, progress=progress, **options)
        _write(out, sel, data.names, seed)
        typer.echo(
            f"chose {sel.m} of {sel.report['n_distinct']} distinct rows "
            f"({sel.report['n_nonfinite_dropped']} non-finite dropped) by {sel.method}, "
            f"{sel.n_features} features: MMD features {sel.mmd_features:.4g}, "
            f"exact {sel.mmd_exact:.4g} ({sel.mmd_exact_rows} rows) -> {out}"
        )
