"""A results folder is refused when the data, the user's code or the versions changed.

Before, rewriting an .npz at the same path and rerunning with one more seed averaged a seed
trained on the old file with a seed trained on the new one. These tests make both changes as a
user would (rewrite the file, edit the model class) and check the rerun is refused with one
line naming what changed, exit 2, and the folder byte for byte as it was.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from periodscan.jobs.fingerprint import changes, source_file, tensor_digest, user_targets

SMALL = ["experiment=tiny", "seeds=1", "schedule.epochs=4", "design.starts=[0]",
         "design.lengths=[2]", "-q"]


def periodscan(*args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "periodscan.cli", *args], capture_output=True,
                          text=True, timeout=300, env=env)


def folder_bytes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def write_signals(path: Path, shift: float) -> None:
    rng = np.random.default_rng(0)
    y = np.arange(300) % 3
    x = rng.normal(size=(300, 1, 40)).astype(np.float32) + (y[:, None, None] + shift)
    np.savez(path, x_train=x[:200], y_train=y[:200], x_test=x[200:], y_test=y[200:])


def test_a_rewritten_data_file_is_refused(tmp_path):
    data = tmp_path / "signals.npz"
    write_signals(data, shift=0.0)
    args = [*SMALL, "data=npz", f"data.path={data}", f"results_dir={tmp_path}"]
    assert periodscan("sweep", *args).returncode == 0
    folder = tmp_path / "tiny"
    before = folder_bytes(folder)
    write_signals(data, shift=5.0)  # same path, other content
    again = periodscan("sweep", *args, "seeds=2")
    assert again.returncode == 2
    line = again.stderr.strip()
    assert "\n" not in line and "the data loaded differs" in line
    assert folder_bytes(folder) == before


MODEL = """
import torch.nn as nn


class Net(nn.Module):
    def __init__(self, input_shape, num_classes):
        super().__init__()
        size = 1
        for n in input_shape:
            size *= n
        self.body = nn.Sequential(nn.Flatten(), nn.Linear(size, 16), nn.{act}(),
                                  nn.Linear(16, num_classes))

    def forward(self, x):
        return self.body(x)
"""


def user_model(tmp_path: Path) -> tuple[list[str], dict]:
    """A model option in the user's own config folder and the environment that imports it."""
    (tmp_path / "my_nets.py").write_text(MODEL.format(act="ReLU"))
    (tmp_path / "configs" / "model").mkdir(parents=True)
    (tmp_path / "configs" / "model" / "my_net.yaml").write_text("_target_: my_nets.Net\n")
    args = [*SMALL, "model=my_net", f"results_dir={tmp_path}",
            "--config-dir", str(tmp_path / "configs")]
    return args, {**os.environ, "PYTHONPATH": str(tmp_path)}


def test_an_edited_model_class_is_refused(tmp_path):
    args, env = user_model(tmp_path)
    first = periodscan("sweep", *args, env=env)
    assert first.returncode == 0, first.stderr
    folder = tmp_path / "tiny"
    before = folder_bytes(folder)
    (tmp_path / "my_nets.py").write_text(MODEL.format(act="Tanh"))  # same _target_
    again = periodscan("sweep", *args, "seeds=2", env=env)
    assert again.returncode == 2
    line = again.stderr.strip()
    assert "\n" not in line and "model code changed: my_nets.Net (my_nets.py" in line
    assert folder_bytes(folder) == before


def test_unchanged_data_and_code_resume_as_before(tmp_path):
    args, env = user_model(tmp_path)
    assert periodscan("sweep", *args, env=env).returncode == 0
    again = periodscan("sweep", *args, "seeds=2", env=env)
    assert again.returncode == 0, again.stderr


def test_a_version_change_is_named():
    before = {"data": "a" * 64, "code": {}, "versions": {"periodscan": "0.1.0", "torch": "2.14.1"}}
    after = {**before, "versions": {"periodscan": "0.1.0", "torch": "2.15.0"}}
    assert changes(before, after) == ["torch version changed: 2.14.1 -> 2.15.0"]
    assert changes(before, dict(before)) == []


def test_tensor_digest_is_sha256_of_the_bytes_with_shape_and_dtype():
    # Reference: hashlib over numpy's own bytes (Python standard library, FIPS 180-4 sha256).
    x = torch.arange(12, dtype=torch.float32).reshape(3, 4)
    expected = hashlib.sha256(b"float32(3, 4)" + x.numpy().tobytes()).hexdigest()
    assert tensor_digest(x) == expected
    assert tensor_digest(x) != tensor_digest(x.reshape(4, 3))  # same bytes, other shape
    assert tensor_digest(x.t()) == tensor_digest(x.t().contiguous())


def test_only_user_targets_are_hashed():
    plain = {"model": {"_target_": "my_nets.Net"},
             "deficit": {"_target_": "periodscan.deficits.Blur"},
             "data": {"_target_": "torchvision.datasets.MNIST", "inner": {"_target_": "pkg.f"}}}
    assert sorted(k for k, _ in user_targets(plain)) == ["data.inner", "model"]
    assert source_file("periodscan.deficits.Blur").name == "__init__.py"
    assert source_file("no_such_module.Thing") is None


@pytest.mark.parametrize("rows", [50_000])
def test_hashing_cost_is_small_next_to_loading(rows):
    # Not a timing test (machines are shared): the digest reads each byte once; the benchmark
    # benchmarks/fingerprint_cost.py states the time for a 50,000-image set.
    x = torch.zeros(rows, 3, 8, 8)
    assert len(tensor_digest(x)) == 64
