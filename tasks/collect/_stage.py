"""The collect stage driven by a study config: cheap predictions and the estimates."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from winnow.tasks.config import StudyConfig, importable, model_search_path
from winnow.tasks.records import (
    Chain,
    QoIEstimate,
    QoIValue,
    RunOutcome,
    RunSpec,
    Selection,
)


def cheap_predictions(
    config: StudyConfig, base_dir: Path, chain: Chain, selection: Selection
) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Evaluate each QoI's cheap prediction on every chain row and on the chosen points.

    Returns ``{qoi name: (on_chain (n, ...), on_points (m, ...))}`` for the QoIs that name one.
    """
    from winnow.tasks.sample import load_callable

    search = model_search_path(config, base_dir)
    out = {}
    for q in config.collect.qoi:
        if q.cheap_qoi is None:
            continue
        f = load_callable(q.cheap_qoi, search_path=search)
        on_chain = np.asarray(f(chain.samples), dtype=np.float64)
        if on_chain.shape[:1] != (chain.n,):
            raise ValueError(
                f"collect.qoi[{q.name}].cheap_qoi: {q.cheap_qoi} returned shape {on_chain.shape} "
                f"for {chain.n} rows; expected ({chain.n},) or ({chain.n}, k)"
            )
        out[q.name] = (on_chain, on_chain[selection.indices])
    return out


def _weights_resolver(chain: Chain, selection: Selection, order: Sequence[int]):
    """For the collect stage: re-solve the weights of surviving points against the chain.

    ``order[p]`` is the selection position of the p-th value the collect stage holds; the
    returned callable takes the surviving value positions and gives
    ``(weights, mmd before, mmd after)`` with exact-kernel MMDs.
    """
    from winnow.tasks.thin import reweight

    def resolve(surviving: np.ndarray) -> tuple[np.ndarray, float, float]:
        keep = np.asarray(order, dtype=np.int64)[np.asarray(surviving, dtype=np.int64)]
        new = reweight(chain.samples, selection, keep, by="position")
        return new.weights, float(selection.mmd_exact), float(new.mmd_exact)

    return resolve


def collect_stage(
    config: StudyConfig,
    base_dir: Path,
    chain: Chain,
    selection: Selection,
    specs: Sequence[RunSpec],
    outcomes: Mapping[str, RunOutcome],
    *,
    rng: Any = None,
    recorded: Mapping[tuple[str, str], QoIValue] | None = None,
) -> tuple[list[QoIValue], list[QoIEstimate]]:
    """Read every QoI from every run and make the weighted estimates with their uncertainty.

    ``recorded`` maps ``(reused_from, qoi name)`` to the value an earlier revision recorded
    for a run reused from it: when the run folder no longer holds that run's output, the
    recorded value is used (and says so) instead of counting the run as missing.
    """
    import dataclasses

    from ._collect import estimate_qoi, read_qoi

    cheap = cheap_predictions(config, base_dir, chain, selection)
    positions = {s.run_id: k for k, s in enumerate(specs)}
    ess = None
    if chain.diagnostics is not None:
        ess = min(p.ess_bulk for p in chain.diagnostics.parameters.values())
    rng = np.random.default_rng(config.study.seed if rng is None else rng)
    from ._uncertainty import ChainGeometry

    # one view of the chain for every QoI's error model (its kernel embeddings are cached)
    finite_rows = np.isfinite(chain.samples).all(axis=1)
    geometry = ChainGeometry(chain.samples[finite_rows], rng=rng)
    chain_points = chain.samples[selection.indices]
    values: list[QoIValue] = []
    estimates: list[QoIEstimate] = []
    for q in config.collect.qoi:
        spec_dict = q.reader_spec()
        vals = []
        for s in specs:
            o = outcomes.get(s.run_id)
            state = o.state if o is not None else "not_run"
            with importable(model_search_path(config, base_dir)):
                v = read_qoi(s.run_dir, spec_dict, run_id=s.run_id, run_state=state)
            earlier = (recorded or {}).get((o.reused_from, q.name)) if o is not None else None
            if v.status != "ok" and earlier is not None and earlier.status == "ok":
                v = dataclasses.replace(
                    earlier,
                    run_id=s.run_id,
                    reason=f"recorded by {o.reused_from} (reused run; its folder no longer "
                    f"holds the output: {v.reason})",
                )
            vals.append(v)
        values.extend(vals)
        order = [positions[v.run_id] for v in vals]
        weights = selection.weights[order]
        on_chain, on_points = cheap.get(q.name, (None, None))
        estimates.append(
            estimate_qoi(
                vals,
                weights,
                name=q.name,
                units=q.units,
                quantiles=tuple(config.collect.quantiles),
                thresholds=tuple(q.thresholds),
                cheap_on_points=None if on_points is None else on_points[order],
                cheap_on_chain=on_chain,
                # the smaller of the parameters' ESS and the cheap prediction's is used
                chain_ess=ess,
                chain_index=chain.chain_index,
                resolve_weights=_weights_resolver(chain, selection, order),
                bootstrap=config.collect.bootstrap,
                points=chain_points[order],
                geometry=geometry,
                level=config.collect.level,
                rng=rng,
            )
        )
    return values, estimates
