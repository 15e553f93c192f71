"""PNG figures of a sweep: sensitivity curves, a start x length heatmap, learning curves.

Every figure is drawn with matplotlib's file-only backend, saved at a fixed size (so the report
looks the same on every machine) and written atomically: a temporary file in the same folder,
then a rename. Epoch axes count *epochs of training completed*: a window starting at s begins
after s clean epochs, and a reading taken after the e-th epoch (0-based) sits at e + 1. How a
design's windows are placed and labelled comes from its
:class:`~periodscan.designs.layout.Layout`.
"""

from __future__ import annotations

import os
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap, TwoSlopeNorm  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from periodscan.designs.layout import WINDOW, Layout  # noqa: E402

#: Our palette: one hue per deficit length, readable in greyscale print too.
PALETTE = ["#1b6f8a", "#c2571a", "#5b8c2a", "#7a4f9a", "#a33b55", "#3f3f3f"]
VERDICT_COLORS = {"critical": "#b8322a", "safe": "#2e7d4f", "undetermined": "#8c8c8c"}
TOLERANCE_COLOR = "#b8322a"
BASELINE_COLOR = "#333333"
WINDOW_SHADE = "#e9b949"
#: Diverging map of our own: teal (the run beat its baseline) - paper white - rust (damage).
DAMAGE_CMAP = LinearSegmentedColormap.from_list(
    "periodscan_damage", ["#1b6f8a", "#9cc7d3", "#f7f5f0", "#e8a06f", "#9c2f12"])


def save_figure(fig, path: str | Path) -> Path:
    """Save next to ``path`` under a temporary name, then rename: never a half-written PNG."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp.png")
    try:
        fig.savefig(tmp)
        os.replace(tmp, path)
    finally:
        plt.close(fig)
        tmp.unlink(missing_ok=True)
    return path


def axis_values(table: pd.DataFrame, layout: Layout) -> pd.Series:
    """Where each window of ``table`` sits on the curve's x axis (start, or end of removal)."""
    return pd.Series([layout.x_value(s, n) for s, n in zip(table.start, table.length,
                                                            strict=True)],
                     index=table.index, dtype=float)


def _verdict_markers(ax, x, group: pd.DataFrame, color: str) -> None:
    """Dots coloured by verdict when known; hollow where recovery time was short."""
    verdicts = (group.verdict.fillna("none") if "verdict" in group
                else pd.Series("none", index=group.index))
    for (verdict, short), part in group.groupby([verdicts, group.short_recovery]):
        face = VERDICT_COLORS.get(verdict, color)
        ax.plot(x.loc[part.index], part.damage, "o", ms=6, mec=face,
                mfc="white" if short else face, mew=1.4, zorder=3)


def _clip_outliers(ax, x, group: pd.DataFrame, tolerance: float | None) -> None:
    """Keep the y range on windows with enough recovery time; a short-recovery window far off
    that range (damage of a model still on the deficit) is drawn at the edge with its value."""
    regular = group[~group.short_recovery]
    if regular.empty or len(regular) == len(group):
        return
    columns = [c for c in ("damage_low", "damage_high", "damage", "holm_low", "holm_high")
               if c in regular]
    values = pd.concat([regular[c] for c in columns]).dropna()
    values = pd.concat([values, pd.Series([0.0] + ([tolerance] if tolerance is not None
                                                   else []))])
    low, high = float(values.min()), float(values.max())
    pad = 0.12 * max(high - low, 1e-6)
    low, high = low - pad, high + pad
    outside = group[(group.damage > high + 2 * pad) | (group.damage < low - 2 * pad)]
    if outside.empty:
        return
    ax.set_ylim(low, high)
    for idx, row in outside.iterrows():
        top = row.damage > high
        edge = high if top else low
        shade = VERDICT_COLORS.get(row.get("verdict"), "#555555")
        ax.plot([x.loc[idx]], [edge], "^" if top else "v", color=shade, ms=7, zorder=4,
                clip_on=False)
        ax.annotate(f"{row.damage:+.1f} (off scale)", (x.loc[idx], edge),
                    textcoords="offset points", xytext=(-8, -3 if top else 3), ha="right",
                    va="top" if top else "bottom", fontsize=7.5, color="#555555")


