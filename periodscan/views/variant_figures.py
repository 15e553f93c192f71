"""Figures of a sweep of deficit variants: overlaid curves, a severity x start map, and the
learning curves of one variant.

The curves of all variants share one panel per deficit length, one colour per variant (a
sequential ramp for severity levels, so darker is more severe); the verdict is the marker's
shape. The severity map is the damage of every level at every start, the verdict's letter in
each cell. Files are written like every periodscan figure: fixed size, temporary file, rename.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap, TwoSlopeNorm  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from periodscan.analysis.variant_plan import variant_rows  # noqa: E402
from periodscan.designs.layout import WINDOW, Layout  # noqa: E402
from periodscan.views import figures  # noqa: E402
from periodscan.views.variants import variant_label, variant_noun  # noqa: E402

#: Marker shape per verdict on overlaid curves (colour is taken by the variant).
VERDICT_MARKERS = {"critical": "^", "safe": "v", "undetermined": "o"}
#: Severity levels from mild to severe: sand to deep rust (ours).
SEVERITY_RAMP = LinearSegmentedColormap.from_list(
    "periodscan_severity", ["#e3b448", "#d1772e", "#a8401f", "#5e1d12"])
SEVERITY_MAP_PNG = "severity_map.png"
VARIANT_CURVES_PNG = "learning_curves.png"



def variant_colors(table: pd.DataFrame) -> dict[str, str]:
    """One colour per variant: the palette for deficits, a mild-to-severe ramp for levels."""
    keys = list(pd.unique(table.variant))
    if variant_noun(table) == "deficit":
        return {k: figures.PALETTE[i % len(figures.PALETTE)] for i, k in enumerate(keys)}
    ramp = np.linspace(0.0, 1.0, len(keys)) if len(keys) > 1 else [0.6]
    return {k: matplotlib.colors.to_hex(SEVERITY_RAMP(x)) for k, x in zip(keys, ramp,
                                                                          strict=True)}


def panels(table: pd.DataFrame, layout: Layout) -> list[tuple[str, pd.DataFrame]]:
    """(title, rows) per panel: one per deficit length, or one in all (a removal design)."""
    if not layout.per_length:
        return [(layout.line_label(int(table.length.iloc[0])), table)]
    return [(layout.line_label(int(n)), rows) for n, rows in table.groupby("length")]


def _overlay_panel(ax, table: pd.DataFrame, layout: Layout, colors: dict[str, str],
                   tolerance: float | None) -> None:
    """Every variant's damage curve with its interval band; marker shape = verdict."""
    ax.axhline(0.0, color="#999999", lw=0.8)
    if tolerance is not None:
        ax.axhline(tolerance, color=figures.TOLERANCE_COLOR, lw=1.1, ls="--")
    for key in pd.unique(table.variant):
        rows = table[table.variant == key]
        x = figures.axis_values(rows, layout)
        order = x.sort_values().index
        rows, x = rows.loc[order], x.loc[order]
        color = colors[key]
        ax.fill_between(x, rows.damage_low, rows.damage_high, color=color, alpha=0.10, lw=0)
        ax.plot(x, rows.damage, color=color, lw=1.8, label=variant_label(table, key, layout))
        verdicts = rows.verdict if "verdict" in rows else pd.Series("", index=rows.index)
        for verdict, part in rows.groupby(verdicts):
            ax.plot(x.loc[part.index], part.damage, ls="", ms=7, color=color, mec="white",
                    marker=VERDICT_MARKERS.get(verdict, "o"), zorder=3)
    ax.grid(alpha=0.25)


def variant_curves(table: pd.DataFrame, path: str | Path, *, title: str = "",
                   layout: Layout = WINDOW, tolerance: float | None = None,
                   epochs: int | None = None) -> Path:
    """Damage against the window start, one panel per deficit length, one line per variant."""
    groups = panels(table, layout)
    fig, axes = plt.subplots(len(groups), 1, figsize=(8.0, 1.6 + 3.0 * len(groups)), dpi=120,
                             sharex=True, squeeze=False, layout="constrained")
    colors = variant_colors(table)
    level = int(round(100 * table.confidence.iloc[0]))
    for ax, (label, rows) in zip(axes[:, 0], groups, strict=True):
        _overlay_panel(ax, rows, layout, colors, tolerance)
        ax.set_title(label, fontsize=9, loc="left", fontweight="bold")
        ax.set_ylabel(f"damage, points\n({level}% interval)", fontsize=8.5)
    handles = [Line2D([], [], color=colors[k], lw=1.8, label=variant_label(table, k, layout))
               for k in colors]
    handles += [Line2D([], [], ls="", marker=m, color="#555555", label=v)
                for v, m in VERDICT_MARKERS.items()
                if "verdict" in table and (table.verdict == v).any()]
    if tolerance is not None:
        handles.append(Line2D([], [], color=figures.TOLERANCE_COLOR, ls="--",
                              label=f"tolerance {tolerance:g} points"))
    fig.legend(handles=handles, fontsize=7.5, frameon=False, loc="outside lower center",
               ncol=min(len(handles), 4))
    if epochs:
        axes[-1, 0].set_xlim(-0.5, epochs + 0.5)
    axes[-1, 0].set_xlabel(layout.axis_title)
    heading = f"damage by {layout.variant_axis or 'variant'}, one line each"
    fig.suptitle(f"{title}\n{heading}" if title else heading, fontsize=10)
    return figures.save_figure(fig, path)


