"""The ``device`` setting: resolution, per-worker devices, determinism, CPU-only checkpoints.

This project's machines have no GPU: the CUDA tests below are skipped here and have not been
run. What runs everywhere: ``device=cpu`` and ``device=auto`` (which picks cuda, then mps,
then cpu) train, resolve before the identity is taken, and leave today's numbers and
checkpoint bytes exactly as they were.
"""

from __future__ import annotations

import io
import os

import pytest
import torch
import yaml

from periodscan.config import TRAINING_KEYS
from periodscan.engine import checkpoint
from periodscan.engine.device import (
    CUBLAS_WORKSPACE,
    DEVICES,
    model_device,
    on_cpu,
    resolve_device,
    use_device,
    worker_device,
    worker_index,
)
from periodscan.engine.segment import SegmentJob, run_segment, train_from_scratch
from periodscan.errors import ConfigError
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep
from periodscan.params import ROOT, check_value

needs_cuda = pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
no_cuda = pytest.mark.skipif(torch.cuda.is_available(), reason="this machine has CUDA")


def _best_here() -> str:
    if torch.cuda.is_available():
        return "cuda"
    return "mps" if torch.backends.mps.is_available() else "cpu"


def test_resolution():
    assert resolve_device(None) == "cpu"
    assert resolve_device("cpu") == "cpu"
    assert resolve_device("auto") == _best_here()


@no_cuda
def test_a_missing_device_is_refused_naming_what_is_here():
    with pytest.raises(ConfigError) as err:
        resolve_device("cuda")
    text = str(err.value)
    assert "'device'" in text and "'cuda'" in text and "'cpu'" in text and "\n" not in text


def test_root_table_takes_choices_from_the_device_module():
    for name in (*DEVICES, None):  # None: a config written before the key existed
        assert check_value("device", name, ROOT["device"]) == name
    with pytest.raises(ConfigError) as err:
        check_value("device", "tpu", ROOT["device"])
    assert all(repr(d) in str(err.value) for d in DEVICES) and "'tpu'" in str(err.value)


@pytest.mark.parametrize("name, index", [("LokyProcess-1", 0), ("LokyProcess-4", 3),
                                         ("MainProcess", 0), ("Dask Worker process", 0)])
def test_worker_index(name, index):
    assert worker_index(name) == index


def test_each_worker_its_own_gpu():
    assert [worker_device("cuda", i, 2) for i in range(4)] == [
        torch.device("cuda", 0), torch.device("cuda", 1), torch.device("cuda", 0),
        torch.device("cuda", 1)]
    assert worker_device("cpu", 3, 1) == torch.device("cpu")


def test_cpu_leaves_determinism_settings_alone():
    before = torch.are_deterministic_algorithms_enabled()
    assert use_device("cpu") == torch.device("cpu")
    assert torch.are_deterministic_algorithms_enabled() == before
    assert model_device(torch.nn.Linear(2, 2)) == torch.device("cpu")
    assert model_device(torch.nn.ReLU()) == torch.device("cpu")


def test_cpu_checkpoint_bytes_unchanged():
    """A CPU checkpoint is byte-for-byte what to_bytes wrote before devices existed."""
    torch.manual_seed(0)
    model = torch.nn.Sequential(torch.nn.Linear(3, 4), torch.nn.BatchNorm1d(4))
    optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
    model(torch.randn(5, 3)).sum().backward()
    optimizer.step()
    assert on_cpu(model.state_dict()).keys() == model.state_dict().keys()
    state = model.state_dict()
    assert on_cpu(state) is state
    before = io.BytesIO()  # the body of checkpoint.to_bytes at 8e1a324
    torch.save({"epoch": 3, "model": model.state_dict(), "optimizer": optimizer.state_dict()},
               before)
    assert checkpoint.to_bytes(model, optimizer, 3) == before.getvalue()


def test_auto_trains_here_and_is_recorded_resolved(make_config):
    cfg = make_config(seeds=1, device="auto", design__starts=[2], design__lengths=[3])
    outcome = run_sweep(cfg, quiet=True)
    assert len(outcome.runs) == 2 and outcome.runs.test_acc.notna().all()
    saved = yaml.safe_load((outcome.folder / "config.yaml").read_text())
    assert saved["device"] == _best_here()
    same = prepare(make_config(seeds=1, device=_best_here(), design__starts=[2],
                               design__lengths=[3]))
    assert same.identity == prepare(cfg).identity


# --- CUDA: written for machines with a GPU, skipped on this project's machines ---------------

@needs_cuda
def test_cuda_turns_on_deterministic_kernels():
    device = use_device("cuda")
    assert device.type == "cuda"
    assert torch.are_deterministic_algorithms_enabled()
    assert os.environ["CUBLAS_WORKSPACE_CONFIG"] == CUBLAS_WORKSPACE


@needs_cuda
def test_cuda_branch_equals_scratch_and_checkpoint_loads_on_cpu(make_config):
    cfg = make_config(seeds=1, device="cuda", design__starts=[2], design__lengths=[3])
    prep = prepare(cfg)
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    run_id = next(r for r, run in prep.tree.runs.items() if not run.is_baseline)
    model, _, _ = train_from_scratch(training, prep.tree.runs[run_id])
    blob = None  # train the run's path segment by segment, each from its parent's bytes
    for segment_id in prep.tree.paths[run_id]:
        seg = prep.tree.segments[segment_id]
        result = run_segment(SegmentJob(
            segment_id=seg.segment_id, config=training, seed=seg.seed, begin=seg.begin,
            end=seg.end, deficit_on=seg.deficit_on, parent_checkpoint=blob,
            keep_checkpoint=True, evaluate_at_end=True))
        assert result.error is None, result.error
        blob = result.checkpoint
    state = checkpoint.from_bytes(blob)
    assert all(t.device.type == "cpu" for t in state["model"].values())
    for key, tensor in model.state_dict().items():
        assert torch.equal(tensor.cpu(), state["model"][key]), key


@needs_cuda
def test_gpu_state_is_saved_on_the_cpu_with_its_metadata():
    model = torch.nn.BatchNorm1d(4).cuda()
    state = model.state_dict()
    moved = on_cpu(state)
    assert all(t.device.type == "cpu" for t in moved.values())
    assert moved._metadata == state._metadata
