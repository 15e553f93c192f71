"""Read a sweep folder from a notebook (or a CLI verb): DataFrames, tables, plans and status.

``load_sweep("results/demo")`` (or just ``load_sweep("demo")``) opens the ledger read-only, so
it is safe while the sweep is still running, and returns a :class:`SweepView`::

    view = load_sweep("demo")
    view.runs                      # one row per run
    view.epochs                    # per-epoch metrics along each run's path
    view.table(tolerance=0.5)      # sensitivity table with verdicts
    view.plan(length=15).frame()   # the planner's answer as a DataFrame
"""

from __future__ import annotations

import json
import sqlite3
from functools import cached_property
from pathlib import Path
from typing import Any

import pandas as pd
import yaml

from periodscan.analysis.mcnemar import mcnemar_frame
from periodscan.analysis.sensitivity import sensitivity_table
from periodscan.errors import SweepError
from periodscan.ledger import FILE_NAME, Ledger
from periodscan.planner import PlanAnswer, check_question, plan_from_table

CONFIG_NAME = "config.yaml"


class ReadOnlyLedger(Ledger):
    """The sweep's ledger opened with SQLite's read-only mode: readers never write or create."""

    def __init__(self, folder: str | Path):
        self.path = Path(folder) / FILE_NAME
        self.conn = sqlite3.connect(f"{self.path.resolve().as_uri()}?mode=ro", uri=True,
                                    timeout=30)


def resolve_folder(sweep: str | Path, results_dir: str | Path = "results") -> Path:
    """A sweep folder path, or a sweep name under ``results_dir``; it must hold a ledger."""
    given = Path(sweep).expanduser()
    for candidate in (given, Path(results_dir).expanduser() / str(sweep)):
        if (candidate / FILE_NAME).is_file():
            return candidate
    raise SweepError(
        f"The 'sweep' argument must be a sweep folder holding {FILE_NAME} or a sweep name under "
        f"{results_dir}/. Got {str(sweep)!r} instead (no {given / FILE_NAME} and no "
        f"{Path(results_dir) / str(sweep) / FILE_NAME})")