def _legend_handles(table: pd.DataFrame, tolerance: float | None) -> list:
    handles = []
    if tolerance is not None:
        handles.append(Line2D([], [], color=TOLERANCE_COLOR, ls="--", lw=1.1,
                              label=f"tolerance {tolerance:g} points"))
    if "holm_low" in table:
        handles.append(Line2D([], [], color="#444444", lw=0.9,
                              label="Holm-adjusted bounds (verdicts)"))
    if "verdict" in table:
        for verdict in ("critical", "safe", "undetermined"):
            if (table.verdict == verdict).any():
                handles.append(Line2D([], [], ls="", marker="o", color=VERDICT_COLORS[verdict],
                                      label=verdict))
    if table.short_recovery.any():
        handles.append(Line2D([], [], ls="", marker="o", mfc="white", mec="#555555",
                              label="little clean training after"))
    return handles


def curve_groups(table: pd.DataFrame, layout: Layout) -> list[tuple[str, pd.DataFrame]]:
    """(panel title, rows) per panel: one per deficit length, or one in all."""
    if not layout.per_length:
        length = int(table.length.iloc[0]) if len(table) else 0
        return [(layout.line_label(length), table)]
    return [(layout.line_label(n), group) for n, group in table.groupby("length")]


def _damage_panel(ax, group: pd.DataFrame, x: pd.Series, color: str,
                  tolerance: float | None) -> None:
    """One line of mean damage with its interval band, verdict dots and Holm bars."""
    order = x.sort_values().index
    group, x = group.loc[order], x.loc[order]
    ax.axhline(0.0, color="#999999", lw=0.8)
    if tolerance is not None:
        ax.axhline(tolerance, color=TOLERANCE_COLOR, lw=1.1, ls="--")
    ax.fill_between(x, group.damage_low, group.damage_high, color=color, alpha=0.18, lw=0)
    ax.plot(x, group.damage, color=color, lw=1.8)
    if "holm_low" in group:  # the bounds the verdicts rest on, as thin bars
        ax.vlines(x, group.holm_low, group.holm_high, color="#444444", lw=0.9, alpha=0.7)
    _verdict_markers(ax, x, group, color)
    _clip_outliers(ax, x, group, tolerance)
    ax.grid(alpha=0.25)


def _fisher_panel(ax, fisher: pd.DataFrame) -> None:
    sd = fisher.sd.fillna(0)
    ax.fill_between(fisher.epoch, fisher["mean"] - sd, fisher["mean"] + sd,
                    color=BASELINE_COLOR, alpha=0.12, lw=0)
    ax.plot(fisher.epoch, fisher["mean"], color=BASELINE_COLOR, lw=1.6)
    ax.set_ylabel("Fisher trace\n(clean baseline)", fontsize=8.5)
    ax.set_title(f"Fisher information trace, mean \u00b1 sd over {int(fisher.seeds.max())} "
                 "seeds", fontsize=9, loc="left")
    ax.grid(alpha=0.25)


def _panels(n_curves: int, has_fisher: bool):
    heights = [3.0] * n_curves + ([2.0] if has_fisher else [])
    fig, axes = plt.subplots(len(heights), 1, figsize=(8.0, 1.3 + sum(heights)), dpi=120,
                             sharex=True, squeeze=False, layout="constrained",
                             gridspec_kw={"height_ratios": heights})
    return fig, axes[:, 0]


