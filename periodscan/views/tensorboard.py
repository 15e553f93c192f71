"""A sweep as TensorBoard event files: learning curves, the sensitivity table and its curve.

TensorBoard calls every folder that holds event files a run and overlays runs in one chart, so
the export folder holds one folder per thing to overlay::

    DIR/runs/<run id>/           one per run of the design, one point per epoch trained:
                                 loss/train, loss/test, accuracy/train, accuracy/test (fractions,
                                 as in the ledger), lr, deficit_on (1 while the deficit is on),
                                 seconds_per_epoch, and every monitor reading (fisher/total, ...)
    DIR/sensitivity/length_<n>/  one per deficit length (one in all for a design drawn as one
                                 line): sensitivity/damage, damage_low, damage_high, holm_low,
                                 holm_high, baseline_acc, run_acc (points), seeds; one point per
                                 window
    DIR/sweep/                   sensitivity/table (the table as text), sensitivity/csv (the
                                 table as sensitivity.csv writes it), sensitivity/curve (the
                                 sensitivity figure) and a custom-scalars chart of damage with its
                                 interval

Steps use the figures' epoch axis: a learning-curve point after the e-th epoch (the ledger's
0-based ``epoch``) sits at step e + 1, epochs of training completed; a window's point sits at
its start (the layout's x value: the end of removal for a removal design). Scalars are written
as TensorBoard's classic single-precision values, the form every reader of event files knows.

An export replaces the previous one: it is written into a temporary folder beside DIR and
swapped in when complete, so a failure leaves the last export as it was. A DIR that holds
files periodscan did not write is refused, not overwritten.
"""

from __future__ import annotations

import os
import secrets
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from periodscan.analysis.readings import fisher_by_epoch
from periodscan.designs.layout import Layout
from periodscan.errors import PeriodscanError, SweepError
from periodscan.views import figures
from periodscan.views.progress import runs_detail
from periodscan.views.report import CSV_FLOAT_FORMAT
from periodscan.views.tables import format_table
from periodscan.views.words import sweep_title

#: Default export folder, inside the sweep folder.
DEFAULT_FOLDER = "tensorboard"
#: A file in every export folder: an existing folder without it is not ours to replace.
MARKER = ".periodscan-export"
#: Ledger column of the epochs frame -> TensorBoard tag of the run's learning curve.
EPOCH_TAGS = {
    "train_loss": "loss/train",
    "test_loss": "loss/test",
    "train_acc": "accuracy/train",
    "test_acc": "accuracy/test",
    "lr": "lr",
    "deficit_on": "deficit_on",
    "seconds": "seconds_per_epoch",
}
#: Sensitivity-table columns written per window, as tag ``sensitivity/<column>``.
TABLE_COLUMNS = ("damage", "damage_low", "damage_high", "holm_low", "holm_high",
                 "baseline_acc", "run_acc", "seeds")
#: The custom-scalars chart: damage with its interval, one band per length.
MARGIN_LAYOUT = {"sensitivity": {"damage and its interval, by window": [
    "Margin", ["sensitivity/damage", "sensitivity/damage_low", "sensitivity/damage_high"]]}}


@dataclass
class TensorboardExport:
    """What :func:`write_tensorboard` wrote."""

    directory: Path
    runs: int  # run folders with learning curves
    windows: int  # windows with a damage value
    image: bool  # whether the sensitivity curve was drawn (some window has finished)


def summary_writer_class():
    """torch's ``SummaryWriter``, or one line saying how to install what it needs."""
    try:
        from torch.utils.tensorboard import SummaryWriter
    except ImportError as err:
        raise PeriodscanError(
            f"writing TensorBoard files needs the tensorboard package ({err}); install it "
            'with: pip install "periodscan[tensorboard]"') from None
    return SummaryWriter


def check_target(directory: Path) -> None:
    """Refuse a folder that exists and holds anything an earlier export did not write."""
    if directory.exists() and not directory.is_dir():
        raise SweepError(f"the TensorBoard folder {directory} exists and is not a folder; "
                         "choose another --tensorboard DIR")
    if directory.is_dir() and any(directory.iterdir()) and not (directory / MARKER).is_file():
        raise SweepError(f"the TensorBoard folder {directory} holds files periodscan export did "
                         "not write; choose another --tensorboard DIR or empty it")


def write_tensorboard(view, directory: str | Path | None = None, *,
                      tolerance: float | None = None,
                      confidence: float | None = None) -> TensorboardExport:
    """Write the sweep of ``view`` (a :class:`~periodscan.api.SweepView`) to ``directory``.

    ``directory`` defaults to ``<sweep folder>/tensorboard``; ``tolerance`` and ``confidence``
    (default: the sweep's) decide the table's verdicts. Works on a partial sweep: runs and
    windows without results are left out. View it with ``tensorboard --logdir DIR``.
    """
    writer_class = summary_writer_class()
    directory = Path(directory) if directory is not None else view.folder / DEFAULT_FOLDER
    check_target(directory)
    table = view.table(tolerance, confidence)
    tolerance = view.tolerance if tolerance is None else tolerance
    staging = make_staging(directory)
    try:
        (staging / MARKER).write_text(f"written by periodscan export from {view.folder}\n")
        runs = write_learning_curves(writer_class, staging / "runs", view.epochs, view.extras)
        windows = write_table_scalars(writer_class, staging / "sensitivity", table, view.layout)
        image = write_sweep_summary(writer_class, staging / "sweep", view, table, tolerance)
        swap_in(staging, directory)
    finally:
        shutil.rmtree(staging, ignore_errors=True)
    return TensorboardExport(directory, runs, windows, image)


