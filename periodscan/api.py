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

from functools import cached_property
from pathlib import Path
from typing import Any

import pandas as pd
import yaml

from periodscan.analysis.mcnemar import mcnemar_frame
from periodscan.analysis.planner import check_question, plan_from_table
from periodscan.analysis.recovery import join_recovery, recovery_frame
from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.designs import Design, Layout, load_design
from periodscan.errors import PeriodscanError, SweepError
from periodscan.ledger import FILE_NAME, Ledger
from periodscan.params import seed_list

CONFIG_NAME = "config.yaml"


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
        self.ledger = Ledger.read_only(self.folder)
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

    @cached_property
    def design(self) -> Design | None:
        """The sweep's design with its stored state (None when config.yaml is missing or from
        a version whose design this one cannot read: every run in the ledger is then used)."""
        if not self.config:
            return None
        try:
            return load_design(self.config, seed_list(self.config), self.meta)
        except PeriodscanError:
            return None

    @property
    def layout(self) -> Layout:
        """How views label this design's windows."""
        return self.design.layout if self.design else Layout()

    @property
    def design_summary(self) -> str:
        return self.design.summary() if self.design else "(no readable design in config.yaml)"

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
        """The ledger's meta values (JSON decoded): identity, command, design state, ..."""
        return self.ledger.meta_values()

    # --- frames --------------------------------------------------------------------------
    @cached_property
    def _all_runs(self) -> pd.DataFrame:
        return self.ledger.runs_frame()

    @cached_property
    def run_ids(self) -> set[str] | None:
        """Runs of the design in config.yaml (a ledger can also hold runs of earlier designs)."""
        if self.design is None:
            return None
        return set(self.design.runs_used(self._all_runs).run_id)

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
              with_mcnemar: bool = True, recovery: bool = False) -> pd.DataFrame:
        """Sensitivity table with verdicts at ``tolerance`` and ``confidence`` (config defaults);
        ``recovery`` joins in each window's gap trend (:meth:`recovery`; not in the CSV)."""
        tolerance = self.tolerance if tolerance is None else tolerance
        confidence = self.confidence if confidence is None else confidence
        check_question(1, tolerance, confidence, None)
        mcnemar = self.mcnemar if with_mcnemar else None
        classes = self.meta.get("num_classes")
        if self.design is None:
            table = sensitivity_table(self.runs, self.schedule_epochs,
                                      TableOptions(confidence=confidence, tolerance=tolerance,
                                                   num_classes=classes), mcnemar)
        else:
            table = self.design.table(self.runs, confidence, tolerance, mcnemar,
                                      num_classes=classes)
        return join_recovery(table, self.recovery(tolerance, confidence)) if recovery else table

    def recovery(self, tolerance: float | None = None,
                 confidence: float | None = None) -> pd.DataFrame:
        """Per window: the paired gap's trend over its last clean epochs, and whether it is
        still recovering (:func:`periodscan.analysis.recovery.recovery_frame`)."""
        design = self.design
        return recovery_frame(
            self.runs, self.epochs, self.schedule_epochs,
            tolerance=self.tolerance if tolerance is None else tolerance,
            confidence=self.confidence if confidence is None else confidence,
            family=design.family if design else "length",
            family_size=design.holm_family_size() if design else None)

    def plan(self, length: int | None = None, tolerance: float | None = None,
             confidence: float | None = None, production_epochs: int | None = None) -> Any:
        """The design's answer to its planning question (:meth:`Design.plan`): for window
        designs a :class:`PlanAnswer` for a deficit of ``length`` epochs (default: shortest
        measured)."""
        table = self.table(tolerance, confidence, with_mcnemar=False, recovery=True)
        if self.design is not None:
            return self.design.plan(self.runs, table, length=length,
                                    production_epochs=production_epochs, sweep=self.name)
        if length is None:
            if table.empty:
                raise SweepError(f"sweep {self.name!r} has no window runs yet")
            length = int(table.length.min())
        return plan_from_table(table, length, self.schedule_epochs, production_epochs,
                               sweep=self.name)

    def status(self):
        """Progress of the sweep: runs and epochs done, failures, ETA (analysis/progress.py)."""
        from periodscan.analysis.progress import sweep_status

        return sweep_status(self)

    def report(self, **kwargs):
        """Write the report files into the sweep folder (views/report.py)."""
        from periodscan.views.report import write_report

        return write_report(self, **kwargs)


def load_sweep(sweep: str | Path, results_dir: str | Path = "results") -> SweepView:
    """Open a sweep folder (or a sweep name under ``results_dir``) for reading."""
    return SweepView(resolve_folder(sweep, results_dir))
