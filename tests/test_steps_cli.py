"""New bad inputs of the training recipe, through the command a user types.

Each case runs ``python -m periodscan.cli sweep ...`` in a subprocess against the folder of a
finished tiny sweep, and must print one line on stderr, exit with 2 and leave every file of
that folder byte-identical: a step whose loss is not a scalar, an optimizer ``_target_`` that
is not a torch.optim.Optimizer, and a device this machine does not have.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import pytest
import torch

from periodscan.cli import main

TESTS = Path(__file__).resolve().parent
TINY = ["experiment=tiny", "seeds=1", "data.n_train=400", "schedule.batch_size=50"]

# (case id, overrides, words the one line must contain)
CASES = [
    ("step returns a per-example loss", ["step=per_example"],
     ["step:", "PerExampleLoss.loss", "scalar", "(2,)"]),
    ("optimizer target is a layer", ["~schedule.optimizer.name",
                                     "+schedule.optimizer._target_=torch.nn.Linear"],
     ["schedule.optimizer._target_", "torch.optim.Optimizer", "torch.nn.Linear"]),
    pytest.param("device this machine lacks", ["device=cuda"], ["'device'", "'cuda'", "'cpu'"],
                 marks=pytest.mark.skipif(torch.cuda.is_available(), reason="CUDA is here")),
]


def _snapshot(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished tiny sweep, its file hashes, and a --config-dir holding a faulty user step."""
    root = tmp_path_factory.mktemp("steps_cli")
    assert main(["sweep", *TINY, f"results_dir={root / 'results'}", "-q"]) == 0
    configs = root / "myconfigs" / "step"
    configs.mkdir(parents=True)
    (configs / "per_example.yaml").write_text("_target_: user_steps.PerExampleLoss\n")
    folder = root / "results" / "tiny"
    return root, folder, _snapshot(folder)


@pytest.mark.parametrize("case, overrides, words", CASES)
def test_refused_in_one_line_with_exit_2(finished, case, overrides, words):
    root, folder, before = finished
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(
        filter(None, [str(TESTS), os.environ.get("PYTHONPATH")]))}
    done = subprocess.run(
        [sys.executable, "-m", "periodscan.cli", "sweep", "--config-dir",
         str(root / "myconfigs"), *TINY, *overrides, f"results_dir={root / 'results'}", "-q"],
        capture_output=True, text=True, cwd=root, env=env, timeout=300)
    lines = done.stderr.strip().splitlines()
    assert done.returncode == 2, done.stderr
    assert len(lines) == 1, done.stderr
    assert all(word in lines[0] for word in words), lines[0]
    assert _snapshot(folder) == before
