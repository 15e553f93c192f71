"""The README's worked example (docs/own_pipeline): a user's Dataset, model and training step.

Run as the README says, at reduced size: the Dataset is read through the streamed path, the
user's model and focal-loss step train, and the sweep's table and plan come out; the
fingerprint names the user's code it hashed.
"""

from __future__ import annotations

import json
import os
import sqlite3
import subprocess
import sys
from pathlib import Path

import pandas as pd

EXAMPLE = Path(__file__).resolve().parents[1] / "docs" / "own_pipeline"
REDUCED = ["experiment=rooftops", "seeds=2", "schedule.epochs=6", "design.starts=[0,3]",
           "data.train.n=400", "data.test.n=200", "-q"]


def periodscan(*args: str) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(EXAMPLE)}
    return subprocess.run([sys.executable, "-m", "periodscan.cli", *args], capture_output=True,
                          text=True, env=env, timeout=600)


def test_the_worked_example_runs_and_reads(tmp_path):
    config_dir = ["--config-dir", str(EXAMPLE / "configs")]
    done = periodscan("sweep", *REDUCED, f"results_dir={tmp_path}", *config_dir)
    assert done.returncode == 0, done.stderr
    folder = tmp_path / "rooftops"
    table = pd.read_csv(folder / "sensitivity.csv")
    assert list(table.start) == [0, 3] and set(table.seeds) == {2}
    assert table.baseline_acc.between(25.0, 100.0).all()  # percent; 4 classes: chance is 25
    with sqlite3.connect(folder / "ledger.sqlite") as conn:
        meta = dict(conn.execute("SELECT key, value FROM meta").fetchall())
    code = json.loads(meta["fingerprint"])["code"]
    targets = {entry["target"] for entry in code.values()}
    assert {"rooftops.Rooftops", "roofnet.RoofNet", "focal.FocalStep"} <= targets
    plan = periodscan("plan", "rooftops", "--results-dir", str(tmp_path), "--json")
    assert plan.returncode == 0, plan.stderr
    answer = json.loads(plan.stdout)
    assert [s["start"] for s in answer["starts"]] == [0, 3]


def test_focal_step_is_cross_entropy_at_gamma_zero():
    # Reference: torch's own F.cross_entropy; focal loss with gamma = 0 is plain cross-entropy.
    import torch
    import torch.nn.functional as F

    sys.path.insert(0, str(EXAMPLE))
    try:
        from focal import FocalStep
    finally:
        sys.path.remove(str(EXAMPLE))
    logits = torch.randn(8, 4, generator=torch.Generator().manual_seed(0))
    y = torch.arange(8) % 4
    loss = FocalStep(gamma=0.0).loss(logits, y, torch.Generator())
    assert torch.allclose(loss, F.cross_entropy(logits, y))
