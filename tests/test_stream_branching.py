"""Exact branching on streamed data: a branch read through loader workers equals the run
trained from scratch, bit for bit (DESIGN.md section 4, as tests/test_branching.py checks it
for in-memory data).

Two streamed paths: an image folder (``data=image_folder_stream``, two loader workers) and a
user's Dataset of PNG files (``data=dataset``, one worker) trained by a user's step (mixup,
tests/user_steps.py, drawing from the generator it is handed). The model has BatchNorm and
dropout, the schedule shifts and flips (augmentation after loading), the deficit blurs.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
from PIL import Image
from stream_datasets import write_pngs

from periodscan.engine import checkpoint
from periodscan.engine.segment import SegmentJob, run_segment, train_from_scratch
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger


def image_tree(root) -> None:
    """Two classes of 10x10 RGB images told apart by a bar's position, 60 each."""
    rng = np.random.default_rng(2)
    for c, name in enumerate(("left", "right")):
        (root / name).mkdir(parents=True)
        for i in range(60):
            pixels = rng.integers(0, 120, (10, 10, 3))
            pixels[:, 2 + 5 * c] = 250
            Image.fromarray(pixels.astype(np.uint8)).save(root / name / f"{i}.png")


def streamed_data(kind: str, tmp_path) -> dict:
    if kind == "folder":
        image_tree(tmp_path / "img")
        return {"_target_": "periodscan.data.folder_stream.stream_image_folder",
                "root": str(tmp_path / "img"), "image_size": None, "num_workers": 2}
    write_pngs(str(tmp_path / "png"), 150, size=10)
    return {"_target_": "periodscan.data.stream.load_dataset", "num_workers": 1,
            "train": {"_target_": "stream_datasets.PngFiles", "root": str(tmp_path / "png")}}


def replay_leaf(prep, run_id):
    """Re-run a run's last segment from its stored parent checkpoint, keeping the end state."""
    leaf = prep.tree.segments[prep.tree.paths[run_id][-1]]
    ledger = Ledger(prep.folder)
    name, _ = ledger.checkpoints()[leaf.parent]
    ledger.close()
    job = SegmentJob(segment_id=leaf.segment_id, config=prep.training, seed=leaf.seed,
                     begin=leaf.begin, end=leaf.end, deficit_on=leaf.deficit_on,
                     parent_checkpoint=(prep.folder / name).read_bytes(), keep_checkpoint=True,
                     evaluate_at_end=True)
    result = run_segment(job)
    assert result.error is None, result.error
    return checkpoint.from_bytes(result.checkpoint)


STEPS = {"folder": {"_target_": "periodscan.steps.CrossEntropy"},
         "dataset": {"_target_": "user_steps.Mixup", "alpha": 0.4, "max_grad_norm": 1.0}}


@pytest.mark.parametrize("kind", ["folder", "dataset"])
def test_streamed_branch_equals_from_scratch(make_config, tmp_path, kind):
    cfg = make_config(seeds=1, data=streamed_data(kind, tmp_path), step=STEPS[kind],
                      model={"_target_": "periodscan.models.CNN2d", "channels": 8,
                             "batchnorm": True, "dropout": 0.2},
                      design__starts=[1, 3], design__lengths=[2],
                      schedule__batch_size=32,
                      schedule__augment={"max_shift": 1, "hflip": True})
    outcome = run_sweep(cfg, quiet=True)
    prep = prepare(cfg)
    epochs = Ledger(prep.folder).epochs_frame()
    branched = [rid for rid, path in prep.tree.paths.items()
                if len(path) > 1 and not prep.tree.runs[rid].is_baseline]
    assert branched, "the design produced no branched run"
    for run_id in branched:
        model, optimizer, records = train_from_scratch(prep.training, prep.tree.runs[run_id])
        reference = pd.DataFrame([vars(r) for r in records])
        branch = replay_leaf(prep, run_id)
        for key, tensor in model.state_dict().items():
            assert torch.equal(tensor, branch["model"][key]), (run_id, key)
        mine = epochs[epochs.run_id == run_id].sort_values("epoch")
        for column in ("train_loss", "train_acc", "test_loss", "test_acc", "lr"):
            np.testing.assert_array_equal(mine[column].to_numpy(), reference[column].to_numpy(),
                                          err_msg=f"{run_id} {column}")
        assert outcome.runs.set_index("run_id").loc[run_id, "test_acc"] == \
            reference.test_acc.iloc[-1]


def test_the_streamed_deficit_changes_the_numbers(make_config, tmp_path):
    """Guard against a vacuous equality: a streamed window run differs from its baseline."""
    cfg = make_config(seeds=1, data=streamed_data("dataset", tmp_path),
                      model={"_target_": "periodscan.models.CNN2d", "channels": 8})
    prep = prepare(cfg)
    runs = list(prep.tree.runs.values())
    window = next(r for r in runs if not r.is_baseline)
    base = next(r for r in runs if r.is_baseline)
    m1, _, _ = train_from_scratch(prep.training, window)
    m2, _, _ = train_from_scratch(prep.training, base)
    assert any(not torch.equal(a, b) for a, b in
               zip(m1.state_dict().values(), m2.state_dict().values(), strict=True))
