"""Exact branching: a run assembled from shared tree segments equals the run trained alone.

This is the contract of DESIGN.md section 4: same final weights, same per-epoch metrics, bit for
bit on CPU at a fixed thread count. Checked with BatchNorm and dropout in the model, for a
window design, a removal design and a fixed_recovery budget, with Adam, with torch.optim's
RMSprop and StepLR by ``_target_``, and with a user step (mixup, drawing from its generator,
gradients clipped) under AdamW and OneCycleLR, whose state travels in the checkpoints.
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
    "torch_optim": {"schedule__optimizer": {"_target_": "torch.optim.RMSprop", "lr": 0.003,
                                            "alpha": 0.9, "centered": True},
                    "schedule__lr_schedule": None,
                    "schedule__lr_scheduler": {"_target_": "torch.optim.lr_scheduler.StepLR",
                                               "step_size": 3, "gamma": 0.5}},
    "user_step": {"step": {"_target_": "user_steps.Mixup", "alpha": 0.4, "max_grad_norm": 1.0},
                  "schedule__optimizer": {"_target_": "torch.optim.AdamW", "lr": 0.003},
                  "schedule__lr_schedule": None,
                  "schedule__lr_scheduler": {"_target_": "torch.optim.lr_scheduler.OneCycleLR",
                                             "max_lr": 0.01, "total_steps": 8}},
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


# --- deficit variants: severity levels and several deficits on one clean trunk per seed ------

VARIANT_DESIGNS = {
    # Blur at three levels, mildest first (design.severity).
    "severity": {"design": {"kind": "window", "starts": [1, 3], "lengths": [2],
                            "budget": "fixed_total", "recovery_epochs": None,
                            "severity": {"param": "sigma", "levels": [1.0, 2.0, 4.0]},
                            "deficits": None}},
    # Three deficits by option name (design.deficits).
    "deficits": {"design": {"kind": "window", "starts": [1, 3], "lengths": [2],
                            "budget": "fixed_total", "recovery_epochs": None,
                            "severity": None, "deficits": ["blur", "label_noise", "crop"]}},
}


def _variant_training(prep, run) -> dict:
    """The training config a run of a variant trains with: the variant's deficit block."""
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    if run.variant:
        training["deficit"] = prep.design.variant_blocks()[run.variant]
    return training


def _replay_variant_leaf(prep, run_id):
    """Re-run a variant run's last segment from its stored parent checkpoint."""
    run = prep.tree.runs[run_id]
    leaf = prep.tree.segments[prep.tree.paths[run_id][-1]]
    ledger = Ledger(prep.folder)
    name, _ = ledger.checkpoints()[leaf.parent]
    ledger.close()
    job = SegmentJob(segment_id=leaf.segment_id, config=_variant_training(prep, run),
                     seed=leaf.seed, begin=leaf.begin, end=leaf.end, deficit_on=leaf.deficit_on,
                     parent_checkpoint=(prep.folder / name).read_bytes(), keep_checkpoint=True,
                     evaluate_at_end=True)
    result = run_segment(job)
    assert result.error is None, result.error
    return checkpoint.from_bytes(result.checkpoint)


def _clean_trunk_once_per_seed(tree, seeds, epochs):
    """One root per seed, and the clean segments without a variant are exactly one trunk of
    ``epochs`` per seed: every variant forks from it."""
    for seed in seeds:
        roots = [s for s in tree.roots() if s.seed == seed]
        assert len(roots) == 1 and not roots[0].deficit_on and roots[0].variant == ""
        trunk = [s for s in tree.segments.values()
                 if s.seed == seed and s.variant == "" and not s.deficit_on]
        assert sum(s.epochs for s in trunk) == epochs
        assert all(s.variant for s in tree.segments.values() if s.seed == seed and s.deficit_on)


@pytest.mark.parametrize("kind", sorted(VARIANT_DESIGNS))
def test_variant_branch_equals_from_scratch(make_config, kind):
    cfg = make_config(seeds=1, **VARIANT_DESIGNS[kind])
    outcome = run_sweep(cfg, quiet=True)
    prep = prepare(cfg)
    _clean_trunk_once_per_seed(prep.tree, prep.seeds, 8)
    # 3 variants x starts 1 and 3 (2-epoch windows) on an 8-epoch schedule: the trunk once (8),
    # then per variant 7 + 5 epochs of branches = 44; from scratch 6 window runs + 1 baseline.
    assert (prep.tree.epochs_shared, prep.tree.epochs_unshared) == (44, 56)
    assert set(outcome.runs.variant) == {"", *prep.design.variant_blocks()}
    epochs = Ledger(prep.folder).epochs_frame()
    finals = outcome.runs.set_index("run_id").test_acc
    branched = [rid for rid, run in prep.tree.runs.items() if not run.is_baseline]
    assert len(branched) == 6
    for run_id in branched:
        run = prep.tree.runs[run_id]
        assert run.variant and len(prep.tree.paths[run_id]) > 1
        model, optimizer, records = train_from_scratch(_variant_training(prep, run), run)
        reference = pd.DataFrame([vars(r) for r in records])
        branch_state = _replay_variant_leaf(prep, run_id)
        for key, tensor in model.state_dict().items():
            assert torch.equal(tensor, branch_state["model"][key]), (run_id, key)
        for idx, slots in optimizer.state_dict()["state"].items():
            for slot, value in slots.items():
                assert torch.equal(value, branch_state["optimizer"]["state"][idx][slot])
        mine = epochs[epochs.run_id == run_id].sort_values("epoch")
        for column in ("train_loss", "train_acc", "test_loss", "test_acc", "lr"):
            np.testing.assert_array_equal(mine[column].to_numpy(), reference[column].to_numpy(),
                                          err_msg=f"{run_id} {column}")
        assert finals[run_id] == reference.test_acc.iloc[-1]


def test_variants_train_different_models(make_config):
    """Guard against a vacuous equality: two levels of one window must not train the same."""
    cfg = make_config(seeds=1, **VARIANT_DESIGNS["severity"])
    prep = prepare(cfg)
    mild, severe = (next(r for r in prep.tree.runs.values() if r.variant == key and r.start == 1)
                    for key in ("sigma=1", "sigma=4"))
    m1, _, _ = train_from_scratch(_variant_training(prep, mild), mild)
    m2, _, _ = train_from_scratch(_variant_training(prep, severe), severe)
    assert any(not torch.equal(a, b) for a, b in
               zip(m1.state_dict().values(), m2.state_dict().values(), strict=True))
