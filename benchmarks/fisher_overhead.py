"""Cost of the Fisher monitor: trunk training time with and without it, side by side.

For each seed, two copies of the demo's clean trunk are trained in lock-step in one process at
one torch thread: epoch e of the plain copy, then epoch e of the monitored copy followed by its
Fisher probe (the order swaps every epoch). Interleaving epoch by epoch keeps both arms under
the same machine load, which matters on a shared machine. Both copies must produce identical
held-out accuracy at every epoch (the monitor must not change training). Run:

    python benchmarks/fisher_overhead.py                        # demo defaults, 2 seeds
    python benchmarks/fisher_overhead.py monitor.probe_size=512 monitor.method=vmap

Extra arguments are Hydra overrides of the sweep config (``monitor.*`` tunes the monitor).
The output is also written to benchmarks/results/fisher_overhead.txt.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from pathlib import Path

import torch
from hydra.utils import instantiate

from periodscan.config import compose_config, to_plain
from periodscan.engine.schedule import build_optimizer
from periodscan.engine.segment import build_model, load_data
from periodscan.engine.training import evaluate, train_epoch
from periodscan.params import seed_list

OUT = Path(__file__).parent / "results" / "fisher_overhead.txt"


class Clock:
    """Wall and CPU seconds accumulated over the ``with`` blocks it times."""

    def __init__(self) -> None:
        self.wall = self.cpu = 0.0

    def __enter__(self) -> Clock:
        self._wall, self._cpu = time.perf_counter(), time.process_time()
        return self

    def __exit__(self, *exc) -> None:
        self.wall += time.perf_counter() - self._wall
        self.cpu += time.process_time() - self._cpu


def lockstep(plain: dict, seed: int) -> dict[str, Clock]:
    """Train the trunk of ``seed`` twice, interleaved; time the arms and the probe alone."""
    data = load_data(plain["data"])
    schedule = plain["schedule"]
    monitor = instantiate(plain["monitor"])
    arms = {}
    for arm in ("off", "on"):
        model = build_model(plain, data, seed)
        arms[arm] = (model, build_optimizer(model.parameters(), schedule))
    clocks = {"off": Clock(), "on": Clock(), "probe": Clock()}
    for epoch in range(int(schedule["epochs"])):
        accuracy = {}
        for arm in (("off", "on") if epoch % 2 == 0 else ("on", "off")):
            model, optimizer = arms[arm]
            with clocks[arm]:
                train_epoch(model, optimizer, data, schedule, seed, epoch, None)
                accuracy[arm] = evaluate(model, data.x_test, data.y_test).acc
                if arm == "on":
                    with clocks["probe"]:
                        readings = monitor(model, data, seed, epoch)
        if accuracy["on"] != accuracy["off"]:
            raise SystemExit(f"the monitor changed training at epoch {epoch} (seed {seed})")
    clocks["readings"] = len(readings)
    return clocks


def main(argv: list[str] | None = None) -> str:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("overrides", nargs="*", help="Hydra overrides (monitor.probe_size=...)")
    parser.add_argument("--seeds", type=int, default=2, help="seeds to time (default 2)")
    parser.add_argument("--no-save", action="store_true", help="do not write the results file")
    args = parser.parse_args(argv)
    plain = to_plain(compose_config(["monitor=fisher", *args.overrides]))
    seeds = seed_list(plain)[: args.seeds]
    torch.set_num_threads(1)
    started = time.perf_counter()
    rows = [(seed, lockstep(plain, seed)) for seed in seeds]

    def ratio(kind: str, rows=rows) -> float:
        on = sum(getattr(c["on"], kind) for _, c in rows)
        return on / sum(getattr(c["off"], kind) for _, c in rows)

    schedule, monitor = plain["schedule"], plain["monitor"]
    shown = " ".join(sys.argv[1:] if argv is None else argv)
    lines = [
        "Fisher monitor overhead on trunk training (benchmarks/fisher_overhead.py)",
        f"command: python benchmarks/fisher_overhead.py {shown}".rstrip(),
        f"data {plain['data']['_target_'].rsplit('.', 1)[-1]} "
        f"(n_train={plain['data'].get('n_train')}), model "
        f"{plain['model']['_target_'].rsplit('.', 1)[-1]}, {schedule['epochs']} epochs, batch "
        f"{schedule['batch_size']}, 1 torch thread, seeds {seeds}",
        "monitor: " + ", ".join(f"{k}={v}" for k, v in monitor.items() if k != "_target_"),
        f"machine: {platform.machine()}, {os.cpu_count()} cores, load average "
        f"{os.getloadavg()[0]:.1f} at the end, torch {torch.__version__}",
        "",
        f"{'seed':>4} {'wall off s':>10} {'wall on s':>10} {'ratio':>6}   "
        f"{'cpu off s':>9} {'cpu on s':>9} {'ratio':>6}   {'probe s/epoch':>13}",
    ]
    for seed, c in rows:
        per_probe = c["probe"].wall / int(schedule["epochs"])
        lines.append(f"{seed:>4} {c['off'].wall:>10.2f} {c['on'].wall:>10.2f} "
                     f"{c['on'].wall / c['off'].wall:>6.3f}   {c['off'].cpu:>9.2f} "
                     f"{c['on'].cpu:>9.2f} {c['on'].cpu / c['off'].cpu:>6.3f}   {per_probe:>13.4f}")
    lines += [
        "",
        f"trunk time with / without the monitor: wall {ratio('wall'):.3f}, "
        f"CPU {ratio('cpu'):.3f} (overhead {100 * (ratio('wall') - 1):+.1f}% wall, "
        f"{100 * (ratio('cpu') - 1):+.1f}% CPU)",
        f"held-out accuracy identical at every epoch with and without the monitor; "
        f"{rows[0][1]['readings']} readings per probed epoch",
        f"benchmark took {time.perf_counter() - started:.0f} s",
    ]
    text = "\n".join(lines)
    print(text)
    if not args.no_save:
        OUT.parent.mkdir(parents=True, exist_ok=True)
        OUT.write_text(text + "\n")
    return text


if __name__ == "__main__":
    main()
