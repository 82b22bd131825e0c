"""Pictures of the collect report, as PNG bytes.

matplotlib is optional: it is imported inside each function, through the object-oriented
``Figure`` + Agg canvas (no pyplot global state, safe in worker threads), and every function
returns ``None`` when it is not installed, so the report still renders without pictures.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from typing import Any

import numpy as np

__all__ = ["matplotlib_available", "pair_plot_png", "qoi_plot_png"]

_MAX_PAIR_PARAMETERS = 6
_MAX_CLOUD_ROWS = 5000  # chain rows drawn in the pair plot
_FONT = 10


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
                    0.12 * ymax + 0.6 * ymax * weights / wmax,
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
                label=f"chosen point, weight {frac * wmax:.3g}",
            )
        leg.legend(loc="center", fontsize=_FONT, frameon=False)
    return _png(fig)


def qoi_plot_png(
    values: np.ndarray,
    weights: np.ndarray,
    *,
    name: str,
    units: str,
    mean: np.ndarray,
    quantiles: dict[float, np.ndarray],
    thresholds: Sequence[float] = (),
    cv_mean: np.ndarray | None = None,
    axis: dict[str, Any] | None = None,
) -> bytes | None:
    """Picture of one QoI's weighted values.

    Scalar QoI: weighted histogram of the run values next to their weighted cumulative
    distribution, with the mean, quantiles, thresholds and the multi-fidelity estimate
    marked. Vector QoI: the weighted mean and quantile band along the axis, over the runs.

    Parameters
    ----------
    values : ndarray, shape (m,) or (m, k)
        Usable run values only.
    weights : ndarray, shape (m,)
        Their (re-solved) weights.
    """
    make = _figure_class()
    if make is None or len(values) == 0:
        return None
    values = np.asarray(values, dtype=float)
    weights = np.asarray(weights, dtype=float)
    weights = weights / weights.sum()
    label = _label(name, units)
    probs = sorted(quantiles)
    if values.ndim == 1:
        fig = make((10.0, 3.8))
        ax_h, ax_c = fig.subplots(1, 2)
        bins = int(np.clip(np.sqrt(values.size) * 2, 5, 30))
        ax_h.hist(values, bins=bins, weights=weights, color="#92c5de", edgecolor="#2166ac")
        ax_h.set_ylabel("weight (probability)", fontsize=_FONT)
        ax_h.set_title("Weighted histogram of the runs", fontsize=_FONT + 1)
        order = np.argsort(values)
        ax_c.step(
            values[order],
            np.cumsum(weights[order]),
            where="post",
            color="#2166ac",
            label="weighted CDF of the runs",
        )
        ax_c.set_ylabel("cumulative weight", fontsize=_FONT)
        ax_c.set_ylim(0, 1.02)
        ax_c.set_title("Weighted cumulative distribution", fontsize=_FONT + 1)
        for q in probs:
            ax_c.plot([float(quantiles[q])], [q], "o", color="#4d4d4d", ms=5)
            ax_c.annotate(
                f"{q:.0%}",
                (float(quantiles[q]), q),
                textcoords="offset points",
                xytext=(6, -10),
                fontsize=_FONT - 1,
            )
        for ax in (ax_h, ax_c):
            ax.axvline(float(mean), color="#b2182b", lw=1.6, label="weighted mean")
            if cv_mean is not None and np.isfinite(cv_mean):
                ax.axvline(
                    float(cv_mean),
                    color="#1b7837",
                    lw=1.4,
                    ls="--",
                    label="multi-fidelity estimate",
                )
            for t in _near(thresholds, values):
                ax.axvline(float(t), color="#e08214", lw=1.2, ls=":", label=f"threshold {t:g}")
            ax.set_xlabel(label, fontsize=_FONT)
            ax.tick_params(labelsize=_FONT - 1)
        ax_c.legend(fontsize=_FONT - 1, loc="lower right")
        return _png(fig)
    ax_info = axis or {}
    x = np.asarray(ax_info.get("values", np.arange(values.shape[1])), dtype=float)
    fig = make((10.0, 4.2))
    ax = fig.subplots()
    for row in values:
        ax.plot(x, row, color="0.7", lw=0.7, zorder=1)
    ax.plot([], [], color="0.7", lw=0.7, label="individual runs")
    if len(probs) >= 2:
        ax.fill_between(
            x,
            quantiles[probs[0]],
            quantiles[probs[-1]],
            color="#92c5de",
            alpha=0.6,
            zorder=2,
            label=f"weighted {probs[0]:.0%}-{probs[-1]:.0%} band",
        )
    ax.plot(x, mean, color="#b2182b", lw=2, zorder=3, label="weighted mean")
    if cv_mean is not None:
        ax.plot(
            x, cv_mean, color="#1b7837", lw=1.6, ls="--", zorder=4, label="multi-fidelity estimate"
        )
    for t in _near(thresholds, values):
        ax.axhline(float(t), color="#e08214", lw=1.2, ls=":", label=f"threshold {t:g}")
    ax.set_xlabel(_label(ax_info.get("name", "index"), ax_info.get("units", "")), fontsize=_FONT)
    ax.set_ylabel(label, fontsize=_FONT)
    ax.tick_params(labelsize=_FONT - 1)
    ax.legend(fontsize=_FONT - 1, loc="upper left", bbox_to_anchor=(1.01, 1.0))
    return _png(fig)
