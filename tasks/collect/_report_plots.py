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

from ._weighted import weighted_quantile

__all__ = [
    "cdf_curve",
    "costly_cheap_png",
    "forecast_png",
    "format_number",
    "matplotlib_available",
    "observations_png",
    "pair_plot_png",
    "qoi_plot_png",
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
                label=f"chosen point, weight {format_number(frac * wmax)}",
            )
        leg.legend(loc="center", fontsize=_FONT, frameon=False)
    return _png(fig)


def cdf_curve(
    values: np.ndarray, weights: np.ndarray, probs: Sequence[float] = ()
) -> tuple[np.ndarray, np.ndarray]:
    """The weighted CDF of the runs as the report draws it: ``(x, p)`` with ``x`` increasing.

    It is the graph of the report's own quantile function,
    :func:`winnow.tasks.collect.weighted_quantile` (weighted Hazen: linear between the
    midpoints of the weighted empirical CDF's steps, flat beyond the first and last), evaluated
    at a fine grid of probabilities, at every step midpoint and at ``probs``. So a quantile
    the report states, drawn at ``(quantile, q)``, lies on the drawn curve exactly.
    """
    y = np.asarray(values, dtype=float).reshape(-1)
    w = np.asarray(weights, dtype=float).reshape(-1)
    keep = w > 0
    ws = w[keep] / w[keep].sum()
    order = np.argsort(y[keep], kind="stable")
    mids = np.cumsum(ws[order]) - 0.5 * ws[order]
    grid = np.unique(
        np.clip(np.concatenate([np.linspace(0.0, 1.0, 2001), mids, np.asarray(probs, float)]), 0, 1)
    )
    return np.asarray(weighted_quantile(y, w, grid)), grid


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


