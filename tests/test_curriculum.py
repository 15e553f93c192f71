"""The curriculum deficit: its easy set, its determinism, its config, and exact branching.

The reference model's manual SGD step is checked against torch autograd of
``torch.nn.functional.cross_entropy``; a curriculum branch is checked, weights and per-epoch
metrics, against the same run trained from scratch (as tests/test_branching.py does).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import torch
import torch.nn.functional as F

from periodscan.analysis.onset_plan import DAMAGE
from periodscan.config import TRAINING_KEYS
from periodscan.data.base import TensorData
from periodscan.deficits import Curriculum
from periodscan.deficits.curriculum import (
    REFERENCE_BATCH,
    easiest_per_class,
    feature_scale,
    reference_scores,
)
from periodscan.engine import checkpoint
from periodscan.engine.segment import SegmentJob, run_segment, train_from_scratch
from periodscan.errors import ConfigError
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger
from periodscan.seeding import ONCE, generator

CURRICULUM = {"_target_": "periodscan.deficits.Curriculum", "keep": 0.5,
              "reference_epochs": 1, "reference_lr": 0.1}


def toy_data(n: int = 90, classes: int = 3, seed: int = 0) -> TensorData:
    """Separable-ish signals: class c has mean c on every position, plus noise."""
    gen = torch.Generator().manual_seed(seed)
    y = torch.arange(n) % classes
    x = y[:, None, None].float() + 0.8 * torch.randn(n, 1, 12, generator=gen)
    return TensorData(x, y, x[:30].clone(), y[:30].clone(), classes, name="toy")


def test_same_generator_gives_the_same_easy_set_and_no_global_draw():
    data = toy_data()
    state = torch.get_rng_state()
    a, b, c = Curriculum(keep=0.4), Curriculum(keep=0.4), Curriculum(keep=0.4)
    a.prepare(data, generator(3, ONCE, "deficit"))
    b.prepare(data, generator(3, ONCE, "deficit"))
    assert torch.equal(torch.get_rng_state(), state)  # torch's global RNG untouched
    assert torch.equal(a.easy, b.easy)
    order = torch.randperm(len(data.y_train), generator=torch.Generator().manual_seed(1))
    assert torch.equal(a.select(order, data, generator(3, 5, "deficit")),
                       b.select(order, data, generator(3, 9, "deficit")))
    # Guard against a vacuous equality: another seed's order trains another reference model.
    s3 = reference_scores(data, generator(3, ONCE, "deficit"))
    s4 = reference_scores(data, generator(4, ONCE, "deficit"))
    assert not torch.equal(s3, s4)
    c.prepare(data, generator(4, ONCE, "deficit"))
    assert c.easy.sum() == a.easy.sum()


def test_select_keeps_the_easiest_fraction_of_every_class_in_epoch_order():
    data = toy_data()
    deficit = Curriculum(keep=0.4)
    deficit.prepare(data, generator(0, ONCE, "deficit"))
    order = torch.randperm(len(data.y_train), generator=torch.Generator().manual_seed(2))
    chosen = deficit.select(order, data, generator(0, 0, "deficit"))
    assert torch.equal(chosen, order[deficit.easy[order]])  # epoch order kept
    counts = torch.bincount(data.y_train[chosen], minlength=3)
    assert counts.tolist() == [12, 12, 12]  # 40% of 30 per class
    scores = reference_scores(data, generator(0, ONCE, "deficit"))
    for c in range(3):
        inside = scores[chosen][data.y_train[chosen] == c]
        left = scores[~deficit.easy & (data.y_train == c)]
        assert inside.min() >= left.max()


def test_easiest_per_class_breaks_ties_by_index_and_keeps_one_per_class():
    scores = torch.tensor([0.5, 0.5, 0.9, 0.1, 0.5, 0.2], dtype=torch.float64)
    labels = torch.tensor([0, 0, 0, 1, 0, 2])
    mask = easiest_per_class(scores, labels, keep=0.5)
    # Class 0 keeps 2 of 4: index 2 (0.9), then index 0 of the three tied at 0.5.
    assert mask.tolist() == [True, False, True, True, False, True]


def test_reference_model_step_matches_autograd_cross_entropy():
    data = toy_data(n=40)
    mean, sd = feature_scale(data)
    x_all = (data.x_train.reshape(40, -1).double() - mean) / sd
    weights = torch.zeros(x_all.shape[1], 3, dtype=torch.float64, requires_grad=True)
    bias = torch.zeros(3, dtype=torch.float64, requires_grad=True)
    order = torch.randperm(40, generator=generator(7, ONCE, "deficit"))
    for begin in range(0, 40, REFERENCE_BATCH):
        idx = order[begin:begin + REFERENCE_BATCH]
        # Source: torch.nn.functional.cross_entropy (mean over the batch) and its autograd.
        loss = F.cross_entropy(x_all[idx] @ weights + bias, data.y_train[idx])
        grad_w, grad_b = torch.autograd.grad(loss, (weights, bias))
        with torch.no_grad():
            weights -= 0.3 * grad_w
            bias -= 0.3 * grad_b
    with torch.no_grad():
        probs = torch.softmax(x_all @ weights + bias, dim=1)
    expected = probs.gather(1, data.y_train[:, None]).squeeze(1)
    mine = reference_scores(data, generator(7, ONCE, "deficit"), epochs=1, lr=0.3)
    torch.testing.assert_close(mine, expected, rtol=1e-10, atol=1e-12)
    # The standardisation is the population mean and sd of each feature.
    flat = data.x_train.reshape(40, -1).double()
    torch.testing.assert_close(mean, flat.mean(0))
    torch.testing.assert_close(sd, flat.std(0, unbiased=False))


@pytest.mark.parametrize("changes, field", [
    ({"keep": 0.0}, "deficit.keep"),
    ({"keep": 1.5}, "deficit.keep"),
    ({"keep": "half"}, "deficit.keep"),
    ({"reference_epochs": 0}, "deficit.reference_epochs"),
    ({"reference_epochs": 1.5}, "deficit.reference_epochs"),
    ({"reference_lr": 0.0}, "deficit.reference_lr"),
])
def test_bad_curriculum_values_name_the_field(changes, field):
    with pytest.raises(ConfigError, match=f"'{field}' parameter must be"):
        Curriculum(**changes)


def test_curriculum_config_file_builds_the_deficit():
    from hydra.utils import instantiate

    from periodscan.config import compose_config, to_plain

    plain = to_plain(compose_config(["deficit=curriculum", "design=removal"]))
    deficit = instantiate(plain["deficit"])
    assert isinstance(deficit, Curriculum) and deficit.keep == 0.5


def _replay_leaf(prep, run_id):
    """Re-run a run's last segment from its stored parent checkpoint, keeping the end state."""
    leaf = prep.tree.segments[prep.tree.paths[run_id][-1]]
    ledger = Ledger(prep.folder)
    name, _ = ledger.checkpoints()[leaf.parent]
    ledger.close()
    job = SegmentJob(segment_id=leaf.segment_id, config={k: prep.plain[k] for k in TRAINING_KEYS},
                     seed=leaf.seed, begin=leaf.begin, end=leaf.end, deficit_on=leaf.deficit_on,
                     parent_checkpoint=(prep.folder / name).read_bytes(), keep_checkpoint=True,
                     evaluate_at_end=True)
    result = run_segment(job)
    assert result.error is None, result.error
    return checkpoint.from_bytes(result.checkpoint)


