"""Trace and pair plots of a chain (PNG, with matplotlib when it is installed)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import numpy.typing as npt

from winnow.tasks.records import Chain

__all__ = ["plot_trace_pairs"]


def plot_trace_pairs(
    chain: Chain,
    path_prefix: str | Path,
    *,
    chosen: npt.ArrayLike | None = None,
    weights: npt.ArrayLike | None = None,
    max_points: int = 5000,
) -> list[Path]:
    """Write a trace plot and a pair plot of ``chain`` as PNG files.

    Parameters
    ----------
    chain : Chain
    path_prefix : str or Path
        Files are ``<prefix>_trace.png`` and ``<prefix>_pairs.png``.
    chosen : array_like of int, shape (m,), optional
        Row indices of chosen points (e.g. ``Selection.indices``), marked in the pair plot.
    weights : array_like, shape (m,), optional
        Weights of the chosen points; marker area is proportional to the weight.
    max_points : int
        At most this many chain rows (evenly strided) are drawn in the pair plot.

    Returns
    -------
    list of Path
        The files written; empty when matplotlib is not installed.
    """
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return []
    prefix = Path(path_prefix)
    idx = None if chosen is None else np.asarray(chosen, dtype=np.int64).reshape(-1)
    if idx is not None and idx.size and (idx.min() < 0 or idx.max() >= chain.n):
        raise ValueError(f"chosen: row indices must be in 0..{chain.n - 1}")
    w = None
    if weights is not None:
        w = np.asarray(weights, dtype=np.float64).reshape(-1)
        if idx is None or w.shape != idx.shape:
            raise ValueError("weights: need one weight per chosen point")
    prefix.parent.mkdir(parents=True, exist_ok=True)
    d = chain.d
    labels = [f"{n} [{u}]" if u else n for n, u in zip(chain.names, chain.units, strict=True)]
    written: list[Path] = []

    fig, axes = plt.subplots(d, 1, figsize=(8, 1.8 * d + 0.6), squeeze=False, sharex=True)
    for j in range(d):
        ax = axes[j, 0]
        for c in np.unique(chain.chain_index):
            rows = np.flatnonzero(chain.chain_index == c)
            rows = rows[np.argsort(chain.draw_index[rows], kind="stable")]
            ax.plot(chain.draw_index[rows], chain.samples[rows, j], lw=0.5, alpha=0.8)
        ax.set_ylabel(labels[j], fontsize=8)
    axes[-1, 0].set_xlabel("draw (after burn-in)")
    fig.tight_layout()
    path = prefix.with_name(prefix.name + "_trace.png")
    fig.savefig(path, dpi=100)
    plt.close(fig)
    written.append(path)

    step = max(1, chain.n // max_points)
    pts = chain.samples[::step]
    fig, axes = plt.subplots(d, d, figsize=(2.2 * d + 1, 2.2 * d + 1), squeeze=False)
    for i in range(d):
        for j in range(d):
            ax = axes[i, j]
            if j > i:
                ax.axis("off")
                continue
            if i == j:
                ax.hist(pts[:, j], bins=40, color="0.6")
            else:
                ax.scatter(pts[:, j], pts[:, i], s=2, alpha=0.3, color="0.4", lw=0)
                if idx is not None and idx.size:
                    size = 20.0 if w is None else 400.0 * w / max(w.max(), 1e-300) + 4.0
                    ax.scatter(
                        chain.samples[idx, j],
                        chain.samples[idx, i],
                        s=size,
                        color="C3",
                        edgecolor="k",
                        lw=0.5,
                    )
            if i == d - 1:
                ax.set_xlabel(labels[j], fontsize=8)
            if j == 0 and i > 0:
                ax.set_ylabel(labels[i], fontsize=8)
    fig.tight_layout()
    path = prefix.with_name(prefix.name + "_pairs.png")
    fig.savefig(path, dpi=100)
    plt.close(fig)
    written.append(path)
    return written
