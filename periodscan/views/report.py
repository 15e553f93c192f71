"""Write a sweep's files: the table (CSV + Parquet), PNG figures and the HTML report page.

Everything is derived from the ledger and config.yaml, so the report can be rewritten at any
time (also while a sweep runs: it then says the results are partial). Files are written
atomically; nothing the sweep itself needs is touched. :func:`write_table_csv` is the one
writer of ``sensitivity.csv``, used by every job and by the report.
"""

from __future__ import annotations

import base64
import os
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from periodscan.analysis.planner import PlanAnswer, check_question
from periodscan.analysis.readings import fisher_by_epoch
from periodscan.analysis.recovery import join_recovery
from periodscan.designs.layout import Layout
from periodscan.engine.checkpoint import write_atomic
from periodscan.errors import SweepError
from periodscan.views import figures
from periodscan.views.html import PageInput, render_page
from periodscan.views.variant_figures import variant_figures
from periodscan.views.words import sweep_title

TABLE_CSV = "sensitivity.csv"
TABLE_PARQUET = "sensitivity.parquet"
CURVE_PNG = "sensitivity.png"
HEATMAP_PNG = "heatmap.png"
CURVES_PNG = "learning_curves.png"
PAGE_HTML = "report.html"
#: Float format of sensitivity.csv: four decimals, whichever job writes the table.
CSV_FLOAT_FORMAT = "%.4f"


@dataclass
class ReportFiles:
    """Paths of what :func:`write_report` wrote."""

    html: Path
    csv: Path
    parquet: Path
    figures: list[Path] = field(default_factory=list)


def write_table_csv(table: pd.DataFrame, path: str | Path) -> Path:
    """The sensitivity table as CSV (floats with four decimals, no index), atomically."""
    path = Path(path)
    write_atomic(path, table.to_csv(index=False, float_format=CSV_FLOAT_FORMAT).encode())
    return path


def write_table_parquet(table: pd.DataFrame, path: str | Path) -> Path:
    """The sensitivity table as Parquet (full precision), atomically."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    table.to_parquet(tmp, index=False)
    os.replace(tmp, path)
    return path


def draw_figures(view, table: pd.DataFrame, layout: Layout, *, title: str, tolerance: float,
                 windows: list[tuple[int, int]] | None, fisher: pd.DataFrame) -> dict[str, Path]:
    """Sensitivity curve, heatmap (2-D grids) and learning curves into the sweep folder."""
    folder = view.folder
    if "variant" in table:  # a sweep of deficit variants (views/variant_figures.py)
        return variant_figures(view, table, layout, title=title, tolerance=tolerance,
                               windows=windows, curve_png=CURVE_PNG)
    drawn = {"sensitivity": figures.sensitivity_curve(
        table, folder / CURVE_PNG, title=title, layout=layout, tolerance=tolerance,
        epochs=view.schedule_epochs, fisher=fisher)}
    if layout.per_length and table.length.nunique() >= 2 and table.start.nunique() >= 2:
        drawn["heatmap"] = figures.heatmap(table, folder / HEATMAP_PNG, title=title)
    chosen = windows if windows is not None else figures.pick_windows(table, layout=layout)
    if chosen and not view.epochs.empty:
        labels = {(int(r.start), int(r.length)): f"damage {r.damage:+.2f} points, {r.verdict}"
                  for r in table.itertuples()}
        drawn["curves"] = figures.learning_curves(
            view.epochs, chosen, folder / CURVES_PNG, layout=layout,
            lengths=sorted(int(n) for n in table.length.unique()), labels=labels)
    return drawn


def write_report(view, *, tolerance: float | None = None, confidence: float | None = None,
                 production_epochs: int | None = None,
                 windows: list[tuple[int, int]] | None = None) -> ReportFiles:
    """Write table, figures and ``report.html`` into the sweep folder of ``view``.

    ``tolerance`` and ``confidence`` default to the sweep config's; ``production_epochs`` maps
    the planner's starts onto a longer schedule; ``windows`` chooses the (start, length) pairs
    whose learning curves are drawn (default: most and least damaging, and the latest one).
    """
    tolerance = view.tolerance if tolerance is None else tolerance
    confidence = view.confidence if confidence is None else confidence
    check_question(1, tolerance, confidence, production_epochs)
    folder = view.folder
    if not os.access(folder, os.W_OK):
        raise SweepError(f"cannot write the report: sweep folder {folder} is not writable")
    table = view.table(tolerance, confidence)
    csv_path = write_table_csv(table, folder / TABLE_CSV)
    parquet_path = write_table_parquet(table, folder / TABLE_PARQUET)
    table = join_recovery(table, view.recovery(tolerance, confidence))  # page only, not files
    layout, title = view.layout, sweep_title(view.config)
    fisher = fisher_by_epoch(view.extras)
    finished = bool(len(table)) and bool((table.seeds > 0).any())
    drawn = (draw_figures(view, table, layout, title=title, tolerance=tolerance,
                          windows=windows, fisher=fisher) if finished else {})
    page = PageInput(
        view=view, table=table, layout=layout, design_summary=view.design_summary,
        status=view.status(), title=title, has_fisher=bool(len(fisher)), finished=finished,
        plans=plans(view, layout, tolerance, confidence, production_epochs) if finished else [],
        images={key: base64.b64encode(path.read_bytes()).decode() for key, path in drawn.items()})
    html_path = folder / PAGE_HTML
    write_atomic(html_path, render_page(page).encode())
    return ReportFiles(html_path, csv_path, parquet_path, list(drawn.values()))


def plans(view, layout: Layout, tolerance: float, confidence: float,
          production_epochs: int | None) -> list[PlanAnswer]:
    """One planner answer per measured length, for designs the planner answers."""
    if not layout.plannable:
        return []
    table = view.table(tolerance, confidence, with_mcnemar=False)
    if table.empty:
        return []
    return [view.plan(length, tolerance, confidence, production_epochs)
            for length in sorted(int(n) for n in pd.unique(table.length))]
