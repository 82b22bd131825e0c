"""The ``winnow thin`` command: thin a chain file to a few weighted points.

``winnow thin CHAIN --budget M --out FILE`` reads ``.npy`` (n x d), ``.csv`` (header row of
parameter names) or ``.h5``/``.hdf5`` (``--dataset PATH``), runs
:func:`winnow.tasks.thin.thin` and writes ``FILE.json`` or ``FILE.csv`` (chosen by the
suffix). The options of the thin settings are generated from the fields of
:class:`winnow.tasks.config.ThinSettings` (their help is the field's description, their
default the field's). Everything is validated before anything is written; an existing ``--out`` is kept
unless ``--force``. Heavy modules (numpy, scipy, the thinning engine) are imported inside the
command so that ``winnow --help`` stays fast.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable
from inspect import Parameter
from pathlib import Path
from typing import Annotated, Any, Literal, get_args, get_origin

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


# the option of a setting whose command-line name is not its field name (README, 0.1)
_FLAGS = {"exact_max_rows": ("--exact-rows", "--exact-max-rows")}


def _setting_option(name: str, field: Any) -> tuple[Any, Any]:
    """The type (with its ``typer.Option``) and default of the option of one thin setting,
    read from its field: Literal and mixed fields are text (checked by the model), the
    choices of a Literal are listed in the help."""
    annotation = field.annotation
    args = [a for a in get_args(annotation) if a is not type(None)]
    kind = annotation if annotation in (bool, int, float) else str
    if len(args) == 1 and args[0] in (int, float):
        kind = args[0] | None
    help_text = field.description or ""
    if get_origin(annotation) is Literal:
        help_text += " One of: " + ", ".join(map(str, get_args(annotation))) + "."
    flags = _FLAGS.get(name, ("--" + name.replace("_", "-"),))
    if kind is bool:
        flags = (f"{flags[0]}/--no-{flags[0].removeprefix('--')}",)
    return Annotated[kind, typer.Option(*flags, help=help_text)], field.default


def _settings_parameters() -> list[inspect.Parameter]:
    """One keyword parameter per field of ThinSettings (the settings are declared there)."""
    from winnow.tasks.config import ThinSettings

    out = []
    for name, field in ThinSettings.model_fields.items():
        annotation, default = _setting_option(name, field)
        out.append(
            inspect.Parameter(name, Parameter.KEYWORD_ONLY, default=default, annotation=annotation)
        )
    return out


def _option_names() -> dict[str, str]:
    from winnow.tasks.config import ThinSettings

    return {n: _FLAGS.get(n, ("--" + n.replace("_", "-"),))[0] for n in ThinSettings.model_fields}


def _with_settings(func: Callable[..., None]) -> Callable[..., None]:
    """``func(..., **settings)`` with a signature typer reads: its own parameters and one
    option per thin setting."""
    sig = inspect.signature(func, eval_str=True)
    own = [p for p in sig.parameters.values() if p.kind is not p.VAR_KEYWORD]
    params = own + _settings_parameters()
    func.__signature__ = sig.replace(parameters=params)  # type: ignore[attr-defined]
    func.__annotations__ = {p.name: p.annotation for p in params} | {"return": None}
    return func


def register(app: typer.Typer) -> None:
    """Add ``winnow thin`` to ``app``."""

    @app.command("thin")
    @guarded
    @_with_settings
    def thin_command(
        chain: Annotated[Path, typer.Argument(help="Chain file: .npy, .csv or .h5/.hdf5.")],
        budget: Annotated[int, typer.Option("--budget", help="Number of points to choose.")],
        out: Annotated[Path, typer.Option("--out", help="Result file, .json or .csv.")],
        seed: Annotated[int, typer.Option(help="Random seed.")] = 0,
        dataset: Annotated[
            str | None, typer.Option(help="Dataset path inside an HDF5 chain.")
        ] = None,
        force: Annotated[bool, typer.Option(help="Overwrite an existing --out.")] = False,
        quiet: Annotated[bool, typer.Option(help="No progress bar.")] = False,
        **settings: Any,
    ) -> None:
        """Choose BUDGET weighted points of CHAIN closest to it in MMD and write them."""
        from winnow.tasks.config import ThinSettings, validate_settings

        _check_paths(chain, out, force, dataset)
        given = validate_settings(ThinSettings, settings, names=_option_names())
        from winnow.tasks.sample import read_chain_file
        from winnow.tasks.thin import thin

        data = read_chain_file(chain, dataset=dataset)
        if quiet:
            sel = thin(data, budget, rng=seed, settings=given)
        else:
            sel = _thin_with_bar(thin, data, budget, seed, given)
        _write(out, sel, data.names, seed)
        typer.echo(
            f"chose {sel.m} of {sel.report['n_distinct']} distinct rows "
            f"({sel.report['n_nonfinite_dropped']} non-finite dropped) by {sel.method}, "
            f"{sel.n_features} features: MMD features {sel.mmd_features:.4g}, "
            f"exact {sel.mmd_exact:.4g} ({sel.mmd_exact_rows} rows) -> {out}"
        )


def _thin_with_bar(thin: Callable[..., Any], data: Any, budget: int, seed: int, given: Any):
    """``thin`` with a rich progress bar per step."""
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

        return thin(data, budget, rng=seed, progress=progress, settings=given)
