"""Pictures of one QoI in the collect report, as PNG bytes: its weighted distribution (or,
for a vector QoI, every run against the axis), the costly runs against the cheap model, and
what more runs would buy. matplotlib is optional, as in :mod:`._report_plots`.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np

from ._report_plots import (
    _FONT,
    _figure_class,
    _label,
    _legend_below,
    _near,
    _pct_label,
    _png,
    format_number,
)
from ._weighted import weighted_quantile

__all__ = [
    "cdf_curve",
    "costly_cheap_figure",
    "costly_cheap_png",
    "forecast_png",
    "qoi_figure",
    "qoi_plot_png",
]


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
        return _scalar_figure(
            make,
            values,
            weights,
            label=label,
            probs=probs,
            mean=mean,
            thresholds=thresholds,
            estimate=estimate,
            interval=interval,
            int_label=int_label,
            est_label=est_label,
        )
    return _vector_figure(
        make,
        values,
        weights,
        label=label,
        probs=probs,
        mean=mean,
        thresholds=thresholds,
        estimate=estimate,
        interval=interval,
        int_label=int_label,
        est_label=est_label,
        axis=axis or {},
    )


def _scalar_figure(
    make: Any,
    values: np.ndarray,
    weights: np.ndarray,
    *,
    label: str,
    probs: list[float],
    mean: np.ndarray,
    thresholds: Sequence[float],
    estimate: np.ndarray | None,
    interval: tuple[np.ndarray, np.ndarray] | None,
    int_label: str,
    est_label: str,
) -> Any:
    """A scalar QoI: the weighted histogram of the runs and their weighted CDF."""
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


def _vector_figure(
    make: Any,
    values: np.ndarray,
    weights: np.ndarray,
    *,
    label: str,
    probs: list[float],
    mean: np.ndarray,
    thresholds: Sequence[float],
    estimate: np.ndarray | None,
    interval: tuple[np.ndarray, np.ndarray] | None,
    int_label: str,
    est_label: str,
    axis: dict[str, Any],
) -> Any:
    """A vector QoI: every run against the axis, the weighted band, mean and estimate."""
    ax_info = axis
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