def _map_cells(ax, damage: np.ndarray, verdicts: np.ndarray, span: float) -> None:
    letters = {"critical": "C", "safe": "S", "undetermined": "?"}
    for r in range(damage.shape[0]):
        for c in range(damage.shape[1]):
            if not np.isfinite(damage[r, c]):
                continue
            color = "white" if abs(damage[r, c]) > 0.6 * span else "#222222"
            ax.text(c, r, f"{damage[r, c]:+.1f}\n{letters.get(verdicts[r, c], '')}",
                    ha="center", va="center", fontsize=7, color=color)


def severity_map(table: pd.DataFrame, path: str | Path, *, title: str = "",
                 layout: Layout = WINDOW) -> Path:
    """Mean damage of every severity level (rows, mildest at the bottom) at every start
    (columns; the removal epoch for a removal design), one panel per deficit length; each cell
    names its verdict's letter."""
    keys = list(pd.unique(table.variant))
    groups = panels(table, layout)
    table = table.assign(x=figures.axis_values(table, layout).astype(int))
    starts = sorted(int(s) for s in table.x.unique())
    finite = table.damage[np.isfinite(table.damage)]
    span = max(float(finite.abs().max()) if len(finite) else 1.0, 1e-6)
    width = min(max(2.5 + 0.6 * len(starts), 6.5), 11.0)
    fig, axes = plt.subplots(len(groups), 1, squeeze=False, dpi=120, layout="constrained",
                             figsize=(width, 1.2 + (0.9 + 0.45 * len(keys)) * len(groups)))
    norm = TwoSlopeNorm(0.0, -span, span)
    for ax, (label, rows) in zip(axes[:, 0], groups, strict=True):
        rows = table.loc[rows.index]
        damage = np.full((len(keys), len(starts)), np.nan)
        verdicts = np.full(damage.shape, "", dtype=object)
        for row in rows.itertuples():
            r, c = keys.index(row.variant), starts.index(int(row.x))
            damage[r, c] = row.damage
            verdicts[r, c] = getattr(row, "verdict", "")
        image = ax.imshow(np.ma.masked_invalid(damage), cmap=figures.DAMAGE_CMAP, norm=norm,
                          aspect="auto", origin="lower")
        _map_cells(ax, damage, verdicts, span)
        ax.set_xticks(range(len(starts)), [str(s) for s in starts])
        ax.set_yticks(range(len(keys)), [variant_label(table, k, layout) for k in keys])
        ax.set_title(label, fontsize=9, loc="left")
    axes[-1, 0].set_xlabel(layout.axis_title)
    fig.colorbar(image, ax=axes[:, 0], pad=0.02).set_label("mean damage (points)")
    heading = ("damage by severity, mildest at the bottom\n"
               "C = critical, S = safe, ? = undetermined")
    fig.suptitle(f"{title}\n{heading}" if title else heading, fontsize=9)
    return figures.save_figure(fig, path)


def worst_variant(table: pd.DataFrame) -> str:
    """The variant with the largest mean damage over its windows (ties: the first listed)."""
    means = table.groupby("variant", sort=False).damage.mean()
    return str(means.idxmax()) if means.notna().any() else str(table.variant.iloc[0])


def variant_figures(view, table: pd.DataFrame, layout: Layout, *, title: str,
                    tolerance: float, windows: list[tuple[int, int]] | None,
                    curve_png: str) -> dict[str, Path]:
    """The report's figures of a variant sweep: overlaid curves (into ``curve_png``), the
    severity map (severity sweeps), and the learning curves of the most damaging variant."""
    folder = view.folder
    drawn = {"sensitivity": variant_curves(table, folder / curve_png, title=title,
                                           layout=layout, tolerance=tolerance,
                                           epochs=view.schedule_epochs)}
    if variant_noun(table) == "level" and figures.axis_values(table, layout).nunique() >= 2:
        drawn["severity_map"] = severity_map(table, folder / SEVERITY_MAP_PNG, title=title,
                                             layout=layout)
    key = worst_variant(table)
    rows = variant_rows(table, key)
    chosen = windows if windows is not None else figures.pick_windows(rows, layout=layout)
    epochs = view.epochs
    if chosen and not epochs.empty:
        mine = epochs[(epochs.variant == key) | (epochs.length == 0)]
        labels = {(int(r.start), int(r.length)): f"damage {r.damage:+.2f} points, {r.verdict}"
                  for r in rows.itertuples()}
        drawn["curves"] = figures.learning_curves(
            mine, chosen, folder / VARIANT_CURVES_PNG, layout=layout,
            lengths=sorted(int(n) for n in table.length.unique()), labels=labels,
            title=f"{variant_noun(table)} {variant_label(table, key, layout)} "
                  "(the most damaging on average)")
    return drawn
