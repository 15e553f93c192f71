"""``periodscan export``: a real tiny sweep written to TensorBoard and read back with
TensorBoard's own event reader (``EventAccumulator``), value by value against the ledger.

Scalars travel as TensorBoard's classic ``simple_value``, a 32-bit float (``summary.proto``), so
a ledger value ``v`` must come back as exactly ``numpy.float32(v)``.
"""

from __future__ import annotations

import io
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from PIL import Image

pytest.importorskip("tensorboard")  # the optional extra; `pip install -e ".[test]"` has it
from tensorboard.backend.event_processing.event_accumulator import (  # noqa: E402
    EventAccumulator,
)
from tensorboard.util.tensor_util import make_ndarray  # noqa: E402

from periodscan.api import load_sweep  # noqa: E402
from periodscan.cli import main  # noqa: E402
from periodscan.engine.runner import KILL_ENV  # noqa: E402
from periodscan.jobs.sweep import run_sweep  # noqa: E402
from periodscan.views import tensorboard as tensorboard_view  # noqa: E402
from periodscan.views.tables import format_table  # noqa: E402
from periodscan.views.tensorboard import EPOCH_TAGS, MARKER  # noqa: E402

TINY = ["experiment=tiny", "monitor=fisher"]
EVERYTHING = {"scalars": 0, "images": 0, "tensors": 0}  # 0: keep every event, no sampling


def _read(directory: Path) -> EventAccumulator:
    reader = EventAccumulator(str(directory), size_guidance=EVERYTHING)
    reader.Reload()
    return reader


def _series(reader: EventAccumulator, tag: str) -> tuple[list[int], np.ndarray]:
    events = reader.Scalars(tag)
    return [e.step for e in events], np.array([e.value for e in events], dtype=np.float32)


def _text(reader: EventAccumulator, tag: str) -> str:
    (event,) = reader.Tensors(f"{tag}/text_summary")  # torch's add_text appends /text_summary
    return make_ndarray(event.tensor_proto).item().decode()


@pytest.fixture(scope="module")
def sweeps(tmp_path_factory):
    """A finished tiny sweep with the Fisher monitor, and one killed after six segments (one
    seed: the baseline and the window at 0 finished, the windows at 2 and 4 not)."""
    root = tmp_path_factory.mktemp("export")
    env = dict(os.environ, **{KILL_ENV: "after-ledger:6"})
    killed = subprocess.Popen(
        [sys.executable, "-m", "periodscan.cli", "sweep", *TINY, "seeds=1", "name=partial",
         f"results_dir={root}", "-q"], cwd=root, env=env, stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL)
    run_sweep([*TINY, f"results_dir={root}"], quiet=True)
    killed.wait(timeout=600)
    assert killed.returncode == -9  # SIGKILL at the hook: a sweep stopped half way
    return root / "tiny", root / "partial"


@pytest.fixture(scope="module")
def exported(sweeps, tmp_path_factory):
    out = tmp_path_factory.mktemp("tb") / "board"
    assert main(["export", str(sweeps[0]), "--tensorboard", str(out)]) == 0
    return sweeps[0], out


def test_one_run_folder_per_run_with_its_learning_curves(exported):
    folder, out = exported
    with load_sweep(folder) as view:
        epochs = view.epochs
    assert sorted(p.name for p in (out / "runs").iterdir()) == sorted(epochs.run_id.unique())
    assert len(epochs.run_id.unique()) == 8  # 2 seeds x (baseline + 3 windows)
    for run_id, ledger in epochs.groupby("run_id"):
        reader = _read(out / "runs" / run_id)
        ledger = ledger.sort_values("epoch")
        for column, tag in EPOCH_TAGS.items():
            steps, values = _series(reader, tag)
            assert steps == list(ledger.epoch + 1), (run_id, tag)  # epochs completed
            np.testing.assert_array_equal(values, ledger[column].to_numpy(np.float32))
    # 0/1 flags mark the deficit: the [2, 5) window is on for epochs 2, 3, 4 (steps 3, 4, 5)
    steps, on = _series(_read(out / "runs" / "seed0-w2+3-to8"), "deficit_on")
    assert [s for s, v in zip(steps, on, strict=True) if v == 1] == [3, 4, 5]


def test_monitor_readings_are_exported_per_run(exported):
    folder, out = exported
    with load_sweep(folder) as view:
        extras = view.extras
    assert {"fisher/total", "fisher/head"} <= set(extras.name)
    for (run_id, name), ledger in extras.groupby(["run_id", "name"]):
        steps, values = _series(_read(out / "runs" / run_id), name)
        ledger = ledger.sort_values("epoch")
        assert steps == list(ledger.epoch + 1)
        np.testing.assert_array_equal(values, ledger.value.to_numpy(np.float32))
    # The monitor probes clean trunks only: a window run starting at 2 shares epochs 0 and 1
    # (steps 1, 2) with its baseline and has no reading after them.
    steps, _ = _series(_read(out / "runs" / "seed0-w2+3-to8"), "fisher/total")
    assert steps == [1, 2]


