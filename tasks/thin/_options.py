"""Input checks of the thin stage and its settings, built and read back through the model.

:func:`thin_options` turns the keywords of :func:`~winnow.tasks.thin.thin` (and a
:class:`~winnow.tasks.config.ThinSettings`) into one validated
:class:`~winnow.tasks.config.ThinOptions` plus the selector's own options;
:func:`options_of` reads a selection's recorded settings back through the same model.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from winnow.tasks.config import ThinOptions, ThinSettings, validate_settings
from winnow.tasks.records import Chain, Selection

from ._selectors import get_selector

__all__ = ["options_of", "thin_options"]

# independent random streams: bandwidth, feature map, pool, auto-features, exact MMD, selector
_STREAMS = 6
# the library keyword named as the Selection attribute it sets
_KEYWORDS = {"n_features": "features"}
# report keys of selections recorded before report["settings"] (kept readable)
_OLD_REPORT_KEYS = {
    "standardise": "standardise",
    "mmd_exact_max_rows": "exact_max_rows",
    "auto_features_tol": "features_tol",
    "precision": "precision",
    "workers": "workers",
    "replace_unweighted": "replace_unweighted",
}


def _validate_samples(samples: Any) -> np.ndarray:
    if isinstance(samples, Chain):
        samples = samples.samples
    try:
        x = np.asarray(samples, dtype=np.float64)
    except (ValueError, TypeError) as exc:
        raise ValueError(
            f"samples must be a rectangular 2-D array of numbers (n, d); got a ragged or "
            f"non-numeric input ({exc})"
        ) from None
    if x.ndim != 2:
        raise ValueError(f"samples must be a 2-D array (n, d), got shape {x.shape}")
    if x.shape[0] == 0 or x.shape[1] == 0:
        raise ValueError(f"samples is empty: shape {x.shape}")
    return x


def _validate_int(name: str, value: Any, low: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int | np.integer):
        raise TypeError(f"{name} must be an integer, got {value!r}")
    if value < low:
        raise ValueError(f"{name} must be >= {low}, got {value!r}")
    return int(value)


def _validate_choice(name: str, value: Any, choices: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in choices:
        raise ValueError(f"{name} must be one of {sorted(choices)}, got {value!r}")
    return value


def rng_and_seed(rng: Any) -> tuple[list[np.random.Generator], int | None]:
    """The run's independent random streams, and the seed when ``rng`` is one."""
    seed = int(rng) if isinstance(rng, int | np.integer) and not isinstance(rng, bool) else None
    gen = np.random.default_rng(rng)
    return gen.spawn(_STREAMS), seed


def _plain(value: Any) -> Any:
    """numpy scalars as Python values (the settings model validates strictly)."""
    return value.item() if isinstance(value, np.generic) else value


def thin_options(
    settings: ThinSettings | None, keywords: Mapping[str, Any]
) -> tuple[ThinOptions, dict[str, Any]]:
    """The validated settings (``settings``, then ``keywords`` naming its fields, override
    them) and the selector's options (the other ``keywords``), checked by the selector."""
    if settings is not None and not isinstance(settings, ThinSettings):
        raise TypeError(f"settings must be a ThinSettings, got {type(settings).__name__}")
    fields = ThinOptions.model_fields
    values = {} if settings is None else settings.model_dump()
    names: dict[str, str] = {}
    method_options = {}
    for key, value in keywords.items():
        field = _KEYWORDS.get(key, key)
        if field in fields:
            values[field] = _plain(value)
            names[field] = key
        else:
            method_options[key] = value
    options = validate_settings(ThinOptions, values, strict=True, names=names)
    try:
        get_selector(options.method, **method_options)  # unknown options fail before any work
    except TypeError as exc:
        raise TypeError(f"{exc}; settings of thin(): {sorted(fields)}") from None
    return options, method_options


def options_of(
    selection: Selection, method: str | None, overrides: Mapping[str, Any]
) -> tuple[ThinOptions, dict[str, Any]]:
    """The settings ``selection`` was made with, read back through the model, with its
    kernel, bandwidth, feature map, feature count and weights rule as used, ``method``
    (default greedy) and ``overrides`` on top.

    A selection recorded before its settings were (no ``report["settings"]``) gives the
    settings its report names; the model's defaults fill in the rest.
    """
    if not isinstance(selection, Selection):
        raise TypeError(f"selection must be a Selection, got {type(selection).__name__}")
    rep = selection.report
    recorded = rep.get("settings")
    if recorded is None:
        recorded = {f: rep[k] for k, f in _OLD_REPORT_KEYS.items() if k in rep}
    recorded = ThinOptions.model_validate(recorded).model_dump()
    used = {
        "kernel": selection.kernel,
        "bandwidth": selection.bandwidth,
        "method": "greedy" if method is None else method,
        "weights": selection.weights_rule,
        "feature_map": selection.feature_map,
        "features": selection.n_features,
    }
    return thin_options(None, {**recorded, **used, **overrides})