def sensitivity_curve(table: pd.DataFrame, path: str | Path, *, title: str = "",
                      layout: Layout = WINDOW, tolerance: float | None = None,
                      epochs: int | None = None, fisher: pd.DataFrame | None = None) -> Path:
    """Damage against the layout's x axis (window start, say), a panel per line, the interval
    as a band.

    Dots are coloured by verdict when the table has one (critical / safe / undetermined) and
    hollow where the window leaves little clean training after it. With ``fisher`` (from
    :func:`periodscan.analysis.readings.fisher_by_epoch`) a bottom panel shows the Fisher trace
    on the same epoch axis.
    """
    if "variant" in table:  # a sweep of deficit variants: their curves overlaid
        from periodscan.views.variant_figures import variant_curves

        return variant_curves(table, path, title=title, layout=layout, tolerance=tolerance,
                              epochs=epochs)
    groups = curve_groups(table, layout)
    has_fisher = fisher is not None and len(fisher) > 0
    fig, axes = _panels(len(groups), has_fisher)
    level = int(round(100 * table.confidence.iloc[0])) if len(table) else 95
    for i, (label, group) in enumerate(groups):
        color = PALETTE[i % len(PALETTE)]
        _damage_panel(axes[i], group, axis_values(group, layout), color, tolerance)
        axes[i].set_title(label, fontsize=9, loc="left", color=color, fontweight="bold")
        axes[i].set_ylabel(f"damage, points\n({level}% interval)", fontsize=8.5)
    handles = _legend_handles(table, tolerance)
    fig.legend(handles=handles, fontsize=7.5, frameon=False, loc="outside lower center",
               ncol=max(min(len(handles), 4), 1))
    if has_fisher:
        _fisher_panel(axes[-1], fisher)
    if epochs:
        axes[-1].set_xlim(-0.5, epochs + 0.5)
    axes[-1].set_xlabel(layout.axis_title + ("; Fisher panel: epochs of training completed"
                                             if has_fisher else ""))
    subtitle = _baseline_line(table)
    fig.suptitle(f"{title}\n{subtitle}" if title else subtitle, fontsize=10)
    return save_figure(fig, path)


def _baseline_line(table: pd.DataFrame) -> str:
    if table.empty or table.baseline_acc.isna().all():
        return "no finished windows yet"
    seeds = int(table.seeds.max())
    return (f"clean baseline {table.baseline_acc.mean():.1f}% "
            f"(sd {table.baseline_sd.mean():.1f}), up to {seeds} seeds per window")


def _heatmap_cells(ax, grid: pd.DataFrame, values: np.ndarray, verdicts, span: float) -> None:
    letters = {"critical": "C", "safe": "S", "undetermined": "?"}
    for r, length in enumerate(grid.index):
        for c, start in enumerate(grid.columns):
            value = values[r, c]
            if not np.isfinite(value):
                continue
            mark = letters.get(verdicts.loc[length, start], "") if verdicts is not None else ""
            dark = abs(value) > 0.6 * span
            ax.text(c, r, f"{value:+.1f}\n{mark}", ha="center", va="center", fontsize=7,
                    color="white" if dark else "#222222")


def heatmap(table: pd.DataFrame, path: str | Path, *, title: str = "") -> Path:
    """Mean damage over window start x length; each cell names its verdict letter."""
    grid = table.pivot_table(index="length", columns="start", values="damage")
    verdicts = (table.pivot(index="length", columns="start", values="verdict")
                if "verdict" in table else None)
    values = grid.to_numpy(dtype=float)
    finite = values[np.isfinite(values)]
    span = max(float(np.abs(finite).max()) if finite.size else 1.0, 1e-6)
    width = min(max(2.0 + 0.55 * grid.shape[1], 5.0), 11.0)
    fig, ax = plt.subplots(figsize=(width, 1.6 + 0.5 * grid.shape[0]), dpi=120)
    image = ax.imshow(np.ma.masked_invalid(values), cmap=DAMAGE_CMAP, aspect="auto",
                      norm=TwoSlopeNorm(0.0, -span, span), origin="lower")
    _heatmap_cells(ax, grid, values, verdicts, span)
    ax.set_xticks(range(grid.shape[1]), [str(s) for s in grid.columns])
    ax.set_yticks(range(grid.shape[0]), [str(n) for n in grid.index])
    ax.set_xlabel("window start (epoch)")
    ax.set_ylabel("deficit length (epochs)")
    bar = fig.colorbar(image, ax=ax, pad=0.02)
    bar.set_label("mean damage (points)")
    ax.set_title((title + "\n" if title else "") + "C = critical, S = safe, ? = undetermined",
                 fontsize=9)
    fig.tight_layout()
    return save_figure(fig, path)


