"""Bad input, table-driven: each case is refused with one line, a non-zero exit, and nothing in an
existing results folder touched.

A tiny sweep is finished first; every case then targets that same folder (``name=tiny``), and
afterwards every file in it must hash exactly as before. Cases cover the config (unknown
options and keys, impossible windows, out-of-range values), the data (empty, one class, bad
arrays, images of different sizes, missing folders), user ``_target_`` objects, and the results
folder. A learning rate that makes training diverge is not refused up front (only training can
tell): the sweep finishes and exits with status 3, naming the learning rate.
"""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from PIL import Image

from periodscan.cli import main
from periodscan.commands.common import EXIT_NO_BASELINE

TINY = ["experiment=tiny", "seeds=1", "data.n_train=400", "schedule.batch_size=50"]
OWN = ["executor=serial", "seeds=1", "schedule.epochs=8", "design.starts=[0,2]",
       "design.lengths=[3]"]  # for the user's own data (the tiny preset is mnist1d-specific)

# (case id, overrides ({data} is the folder of bad files), words the one line must contain)
CASES = [
    ("unknown group option", [*TINY, "deficit=blurr"], ["'deficit'", "blurr", "label_noise"]),
    ("misspelled root key", [*TINY, "seedz=3"], ["seedz", "'seeds'"]),
    ("misspelled nested key", [*TINY, "schedule.epoch=5"], ["schedule.epoch", "'epochs'"]),
    ("misspelled key in a preset file", ["experiment=mistyped"], ["design.start", "'starts'"]),
    ("new key added with +", [*TINY, "+design.strats=[1]"], ["design.strats", "'starts'"]),
    ("misspelled deficit argument", [*TINY, "deficit.sigmaa=2"], ["deficit.sigmaa", "'sigma'"]),
    ("window past the last epoch", [*TINY, "design.starts=[0,6]"],
     ["design.starts", "[6, 9)", "latest start is 5"]),
    ("repeated starts", [*TINY, "design.starts=[2,2]"], ["design.starts", "distinct"]),
    ("empty start list", [*TINY, "design.starts=[]"], ["design.starts", "non-empty"]),
    ("zero-length window", [*TINY, "design.lengths=[0]"], ["design.lengths", ">= 1"]),
    ("negative rate", [*TINY, "deficit=label_noise", "deficit.rate=-0.1"],
     ["deficit.rate", "[0, 1]", "-0.1"]),
    ("rate above 1", [*TINY, "deficit=label_noise", "deficit.rate=1.5"],
     ["deficit.rate", "[0, 1]", "1.5"]),
    ("negative outage fraction", [*TINY, "deficit=data_outage", "deficit.fraction=-0.2"],
     ["deficit.fraction", "-0.2"]),
    ("class index out of range", [*TINY, "deficit=class_dropout", "deficit.classes=[12]"],
     ["deficit.classes", "12"]),
    ("zero seeds", [*TINY, "seeds=0"], ["seeds", "[1, inf)", "0"]),
    ("negative seed", [*TINY, "seeds=[0,-1]"], ["seeds", "ints >= 0", "-1"]),
    ("image data on the signal model of the size preset", [*TINY, "data=digits"],
     ["model.input_shape", "model=cnn2d"]),
    ("repeated seeds", [*TINY, "seeds=[1,1]"], ["seeds", "distinct"]),
    ("negative learning rate", [*TINY, "schedule.optimizer.lr=-0.1"],
     ["schedule.optimizer.lr", "-0.1"]),
    ("zero batch size", [*TINY, "schedule.batch_size=0"], ["schedule.batch_size", "[1, inf)"]),
    ("decay factor 0", [*TINY, "schedule.lr_schedule.gamma=0"], ["schedule.lr_schedule.gamma"]),
    ("recovery budget without epochs", [*TINY, "design.budget=fixed_recovery"],
     ["design.recovery_epochs"]),
    ("confidence above 1", [*TINY, "confidence=1.5"], ["confidence", "[0.5, 1)"]),
    ("unknown executor", [*TINY, "executor=gpu"], ["'executor'", "gpu", "local"]),
    ("zero workers", [*TINY, "executor.workers=0"], ["executor.workers", "[1, inf)"]),
    ("scheduler address without a port", [*TINY, "executor=dask", "executor.address=myhost"],
     ["executor.address", "myhost"]),
    ("name with a slash", [*TINY, "name=a/b"], ["name", "a/b"]),
    ("sweep syntax", [*TINY, "seeds=1,2"], ["seeds=1,2"]),
    ("unreadable override", [*TINY, "schedule.epochs=["], ["schedule.epochs=["]),
    ("required value not set", [*OWN, "data=image_folder"], ["data.root", "required"]),
    ("missing data folder", [*OWN, "data=image_folder", "data.root={data}/nowhere"],
     ["data.root", "does not exist"]),
    ("empty image folder", [*OWN, "data=image_folder", "data.root={data}/no_images"],
     ["data.root", "holds no images"]),
    ("empty npz arrays", [*OWN, "data=npz", "data.path={data}/empty.npz"], ["empty"]),
    ("one-class dataset", [*OWN, "data=npz", "data.path={data}/one_class.npz"],
     ["single class"]),
    ("npz with a missing array", [*OWN, "data=npz", "data.path={data}/no_labels.npz"],
     ["data.y_train", "y_train", "x_train"]),
    ("npz with mismatched lengths", [*OWN, "data=npz", "data.path={data}/mismatch.npz"],
     ["y_train", "(50,)", "(40,)"]),
    ("images of different sizes", [*OWN, "data=image_folder", "data.root={data}/images",
                                   "data.image_size=null"], ["differ in size", "data.image_size"]),
    ("target that does not import", [*TINY, "model._target_=nope.Model"],
     ["model._target_", "nope.Model", "No module named 'nope'"]),
    ("blocked target", [*TINY, "model._target_=os.system"], ["model", "os.system"]),
    ("model output does not match the classes", [*TINY, "model._target_=torch.nn.Identity"],
     ["model", "output shape", "10 classes"]),
    ("model for images given signals", [*TINY, "model=cnn2d"], ["model.input_shape", "(1, 40)"]),
    ("another training config in the folder", [*TINY, "schedule.optimizer.lr=0.01"],
     ["holds a sweep trained under another config", "schedule"]),
    ("results_dir below a file", [*TINY, "results_dir={data}/a_file/results"],
     ["cannot be written", "Not a directory"]),
]