def qoi_figure(
    values: np.ndarray,
    weights: np.ndarray,
    *,
    name: str,
    units: str,
    mean: np.ndarray,
    quantiles: Sequence[float] | dict[float, Any],
    thresholds: Sequence[float] = (),
    estimate: np.ndarray | None = None,
    interval: tuple[np.ndarray, np.ndarray] | None = None,
    level: float = 0.95,
    rule: str = "",
    axis: dict[str, Any] | None = None,
) -> Any | None:
    """The figure of :func:`qoi_plot_png` (a matplotlib ``Figure``; None without matplotlib)."""
    make = _figure_class()
    if make is None or len(values) == 0:
        return None
    values = np.asarray(values, dtype=float)
    weights = np.asarray(weights, dtype=float)
    weights = weights / weights.sum()
    label = _label(name, units)
    probs = sorted(float(q) for q in quantiles)
    lvl = _pct_label(level)
    est_label = f"estimate ({rule})" if rule else "estimate"
    int_label = f"{lvl} interval for the posterior expectation"
    if values.ndim == 1:
        fig = make((10.0, 4.4))
        ax_h, ax_c = fig.subplots(1, 2)
        bins = int(np.clip(np.sqrt(values.size) * 2, 5, 30))
        ax_h.hist(
            values,
            bins=bins,
            weights=weights,
            color="#92c5de",
            edgecolor="#2166ac",
            label="runs (bar height: total weight)",
        )
        ax_h.set_ylabel("weight (probability)", fontsize=_FONT)
        ax_h.set_title("Weighted histogram of the runs", fontsize=_FONT + 1)
        x, p = cdf_curve(values, weights, probs)
        ax_c.plot(x, p, color="#2166ac", lw=1.6, label="weighted CDF of the runs (Hazen)")
        keep = weights > 0
        ax_c.plot(
            values[keep],
            np.interp(values[keep], x, p),
            "|",
            color="#2166ac",
            ms=8,
            label="_runs",
        )
        ax_c.set_ylabel("cumulative weight", fontsize=_FONT)
        ax_c.set_ylim(0, 1.02)
        ax_c.set_title("Weighted cumulative distribution", fontsize=_FONT + 1)
        if probs:
            qv = np.atleast_1d(weighted_quantile(values, weights, probs))
            ax_c.plot(qv, probs, "o", color="#4d4d4d", ms=5, label="quantiles (on the curve)")
            for q, v in zip(probs, qv, strict=True):
                ax_c.annotate(
                    f"{q:.0%}: {format_number(v)}",
                    (float(v), q),
                    textcoords="offset points",
                    xytext=(8, -4),
                    fontsize=_FONT - 1,
                )
        for ax in (ax_h, ax_c):
            if interval is not None and np.all(np.isfinite(np.asarray(interval, dtype=float))):
                ax.axvspan(
                    float(interval[0]),
                    float(interval[1]),
                    color="#b2182b",
                    alpha=0.15,
                    lw=0,
                    label=int_label,
                )
            ax.axvline(float(mean), color="#b2182b", lw=1.6, label="weighted mean of the runs")
            if (
                estimate is not None
                and np.isfinite(estimate)
                and not np.isclose(float(estimate), float(mean), rtol=1e-9, atol=0.0)
            ):
                ax.axvline(float(estimate), color="#1b7837", lw=1.4, ls="--", label=est_label)
            for t in _near(thresholds, values):
                ax.axvline(
                    float(t),
                    color="#e08214",
                    lw=1.2,
                    ls=":",
                    label=f"threshold {format_number(t)}",
                )
            ax.set_xlabel(label, fontsize=_FONT)
            ax.tick_params(labelsize=_FONT - 1)
        _legend_below(fig, (ax_h, ax_c))
        return fig
    ax_info = axis or {}
    x = np.asarray(ax_info.get("values", np.arange(values.shape[1])), dtype=float)
    fig = make((10.0, 4.2))
    ax = fig.subplots()
    for row in values:
        ax.plot(x, row, color="0.7", lw=0.7, zorder=1)
    ax.plot([], [], color="0.7", lw=0.7, label="individual runs")
    if len(probs) >= 2:
        band = np.asarray(weighted_quantile(values, weights, [probs[0], probs[-1]]))
        ax.fill_between(
            x,
            band[0],
            band[1],
            color="#92c5de",
            alpha=0.6,
            zorder=2,
            label=f"weighted {probs[0]:.0%} to {probs[-1]:.0%} quantiles of the runs",
        )
    ax.plot(x, mean, color="#b2182b", lw=2, zorder=3, label="weighted mean of the runs")
    if interval is not None:
        lo, hi = (np.asarray(v, dtype=float) for v in interval)
        if np.any(np.isfinite(lo)):
            ax.fill_between(x, lo, hi, color="#1b7837", alpha=0.25, zorder=4, lw=0, label=int_label)
    if estimate is not None:
        ax.plot(x, estimate, color="#1b7837", lw=1.6, ls="--", zorder=5, label=est_label)
    for t in _near(thresholds, values):
        ax.axhline(float(t), color="#e08214", lw=1.2, ls=":", label=f"threshold {format_number(t)}")
    ax.set_xlabel(_label(ax_info.get("name", "index"), ax_info.get("units", "")), fontsize=_FONT)
    ax.set_ylabel(label, fontsize=_FONT)
    ax.tick_params(labelsize=_FONT - 1)
    _legend_below(fig, (ax,))
    return fig


def qoi_plot_png(values: np.ndarray, weights: np.ndarray, **kwargs: Any) -> bytes | None:
    """Picture of one QoI's weighted values.

    Scalar QoI: weighted histogram of the run values next to their weighted cumulative
    distribution (:func:`cdf_curve`, the same definition as the stated quantiles, which are
    marked on it), with the weighted mean, the headline estimate, its interval for the
    posterior expectation and the thresholds. Vector QoI: the weighted mean and quantile band
    along the axis over the runs, with the headline estimate and its interval. The legend is
    outside the axes.

    Parameters
    ----------
    values : ndarray, shape (m,) or (m, k)
        Usable run values only.
    weights : ndarray, shape (m,)
        Their (re-solved) weights.
    **kwargs
        As :func:`qoi_figure`.
    """
    fig = qoi_figure(values, weights, **kwargs)
    return None if fig is None else _png(fig)