def _window_panel(ax, epochs: pd.DataFrame, start: int, length: int, color: str,
                  metric: str) -> int:
    """One window's runs beside the baseline of the same seeds and end epoch; returns seeds."""
    runs = epochs[(epochs.start_epoch == start) & (epochs.length == length)]
    seeds = runs.seed.unique()
    end = runs.epoch.max() + 1 if len(runs) else None
    base = epochs[(epochs.length == 0) & epochs.seed.isin(seeds)]
    if end is not None:  # the baseline evaluated at the same end epoch
        base = base[base.groupby("run_id").epoch.transform("max") + 1 == end]
    ax.axvspan(start, start + length, color=WINDOW_SHADE, alpha=0.28, lw=0)
    for frame, shade, label in ((base, BASELINE_COLOR, "clean baseline"),
                                (runs, color, "with deficit")):
        curve = (frame.groupby("epoch")[metric].agg(["mean", "std"]) * 100.0).reset_index()
        x = curve.epoch + 1
        ax.fill_between(x, curve["mean"] - curve["std"].fillna(0),
                        curve["mean"] + curve["std"].fillna(0), color=shade, alpha=0.12, lw=0)
        ax.plot(x, curve["mean"], color=shade, lw=1.6, label=label)
    if end is not None:
        ax.set_xlim(0, end)
    ax.set_xlabel("epochs trained")
    ax.grid(alpha=0.25)
    return len(seeds)


def learning_curves(epochs: pd.DataFrame, windows: list[tuple[int, int]], path: str | Path, *,
                    layout: Layout = WINDOW, metric: str = "test_acc", title: str = "",
                    lengths: list[int] | None = None,
                    labels: dict[tuple[int, int], str] | None = None) -> Path:
    """Held-out accuracy of the baseline beside chosen window runs, the window shaded.

    Means over seeds with a band of +- one sd. Each panel pairs every window run with the
    baseline of the same seeds and end epoch. ``lengths`` (all lengths of the sweep) keeps each
    length in the colour the sensitivity figure gives it (a layout with one line in all draws
    every panel in the first colour); ``labels`` adds a line per panel.
    """
    lengths = sorted({n for _, n in windows} if lengths is None else lengths)
    fig, axes = plt.subplots(1, len(windows), figsize=(3.6 * len(windows) + 0.6, 3.3), dpi=120,
                             sharey=True, squeeze=False)
    for i, (start, length) in enumerate(windows):
        ax = axes[0][i]
        color = (PALETTE[lengths.index(length) % len(PALETTE)]
                 if layout.per_length and length in lengths else PALETTE[0])
        seeds = _window_panel(ax, epochs, start, length, color, metric)
        extra = (labels or {}).get((start, length))
        ax.set_title(f"deficit in epochs [{start}, {start + length}), {seeds} seeds"
                     + (f"\n{extra}" if extra else ""), fontsize=9)
    axes[0][0].set_ylabel("held-out accuracy (%)")
    axes[0][0].legend(fontsize=8, frameon=False, loc="lower right")
    if title:
        fig.suptitle(title, fontsize=10)
    fig.tight_layout()
    return save_figure(fig, path)


def pick_windows(table: pd.DataFrame, limit: int = 3,
                 layout: Layout = WINDOW) -> list[tuple[int, int]]:
    """Windows worth a learning-curve panel: the most damaging (among windows with enough
    recovery time), the least damaging, and the one furthest along the layout's x axis; of a
    layout with a line per length, only the shortest length is considered. No repeats."""
    if table.empty:
        return []
    rows = table[table.length == table.length.min()] if layout.per_length else table
    rows = rows.dropna(subset=["damage"])
    if rows.empty:
        return []
    regular = rows[~rows.short_recovery] if (~rows.short_recovery).any() else rows
    last = axis_values(rows, layout).idxmax()
    chosen = [regular.loc[regular.damage.idxmax()], rows.loc[rows.damage.idxmin()],
              rows.loc[last]]
    out: list[tuple[int, int]] = []
    for row in sorted(chosen, key=lambda r: (r.start, r.length)):
        key = (int(row.start), int(row.length))
        if key not in out:
            out.append(key)
    return out[:limit]