def test_curriculum_branch_equals_from_scratch_and_plans_its_end(make_config):
    cfg = make_config(deficit=CURRICULUM, seeds=1,
                      design={"kind": "removal", "until": [2, 5], "budget": "fixed_total",
                              "recovery_epochs": None})
    run_sweep(cfg, quiet=True)
    prep = prepare(cfg)
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    epochs = Ledger(prep.folder).epochs_frame()
    for run_id in ("seed0-w0+2-to8", "seed0-w0+5-to8"):
        # until 5 continues the deficit from the checkpoint at 2: prepare() runs again there.
        model, _, records = train_from_scratch(training, prep.tree.runs[run_id])
        branch = _replay_leaf(prep, run_id)
        for key, tensor in model.state_dict().items():
            assert torch.equal(tensor, branch["model"][key]), (run_id, key)
        mine = epochs[epochs.run_id == run_id].sort_values("epoch")
        reference = pd.DataFrame([vars(r) for r in records])
        for column in ("train_loss", "train_acc", "test_acc"):
            np.testing.assert_array_equal(mine[column].to_numpy(), reference[column].to_numpy())
    # The curriculum changes training (not a vacuous equality): epoch 0 sees half the data.
    base, _, base_records = train_from_scratch(training, prep.tree.runs["seed0-baseline-to8"])
    assert base_records[0].train_loss != records[0].train_loss

    from periodscan.api import load_sweep

    with load_sweep(prep.folder) as view:
        answer = view.plan(tolerance=50.0)
    assert answer.judged == DAMAGE and [r.epoch for r in answer.rows] == [2, 5]
