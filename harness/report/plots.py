"""Report figures as PNG bytes, drawn with matplotlib's object API on the Agg canvas.

No pyplot: figures are built as `matplotlib.figure.Figure` objects, so nothing touches global
state or needs a display, and nothing is left open. Every function takes plain numbers and
returns the PNG file contents, which the reports write beside the Markdown and inline in HTML.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from typing import Any

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, MaxNLocator, NullFormatter

__all__ = [
    "confusion_png",
    "cost_quality_png",
    "curves_png",
    "efficiency_png",
    "expected_best_png",
    "groups_png",
    "human",
    "reliability_png",
    "spaced_ticks",
]

_INK, _ACCENT, _MUTED, _WARN = "#1d2329", "#2a6f97", "#8aa1b1", "#c8553d"
_SERIES = ("#2a6f97", "#c8553d", "#4d8b31", "#8e5ea2", "#d69a2d", "#3b8686", "#6b6b6b")


def _figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _style(ax: Any) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.grid(True, color="#e3e8ec", linewidth=0.8)
    ax.set_axisbelow(True)


def human(value: float) -> str:
    """Compact tick text: 950, 1.5k, 22.7M, 1.2B."""
    for size, suffix in ((1e9, "B"), (1e6, "M"), (1e3, "k")):
        if abs(value) >= size:
            return f"{value / size:.3g}{suffix}"
    return f"{value:.3g}"


def spaced_ticks(values: Sequence[float], min_ratio: float = 1.15) -> list[float]:
    """Sorted distinct positive tick values, dropping any within `min_ratio` of the previous kept one (their
    labels would overlap on a log axis: 60.7 and 65 printed as "60.765")."""
    kept: list[float] = []
    for v in sorted(set(v for v in values if v > 0)):
        if not kept or v / kept[-1] >= min_ratio:
            kept.append(v)
    return kept


def _log_x(ax: Any, ticks: Sequence[float] | None = None) -> None:
    """Log x axis with plain tick text (no 10^k notation, no crowded minor labels)."""
    ax.set_xscale("log")
    if ticks is not None:
        ax.set_xticks(spaced_ticks(ticks))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _pos: human(v)))
    ax.xaxis.set_minor_formatter(NullFormatter())


def _png(fig: Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})  # no version stamp: same input, same bytes
    return buf.getvalue()


def confusion_png(matrix: Sequence[Sequence[int]], labels: Sequence[str]) -> bytes:
    """Heat map of a confusion matrix (rows gold, columns predicted); colour is the row share, text the count."""
    counts = np.asarray(matrix, dtype=float)  # (k, k)
    k = counts.shape[0]
    share = counts / np.maximum(counts.sum(axis=1, keepdims=True), 1.0)  # recall of each gold row
    side = min(9.0, 2.2 + 0.7 * k)
    fig = _figure(side + 1.2, side)
    ax = fig.add_subplot()
    im = ax.imshow(share, cmap="YlGnBu", vmin=0.0, vmax=1.0)
    for i in range(k):
        for j in range(k):
            ax.text(j, i, f"{int(counts[i, j])}", ha="center", va="center", fontsize=10 if k <= 8 else 7,
                    color="white" if share[i, j] > 0.55 else _INK)
    ax.set_xticks(range(k), labels, rotation=30 if k > 3 else 0, ha="right" if k > 3 else "center")
    ax.set_yticks(range(k), labels)
    ax.set_xlabel("predicted label")
    ax.set_ylabel("gold label")
    ax.set_title("Confusion matrix (counts; colour = share of the gold row)", fontsize=10)
    fig.colorbar(im, ax=ax, shrink=0.8, label="share of gold row")
    return _png(fig)


def reliability_png(rows: Sequence[dict[str, Any]]) -> bytes:
    """Reliability diagram from (lower, upper, count, confidence, accuracy) bins, with the bin counts below."""
    fig = _figure(6.0, 5.6)
    top, bottom = fig.subplots(2, 1, sharex=True, height_ratios=[3, 1])
    filled = [r for r in rows if r.get("count")]
    lower = np.array([r["lower"] for r in rows], dtype=float)
    width = np.array([r["upper"] - r["lower"] for r in rows], dtype=float)
    centre = np.array([(r["lower"] + r["upper"]) / 2 for r in filled], dtype=float)
    acc = np.array([r["accuracy"] for r in filled], dtype=float)
    conf = np.array([r.get("mean_confidence", r.get("confidence")) for r in filled], dtype=float)
    bar_w = np.array([r["upper"] - r["lower"] for r in filled], dtype=float)
    top.bar(centre, acc, width=bar_w * 0.9, color=_ACCENT, alpha=0.85, label="accuracy in bin")
    top.plot([0, 1], [0, 1], color=_MUTED, linestyle="--", linewidth=1, label="perfectly calibrated")
    top.plot(conf, acc, "o", color=_WARN, markersize=4, label="mean confidence vs accuracy")
    top.set_ylim(0, 1.02)
    top.set_ylabel("accuracy")
    top.set_title("Reliability: top-class confidence against accuracy", fontsize=10)
    top.legend(fontsize=8, loc="upper left", frameon=False)
    bottom.bar(lower + width / 2, [r.get("count", 0) for r in rows], width=width * 0.9, color=_MUTED)
    bottom.set_ylabel("rows")
    bottom.set_xlabel("top-class confidence")
    bottom.set_xlim(0, 1)
    for ax in (top, bottom):
        _style(ax)
    return _png(fig)


def curves_png(
    train: dict[str, list[float]], dev_steps: Sequence[float], dev_values: Sequence[float], dev_name: str
) -> bytes:
    """Three panels over optimiser steps: training loss, the dev primary metric, the learning rate.

    `train` holds "step" and "loss" lists, and "lr_step" and "lr" lists for the learning rate.
    """
    fig = _figure(11.0, 3.4)
    loss_ax, dev_ax, lr_ax = fig.subplots(1, 3)
    loss_ax.plot(train["step"], train["loss"], color=_ACCENT, linewidth=1.4)
    loss_ax.set_title("training loss", fontsize=10)
    if len(dev_steps):
        dev_ax.plot(dev_steps, dev_values, "o-", color=_WARN, linewidth=1.4, markersize=4)
    else:
        dev_ax.text(0.5, 0.5, "no dev evaluations logged", ha="center", va="center", transform=dev_ax.transAxes)
    dev_ax.set_title(f"dev {dev_name}", fontsize=10)
    lr_ax.plot(train["lr_step"], train["lr"], color="#4d8b31", linewidth=1.4)
    lr_ax.set_title("learning rate", fontsize=10)
    lr_ax.ticklabel_format(axis="y", style="sci", scilimits=(-2, 2))
    for ax in (loss_ax, dev_ax, lr_ax):
        ax.set_xlabel("optimiser step")
        _style(ax)
    return _png(fig)


def groups_png(
    names: Sequence[str],
    means: Sequence[float],
    intervals: Sequence[Sequence[float | None]],
    seed_values: Sequence[Sequence[float]],
    metric: str,
) -> bytes:
    """One row per group: the seed mean, its pooled test-set interval and every seed as a dot."""
    n = len(names)
    fig = _figure(10.0, 1.4 + 0.55 * n)
    ax = fig.add_subplot()
    y = np.arange(n)[::-1]  # first group on top
    for yi, mean, (lo, hi), seeds in zip(y, means, intervals, seed_values, strict=True):
        if lo is not None and hi is not None:
            ax.plot([lo, hi], [yi, yi], color=_MUTED, linewidth=5, solid_capstyle="butt", alpha=0.7)
        ax.plot(seeds, [yi] * len(seeds), "o", color=_INK, markersize=3.5, alpha=0.7)
        ax.plot([mean], [yi], "D", color=_WARN, markersize=7)
    ax.set_yticks(y, names)
    ax.set_ylim(-0.6, n - 0.4)
    ax.set_xlabel(metric)
    ax.set_title(f"{metric} per group", fontsize=10)
    keys = [Line2D([], [], marker="D", color=_WARN, linestyle="", label="seed mean"),
            Line2D([], [], marker="o", color=_INK, markersize=3.5, linestyle="", label="one seed"),
            Line2D([], [], color=_MUTED, linewidth=5, label="pooled 95% interval")]
    fig.legend(handles=keys, loc="outside lower center", ncols=3, fontsize=8, frameon=False)
    _style(ax)
    return _png(fig)


def cost_quality_png(
    names: Sequence[str],
    means: Sequence[float],
    sds: Sequence[float],
    seconds: Sequence[float | None],
    params: Sequence[float | None],
    metric: str,
) -> bytes:
    """Quality against training seconds and trainable parameters (log x); zero-cost groups as dashed lines."""
    fig = _figure(11.0, 4.2)
    axes = fig.subplots(1, 2, sharey=True)
    for ax, cost, label in ((axes[0], seconds, "training seconds (log)"),
                            (axes[1], params, "trainable parameters (log)")):
        for i, (name, mean, sd, c) in enumerate(zip(names, means, sds, cost, strict=True)):
            colour = _SERIES[i % len(_SERIES)]
            if c is None:
                continue
            if c <= 0:  # a log axis has no zero: a method that trains nothing is a reference line
                ax.axhline(mean, color=colour, linestyle="--", linewidth=1.2, label=f"{name} (no training)")
            else:
                ax.errorbar([c], [mean], yerr=[sd], fmt="o", color=colour, capsize=3, markersize=6, label=name)
        positive = [c for c in cost if c is not None and c > 0]
        if positive:  # a log axis needs at least one positive value
            _log_x(ax, positive)
        ax.set_xlabel(label)
        _style(ax)
    axes[0].set_ylabel(f"{metric} (mean ± sd over seeds)")
    handles, labels = axes[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="outside lower center", ncols=min(2, max(1, len(labels))), fontsize=8,
               frameon=False)
    fig.suptitle(f"{metric} against training cost", fontsize=10)
    return _png(fig)


def efficiency_png(series: Sequence[dict[str, Any]], baselines: Sequence[dict[str, Any]], metric: str) -> bytes:
    """Metric against training examples: one line per method (seed min-max band), zero-training baselines flat.

    `series` items: {"name", "x", "mean", "min", "max"}; `baselines` items: {"name", "mean"}.
    """
    fig = _figure(8.0, 4.8)
    ax = fig.add_subplot()
    xs = [x for s in series for x in s["x"]]
    for i, s in enumerate(series):
        colour = _SERIES[i % len(_SERIES)]
        ax.fill_between(s["x"], s["min"], s["max"], color=colour, alpha=0.18, linewidth=0)
        ax.plot(s["x"], s["mean"], "o-", color=colour, linewidth=1.6, markersize=5, label=s["name"])
    for j, b in enumerate(baselines):
        ax.axhline(b["mean"], color=_SERIES[(len(series) + j) % len(_SERIES)], linestyle="--", linewidth=1.2,
                   label=f"{b['name']} (no training)")
    if xs and max(xs) / max(min(xs), 1) >= 8:
        _log_x(ax, xs)
    elif xs:
        ax.set_xticks(sorted(set(xs)))
    ax.set_xlabel("training examples")
    ax.set_ylabel(f"{metric} (seed mean; band = seed min to max)")
    ax.set_title(f"Data efficiency: {metric} as the training set grows", fontsize=10)
    fig.legend(loc="outside lower center", ncols=1, fontsize=8, frameon=False)
    _style(ax)
    return _png(fig)


def expected_best_png(curves: Sequence[tuple[str, Sequence[float], Sequence[float]]], metric: str) -> bytes | None:
    """Expected best dev score against the number of tuning trials: one line per arm, a ±sd band around it.

    `curves` items: (label, means, sds), the values for n = 1, 2, ...; an arm with an empty curve (no
    finished trial) is left out, and with no points at all there is no figure (None).
    """
    drawn = [(label, means, sds) for label, means, sds in curves if len(means)]
    if not drawn:
        return None
    fig = _figure(8.0, 4.8)
    ax = fig.add_subplot()
    for i, (label, means, sds) in enumerate(drawn):
        colour = _SERIES[i % len(_SERIES)]
        n = np.arange(1, len(means) + 1)
        mean, sd = np.asarray(means, dtype=float), np.asarray(sds, dtype=float)
        ax.fill_between(n, mean - sd, mean + sd, color=colour, alpha=0.18, linewidth=0)
        ax.plot(n, mean, "o-", color=colour, linewidth=1.6, markersize=4, label=label)
    # trial counts are whole numbers; MaxNLocator keeps long sweeps from crowding the axis
    ax.xaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_xlabel("tuning trials (n)")
    ax.set_ylabel(f"expected best dev {metric} (band = ± sd)")
    ax.set_title(f"Expected best dev {metric} by number of tuning trials", fontsize=10)
    fig.legend(loc="outside lower center", ncols=1, fontsize=8, frameon=False)
    _style(ax)
    return _png(fig)
