"""The comparison figure: several sweeps' damage curves overlaid, and their differences.

One column per compared deficit length. The top panel draws each sweep's mean damage with its
interval band in its own colour (the palette of :mod:`periodscan.views.figures`, in the order
the sweeps were given); the marker says the verdict (filled: critical, hollow: safe, cross:
undetermined) and the legend names each sweep's critical edge. The bottom panel draws each
difference (a sweep minus the sweep it is compared with) with its interval as a bar, in the
colour of the later sweep. Its size is set by the number of lengths; written atomically.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from periodscan.analysis.compare import Comparison  # noqa: E402
from periodscan.views.compare import edge_value  # noqa: E402
from periodscan.views.figures import PALETTE, TOLERANCE_COLOR, save_figure  # noqa: E402

MARKERS = {"critical": dict(marker="o"), "safe": dict(marker="o", mfc="white"),
           "undetermined": dict(marker="x")}



def _edge_words(c: Comparison, sweep: str, length: int) -> str:
    row = c.edges[(c.edges.sweep == sweep) & (c.edges.length == length)].iloc[0]
    return (f"critical until {edge_value(row.critical_until)}, "
            f"safe from {edge_value(row.safe_from)}")


def _curves_panel(ax, c: Comparison, length: int, colors: dict[str, str]) -> None:
    ax.axhline(0.0, color="#999999", lw=0.8)
    ax.axhline(c.tolerance, color=TOLERANCE_COLOR, lw=1.1, ls="--")
    handles = []
    for sweep, color in colors.items():
        rows = c.curves[(c.curves.sweep == sweep) & (c.curves.length == length)]
        rows = rows.sort_values("x")
        ax.fill_between(rows.x, rows.damage_low, rows.damage_high, color=color, alpha=0.15,
                        lw=0)
        ax.plot(rows.x, rows.damage, color=color, lw=1.7)
        for verdict, part in rows.groupby(rows.verdict.fillna("undetermined")):
            style = MARKERS.get(verdict, MARKERS["undetermined"])
            ax.plot(part.x, part.damage, ls="", ms=6, mew=1.4, color=color, mec=color,
                    zorder=3, **style)
        handles.append(Line2D([], [], color=color, lw=1.7,
                              label=f"{sweep} ({_edge_words(c, sweep, length)})"))
    handles.append(Line2D([], [], color=TOLERANCE_COLOR, ls="--", lw=1.1,
                          label=f"tolerance {c.tolerance:g} points"))
    handles += [Line2D([], [], ls="", color="#444444", mec="#444444", label=v, **MARKERS[v])
                for v in ("critical", "safe", "undetermined")]
    ax.legend(handles=handles, fontsize=7, frameon=False, loc="upper right")
    ax.set_ylabel(f"damage, points\n({c.confidence:.0%} interval)", fontsize=8.5)
    ax.set_title(c.layout.line_label(length), fontsize=9, loc="left")
    ax.grid(alpha=0.25)


def _differences_panel(ax, c: Comparison, length: int, colors: dict[str, str]) -> None:
    rows = c.differences[c.differences.length == length]
    xs = np.sort(rows.x.unique())
    step = float(np.diff(xs).min()) if len(xs) > 1 else 1.0
    pairs = list(dict.fromkeys(rows.sweep))
    ax.axhline(0.0, color="#999999", lw=0.8)
    for k, sweep in enumerate(pairs):
        part = rows[rows.sweep == sweep]
        shift = (k - (len(pairs) - 1) / 2) * 0.08 * step
        against = part.against.iloc[0]
        ax.errorbar(part.x + shift, part.difference,
                    yerr=[part.difference - part.low, part.high - part.difference],
                    fmt="o", ms=4, color=colors[sweep], capsize=3, lw=1.2,
                    label=f"{sweep} minus {against} ({part.method.iloc[0]})")
    ax.legend(fontsize=7, frameon=False, loc="best")
    ax.set_ylabel("difference of\ndamage, points", fontsize=8.5)
    ax.set_xlabel(c.layout.axis_title)
    ax.grid(alpha=0.25)


def comparison_figure(c: Comparison, path: str | Path, *, title: str = "") -> Path:
    """Draw :class:`~periodscan.analysis.compare.Comparison` ``c`` into the PNG at ``path``."""
    colors = {r.label: PALETTE[i % len(PALETTE)] for i, r in enumerate(c.rungs)}
    n = len(c.lengths)
    fig, axes = plt.subplots(2, n, figsize=(8.0 * n, 6.4), dpi=120, squeeze=False,
                             sharex="col", layout="constrained",
                             gridspec_kw={"height_ratios": [3.0, 1.8]})
    for i, length in enumerate(c.lengths):
        _curves_panel(axes[0][i], c, length, colors)
        _differences_panel(axes[1][i], c, length, colors)
    first = ", ".join(f"{r.label} {r.baseline_acc:.1f}%" for r in c.rungs
                      if not pd.isna(r.baseline_acc))
    subtitle = f"clean baselines: {first}"
    fig.suptitle(f"{title}\n{subtitle}" if title else subtitle, fontsize=10)
    return save_figure(fig, path)
