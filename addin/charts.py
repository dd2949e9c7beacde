"""PNG charts for priced towers: exceedance curve with layers, distortions, premium split.

Charts are drawn with matplotlib's non-interactive Agg backend, so they work
headless. Each function writes one PNG and returns its path.
"""
from __future__ import annotations

import math
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
from matplotlib.ticker import FuncFormatter  # noqa: E402

__all__ = ["exceedance_chart", "distortion_chart", "premium_split_chart"]

_LAYER_COLOURS = ["#4c72b0", "#dd8452", "#55a868", "#c44e52", "#8172b3", "#937860", "#da8bc3", "#8c8c8c", "#ccb974", "#64b5cd"]


def _short_amount(x, _pos=None) -> str:
    """Tick label for an amount: 0, 250k, 50m, 1.5bn (no offset or scientific notation)."""
    for scale, suffix in ((1e9, "bn"), (1e6, "m"), (1e3, "k")):
        if abs(x) >= scale:
            return f"{x / scale:,.4g}{suffix}"
    return f"{x:,.4g}"


def _amount_axis(axis) -> None:
    axis.set_major_formatter(FuncFormatter(_short_amount))


def _finish(fig, path) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def exceedance_chart(model, layers, path, *, title: str | None = None) -> Path:
    """Annual exceedance probability of the model's ground-up loss, with each layer's band shaded.

    Aggregate layers are drawn on the annual total; per-occurrence layers are
    drawn at their per-occurrence bounds, on the same loss axis.
    """
    dist = model.annual()
    x, s = dist.values, dist.sf
    keep = s > 0
    tops = [lay.attachment + lay.limit for lay in layers]
    finite_tops = [t for t in tops if math.isfinite(t)]
    x_hi = max(finite_tops + [float(dist.quantile(0.999))]) * 1.1 if finite_tops else float(dist.quantile(0.999))
    fig, ax = plt.subplots(figsize=(7.5, 4.5))
    ax.step(x[keep], s[keep], where="post", color="black", lw=1.4, label="P(annual loss > x)")
    for i, lay in enumerate(layers):
        lo = lay.attachment
        hi = lo + lay.limit if math.isfinite(lay.limit) else x_hi
        ax.axvspan(lo, hi, color=_LAYER_COLOURS[i % len(_LAYER_COLOURS)], alpha=0.22, lw=0,
                   label=f"layer {i + 1}: {lay.describe()}" if len(layers) <= 10 else None)
    ax.set_yscale("log")
    y_lo = max(float(s[keep][s[keep] > 0].min()) if keep.any() else 1e-6, 1e-7)
    ax.set_ylim(max(y_lo, 1e-6), 1.0)
    ax.set_xlim(0, x_hi)
    ax.set_xlabel("loss")
    _amount_axis(ax.xaxis)
    ax.set_ylabel("exceedance probability (log scale)")
    ax.set_title(title or f"Exceedance curve: {model.describe()}", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=7, loc="upper right")
    return _finish(fig, path)


def distortion_chart(distortions: dict, path, *, title: str = "Distortion functions in use") -> Path:
    """g(s) against s for each named distortion, with the diagonal g(s) = s (no risk load)."""
    s = np.linspace(0.0, 1.0, 801)
    fig, ax = plt.subplots(figsize=(5.5, 5.0))
    ax.plot(s, s, color="grey", ls="--", lw=1, label="expected value (g(s) = s)")
    for i, (name, g) in enumerate(distortions.items()):
        gs = np.asarray(g(s), dtype=float)
        gs[0] = 0.0
        label = name if name == g.label() else f"{name}: {g.label()}"
        ax.plot(s, gs, color=_LAYER_COLOURS[i % len(_LAYER_COLOURS)], lw=1.6, label=label)
    ax.set_xlim(0, 1)
    ax.set_ylim(0, 1.02)
    ax.set_xlabel("survival probability s")
    ax.set_ylabel("distorted probability g(s)")
    ax.set_title(title, fontsize=10)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="lower right")
    return _finish(fig, path)


def premium_split_chart(table, path, *, title: str = "Premium and capital by layer") -> Path:
    """Stacked bars per layer: expected loss + margin (= premium), then capital (= collateral - premium).

    ``table`` is a priced tower (engine.price_layers output) for one distortion.
    """
    labels = [f"L{i + 1}" for i in range(len(table))]
    el = np.asarray(table["expected_loss"], dtype=float)
    margin = np.asarray(table["margin"], dtype=float)
    capital = np.asarray(table["capital"], dtype=float)
    capital = np.where(np.isfinite(capital), capital, 0.0)
    fig, ax = plt.subplots(figsize=(7.5, 4.5))
    pos = np.arange(len(labels))
    ax.bar(pos, el, color="#4c72b0", label="expected loss")
    ax.bar(pos, margin, bottom=el, color="#dd8452", label="margin")
    ax.bar(pos, capital, bottom=el + margin, color="#c7c7c7", label="capital")
    ax.set_xticks(pos, labels)
    ax.set_ylabel("amount")
    _amount_axis(ax.yaxis)
    ax.set_title(title, fontsize=10)
    ax.grid(True, axis="y", alpha=0.3)
    ax.legend(fontsize=8)
    for p, prem, roc in zip(pos, el + margin, np.asarray(table["return_on_capital"], dtype=float)):
        if math.isfinite(roc):
            ax.annotate(f"RoC {roc:.1%}", (p, prem), textcoords="offset points", xytext=(0, 3), ha="center", fontsize=7)
    return _finish(fig, path)
