"""The ``sweep`` job as a library call: train what the design asks for, write the table.

``run_sweep`` is what the CLI verb calls and what a notebook calls; it returns DataFrames. The
design says which runs to train, round by round (one round for window and removal designs);
every round is trained in the same results folder, so a rerun resumes where a killed one
stopped and a grown design reuses every run already trained.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
from omegaconf import DictConfig

from periodscan.designs import Layout
from periodscan.engine.runner import kill_point
from periodscan.engine.tree import RunSpec, build_tree
from periodscan.jobs.folder import JobFolder
from periodscan.jobs.prepare import Prepared, prepare
from periodscan.views.figures import sensitivity_curve
from periodscan.views.report import CURVE_PNG, TABLE_CSV, write_table_csv
from periodscan.views.words import sweep_title


@dataclass(kw_only=True)
class SweepOutcome:
    """What a finished (or partly failed) sweep hands back."""

    folder: Path
    table: pd.DataFrame
    runs: pd.DataFrame
    counts: dict[str, int]
    epochs_shared: int
    epochs_unshared: int
    seconds: float
    layout: Layout = field(default_factory=Layout)
    reused_runs: int = 0
    notes: list[str] = field(default_factory=list)


def run_sweep(config: DictConfig | dict | Sequence[str] = (), quiet: bool = False,
              command: str | None = None) -> SweepOutcome:
    """Run (or resume) a sweep and write its ledger, table and curve into its folder.

    ``command`` is the shell command that started it (the CLI passes it); the report shows it
    as the way to reproduce the sweep. A results folder that cannot be written (no space, no
    permission) raises SweepError; the ledger stays consistent, so the same call resumes.
    """
    prep = prepare(config)
    started = time.perf_counter()
    with JobFolder(prep, command=command, quiet=quiet) as job:
        counts, trained = train_rounds(job, prep, quiet)
        job.close_executor()
        runs = prep.design.runs_used(job.ledger.runs_frame())
        kill_point("before-outputs")
        table = write_outputs(job, prep, runs)
    tree = build_tree(trained, prep.identity)
    return SweepOutcome(folder=prep.folder, table=table, runs=runs, counts=counts,
                        epochs_shared=tree.epochs_shared, epochs_unshared=tree.epochs_unshared,
                        seconds=time.perf_counter() - started, reused_runs=job.reused_runs,
                        layout=prep.design.layout, notes=prep.design.notes())


def train_rounds(job: JobFolder, prep: Prepared,
                 quiet: bool) -> tuple[dict[str, int], list[RunSpec]]:
    """Train the design's rounds; return segment counts and every run trained."""
    counts = {"done": 0, "failed": 0, "diverged": 0}
    trained: list[RunSpec] = []
    said = 0
    for runs in prep.design.rounds(job.ledger.runs_frame):
        trained += runs
        done = job.train(build_tree(runs, prep.identity), monitor=prep.plain.get("monitor"))
        counts = {k: counts[k] + done.get(k, 0) for k in counts}
        job.save_state(prep.design)
        notes = prep.design.notes()
        if not quiet:
            for line in notes[said:]:
                print(line, file=sys.stderr, flush=True)
        said = len(notes)
    job.save_state(prep.design)
    return counts, trained


def write_outputs(job: JobFolder, prep: Prepared, runs: pd.DataFrame) -> pd.DataFrame:
    """The design's sensitivity table as CSV, and its curve as PNG."""
    plain = prep.plain
    table = prep.design.table(runs, float(plain.get("confidence", 0.95)), plain.get("tolerance"),
                              num_classes=prep.num_classes)
    write_table_csv(table, job.folder / TABLE_CSV)
    if len(table):
        sensitivity_curve(table, job.folder / CURVE_PNG, title=sweep_title(plain),
                          layout=prep.design.layout, tolerance=plain.get("tolerance"),
                          epochs=None)
    return table
