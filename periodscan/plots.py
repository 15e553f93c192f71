"""PNG figures of a sweep, drawn with matplotlib's file-only backend."""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import pandas as pd  # noqa: E402

#: Our palette: one hue per deficit length, readable in greyscale print too.
PALETTE = ["#1b6f8a", "#c2571a", "#5b8c2a", "#7a4f9a", "#a33b55", "#3f3f3f"]


def sensitivity_curve(table: pd.DataFrame, path: str | Path, *, title: str = "",
                      removal: bool = False, tolerance: float | None = None,
                      epochs: int | None = None) -> Path:
    """Damage against window start, one line per length, interval as a band.

    Hollow markers are windows with too little clean training after them to tell lasting
    damage from unfinished recovery.
    """
    fig, ax = plt.subplots(figsize=(7.5, 4.2), dpi=120)
    ax.axhline(0.0, color="#888888", lw=0.8)
    if tolerance is not None:
        ax.axhline(tolerance, color="#b03a2e", lw=1.0, ls="--", label=f"tolerance {tolerance:g}")
    xcol = "length" if removal else "start"
    groups = [(None, table)] if removal else list(table.groupby("length"))
    for i, (length, group) in enumerate(groups):
        color = PALETTE[i % len(PALETTE)]
        group = group.sort_values(xcol)
        label = "deficit from epoch 0" if removal else f"{int(length)}-epoch deficit"
        ax.fill_between(group[xcol], group.damage_low, group.damage_high, color=color,
                        alpha=0.18, lw=0)
        ax.plot(group[xcol], group.damage, color=color, lw=1.8, label=label)
        full = group[~group.short_recovery]
        short = group[group.short_recovery]
        ax.plot(full[xcol], full.damage, "o", color=color, ms=5)
        if len(short):
            ax.plot(short[xcol], short.damage, "o", mfc="white", mec=color, ms=5,
                    label="little recovery time after" if i == 0 else None)
    if epochs:
        ax.set_xlim(-0.5, epochs)
    ax.set_xlabel("deficit removed at epoch" if removal else "window start (epoch)")
    level = int(round(100 * table.confidence.iloc[0])) if len(table) else 95
    ax.set_ylabel(f"damage (accuracy points, {level}% interval)")
    base = table.baseline_acc.mean()
    spread = table.baseline_sd.mean()
    seeds = int(table.seeds.max()) if len(table) else 0
    subtitle = f"clean baseline {base:.1f}% (sd {spread:.1f}), {seeds} seeds"
    ax.set_title(f"{title}\n{subtitle}" if title else subtitle, fontsize=10)
    ax.grid(alpha=0.25)
    ax.legend(fontsize=8, frameon=False)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path)
    plt.close(fig)
    return path
