"""Seconds per epoch, streamed versus in memory, on the same image folder, side by side.

Builds a folder of 32x32 RGB PNGs (benchmarks/stream_memory.py's procedural classes) in a
temporary folder and trains the same model on it four ways, one epoch of each in turn (the
order rotates every round), so machine noise falls on all of them alike:

- ``memory``: ``data=image_folder`` (every image decoded once, tensors in memory);
- ``stream-1w`` / ``stream-2w``: ``data=image_folder_stream`` with 1 and 2 loader workers;
- ``dataset-2w``: ``data=dataset`` with a user's Dataset that reads each PNG with PIL.

An epoch is what the engine times per epoch: train (periodscan's own loop, seed-keyed order)
plus the held-out evaluation. The first epoch of each way is a warm-up (it starts the loader
workers) and is reported apart. ``memory`` and ``stream-*`` start from the same weights and
must give identical losses (the streamed folder gives the in-memory tensors); that is checked.

    python benchmarks/stream_speed.py [--images 10000] [--rounds 4] [--channels 32 8]
"""

from __future__ import annotations

import argparse
import glob
import os
import shutil
import statistics
import tempfile
import time

import numpy as np
import psutil
import torch
from PIL import Image
from stream_memory import write_folder
from torch.utils.data import Dataset

from periodscan.data import load_dataset, load_image_folder, stream_image_folder
from periodscan.engine.schedule import build_optimizer
from periodscan.engine.segment import build_model, train_epochs

SCHEDULE = {"epochs": 100, "batch_size": 100,
            "optimizer": {"name": "sgd", "lr": 0.05, "momentum": 0.9, "weight_decay": 5e-4,
                          "nesterov": False},
            "lr_schedule": {"kind": "exponential", "gamma": 0.97, "step_size": None,
                            "min_lr": 0.0, "warmup_epochs": 0},
            "augment": {"max_shift": 0, "hflip": False}}


class PngDataset(Dataset):
    """A user's Dataset: PNG files read with PIL, scaled to [-1, 1]; labels from folder names."""

    def __init__(self, files: list[str], labels: list[int]) -> None:
        self.files, self.targets = files, labels

    def __len__(self) -> int:
        return len(self.files)

    def __getitem__(self, i: int):
        with Image.open(self.files[i]) as im:
            a = np.asarray(im.convert("RGB"), dtype=np.float32)
        return torch.from_numpy(a.transpose(2, 0, 1) / 127.5 - 1.0), self.targets[i]


def user_dataset(root: str, workers: int):
    """The same images as the folder loaders; every fifth held out (a user's own split)."""
    classes = sorted(os.listdir(root))
    pairs = [(os.path.join(root, c, f), k) for k, c in enumerate(classes)
             for f in sorted(os.listdir(os.path.join(root, c)))]
    train = [p for i, p in enumerate(pairs) if i % 5]
    test = pairs[::5]
    return load_dataset(PngDataset(*map(list, zip(*train, strict=True))),
                        PngDataset(*map(list, zip(*test, strict=True))), num_workers=workers)


def build_ways(root: str) -> tuple[dict, dict]:
    """The four ways's data, and the seconds each took to load (construct)."""
    loaders = {"memory": lambda: load_image_folder(root),
               "stream-1w": lambda: stream_image_folder(root, num_workers=1),
               "stream-2w": lambda: stream_image_folder(root, num_workers=2),
               "dataset-2w": lambda: user_dataset(root, 2)}
    data, seconds = {}, {}
    for name, load in loaders.items():
        tick = time.perf_counter()
        data[name] = load()
        seconds[name] = time.perf_counter() - tick
    return data, seconds


def schedstat(pid: int) -> tuple[float, float]:
    """(seconds on a CPU, seconds runnable but waiting for one) of a process, from the kernel.

    /proc/<pid>/task/<tid>/schedstat (Linux), summed over the threads: the second figure is
    time spent on a run queue, i.e. ready to run while every core was busy, which is what
    separates a slow loader from a full machine.
    """
    run = wait = 0.0
    for task in glob.glob(f"/proc/{pid}/task/*/schedstat"):
        try:
            with open(task) as handle:
                fields = handle.read().split()
        except OSError:
            continue  # the thread ended
        run, wait = run + int(fields[0]) / 1e9, wait + int(fields[1]) / 1e9
    return run, wait


