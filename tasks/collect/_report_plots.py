"""Pictures of the collect report, as PNG bytes: the shared helpers, the chosen points over
the chain, the traces and the cheap model against the observations (the pictures of one QoI
are in :mod:`._report_plots_qoi`).

matplotlib is optional: it is imported inside each function, through the object-oriented
``Figure`` + Agg canvas (no pyplot global state, safe in worker threads), and every function
returns ``None`` when it is not installed, so the report still renders without pictures.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = [
    "format_number",
    "matplotlib_available",
    "observations_png",
    "pair_plot_png",
    "trace_plot_png",
]

DIGITS = 4  # significant digits of every number the report prints, in text and pictures
_MAX_PAIR_PARAMETERS = 6
_MAX_CLOUD_ROWS = 5000  # chain rows drawn in the pair plot
_FONT = 10


def format_number(x: Any, digits: int = DIGITS) -> str:
    """A number as the report prints it: ``digits`` significant digits, ``n/a`` if not finite.

    The one formatting rule of the report and its pictures (tables, sentences, legends).
    """
    try:
        v = float(np.asarray(x, dtype=float).reshape(-1)[0])
    except (TypeError, ValueError, IndexError):
        return "n/a"
    if not np.isfinite(v):
        return "n/a"
    return f"{v:.{digits}g}"


def _figure_class() -> Any | None:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure
    except ImportError:
        return None

    def make(figsize: tuple[float, float]) -> Any:
        fig = Figure(figsize=figsize, dpi=100, layout="constrained")
        FigureCanvasAgg(fig)
        return fig

    return make


def matplotlib_available() -> bool:
    """True when matplotlib can be imported (pictures are drawn)."""
    return _figure_class() is not None


def _png(fig: Any) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return buf.getvalue()


def _near(thresholds: Sequence[float], values: np.ndarray) -> list[float]:
    """Thresholds close enough to the values to draw without squashing the plot."""
    lo, hi = float(np.min(values)), float(np.max(values))
    span = max(hi - lo, abs(hi) * 1e-6, 1e-12)
    return [float(t) for t in thresholds if lo - 0.5 * span <= t <= hi + 0.5 * span]


def _label(name: str, units: str) -> str:
    return f"{name} ({units})" if units else name


def _pair_panel(
    ax: Any,
    i: int,
    j: int,
    chain_samples: np.ndarray | None,
    points: np.ndarray,
    rel_weights: np.ndarray,
    sizes: np.ndarray,
) -> None:
    """One panel of the pair plot: on the diagonal the chain's histogram of parameter i with
    the points as lines of height growing with weight, below it the chain cloud of (j, i)
    with the points as markers of area ``sizes``."""
    if i == j:
        if chain_samples is not None and len(chain_samples):
            ax.hist(
                chain_samples[:, i],
                bins=40,
                density=True,
                color="0.75",
                label="posterior chain",
            )
        ymax = ax.get_ylim()[1] if chain_samples is not None else 1.0
        ax.vlines(
            points[:, i],
            0,
            0.12 * ymax + 0.6 * ymax * rel_weights,
            color="#b2182b",
            lw=1.4,
            label="chosen points (height ~ weight)",
        )
        ax.set_yticks([])
    else:
        if chain_samples is not None and len(chain_samples):
            ax.scatter(
                chain_samples[:, j],
                chain_samples[:, i],
                s=2,
                c="0.6",
                alpha=0.25,
                linewidths=0,
                rasterized=True,
            )
        ax.scatter(
            points[:, j],
            points[:, i],
            s=sizes,
            c="#b2182b",
            alpha=0.85,
            edgecolors="white",
            linewidths=0.6,
        )


def pair_plot_png(
    chain_samples: np.ndarray | None,
    names: Sequence[str],
    units: Sequence[str],
    points: np.ndarray,
    weights: np.ndarray,
) -> bytes | None:
    """Pair plot of the chosen points over the posterior, marker area proportional to weight.

    Parameters
    ----------
    chain_samples : ndarray, shape (k, d), or None
        Chain rows drawn as a grey cloud (a subsample is enough).
    names, units : sequence of str, length d
    points : ndarray, shape (m, d)
    weights : ndarray, shape (m,)

    Only the first six parameters are drawn (the caption of the report says so).
    """
    make = _figure_class()
    if make is None:
        return None
    points = np.asarray(points, dtype=float)
    weights = np.asarray(weights, dtype=float)
    if chain_samples is not None and len(chain_samples) > _MAX_CLOUD_ROWS:
        step = -(-len(chain_samples) // _MAX_CLOUD_ROWS)  # even stride: no randomness needed
        chain_samples = np.asarray(chain_samples)[::step]
    d = min(points.shape[1], _MAX_PAIR_PARAMETERS)
    panel = 2.6 if d > 2 else 3.4
    fig = make((panel * d + 0.6, panel * d + 0.4))
    axes = fig.subplots(d, d, squeeze=False)
    wmax = float(weights.max()) if weights.size and weights.max() > 0 else 1.0
    sizes = 12.0 + 150.0 * weights / wmax  # area grows with weight; zero weight still visible
    for i in range(d):
        for j in range(d):
            ax = axes[i, j]
            ax.tick_params(labelsize=_FONT - 2)
            if j > i:
                ax.set_axis_off()
                continue
            _pair_panel(ax, i, j, chain_samples, points, weights / wmax, sizes)
            if i == d - 1:
                ax.set_xlabel(_label(names[j], units[j]), fontsize=_FONT)
            else:
                ax.set_xticklabels([])
            if j == 0 and i > 0:
                ax.set_ylabel(_label(names[i], units[i]), fontsize=_FONT)
            elif i != j:
                ax.set_yticklabels([])
    if d == 1:
        axes[0, 0].legend(fontsize=_FONT - 1, loc="upper right")
    elif d > 1:
        leg = axes[0, d - 1]
        leg.scatter([], [], s=2 * 20, c="0.6", label="posterior chain (rows)")
        for frac in (0.25, 1.0):
            leg.scatter(
                [],
                [],
                s=12.0 + 150.0 * frac,
                c="#b2182b",
                label=f"chosen point, weight {format_number(frac * wmax)}",
            )
        leg.legend(loc="center", fontsize=_FONT, frameon=False)
    return _png(fig)


def _dedupe(handles: list, labels: list[str]) -> tuple[list, list[str]]:
    seen: dict[str, Any] = {}
    for h, lab in zip(handles, labels, strict=True):
        if lab and not lab.startswith("_") and lab not in seen:
            seen[lab] = h
    return list(seen.values()), list(seen)


def _legend_below(fig: Any, axes: Sequence[Any], ncols: int = 3) -> Any:
    """One legend for ``axes``, outside the axes below them (it never covers a curve)."""
    handles: list = []
    labels: list[str] = []
    for ax in axes:
        h, lab = ax.get_legend_handles_labels()
        handles += h
        labels += lab
    handles, labels = _dedupe(handles, labels)
    if not handles:
        return None
    return fig.legend(
        handles, labels, loc="outside lower center", ncols=ncols, fontsize=_FONT - 1, frameon=False
    )


def _pct_label(level: float) -> str:
    return f"{100 * level:g} %"


def trace_plot_png(
    samples: np.ndarray,
    names: Sequence[str],
    units: Sequence[str],
    *,
    chain: np.ndarray | None = None,
    draw: np.ndarray | None = None,
) -> bytes | None:
    """Trace of every parameter: value against draw, one colour per chain.

    Parameters
    ----------
    samples : ndarray, shape (k, d)
        Chain rows (may be a subsample, in stored order).
    chain, draw : ndarray of int, shape (k,), optional
        Chain and draw number of each row; without them the rows are drawn against their
        position as one sequence.
    """
    make = _figure_class()
    if make is None or samples is None or len(samples) == 0:
        return None
    x = np.asarray(samples, dtype=float)
    d = x.shape[1]
    k = x.shape[0]
    ch = np.zeros(k, dtype=np.int64) if chain is None else np.asarray(chain).reshape(-1)
    dr = np.arange(k) if draw is None else np.asarray(draw).reshape(-1)
    fig = make((10.0, 1.9 * d + 0.9))
    axes = fig.subplots(d, 1, squeeze=False, sharex=True)
    labels = np.unique(ch)
    for j in range(d):
        ax = axes[j, 0]
        for c in labels:
            rows = np.flatnonzero(ch == c)
            rows = rows[np.argsort(dr[rows], kind="stable")]
            ax.plot(
                dr[rows],
                x[rows, j],
                lw=0.5,
                alpha=0.8,
                label=f"chain {int(c) + 1}" if chain is not None else "rows in stored order",
            )
        ax.set_ylabel(_label(names[j], units[j] if j < len(units) else ""), fontsize=_FONT)
        ax.tick_params(labelsize=_FONT - 1)
    axes[-1, 0].set_xlabel(
        "draw (after burn-in)" if draw is not None else "row of the plotted chain", fontsize=_FONT
    )
    if labels.size <= 12:
        _legend_below(fig, (axes[0, 0],), ncols=min(int(labels.size), 6))
    return _png(fig)


def observations_png(
    x: np.ndarray,
    observed: np.ndarray,
    predictions: np.ndarray,
    *,
    sigma: np.ndarray | None = None,
    x_label: str = "observation",
    y_label: str = "observed value",
    band: tuple[float, float] = (0.05, 0.95),
) -> bytes | None:
    """The cheap model's posterior predictions against the observations.

    Parameters
    ----------
    x : ndarray, shape (n,)
        Where each observation was made (e.g. time).
    observed : ndarray, shape (n,)
    predictions : ndarray, shape (k, n)
        The cheap (forward) model at ``x`` for ``k`` chain rows.
    sigma : ndarray, shape (n,), optional
        Observation noise sd; drawn as bars of one sd either side.
    band : (float, float)
        Probabilities of the band of the predictions over the chain rows (equal weights).
    """
    make = _figure_class()
    xs = np.asarray(x, dtype=float).reshape(-1)
    obs = np.asarray(observed, dtype=float).reshape(-1)
    pred = np.asarray(predictions, dtype=float)
    if make is None or xs.size == 0 or pred.ndim != 2 or pred.shape[1] != xs.size:
        return None
    order = np.argsort(xs, kind="stable")
    lo, med, hi = np.nanquantile(pred[:, order], [band[0], 0.5, band[1]], axis=0)
    fig = make((8.0, 4.2))
    ax = fig.subplots()
    ax.fill_between(
        xs[order],
        lo,
        hi,
        color="#92c5de",
        alpha=0.6,
        lw=0,
        label=f"cheap model over the chain rows: {band[0]:.0%} to {band[1]:.0%} of them",
    )
    ax.plot(
        xs[order], med, color="#2166ac", lw=1.6, label="cheap model: median over the chain rows"
    )
    if sigma is not None:
        ax.errorbar(
            xs,
            obs,
            yerr=np.asarray(sigma, dtype=float),
            fmt="o",
            color="#b2182b",
            ms=4,
            capsize=2,
            label="observed (bars: 1 noise sd either side)",
        )
    else:
        ax.plot(xs, obs, "o", color="#b2182b", ms=4, label="observed")
    ax.set_xlabel(x_label, fontsize=_FONT)
    ax.set_ylabel(y_label, fontsize=_FONT)
    ax.set_title("Cheap model's posterior predictions against the observations", fontsize=_FONT + 1)
    ax.tick_params(labelsize=_FONT - 1)
    _legend_below(fig, (ax,), ncols=2)
    return _png(fig)