PRESET = """# @package _global_
defaults:
  - override /executor: serial
seeds: 1
data:
  n_train: 400
schedule:
  epochs: 8
design:
  start: [0, 2]
"""


def _snapshot(folder):
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _bad_files(folder):
    rng = np.random.default_rng(0)
    x = rng.normal(size=(50, 40)).astype(np.float32)
    np.savez(folder / "empty.npz", x_train=x[:0], y_train=np.zeros(0, int), x_test=x[:0],
             y_test=np.zeros(0, int))
    np.savez(folder / "one_class.npz", x_train=x, y_train=np.zeros(50, int))
    np.savez(folder / "no_labels.npz", x_train=x)
    np.savez(folder / "mismatch.npz", x_train=x, y_train=np.arange(40) % 2)
    for cls, size in (("cats", (8, 8)), ("dogs", (12, 10))):
        (folder / "images" / cls).mkdir(parents=True)
        for i in range(3):
            pixels = rng.integers(0, 255, size=(*size[::-1], 3), dtype=np.uint8)
            Image.fromarray(pixels).save(folder / "images" / cls / f"{i}.png")
    for cls in ("cats", "dogs"):
        (folder / "no_images" / cls).mkdir(parents=True)
        (folder / "no_images" / cls / "notes.txt").write_text("no pictures here")
    (folder / "a_file").write_text("not a folder")
    (folder / "configs" / "experiment").mkdir(parents=True)
    (folder / "configs" / "experiment" / "mistyped.yaml").write_text(PRESET)


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished tiny sweep in results/tiny, its file hashes, and a folder of bad inputs."""
    root = tmp_path_factory.mktemp("bad_input")
    results = root / "results"
    assert main(["sweep", *TINY, f"results_dir={results}", "-q"]) == 0
    data = root / "data"
    data.mkdir()
    _bad_files(data)
    return results, _snapshot(results / "tiny"), data


def _as_param(case):
    """(id, overrides, words), or a pytest.param of the same three carrying marks."""
    if hasattr(case, "marks"):
        return pytest.param(*case.values[1:], id=case.values[0], marks=case.marks)
    return pytest.param(*case[1:], id=case[0])


@pytest.mark.parametrize("overrides, words", [_as_param(c) for c in CASES])
def test_bad_input_is_one_line_and_touches_nothing(finished, capsys, overrides, words):
    results, before, data = finished
    overrides = [o.replace("{data}", str(data)) for o in overrides]
    if not any(o.startswith("results_dir=") for o in overrides):
        overrides.append(f"results_dir={results}")
    if not any(o.startswith("name=") for o in overrides):
        overrides.append("name=tiny")
    capsys.readouterr()
    code = main(["sweep", "--config-dir", str(data / "configs"), *overrides, "-q"])
    err = capsys.readouterr().err
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("periodscan: error: "), err
    assert "Traceback" not in err
    for word in words:
        assert word in lines[0], f"{word!r} not in: {lines[0]}"
    assert _snapshot(results / "tiny") == before


def test_at_least_twenty_cases():
    assert len(CASES) >= 20  # the bar set for this table


def test_diverging_learning_rate_finishes_and_exits_3(finished, capsys):
    """lr = 1e6 makes the loss non-finite at once: every run is recorded as diverged."""
    results, before, _ = finished
    code = main(["sweep", *TINY, "schedule.optimizer.lr=1e6", f"results_dir={results}",
                 "name=diverging", "-q"])
    err = capsys.readouterr().err
    assert code == EXIT_NO_BASELINE == 3
    assert "every run diverged" in err and "schedule.optimizer.lr=1000000.0" in err
    assert "Traceback" not in err
    assert _snapshot(results / "tiny") == before
    import sqlite3

    with sqlite3.connect(results / "diverging" / "ledger.sqlite") as conn:
        rows = conn.execute("SELECT status, diverged_at FROM runs").fetchall()
    assert rows and {r[0] for r in rows} == {"diverged"} and {r[1] for r in rows} == {0}


def test_unreachable_dask_scheduler(finished, capsys):
    """No scheduler listens on the address: one line, and the folder is left as it was."""
    import dask
    import distributed  # noqa: F401 - loads its config defaults first; else leaving
    # dask.config.set below would drop the whole "distributed" section it created

    results, before, _ = finished
    with dask.config.set({"distributed.comm.timeouts.connect": "2s"}):
        code = main(["sweep", *TINY, "executor=dask", "executor.address=tcp://127.0.0.1:9",
                     f"results_dir={results}", "name=tiny", "-q"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0 and "executor.address" in err and "127.0.0.1:9" in err
    assert _snapshot(results / "tiny") == before
