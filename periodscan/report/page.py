"""Write a sweep's report files: table (CSV + Parquet), PNG figures and the HTML page.

Everything is derived from the ledger and config.yaml, so the report can be rewritten at any
time (also while a sweep runs: it then says the results are partial). Files are written
atomically; nothing the sweep itself needs is touched.
"""

from __future__ import annotations

import base64
import os
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from periodscan.engine.checkpoint import write_atomic
from periodscan.errors import SweepError
from periodscan.planner import PlanAnswer, check_question
from periodscan.report import figures
from periodscan.report.html import render_page

TABLE_CSV = "sensitivity.csv"
TABLE_PARQUET = "sensitivity.parquet"
CURVE_PNG = "sensitivity.png"
HEATMAP_PNG = "heatmap.png"
CURVES_PNG = "learning_curves.png"
PAGE_HTML = "report.html"


@dataclass
class ReportFiles:
    """Paths of what :func:`write_report` wrote."""

    html: Path
    csv: Path
    parquet: Path
    figures: list[Path] = field(default_factory=list)


def _atomic_figure(draw, path: Path, *args, **kwargs) -> Path:
    tmp = path.with_name(f".{path.name}.tmp.png")
    draw(*args, tmp, **kwargs)
    os.replace(tmp, path)
    return path


def title_of(config: dict) -> str:
    """'Blur on load_mnist1d / CNN1d' from the config's targets."""
    def short(group: str) -> str:
        return str((config.get(group) or {}).get("_target_", "?")).rsplit(".", 1)[-1]
    return f"{short('deficit')} on {short('data')} / {short('model')}"


def write_report(view, *, tolerance: float | None = None, confidence: float | None = None,
                 production_epochs: int | None = None,
                 windows: list[tuple[int, int]] | None = None) -> ReportFiles:
    """Write table, figures and ``report.html`` into the sweep folder of ``view``.

    ``tolerance`` and ``confidence`` default to the sweep config's; ``production_epochs`` maps
    the planner's starts onto a longer schedule; ``windows`` chooses the (start, length) pairs
    whose learning curves are drawn (default: most and least damaging, and the latest start).
    """
    tolerance = view.tolerance if tolerance is None else tolerance
    confidence = view.confidence if confidence is None else confidence
    check_question(1, tolerance, confidence, production_epochs)
    folder = view.folder
    if not os.access(folder, os.W_OK):
        raise SweepError(f"cannot write the report: sweep folder {folder} is not writable")
    table = view.table(tolerance, confidence)
    csv_path, parquet_path = folder / TABLE_CSV, folder / TABLE_PARQUET
    write_atomic(csv_path, table.to_csv(index=False, float_format="%.6g").encode())
    tmp = folder / f".{TABLE_PARQUET}.tmp"
    table.to_parquet(tmp, index=False)
    os.replace(tmp, parquet_path)

    title = f"{title_of(view.config)}, sweep '{view.name}'"
    drawn: dict[str, Path] = {}
    fisher = figures.fisher_by_epoch(view.extras)
    finished = bool(len(table)) and bool((table.seeds > 0).any())
    if finished:
        drawn["sensitivity"] = _atomic_figure(
            figures.sensitivity_curve, folder / CURVE_PNG, table, title=title,
            removal=view.is_removal, tolerance=tolerance, epochs=view.schedule_epochs,
            fisher=fisher)
        if table.length.nunique() >= 2 and table.start.nunique() >= 2:
            drawn["heatmap"] = _atomic_figure(figures.heatmap, folder / HEATMAP_PNG, table,
                                              title=title)
        chosen = (windows if windows is not None
                  else figures.pick_windows(table, removal=view.is_removal))
        if chosen and not view.epochs.empty:
            labels = {(int(r.start), int(r.length)): f"damage {r.damage:+.2f} points, {r.verdict}"
                      for r in table.itertuples()}
            drawn["curves"] = _atomic_figure(figures.learning_curves, folder / CURVES_PNG,
                                             view.epochs, chosen,
                                             lengths=[] if view.is_removal else
                                             sorted(int(n) for n in table.length.unique()),
                                             labels=labels)
    plans = _plans(view, tolerance, confidence, production_epochs) if finished else []
    images = {key: base64.b64encode(path.read_bytes()).decode() for key, path in drawn.items()}
    page = render_page(view=view, table=table, plans=plans, images=images,
                       status=view.status(), title=title, has_fisher=bool(len(fisher)),
                       finished=finished)
    html_path = folder / PAGE_HTML
    write_atomic(html_path, page.encode())
    return ReportFiles(html_path, csv_path, parquet_path, list(drawn.values()))


def _plans(view, tolerance: float, confidence: float,
           production_epochs: int | None) -> list[PlanAnswer]:
    """One planner answer per measured length (window designs only)."""
    if view.is_removal:
        return []
    table = view.table(tolerance, confidence, with_mcnemar=False)
    if table.empty:
        return []
    out = []
    for length in sorted(int(n) for n in pd.unique(table.length)):
        out.append(view.plan(length, tolerance, confidence, production_epochs))
    return out