def cpu_now() -> tuple[float, float, float, float]:
    """(run, wait) of this process, then (run, wait) summed over its children (loader workers)."""
    children = [schedstat(c.pid) for c in psutil.Process().children(recursive=True)]
    own = schedstat(os.getpid())
    return (*own, sum(c[0] for c in children), sum(c[1] for c in children))


def one_epoch(model, opt, data, epoch: int) -> tuple[float, list[float]]:
    """(train loss, [wall s, CPU s, run-queue wait s, workers' CPU s, workers' wait s])."""
    before = cpu_now()
    records, _, _ = train_epochs(model, opt, data, SCHEDULE, 0, range(epoch, epoch + 1),
                                 lambda e: None)
    after = cpu_now()
    return records[0].train_loss, [records[0].seconds,
                                   *(b - a for a, b in zip(before, after, strict=True))]


def run(data: dict, channels: int, rounds: int) -> tuple[dict, dict, dict]:
    """Per way: warm-up wall seconds, per-epoch (wall, main CPU, workers CPU), train losses."""
    config = {"model": {"_target_": "periodscan.models.CNN2d", "channels": channels}}
    models = {}
    for name, d in data.items():
        model = build_model(config, d, seed=0)
        models[name] = (model, build_optimizer(model.parameters(), SCHEDULE))
    warm, times, losses = {}, {n: [] for n in data}, {n: [] for n in data}
    names = list(data)
    for epoch in range(rounds + 1):
        turn = names[epoch % len(names):] + names[: epoch % len(names)]
        for name in turn:
            loss, seconds = one_epoch(*models[name], data[name], epoch)
            losses[name].append(loss)
            if epoch == 0:
                warm[name] = seconds[0]
            else:
                times[name].append(seconds)
    return warm, times, losses


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=10_000)
    parser.add_argument("--rounds", type=int, default=4)
    parser.add_argument("--channels", type=int, nargs="+", default=[32, 8])
    args = parser.parse_args()
    torch.set_num_threads(1)  # one training thread, as every sweep worker has
    base = tempfile.mkdtemp(prefix="periodscan_stream_speed_")
    try:
        root = os.path.join(base, "images")
        write_folder(root, args.images)
        data, load_seconds = build_ways(root)
        print(f"{args.images} PNG files 32x32 RGB (80/20 split), batch 100, 1 torch thread, "
              f"{os.cpu_count()} cores; loading: " + ", ".join(
                  f"{n} {s:.1f} s" for n, s in load_seconds.items()))
        for channels in args.channels:
            warm, times, losses = run(data, channels, args.rounds)
            report(channels, warm, times, losses)
    finally:
        shutil.rmtree(base, ignore_errors=True)


def report(channels: int, warm: dict, times: dict, losses: dict) -> None:
    same = all(losses[n] == losses["memory"] for n in ("stream-1w", "stream-2w"))
    print(f"\nCNN2d(channels={channels}): seconds per epoch (train + held-out evaluation), "
          f"{len(times['memory'])} epochs each after a warm-up; streamed losses identical to "
          f"in-memory: {same}. Medians; 'wait' is time ready to run but without a free core.")
    print(f"  {'way':<11} {'wall':>6} {'range':>12} {'warm-up':>8} {'ratio':>6} | "
          f"{'training process: CPU':>21} {'wait':>5} | {'loader workers: CPU':>19} {'wait':>5}")
    memory = statistics.median(t[0] for t in times["memory"])
    for name, values in times.items():
        wall, cpu, wait, workers, workers_wait = (statistics.median(v)
                                                  for v in zip(*values, strict=True))
        low, high = min(v[0] for v in values), max(v[0] for v in values)
        print(f"  {name:<11} {wall:5.2f}s {low:5.2f}-{high:5.2f}s {warm[name]:7.2f}s "
              f"{wall / memory:6.2f} | {cpu:20.2f}s {wait:4.2f}s | {workers:18.2f}s "
              f"{workers_wait:4.2f}s")
    if not same:
        raise SystemExit("streamed and in-memory losses differ")


if __name__ == "__main__":
    main()
