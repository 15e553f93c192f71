"""Streamed data: a user's Dataset and an image folder read through a DataLoader.

References: the in-memory loaders (a streamed folder must give load_image_folder's tensors, a
streamed Dataset over the tiny config's tensors must give the in-memory sweep's numbers),
torchvision's ImageFolder for which file carries which label, hashlib for file digests.
Bad Datasets are refused by the CLI with one line and exit 2, the results folder unchanged.
"""

from __future__ import annotations

import hashlib
import multiprocessing
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image
from stream_datasets import Broken, PngFiles, Signals, write_pngs

from periodscan.data import (
    StreamData,
    filehash,
    load_dataset,
    load_image_folder,
    stream_image_folder,
)
from periodscan.data.folder_stream import ImageFiles, channel_stats
from periodscan.data.stream import read_labels
from periodscan.errors import DataError
from periodscan.jobs.sweep import run_sweep
from periodscan.ledger import Ledger

TESTS = Path(__file__).parent
SMALL = ["experiment=tiny", "seeds=1", "schedule.epochs=4", "design.starts=[0]",
         "design.lengths=[2]", "-q"]


@pytest.fixture(autouse=True)
def _private_cache(tmp_path, monkeypatch):
    """Keep the file-hash record (and mnist1d's cache) inside the test's folder."""
    monkeypatch.setenv("PERIODSCAN_CACHE", str(tmp_path / "cache"))