def test_table_scalars_match_the_table_and_sensitivity_csv(exported):
    folder, out = exported
    with load_sweep(folder) as view:
        table = view.table()
    written = pd.read_csv(folder / "sensitivity.csv")  # what the sweep itself wrote, 4 decimals
    assert sorted(p.name for p in (out / "sensitivity").iterdir()) == ["length_3"]
    reader = _read(out / "sensitivity" / "length_3")
    for column in ("damage", "damage_low", "damage_high", "holm_low", "holm_high",
                   "baseline_acc", "run_acc", "seeds"):
        steps, values = _series(reader, f"sensitivity/{column}")
        assert steps == [0, 2, 4]  # keyed by window start
        np.testing.assert_array_equal(values, table[column].to_numpy(np.float32))
        np.testing.assert_allclose(values, written[column], rtol=1e-6, atol=5e-5)


def test_table_text_csv_and_curve_image(exported, tmp_path):
    folder, out = exported
    report = tmp_path / "tiny"  # `periodscan report` on a copy: the same table and figure
    shutil.copytree(folder, report)
    assert main(["report", str(report)]) == 0
    with load_sweep(folder) as view:
        aligned = format_table(view.table(), view.layout)
    reader = _read(out / "sweep")
    assert _text(reader, "sensitivity/csv") == f"```\n{(report / 'sensitivity.csv').read_text()}```"
    text = _text(reader, "sensitivity/table")
    assert f"```\n{aligned}\n```" in text and "runs: 8 of 8 finished (8 done)" in text
    (image,) = reader.Images("sensitivity/curve")
    pixels = np.asarray(Image.open(io.BytesIO(image.encoded_image_string)).convert("RGB"))
    with Image.open(report / "sensitivity.png") as png:  # with its Fisher panel
        np.testing.assert_array_equal(pixels, np.asarray(png.convert("RGB")))
    assert (image.width, image.height) == (pixels.shape[1], pixels.shape[0])
    assert "custom_scalars__config__" in reader.Tags()["tensors"]


def test_default_folder_and_a_second_export_replaces_the_first(sweeps, tmp_path, capsys):
    folder = tmp_path / "tiny"
    shutil.copytree(sweeps[0], folder)
    for _ in range(2):
        assert main(["export", "tiny", "--results-dir", str(tmp_path)]) == 0
    out = folder / "tensorboard"
    assert capsys.readouterr().out.splitlines()[-2:] == [
        f"tensorboard: {out} (8 runs, 3 windows, sensitivity curve)",
        f"view with:   tensorboard --logdir {out}"]
    run = out / "runs" / "seed1-baseline-to8"
    assert len(list(run.glob("events.out.tfevents.*"))) == 1
    assert _series(_read(run), "accuracy/test")[0] == list(range(1, 9))  # not doubled
    leftovers = [p.name for p in folder.iterdir() if p.name.startswith(".tensorboard")]
    assert leftovers == [] and (out / MARKER).is_file()


def test_a_failed_export_leaves_the_last_one_as_it_was(exported, tmp_path, monkeypatch):
    out = tmp_path / "board"
    shutil.copytree(exported[1], out)
    before = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}

    def broken(*args, **kwargs):
        raise OSError("disk full")  # invented failure half way through the writing

    monkeypatch.setattr(tensorboard_view, "write_sweep_summary", broken)
    with load_sweep(exported[0]) as view, pytest.raises(OSError, match="disk full"):
        tensorboard_view.write_tensorboard(view, out)
    after = {p.relative_to(out): p.read_bytes() for p in out.rglob("*") if p.is_file()}
    assert after == before and [p.name for p in tmp_path.iterdir()] == ["board"]


def test_a_partial_sweep_exports_what_it_has(sweeps, tmp_path):
    out = tmp_path / "board"
    assert main(["export", str(sweeps[1]), "--tensorboard", str(out)]) == 0
    with load_sweep(sweeps[1]) as view:
        epochs, table = view.epochs, view.table()
        status = view.status()
    assert 0 < status.runs_done < status.runs_total
    assert sorted(p.name for p in (out / "runs").iterdir()) == sorted(epochs.run_id.unique())
    finished = table[table.damage.notna()]
    assert list(finished.start) == [0] and len(table) == 3
    reader = _read(out / "sensitivity" / "length_3")
    steps, values = _series(reader, "sensitivity/damage")
    assert steps == list(finished.start)
    np.testing.assert_array_equal(values, finished.damage.to_numpy(np.float32))
    # one seed gives no interval: the bounds are missing, not written as NaN
    assert "sensitivity/damage_low" not in reader.Tags()["scalars"]
    assert f"runs: {status.runs_done} of {status.runs_total} finished" in _text(
        _read(out / "sweep"), "sensitivity/table")


def test_a_folder_with_other_files_is_refused_and_left_alone(sweeps, tmp_path, capsys):
    out = tmp_path / "board"
    out.mkdir()
    (out / "notes.txt").write_text("mine")
    assert main(["export", str(sweeps[0]), "--tensorboard", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "holds files periodscan export did not write" in err
    assert [p.name for p in out.iterdir()] == ["notes.txt"]
    assert [p.name for p in tmp_path.iterdir()] == ["board"]  # no staging folder left


def test_without_tensorboard_one_line_names_the_extra(sweeps, tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "torch.utils.tensorboard", None)  # import now fails
    out = tmp_path / "board"
    assert main(["export", str(sweeps[0]), "--tensorboard", str(out)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("periodscan: error: ")
    assert 'pip install "periodscan[tensorboard]"' in err
    assert not out.exists()


def test_bad_tolerance_is_refused_before_anything_is_written(sweeps, tmp_path, capsys):
    out = tmp_path / "board"
    assert main(["export", str(sweeps[0]), "--tensorboard", str(out), "--confidence", "2"]) == 2
    assert "confidence" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []
