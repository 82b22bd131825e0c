"""Run store section ``selection`` (private).

Attributes and datasets come from the table ``SELECTION`` of :mod:`._tables`; the
points (in the chain's units) and the genetic selector's population are written here. Layout
in ``docs/store-layout.md``.
"""

from __future__ import annotations

from typing import Any

import h5py
import numpy as np

from winnow.tasks.records import Selection

from ._columns import build_group, group_attrs, write_group_datasets
from ._h5 import ONE, attr_json, get_array, need, put_array, put_group, to_json
from ._hashes import hash_selection as _hash_selection
from ._tables import SELECTION


def validate_selection(sel: Selection) -> None:
    if not isinstance(sel, Selection):
        raise TypeError(f"selection must be a Selection, got {type(sel).__name__}")
    idx = np.asarray(sel.indices)
    if idx.ndim != 1:
        raise ValueError(f"selection.indices must have shape (m,), got {idx.shape}")
    if np.asarray(sel.weights).shape != idx.shape:
        raise ValueError(
            f"selection.weights must have shape {idx.shape}, got {np.asarray(sel.weights).shape}"
        )
    if np.asarray(sel.points).ndim != 2 or np.asarray(sel.points).shape[0] != idx.shape[0]:
        raise ValueError(
            f"selection.points must have shape ({idx.shape[0]}, d), "
            f"got {np.asarray(sel.points).shape}"
        )
    if sel.seed is not None and not isinstance(sel.seed, int | np.integer):
        raise TypeError(f"selection.seed must be int or None, got {type(sel.seed).__name__}")


def write_selection(rev: h5py.Group, sel: Selection, digest: str) -> None:
    names: list[str] = []
    units: Any = "chain units"
    if "chain" in rev:
        s = rev["chain/samples"]
        names = [str(x) for x in s.attrs["names"]]
        units = [str(x) for x in s.attrs["units"]]
    g = put_group(
        rev,
        "selection",
        "weighted subset of chain rows chosen to minimise MMD to the whole chain",
        **group_attrs(SELECTION, sel),
        sha256=digest,
    )
    write_group_datasets(g, SELECTION, sel)
    put_array(
        g,
        "points",
        sel.points,
        units=units,
        description="the chosen rows, chain.samples[indices]",
        names=names,
    )
    if sel.population is not None:
        pop = put_group(
            g,
            "population",
            "near-optimal index sets of the genetic selector",
            count=len(sel.population),
        )
        for i, item in enumerate(sel.population):
            ind, mmd = item
            put_array(
                pop,
                f"p{i:04d}",
                ind,
                units=ONE,
                description="chain row indices of one member",
                mmd=to_json(mmd, "population mmd"),
            )


def read_selection(rev: h5py.Group) -> Selection:
    g = need(rev, "selection")
    population = None
    if "population" in g:
        pop = g["population"]
        population = [
            (get_array(pop[f"p{i:04d}"]), attr_json(pop[f"p{i:04d}"], "mmd"))
            for i in range(int(pop.attrs["count"]))
        ]
    return build_group(SELECTION, g, points=get_array(need(g, "points")), population=population)


def hash_selection(sel: Selection) -> str:
    return _hash_selection(sel)