def make_staging(directory: Path) -> Path:
    """An empty folder beside ``directory`` (same file system, so the swap is a rename), with
    the permissions the umask gives (not mkdtemp's owner-only ones: TensorBoard may run as
    another user)."""
    staging = directory.with_name(f".{directory.name}.{os.getpid()}.{secrets.token_hex(4)}")
    try:
        directory.parent.mkdir(parents=True, exist_ok=True)
        staging.mkdir()
        return staging
    except OSError as err:
        raise SweepError(f"cannot write the TensorBoard folder {directory}: "
                         f"{err.strerror or err}") from None


def swap_in(staging: Path, directory: Path) -> None:
    """Put the finished export at ``directory``, removing the earlier one only afterwards."""
    old = None
    if directory.exists():
        old = directory.with_name(f"{staging.name}.old")
        directory.rename(old)
    staging.rename(directory)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _scalars(writer, frame: pd.DataFrame, tags: dict[str, str], step: pd.Series) -> None:
    """One scalar per row and column of ``frame`` (missing values left out)."""
    for column, tag in tags.items():
        if column not in frame:
            continue
        for at, value in zip(step, frame[column], strict=True):
            if pd.notna(value):
                writer.add_scalar(tag, float(value), int(at))


def write_learning_curves(writer_class, root: Path, epochs: pd.DataFrame,
                          extras: pd.DataFrame) -> int:
    """One run folder per run id: its per-epoch metrics and monitor readings."""
    readings = ({run_id: group for run_id, group in extras.groupby("run_id")}
                if not extras.empty else {})
    count = 0
    for run_id, group in epochs.groupby("run_id", sort=True):
        group = group.sort_values("epoch")
        with writer_class(str(root / str(run_id).replace("/", "_"))) as writer:
            _scalars(writer, group, EPOCH_TAGS, group.epoch + 1)
            for name, series in readings.get(run_id, extras.iloc[:0]).groupby("name"):
                series = series.sort_values("epoch")
                _scalars(writer, series, {"value": str(name)}, series.epoch + 1)
        count += 1
    return count


def table_groups(table: pd.DataFrame, layout: Layout) -> list[tuple[str, pd.DataFrame]]:
    """(run folder name, rows): one per deficit length, or one in all."""
    if not layout.per_length:
        return [("all", table)]
    return [(f"length_{int(n)}", group) for n, group in table.groupby("length")]


def write_table_scalars(writer_class, root: Path, table: pd.DataFrame, layout: Layout) -> int:
    """The table's numbers per window, keyed by the window's place on the curve's axis."""
    table = table[table.damage.notna()]
    tags = {column: f"sensitivity/{column}" for column in TABLE_COLUMNS}
    for name, group in table_groups(table, layout):
        group = group.assign(x=figures.axis_values(group, layout)).sort_values("x")
        with writer_class(str(root / name)) as writer:
            _scalars(writer, group, tags, group.x)
    return len(table)


def table_markdown(view, table: pd.DataFrame) -> str:
    """Title, progress and the aligned table, as Markdown TensorBoard's text tab renders."""
    status = view.status()
    head = (f"**{sweep_title(view.config)}**\n\nruns: {status.runs_done} of "
            f"{status.runs_total} finished ({runs_detail(status) or 'none yet'})")
    return f"{head}\n\n```\n{format_table(table, view.layout)}\n```"


def curve_pixels(view, table: pd.DataFrame, tolerance: float) -> np.ndarray | None:
    """The sensitivity figure as the report draws it, as RGB pixels (None: nothing finished)."""
    from PIL import Image

    if table.empty or not (table.seeds > 0).any():
        return None
    with tempfile.TemporaryDirectory() as tmp:
        path = figures.sensitivity_curve(
            table, Path(tmp) / "sensitivity.png", title=sweep_title(view.config),
            layout=view.layout, tolerance=tolerance, epochs=view.schedule_epochs,
            fisher=fisher_by_epoch(view.extras))
        with Image.open(path) as image:
            return np.asarray(image.convert("RGB"))


def write_sweep_summary(writer_class, root: Path, view, table: pd.DataFrame,
                        tolerance: float) -> bool:
    """The table as text (aligned and as CSV), the curve as an image, the margin chart."""
    csv = table.to_csv(index=False, float_format=CSV_FLOAT_FORMAT)
    pixels = curve_pixels(view, table, tolerance)
    with writer_class(str(root)) as writer:
        writer.add_text("sensitivity/table", table_markdown(view, table), 0)
        writer.add_text("sensitivity/csv", f"```\n{csv}```", 0)
        writer.add_custom_scalars(MARGIN_LAYOUT)
        if pixels is not None:
            writer.add_image("sensitivity/curve", pixels, 0, dataformats="HWC")
    return pixels is not None
