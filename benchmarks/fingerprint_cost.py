"""What the data fingerprint costs on a CIFAR-sized set: 50,000 RGB images of 32 x 32.

A sweep hashes the tensors it loaded once per start (periodscan.jobs.fingerprint). This
prints the time of that digest next to the time of one pass that touches the same bytes
(a sum), measured side by side in one run, so the ratio says what the hash adds.

    python benchmarks/fingerprint_cost.py [--images 50000] [--repeats 3]
"""

from __future__ import annotations

import argparse
import time

import torch

from periodscan.jobs.fingerprint import tensor_digest


def best_of(repeats: int, work) -> float:
    times = []
    for _ in range(repeats):
        tick = time.perf_counter()
        work()
        times.append(time.perf_counter() - tick)
    return min(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--images", type=int, default=50_000)
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    torch.set_num_threads(1)
    x = torch.rand(args.images, 3, 32, 32)  # float32, as loaders return it
    y = torch.randint(0, 10, (args.images,))
    size = x.numel() * 4 + y.numel() * 8
    digest = best_of(args.repeats, lambda: tensor_digest(x, y))
    touch = best_of(args.repeats, lambda: float(x.sum()) + float(y.sum()))
    print(f"{args.images} images 3x32x32 float32: {size / 1e6:.0f} MB")
    print(f"sha256 digest: {digest:.2f} s ({size / digest / 1e9:.2f} GB/s)")
    print(f"one summing pass over the same tensors: {touch:.2f} s; digest / pass = "
          f"{digest / touch:.1f}")


if __name__ == "__main__":
    main()
