"""Exact branching: a run assembled from shared tree segments equals the run trained alone.

This is the contract of DESIGN.md section 4: same final weights, same per-epoch metrics, bit for
bit on CPU at a fixed thread count. Checked with BatchNorm and dropout in the model, for a
window design, a removal design and a fixed_recovery budget, and with Adam.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch

from periodscan.config import TRAINING_KEYS
from periodscan.engine import checkpoint
from periodscan.engine.segment import SegmentJob, run_segment, train_from_scratch
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger


def _replay_leaf(prep, run_id):
    """Re-run a run's last segment from its stored parent checkpoint, keeping the end state."""
    leaf = prep.tree.segments[prep.tree.paths[run_id][-1]]
    ledger = Ledger(prep.folder)
    name, _ = ledger.checkpoints()[leaf.parent]
    ledger.close()
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    job = SegmentJob(segment_id=leaf.segment_id, config=training, seed=leaf.seed,
                     begin=leaf.begin, end=leaf.end, deficit_on=leaf.deficit_on,
                     parent_checkpoint=(prep.folder / name).read_bytes(), keep_checkpoint=True,
                     evaluate_at_end=True)
    result = run_segment(job)
    assert result.error is None, result.error
    return checkpoint.from_bytes(result.checkpoint)


DESIGNS = {
    "window": {},
    "removal": {"design": {"kind": "removal", "until": [2, 5], "budget": "fixed_total",
                           "recovery_epochs": None}},
    "fixed_recovery": {"design": {"kind": "window", "starts": [1, 3], "lengths": [2],
                                  "budget": "fixed_recovery", "recovery_epochs": 3}},
    "adam": {"schedule__optimizer": {"name": "adam", "lr": 0.003, "weight_decay": 1e-4},
             "schedule__lr_schedule": {"kind": "cosine", "min_lr": 1e-4}},
}


@pytest.mark.parametrize("variant", sorted(DESIGNS))
def test_branch_equals_from_scratch(make_config, variant):
    cfg = make_config(seeds=1, **DESIGNS[variant])
    outcome = run_sweep(cfg, quiet=True)
    prep = prepare(cfg)
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    epochs = Ledger(prep.folder).epochs_frame()

    # Every window run whose last segment has a stored parent (i.e. a real branch).
    branched = [rid for rid, path in prep.tree.paths.items()
                if len(path) > 1 and not prep.tree.runs[rid].is_baseline]
    assert branched, "the design produced no branched run"
    for run_id in branched:
        run = prep.tree.runs[run_id]
        model, optimizer, records = train_from_scratch(training, run)
        reference = pd.DataFrame([vars(r) for r in records])

        branch_state = _replay_leaf(prep, run_id)
        for key, tensor in model.state_dict().items():
            assert torch.equal(tensor, branch_state["model"][key]), (run_id, key)
        scratch_opt = optimizer.state_dict()["state"]
        for idx, slots in scratch_opt.items():
            for slot, value in slots.items():
                assert torch.equal(value, branch_state["optimizer"]["state"][idx][slot])

        mine = epochs[epochs.run_id == run_id].sort_values("epoch")
        for column in ("train_loss", "train_acc", "test_loss", "test_acc", "lr"):
            np.testing.assert_array_equal(mine[column].to_numpy(), reference[column].to_numpy(),
                                          err_msg=f"{run_id} {column}")
        final = outcome.runs.set_index("run_id").loc[run_id, "test_acc"]
        assert final == reference.test_acc.iloc[-1]


def test_deficit_changes_the_numbers(make_config):
    """Guard against a vacuous equality: a window run must differ from its baseline."""
    cfg = make_config(seeds=1)
    prep = prepare(cfg)
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    runs = list(prep.tree.runs.values())
    window = next(r for r in runs if not r.is_baseline)
    base = next(r for r in runs if r.is_baseline)
    m1, _, _ = train_from_scratch(training, window)
    m2, _, _ = train_from_scratch(training, base)
    assert any(not torch.equal(a, b) for a, b in
               zip(m1.state_dict().values(), m2.state_dict().values(), strict=True))


def test_tree_saves_epochs(make_config):
    cfg = make_config()
    prep = prepare(cfg)
    # Runs: baseline + 3 starts x 2 lengths per seed, all ending at epoch 8 (fixed_total).
    assert prep.tree.epochs_unshared == 2 * 7 * 8
    assert prep.tree.epochs_shared < prep.tree.epochs_unshared