def forecast_png(
    runs_now: int,
    sd_now: float,
    extra: dict[int, float],
    *,
    name: str,
    units: str,
    where: str = "",
) -> bytes | None:
    """Stated thinning error (sd) against the number of runs: now and with ``k`` more.

    Parameters
    ----------
    runs_now : int
        Runs the estimate used.
    sd_now : float
        Its stated thinning error.
    extra : dict of int to float
        ``{k: stated sd with k more runs}`` (the error model's forecast).
    """
    make = _figure_class()
    ks = sorted(int(k) for k, v in extra.items() if np.isfinite(v))
    if make is None or not ks or not np.isfinite(sd_now):
        return None
    fig = make((7.0, 3.6))
    ax = fig.subplots()
    xs = [runs_now + k for k in ks]
    ys = [float(extra[k]) for k in ks]
    ax.plot(xs, ys, "o-", color="#2166ac", label="forecast with k more runs")
    ax.plot([runs_now], [sd_now], "s", color="#b2182b", ms=8, label="now")
    for i, (x, y, k) in enumerate(zip(xs, ys, ks, strict=True)):
        ax.annotate(
            f"+{k}: {format_number(y)}",
            (x, y),
            textcoords="offset points",
            xytext=(4, 7 if i % 2 == 0 else -13),  # alternate above/below: no overlap
            fontsize=_FONT - 1,
        )
    ax.annotate(
        f"now: {format_number(sd_now)}",
        (runs_now, sd_now),
        textcoords="offset points",
        xytext=(6, -12),
        fontsize=_FONT - 1,
    )
    allv = np.asarray(ys + [sd_now])
    if np.all(allv > 0) and allv.max() / allv.min() > 10:
        ax.set_yscale("log")
    ax.set_xlabel("runs (budget)", fontsize=_FONT)
    ax.set_ylabel(_label("stated thinning error, sd", units), fontsize=_FONT)
    title = f"{name}: stated thinning error against the budget"
    ax.set_title(title + (f" ({where})" if where else ""), fontsize=_FONT + 1)
    ax.tick_params(labelsize=_FONT - 1)
    _legend_below(fig, (ax,), ncols=2)
    return _png(fig)


def costly_cheap_figure(
    cheap: np.ndarray,
    costly: np.ndarray,
    weights: np.ndarray,
    *,
    name: str,
    units: str,
    correlation: float | None = None,
) -> Any | None:
    """The figure of :func:`costly_cheap_png`."""
    make = _figure_class()
    c = np.asarray(cheap, dtype=float).reshape(-1)
    y = np.asarray(costly, dtype=float).reshape(-1)
    w = np.asarray(weights, dtype=float).reshape(-1)
    if make is None or c.size == 0 or c.shape != y.shape or w.shape != c.shape:
        return None
    fig = make((5.6, 5.0))
    ax = fig.subplots()
    wmax = float(w.max()) if w.max() > 0 else 1.0
    ax.scatter(
        c,
        y,
        s=12.0 + 150.0 * w / wmax,
        c="#b2182b",
        alpha=0.85,
        edgecolors="white",
        linewidths=0.6,
        label="chosen points (area ~ weight)",
    )
    lo = float(min(c.min(), y.min()))
    hi = float(max(c.max(), y.max()))
    pad = 0.05 * (hi - lo) if hi > lo else max(abs(hi), 1.0) * 0.05
    line = np.array([lo - pad, hi + pad])
    ax.plot(line, line, color="0.5", lw=1.0, ls=":", label="costly = cheap")
    shift = float(np.sum(w * (y - c)) / np.sum(w))
    ax.plot(
        line,
        line + shift,
        color="#1b7837",
        lw=1.2,
        ls="--",
        label=f"costly = cheap + weighted mean difference ({format_number(shift)})",
    )
    ax.set_xlabel(_label(f"cheap model's {name}", units), fontsize=_FONT)
    ax.set_ylabel(_label(f"costly run's {name}", units), fontsize=_FONT)
    r = "n/a" if correlation is None else format_number(correlation)
    ax.set_title(
        f"Costly against cheap at the chosen points\nweighted correlation {r}", fontsize=_FONT + 1
    )
    ax.tick_params(labelsize=_FONT - 1)
    _legend_below(fig, (ax,), ncols=1)
    return fig


def costly_cheap_png(
    cheap: np.ndarray, costly: np.ndarray, weights: np.ndarray, **kwargs: Any
) -> bytes | None:
    """Scatter of the costly values against the cheap model's at the chosen points.

    The basis of the reported costly/cheap correlation and of the multi-fidelity forms:
    marker area grows with weight; the dotted line is ``costly = cheap``, the dashed line is
    shifted by the weighted mean difference (the discrepancy form's correction).
    """
    fig = costly_cheap_figure(cheap, costly, weights, **kwargs)
    return None if fig is None else _png(fig)


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