class SweepView:
    """One sweep folder, read-only. Frames are read once per view; make a new view to refresh."""

    def __init__(self, folder: str | Path):
        self.folder = Path(folder)
        self.ledger = ReadOnlyLedger(self.folder)
        path = self.folder / CONFIG_NAME
        self.config: dict[str, Any] = (yaml.safe_load(path.read_text()) or {}
                                       if path.is_file() else {})

    def close(self) -> None:
        self.ledger.close()

    def __enter__(self) -> SweepView:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"SweepView({str(self.folder)!r})"

    # --- facts from the config ----------------------------------------------------------
    @property
    def name(self) -> str:
        return str(self.config.get("name") or self.folder.name)

    @property
    def schedule_epochs(self) -> int:
        epochs = (self.config.get("schedule") or {}).get("epochs")
        if epochs is None:  # no config.yaml: the latest end epoch of any run
            epochs = int(self._all_runs.end_epoch.max()) if len(self._all_runs) else 1
        return int(epochs)

    @property
    def design(self) -> dict[str, Any]:
        return dict(self.config.get("design") or {})

    @property
    def is_removal(self) -> bool:
        return self.design.get("kind") == "removal"

    @property
    def is_adaptive(self) -> bool:
        return self.design.get("kind") == "adaptive"

    @cached_property
    def adaptive_seeds(self) -> dict[int, int] | None:
        """Seeds per start of a finished adaptive design (None for other designs)."""
        from periodscan.adaptive import SEEDS_META, stored_seeds

        return stored_seeds(self.ledger.get_meta(SEEDS_META)) if self.is_adaptive else None

    @property
    def tolerance(self) -> float:
        return float(self.config.get("tolerance", 0.5))

    @property
    def confidence(self) -> float:
        return float(self.config.get("confidence", 0.95))

    @property
    def command(self) -> str | None:
        """The shell command that started the sweep (None when it was started from Python)."""
        return self.ledger.get_meta("command")

    @cached_property
    def meta(self) -> dict[str, Any]:
        rows = self.ledger.conn.execute("SELECT key, value FROM meta").fetchall()
        out = {}
        for key, value in rows:
            try:
                out[key] = json.loads(value)
            except ValueError:
                out[key] = value
        return out

    # --- frames --------------------------------------------------------------------------
    @cached_property
    def _all_runs(self) -> pd.DataFrame:
        return self.ledger.runs_frame()

    @cached_property
    def run_ids(self) -> set[str] | None:
        """Runs of the design in config.yaml (a ledger can also hold runs of earlier designs)."""
        if not self.config:
            return None
        if self.is_adaptive:
            return self._adaptive_run_ids()
        from periodscan.config import plan_runs

        try:
            return {r.run_id for r in plan_runs(self.config)}
        except Exception:  # noqa: BLE001 - an unreadable design: fall back to every run
            return None

    def _adaptive_run_ids(self) -> set[str] | None:
        """Runs the adaptive design used: its starts at their seed counts, baselines to the cap."""
        from periodscan.adaptive import adaptive_settings, runs_used

        if self.adaptive_seeds is None:  # interrupted before it finished: every run in the folder
            return None
        return set(runs_used(self._all_runs, adaptive_settings(self.config),
                             self.adaptive_seeds).run_id)

    @cached_property
    def runs(self) -> pd.DataFrame:
        """One row per run of this design: status, final accuracy and loss, divergence, error."""
        runs = self._all_runs
        if self.run_ids is not None:
            runs = runs[runs.run_id.isin(self.run_ids)]
        return runs.reset_index(drop=True)

    @cached_property
    def epochs(self) -> pd.DataFrame:
        """Per-epoch metrics (lr, losses, accuracies, seconds) of every run along its path."""
        return self._only_design(self.ledger.epochs_frame())

    @cached_property
    def extras(self) -> pd.DataFrame:
        """Per-epoch monitor readings (e.g. ``fisher/total``) of every run along its path."""
        return self._only_design(self.ledger.extras_frame())

    @cached_property
    def segments(self) -> pd.DataFrame:
        return self.ledger.segments_frame()

    def _only_design(self, frame: pd.DataFrame) -> pd.DataFrame:
        if self.run_ids is None or frame.empty:
            return frame.reset_index(drop=True)
        return frame[frame.run_id.isin(self.run_ids)].reset_index(drop=True)

    @cached_property
    def mcnemar(self) -> pd.DataFrame:
        """McNemar's test of every finished window run against its baseline (same seed)."""
        return mcnemar_frame(self.runs, self.ledger.correctness)

    # --- answers -------------------------------------------------------------------------
    def table(self, tolerance: float | None = None, confidence: float | None = None,
              with_mcnemar: bool = True) -> pd.DataFrame:
        """Sensitivity table with verdicts at ``tolerance`` and ``confidence`` (config defaults)."""
        tolerance = self.tolerance if tolerance is None else tolerance
        confidence = self.confidence if confidence is None else confidence
        check_question(1, tolerance, confidence, None)
        if self.is_adaptive and self.adaptive_seeds is not None:
            from periodscan.adaptive import adaptive_settings, adaptive_table

            return adaptive_table(self.runs, adaptive_settings(self.config),
                                  self.adaptive_seeds, confidence, tolerance)
        return sensitivity_table(
            self.runs, self.schedule_epochs, confidence, tolerance=tolerance,
            family="all" if self.is_removal else "length",
            mcnemar=self.mcnemar if with_mcnemar else None)

    def plan(self, length: int | None = None, tolerance: float | None = None,
             confidence: float | None = None,
             production_epochs: int | None = None) -> PlanAnswer:
        """The planner's answer for a deficit of ``length`` epochs (default: shortest measured)."""
        if self.is_removal:
            raise SweepError("plan answers window designs (where may a deficit of L epochs "
                             "go?); this sweep is a removal design: read its table instead")
        table = self.table(tolerance, confidence, with_mcnemar=False)
        if length is None:
            if table.empty:
                raise SweepError(f"sweep {self.name!r} has no window runs yet")
            length = int(table.length.min())
        return plan_from_table(table, length, self.schedule_epochs, production_epochs,
                               sweep=self.name, budget=self.design.get("budget", "fixed_total"),
                               recovery_epochs=self.design.get("recovery_epochs"),
                               holm_family=self._adaptive_family())

    def _adaptive_family(self) -> int | None:
        """Candidate starts an adaptive design's Holm correction counted (None otherwise)."""
        if not self.is_adaptive or self.adaptive_seeds is None:
            return None
        from periodscan.adaptive import candidate_starts

        return len(candidate_starts(self.config))

    def status(self):
        """Progress of the sweep: runs and epochs done, failures, ETA (see periodscan.status)."""
        from periodscan.status import sweep_status

        return sweep_status(self)

    def report(self, **kwargs):
        """Write the report files into the sweep folder (see periodscan.report.write_report)."""
        from periodscan.report import write_report

        return write_report(self, **kwargs)


def load_sweep(sweep: str | Path, results_dir: str | Path = "results") -> SweepView:
    """Open a sweep folder (or a sweep name under ``results_dir``) for reading."""
    return SweepView(resolve_folder(sweep, results_dir))