def periodscan(*args: str, cache: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONPATH": str(TESTS), "PERIODSCAN_CACHE": str(cache)}
    return subprocess.run([sys.executable, "-m", "periodscan.cli", *args], capture_output=True,
                          text=True, timeout=300, env=env)


def folder_bytes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def write_tree(root: Path, per_class: int = 12, sizes=((9, 7),)) -> None:
    """RGB images in root/<class>/; class-dependent colour, varied sizes if several given."""
    rng = np.random.default_rng(1)
    for c, name in enumerate(("cat", "dog", "eel")):
        (root / name).mkdir(parents=True, exist_ok=True)
        for i in range(per_class):
            w, h = sizes[i % len(sizes)]
            pixels = rng.integers(0, 90, (h, w, 3)) + np.array([60 * c, 30, 90 - 40 * c])
            Image.fromarray(pixels.astype(np.uint8)).save(root / name / f"{i:03d}.png")


def all_inputs(data: StreamData) -> tuple[torch.Tensor, torch.Tensor]:
    """Every training input (read in the process) and every held-out input (through workers)."""
    x_train, _ = data.train_examples(torch.arange(len(data.y_train)))
    x_test = torch.cat([x for x, _ in data.test_batches(5)])
    return x_train, x_test


# ------------------------------------------------------------------ the streamed image folder


@pytest.mark.parametrize("options", [
    {}, {"image_size": None}, {"grayscale": True, "n_train": 20, "n_test": 5},
    {"image_size": 6, "test_fraction": 0.25, "split_seed": 3},
], ids=["default", "native-size", "grey-capped", "split"])
def test_streamed_folder_gives_the_in_memory_tensors(tmp_path, options):
    write_tree(tmp_path / "img")
    memory = load_image_folder(str(tmp_path / "img"), **options)
    streamed = stream_image_folder(str(tmp_path / "img"), num_workers=2, **options)
    x_train, x_test = all_inputs(streamed)
    # Bit for bit: the statistics are exact integer sums, scaled with the same float32 ops.
    assert torch.equal(x_train, memory.x_train) and torch.equal(x_test, memory.x_test)
    assert torch.equal(streamed.y_train, memory.y_train)
    assert torch.equal(streamed.y_test, memory.y_test)
    assert (streamed.input_shape, streamed.num_classes) == (memory.input_shape, memory.num_classes)


def test_folder_files_and_labels_follow_torchvision_image_folder(tmp_path):
    from torchvision.datasets import ImageFolder
    from torchvision.transforms import PILToTensor

    write_tree(tmp_path / "img", per_class=5, sizes=((9, 7), (5, 8)))
    # Reference: torchvision.datasets.ImageFolder (sorted class folders, sorted files; RGB).
    reference = ImageFolder(str(tmp_path / "img"), transform=PILToTensor())
    data = stream_image_folder(str(tmp_path / "img"), test_root=str(tmp_path / "img"),
                               image_size=None, mean=[0.0, 0.0, 0.0], std=[1.0, 1.0, 1.0],
                               num_workers=0)
    assert [os.fsdecode(f) for f in data.train.files] == [path for path, _ in reference.samples]
    assert data.y_train.tolist() == reference.targets
    for i in range(len(reference)):  # unscaled pixels equal torchvision's decode
        assert torch.equal(data.train[i][0], reference[i][0].float())


def test_folder_statistics_match_numpy(tmp_path):
    write_tree(tmp_path / "img", per_class=7, sizes=((9, 7), (4, 4)))
    images = ImageFiles([str(p) for p in sorted((tmp_path / "img").rglob("*.png"))],
                        np.zeros(21, np.int64), "RGB", 8, "data.root")
    mean, std = channel_stats(images, num_workers=1)
    stack = np.stack([images[i][0].numpy() for i in range(len(images))]).astype(np.float64)
    # Reference: numpy's float64 mean and (population) std per channel, rounded to float32.
    np.testing.assert_array_equal(mean, stack.mean(axis=(0, 2, 3)).astype(np.float32))
    np.testing.assert_allclose(std, stack.std(axis=(0, 2, 3)), rtol=1e-7)


def test_native_sizes_that_differ_are_refused_by_the_statistics_pass(tmp_path):
    write_tree(tmp_path / "img", per_class=4, sizes=((9, 7), (5, 8)))
    with pytest.raises(DataError, match="differ in size.*data.image_size"):
        stream_image_folder(str(tmp_path / "img"), image_size=None, num_workers=0)


# ------------------------------------------------------------------ a Dataset of your own


def test_labels_come_from_targets_or_one_pass(tmp_path):
    write_pngs(str(tmp_path / "png"), 30)
    with_targets = PngFiles(str(tmp_path / "png"))
    assert read_labels(with_targets, "data.train", 0).tolist() == with_targets.targets
    signals = Signals("test", n_train=100, n_test=60)  # no targets: read by a pass in workers
    assert read_labels(signals, "data.train", 2).tolist() == signals.y


def test_loader_workers_change_nothing_and_leave_global_rng_alone():
    data = {w: load_dataset(Signals("train", 200, 50), Signals("test", 200, 50), num_workers=w)
            for w in (0, 2)}
    order = torch.randperm(200, generator=torch.Generator().manual_seed(4))
    batches = [order[b : b + 32] for b in range(0, 200, 32)]
    for _ in range(2):  # twice: persistent workers serve a second epoch the same way
        state = torch.get_rng_state()
        zero, two = list(data[0].train_batches(batches)), list(data[2].train_batches(batches))
        assert torch.equal(torch.get_rng_state(), state)  # dropout's stream is untouched
        for (x0, y0), (x2, y2), idx in zip(zero, two, batches, strict=True):
            assert torch.equal(x0, x2) and torch.equal(y0, y2)
            assert torch.equal(x0, torch.from_numpy(data[0].train.x[idx.numpy()]))


def _batches_in_daemon(queue) -> None:
    data = load_dataset(Signals("train", 100, 20), Signals("test", 100, 20), num_workers=2)
    queue.put(torch.cat([x for x, _ in data.test_batches(7)]).numpy())


def test_a_daemon_process_reads_in_process_with_the_same_numbers():
    """A Dask worker is a daemon and may not start loader workers; it reads by itself."""
    ctx = multiprocessing.get_context("fork")
    queue = ctx.Queue()
    child = ctx.Process(target=_batches_in_daemon, args=(queue,), daemon=True)
    child.start()
    got = queue.get(timeout=120)
    child.join(timeout=60)
    assert child.exitcode == 0
    np.testing.assert_array_equal(got, Signals("test", 100, 20).x)


def test_streamed_sweep_equals_the_in_memory_sweep(make_config, tmp_path):
    memory = make_config(seeds=1, name="memory")
    streamed = make_config(seeds=1, name="streamed", data={
        "_target_": "periodscan.data.stream.load_dataset", "num_workers": 2,
        "train": {"_target_": "stream_datasets.Signals", "split": "train"},
        "test": {"_target_": "stream_datasets.Signals", "split": "test"}})
    run_sweep(memory, quiet=True)
    run_sweep(streamed, quiet=True)
    frames = [Ledger(tmp_path / "results" / name).epochs_frame().sort_values(["run_id", "epoch"])
              for name in ("memory", "streamed")]
    columns = ["run_id", "epoch", "lr", "train_loss", "train_acc", "test_loss", "test_acc"]
    assert len(frames[0]) > 0
    for column in columns:
        np.testing.assert_array_equal(frames[0][column].to_numpy(), frames[1][column].to_numpy(),
                                      err_msg=column)


def test_a_pil_image_is_refused_with_the_transform_to_add():
    from torchvision.datasets import FakeData

    with pytest.raises(DataError, match=r"data.train\[0\]: .*PIL.*PILToTensor"):
        load_dataset(FakeData(size=20, image_size=(3, 4, 4), num_classes=2), num_workers=0)


# ------------------------------------------------------------------ fingerprint of files


def test_file_digests_are_sha256_and_skip_unchanged_files(tmp_path, monkeypatch):
    write_pngs(str(tmp_path / "png"), 6)
    paths = sorted(str(p) for p in (tmp_path / "png").iterdir())
    # Reference: hashlib.sha256 over each file's bytes.
    expected = [hashlib.sha256(Path(p).read_bytes()).hexdigest() for p in paths]
    assert filehash.file_digests(paths) == expected
    opened = []
    monkeypatch.setattr(filehash, "sha256_of", lambda p: opened.append(p) or "0" * 64)
    assert filehash.file_digests(paths) == expected and opened == []  # nothing read again

    target = Path(paths[2])
    old = target.stat()
    flipped = bytearray(target.read_bytes())
    flipped[-20] ^= 0xFF  # same size, other bytes
    target.write_bytes(bytes(flipped))
    os.utime(target, ns=(old.st_atime_ns, old.st_mtime_ns))  # mtime set back; ctime moves on
    assert target.stat().st_mtime_ns == old.st_mtime_ns and target.stat().st_size == old.st_size
    monkeypatch.undo()
    monkeypatch.setenv("PERIODSCAN_CACHE", str(tmp_path / "cache"))
    again = filehash.file_digests(paths)
    assert again[2] == hashlib.sha256(bytes(flipped)).hexdigest() != expected[2]
    assert again[:2] + again[3:] == expected[:2] + expected[3:]


def test_a_dataset_without_files_is_fingerprinted_by_its_inputs():
    a = load_dataset(Signals("train", 100, 40), Signals("test", 100, 40), num_workers=0)
    b = load_dataset(Signals("train", 100, 40), Signals("test", 100, 40), num_workers=2)
    assert a.digest() == b.digest()
    b.test.x[3, 0, 5] += 1.0  # one value of one held-out input
    assert a.digest() != b.digest()


def test_a_changed_image_file_is_refused(tmp_path):
    write_tree(tmp_path / "img")
    args = [*SMALL, "data=image_folder_stream", f"data.root={tmp_path / 'img'}", "model=cnn2d",
            "model.channels=4", "data.image_size=8", f"results_dir={tmp_path}"]
    first = periodscan("sweep", *args, cache=tmp_path / "cache")
    assert first.returncode == 0, first.stderr
    folder = tmp_path / "tiny"
    before = folder_bytes(folder)
    image = tmp_path / "img" / "dog" / "004.png"
    pixels = np.asarray(Image.open(image)).copy()
    pixels[0, 0] = 255 - pixels[0, 0]
    Image.fromarray(pixels).save(image)  # same path, one pixel changed
    again = periodscan("sweep", *args, "seeds=2", cache=tmp_path / "cache")
    assert again.returncode == 2
    line = again.stderr.strip()
    assert "\n" not in line and "the data loaded differs" in line, line
    assert folder_bytes(folder) == before


# ------------------------------------------------------------------ bad Datasets, at the CLI

BAD = [  # (fault of the training Dataset, words the one line must contain)
    ("shape", ["data.train", "example 63", "(1, 24)", "(1, 20)", "same shape"]),
    ("flat", ["shape (C, L) or (C, H, W)", "(20,)"]),
    ("float_labels", ["data.train[0]", "integer class indices", "0.0", "float"]),
    ("onehot", ["data.train[0]", "integer class indices", "shape (2,)"]),
    ("float_targets", ["data.train.targets", "integer class indices", "float64"]),
    ("random", ["data.train[0]", "two reads", "depend only on the index"]),
]


def dataset_args(fault: str, tmp_path: Path) -> list[str]:
    return [*SMALL, "data=dataset", "model.channels=4", f"results_dir={tmp_path}",
            f"data.train={{_target_:stream_datasets.Broken,fault:{fault}}}",
            "data.test={_target_:stream_datasets.Broken,fault:none,n:20}"]


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished sweep on a well-behaved Dataset; every bad case then targets its folder."""
    root = tmp_path_factory.mktemp("stream_bad")
    done = periodscan("sweep", *dataset_args("none", root), cache=root / "cache")
    assert done.returncode == 0, done.stderr
    return root


@pytest.mark.parametrize("fault, words", BAD, ids=[f for f, _ in BAD])
def test_a_bad_dataset_is_one_line_and_exit_2(finished, fault, words):
    before = folder_bytes(finished / "tiny")
    result = periodscan("sweep", *dataset_args(fault, finished), cache=finished / "cache")
    line = result.stderr.strip()
    assert result.returncode == 2 and "\n" not in line, result.stderr
    assert line.startswith("periodscan: error: ")
    for word in words:
        assert word in line, (word, line)
    assert folder_bytes(finished / "tiny") == before


def test_the_bad_datasets_are_bad_only_where_they_say():
    """Guard: with no fault, the same class passes every check (so each case tests its fault)."""
    data = load_dataset(Broken("none"), Broken("none", n=20), num_workers=0)
    from periodscan.data.stream import check_examples

    check_examples(data)
    assert data.input_shape == (1, 20) and data.num_classes == 2
