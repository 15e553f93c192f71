"""Peak memory of a sweep on a 200,000-image folder read through the streamed path.

Builds root/<class>/<i>.png (32x32 RGB, ten classes of procedural stripes with noise) in a
temporary folder, runs a short sweep on it with ``data=image_folder_stream`` (serial executor,
two loader workers), and samples the resident memory of the sweep process and its loader
workers while it runs. Held in memory as the in-memory loader holds it, the training split
alone would be 160,000 x 3 x 32 x 32 float32 = 1.97 GB (the whole folder 2.46 GB). The folder
is deleted afterwards.

    python benchmarks/stream_memory.py [--images 200000] [--epochs 2] [--workers 2]
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import threading
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np
import psutil
from PIL import Image

CLASSES = 10


def write_chunk(root: str, start: int, stop: int, seed: int) -> None:
    """Images start..stop-1: class k has stripes at angle 18k degrees, tinted, plus noise."""
    rng = np.random.default_rng([seed, start])
    yy, xx = np.mgrid[0:32, 0:32]
    for i in range(start, stop):
        k = i % CLASSES
        angle = np.pi * k / CLASSES
        phase = rng.uniform(0, 2 * np.pi)
        wave = np.sin((xx * np.cos(angle) + yy * np.sin(angle)) * 0.6 + phase)
        tint = np.array([1.0 + 0.3 * np.sin(k), 1.0, 1.0 - 0.3 * np.cos(k)])
        pixels = 128 + 60 * wave[..., None] * tint + rng.normal(0, 25, (32, 32, 3))
        image = Image.fromarray(np.clip(pixels, 0, 255).astype(np.uint8))
        image.save(os.path.join(root, f"class_{k}", f"{i:06d}.png"))


def write_folder(root: str, images: int, processes: int = 2, seed: int = 0) -> float:
    """Write ``images`` PNGs under ``root/class_<k>/``; return the seconds it took."""
    tick = time.perf_counter()
    for k in range(CLASSES):
        os.makedirs(os.path.join(root, f"class_{k}"), exist_ok=True)
    step = 5_000
    with ProcessPoolExecutor(processes) as pool:
        jobs = [pool.submit(write_chunk, root, a, min(a + step, images), seed)
                for a in range(0, images, step)]
        for job in jobs:
            job.result()
    return time.perf_counter() - tick


class TreeMemory:
    """Samples memory of this process (RSS) and its children (USS) every ``interval`` seconds.

    Loader workers are forked: their RSS counts the pages they share with this process, so
    what they add is their unique set size (USS, pages no other process maps).
    """

    def __init__(self, interval: float = 0.25) -> None:
        self.interval, self.stop = interval, threading.Event()
        self.peak_self = self.peak_tree = self.peak_children = self.most_children = 0
        self.thread = threading.Thread(target=self.run, daemon=True)

    def run(self) -> None:
        me = psutil.Process()
        while not self.stop.is_set():
            own, unique = me.memory_info().rss, []
            for child in me.children(recursive=True):
                try:
                    unique.append(child.memory_full_info().uss)
                except psutil.Error:
                    pass
            self.peak_self = max(self.peak_self, own)
            self.peak_children = max(self.peak_children, sum(unique))
            self.peak_tree = max(self.peak_tree, own + sum(unique))
            self.most_children = max(self.most_children, len(unique))
            time.sleep(self.interval)

    def __enter__(self) -> TreeMemory:
        self.thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self.stop.set()
        self.thread.join()


def sweep_config(root: str, results: str, epochs: int, workers: int) -> list[str]:
    return ["executor=serial", "seeds=1", f"schedule.epochs={epochs}", "design.starts=[0]",
            "design.lengths=[1]", "schedule.batch_size=128", "data=image_folder_stream",
            f"data.root={root}", f"data.num_workers={workers}", "model=cnn2d",
            "model.channels=16", f"results_dir={results}", "name=stream_memory"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=200_000)
    parser.add_argument("--epochs", type=int, default=2)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    from periodscan.jobs.sweep import run_sweep

    base = tempfile.mkdtemp(prefix="periodscan_stream_memory_")
    os.environ["PERIODSCAN_CACHE"] = os.path.join(base, "cache")  # a cold file-hash record
    try:
        root = os.path.join(base, "images")
        written = write_folder(root, args.images)
        on_disk = sum(e.stat().st_size for d in os.scandir(root) for e in os.scandir(d))
        print(f"{args.images} PNG files 32x32 RGB, {on_disk / 1e6:.0f} MB on disk, written in "
              f"{written:.0f} s")
        rss_before = psutil.Process().memory_info().rss
        with TreeMemory() as memory:
            phases = loading_costs(root, args.workers)
            tick = time.perf_counter()
            outcome = run_sweep(sweep_config(root, os.path.join(base, "results"), args.epochs,
                                             args.workers), quiet=True)
            seconds = time.perf_counter() - tick
        for name, value in phases.items():
            print(f"{name}: {value:.1f} s")
        report(args, outcome, memory, rss_before, seconds)
    finally:
        shutil.rmtree(base, ignore_errors=True)


def loading_costs(root: str, workers: int) -> dict[str, float]:
    """Seconds to list and measure the folder, and to fingerprint it with a cold and warm record."""
    from periodscan.data import stream_image_folder

    costs, tick = {}, time.perf_counter()
    data = stream_image_folder(root, num_workers=workers)
    costs["list files + statistics pass over the training images"] = time.perf_counter() - tick
    for state in ("cold", "warm"):
        tick = time.perf_counter()
        data.digest()
        costs[f"fingerprint ({state} file-hash record)"] = time.perf_counter() - tick
    return costs


def report(args, outcome, memory: TreeMemory, rss_before: int, seconds: float) -> None:
    runs = outcome.runs
    n_train = int(args.images * 0.8)
    print(f"sweep: {len(runs)} runs of {args.epochs} epochs, {args.workers} loader workers, "
          f"{seconds:.0f} s in all (fingerprint, statistics pass, training, evaluation); "
          f"baseline test accuracy {runs.test_acc.max():.3f}")
    print(f"peak RSS of the sweep process: {memory.peak_self / 1e6:.0f} MB "
          f"(before the sweep: {rss_before / 1e6:.0f} MB, mostly the torch import)")
    print(f"peak USS of its child processes together (loader workers; at most "
          f"{memory.most_children} at once): {memory.peak_children / 1e6:.0f} MB")
    print(f"peak of process RSS + children USS: {memory.peak_tree / 1e6:.0f} MB")
    print(f"in memory, the training split alone would be {n_train * 3 * 32 * 32 * 4 / 1e9:.2f} "
          f"GB of float32 ({n_train} x 3 x 32 x 32)")


if __name__ == "__main__":
    main()
