"""docs/read_a_sweep.py runs on a real tiny sweep and reads what the ledger holds."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import load_script
from PIL import Image

from periodscan.api import load_sweep
from periodscan.jobs.sweep import run_sweep

SCRIPT = Path(__file__).resolve().parents[1] / "docs" / "read_a_sweep.py"


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("docs")
    run_sweep(["experiment=tiny", f"results_dir={root}"], quiet=True)
    return root / "tiny"


def test_script_saves_the_figure_and_names_the_worst_window(folder, tmp_path):
    png = tmp_path / "sweep.png"
    done = subprocess.run([sys.executable, str(SCRIPT), "tiny", str(png), "--results-dir",
                           str(folder.parent)], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    with Image.open(png) as image:
        assert image.format == "PNG" and image.size == (1100, 400)  # figsize 11 x 4 at 100 dpi
    with load_sweep(folder) as view:
        worst = view.table().sort_values("damage").iloc[-1]
    assert done.stdout.splitlines() == [
        f"most damaging window: start {worst.start}, length {worst.length}: "
        f"{worst.damage:+.2f} points ({worst.damage_low:+.2f} to {worst.damage_high:+.2f})",
        f"figure: {png}"]


def test_learning_curves_end_at_each_runs_final_accuracy(folder):
    script = load_script(SCRIPT)
    with load_sweep(folder) as view:
        curves = script.learning_curves(view.epochs, 3)
        runs = view.runs
    assert list(curves.index) == list(range(1, 9))  # epochs trained
    assert list(curves.columns) == ["baseline", "deficit from epoch 0", "deficit from epoch 2",
                                    "deficit from epoch 4"]
    # The runs table keeps each run's final held-out accuracy apart from the epoch rows.
    final = runs.assign(kind=["baseline" if n == 0 else f"deficit from epoch {s}"
                              for s, n in zip(runs.start_epoch, runs.length, strict=True)])
    expected = 100 * final.groupby("kind").test_acc.mean()
    np.testing.assert_allclose(curves.loc[8], expected[curves.columns], rtol=1e-12)
