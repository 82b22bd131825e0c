"""What the collect report shows, read from a run store (private): ``load_report_data``.

Re-exported by :mod:`winnow.tasks.store`. The stored config is read through the config
model (:mod:`winnow.tasks.config`).
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from . import _core as S
from ._core import StoreFormatError
from ._core import as_path as _as_path
from ._hashes import hash_chain, hash_config
from ._inspect import _rev_name


def _config_qoi_info(config_text: str) -> tuple[dict[str, str], dict[str, dict[str, Any]]]:
    """QoI descriptions and axes from the stored config, read through the config model.

    The stored config is validated as a whole (``parse_config``). One that no longer validates
    as a whole (written by an older winnow, or its files have moved since) is read entry by
    entry: each ``collect.qoi`` entry is validated as a ``QoISettings`` and those that fail
    are left out. Tolerant by design: the report then just lacks those descriptions.
    """
    import yaml
    from pydantic import ValidationError

    from winnow.tasks.config import AxisSpec, ConfigError, QoISettings, parse_config

    try:
        data = yaml.safe_load(config_text)
    except yaml.YAMLError:
        return {}, {}
    qois: list[QoISettings] = []
    try:
        qois = list(parse_config(data, source="stored config").collect.qoi)
    except (ConfigError, ValueError, TypeError):
        collect = data.get("collect") if isinstance(data, dict) else None
        entries = collect.get("qoi") if isinstance(collect, dict) else None
        for entry in entries if isinstance(entries, list) else []:
            try:
                qois.append(QoISettings.model_validate(entry))
            except (ValidationError, ValueError, TypeError):
                continue
    descriptions = {q.name: q.description for q in qois if q.description}
    axes: dict[str, dict[str, Any]] = {}
    for q in qois:
        if q.axis is None:
            continue
        axis = AxisSpec.model_validate(q.axis)  # validated with the QoI: cannot fail here
        entry: dict[str, Any] = {"name": axis.name, "units": axis.units}
        if axis.values is not None:
            entry["values"] = np.asarray(axis.values, dtype=np.float64)
        axes[q.name] = entry
    return descriptions, axes


def load_report_data(
    path: str | Path, revision: str | int | None = None, *, max_plot_rows: int = 20000
) -> Any:
    """Everything the collect report shows for one revision (default: the latest).

    Reads every section first and checks that the chain, selection, runs and results still
    match the hashes recorded in the revision's provenance, so a damaged store is reported
    (``StoreFormatError``; ``winnow check`` names the damage) instead of turned into a report.

    Parameters
    ----------
    max_plot_rows : int
        At most this many chain rows are passed for plotting, evenly spaced over the chain
        (``chain_rows`` keeps the full count).

    Returns
    -------
    winnow.tasks.collect.ReportData
    """
    from winnow.tasks.collect import ReportData  # the collect stage owns the report record

    if isinstance(max_plot_rows, bool) or not isinstance(max_plot_rows, int) or max_plot_rows < 1:
        raise ValueError(f"max_plot_rows must be a positive int, got {max_plot_rows!r}")
    p = _as_path(path)
    from ._api import RunStore  # the store API re-exports this module

    with RunStore.open_read(p) as r:
        rev = _rev_name(r, "latest" if revision is None else revision)
        secs = set(r.sections(rev))
        text = r.read_config_text(rev)
        chain = r.read_chain(rev) if "chain" in secs else None
        sel = r.read_selection(rev) if "selection" in secs else None
        specs, outcomes = r.read_runs(rev) if "runs" in secs else ([], [])
        values, estimates = r.read_results(rev) if "results" in secs else ([], [])
        prov = r.read_provenance(rev)
        inputs = r.read_input_details(rev)
        study, description = r.study, r.description
    recomputed = {
        "config": hash_config(text),
        "chain": hash_chain(chain) if chain is not None else "",
        "selection": S.hash_selection(sel) if sel is not None else "",
        "runs": S.hash_runs(specs, outcomes) if "runs" in secs else "",
        "results": S.hash_results(values, estimates) if "results" in secs else "",
    }
    for name, digest in recomputed.items():
        if (prov.get(f"{name}_sha256") or "") != digest:
            raise StoreFormatError(
                f"store {str(p)!r} {rev}: the stored {name} does not match the hash recorded "
                f"in its provenance; run `winnow check {p}` to see the damage"
            )
    samples = None
    if chain is not None:
        samples = chain.samples
        if chain.n > max_plot_rows:
            rows = np.linspace(0, chain.n - 1, max_plot_rows).round().astype(np.int64)
            samples = chain.samples[rows]
    run_of_point = {int(s.point_index): s.run_id for s in specs}
    point_run_ids = (
        tuple(run_of_point.get(int(i), "") for i in np.asarray(sel.indices)) if sel else ()
    )
    reuse = {
        "ran": sum(1 for o in outcomes if not o.reused_from and o.attempts),
        "reused": sum(1 for o in outcomes if o.reused_from),
    }
    not_run = len(outcomes) - reuse["ran"] - reuse["reused"]
    if not_run:
        reuse["not run"] = not_run
    descriptions, axes = _config_qoi_info(text)
    provenance: dict[str, Any] = {"store": str(p.resolve()), "revision": rev}
    for k, v in prov.items():
        if k != "revision" and v not in (None, ""):
            provenance[k] = v
    for name, info in inputs.items():
        provenance[f"input {name}"] = f"{info['path']} (sha256 {info['sha256']})"
    return ReportData(
        study=study,
        revision=rev,
        config_hash=recomputed["config"],
        config_text=text,
        description=description,
        chain_names=tuple(chain.names) if chain is not None else (),
        chain_units=tuple(chain.units) if chain is not None else (),
        chain_diagnostics=chain.diagnostics if chain is not None else None,
        chain_samples=samples,
        chain_rows=chain.n if chain is not None else 0,
        chain_source=chain.source if chain is not None else "",
        selection=sel,
        point_run_ids=point_run_ids,
        outcomes=list(outcomes),
        qoi_values=list(values),
        estimates=list(estimates),
        qoi_axes=axes,
        qoi_descriptions=descriptions,
        reuse_counts=reuse,
        provenance=provenance,
        created=S.now_iso(),
    )
