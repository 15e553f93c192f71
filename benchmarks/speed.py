"""Speed benchmark: periodscan's shared run tree against the usual ways, side by side.

Runs one sweep three ways on this machine, in one process session, and checks they agree:

  (a) every run trained from scratch, one after another, in one child process;
  (b) a Hydra multirun over the runs with the joblib launcher, one run per job, as many jobs
      at once as periodscan has workers (benchmarks/hydra_one_run.py);
  (c) ``periodscan.run_sweep`` with the local executor.

Each way runs ``--repeats`` times, the order reversed every other time, and the median wall time
is reported with its range: this machine is shared and a single timing can be off by a third.
Prints epochs trained, wall time, peak resident memory (this process and its children, sampled)
and the ratios (a)/(c), (b)/(c), the ideal ratio (epochs without sharing / epochs with sharing,
times workers for (a)) and the efficiency (achieved / ideal). With several workers, (a) also runs
split over that many processes: the speed-up the machine itself gives independent runs, against
which the parallel efficiency of (c) is also stated. With one worker, (a) and (c) also run at the
same moment, one per core, so that the machine's drift hits both alike (``same_moment``). Also
times one epoch of
periodscan's loop against a minimal hand-written PyTorch loop over the same tensors.

    python benchmarks/speed.py                 # both sweeps of the speed issue, 1 and 2 workers
    python benchmarks/speed.py --quick         # 1,000 training examples: same arithmetic, faster
    python benchmarks/speed.py --sweeps 1d --workers 2
"""

from __future__ import annotations

import argparse
import json
import math
import multiprocessing
import os
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import psutil
import torch
import torch.nn.functional as F
from joblib.externals.loky import get_reusable_executor

from periodscan.config import TRAINING_KEYS, compose_config, to_plain
from periodscan.designs import load_design
from periodscan.engine.schedule import build_optimizer
from periodscan.engine.segment import build_model, load_data, train_from_scratch
from periodscan.engine.training import train_epoch
from periodscan.engine.tree import build_tree
from periodscan.jobs.sweep import run_sweep
from periodscan.params import seed_list


def plan_runs(plain: dict) -> list:
    """The runs of a config's design (its first round), as a sweep would train them."""
    return load_design(plain, seed_list(plain)).preview()

HERE = Path(__file__).resolve().parent
SWEEPS = {
    # 60 epochs, 10-epoch windows at 0, 5, ..., 50, 3 seeds: ideal 720 / 445 = 1.62 per seed.
    "1d": ["design.starts=${span:0,50,5}", "design.lengths=[10]", "seeds=3"],
    # starts 0, 6, ..., 42 x lengths 6, 12, 18, 3 seeds: ideal 1,500 / 852 = 1.76 per seed.
    "grid": ["design.starts=${span:0,42,6}", "design.lengths=[6,12,18]", "seeds=3"],
}


class PeakMemory:
    """Sample the resident memory of this process plus all its children every 0.1 s."""

    def __init__(self) -> None:
        self.peak = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        me = psutil.Process()
        while not self._stop.is_set():
            total = 0
            for proc in [me, *me.children(recursive=True)]:
                try:
                    total += proc.memory_info().rss
                except psutil.Error:
                    pass
            self.peak = max(self.peak, total)
            self._stop.wait(0.1)

    def __enter__(self) -> PeakMemory:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()


def _scratch_runs(plain: dict, share: int, processes: int) -> dict[str, float]:
    training = {k: plain[k] for k in TRAINING_KEYS}
    accs = {}
    for run in plan_runs(plain)[share::processes]:
        _, _, records = train_from_scratch(training, run, threads=1)
        accs[run.run_id] = records[-1].test_acc
    return accs


def way_scratch(plain: dict, processes: int = 1) -> dict[str, float]:
    """The runs one after another in fresh child processes (split evenly over ``processes``).

    Like (b) and (c), training happens outside this process, which only samples memory. With
    more than one process this measures what the machine itself gives for independent work on
    several cores: the yardstick for the parallel efficiency of (c).
    """
    context = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(max_workers=processes, mp_context=context) as pool:
        parts = [pool.submit(_scratch_runs, plain, i, processes) for i in range(processes)]
        return {k: v for part in parts for k, v in part.result().items()}


def way_hydra(overrides: list[str], workers: int, n_runs: int) -> dict[str, float]:
    with tempfile.TemporaryDirectory() as tmp:
        cmd = [sys.executable, str(HERE / "hydra_one_run.py"), "-m",
               f"+bench.index=range(0,{n_runs})", "hydra/launcher=joblib",
               f"hydra.launcher.n_jobs={workers}", f"+bench.out={tmp}/runs",
               f"hydra.sweep.dir={tmp}/multirun", "hydra/job_logging=disabled",
               "hydra/hydra_logging=disabled", *overrides]
        subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)
        return {json.loads(p.read_text())["run_id"]: json.loads(p.read_text())["test_acc"]
                for p in Path(tmp, "runs").glob("*.json")}


def way_periodscan(overrides: list[str], workers: int) -> dict[str, float]:
    with tempfile.TemporaryDirectory() as tmp:
        outcome = run_sweep([*overrides, "executor=local", f"executor.workers={workers}",
                             f"results_dir={tmp}", "name=bench"], quiet=True)
    # The reusable worker pool would stay alive and count in the next way's memory.
    get_reusable_executor().shutdown(wait=True)
    return dict(zip(outcome.runs.run_id, outcome.runs.test_acc, strict=True))


def _scratch_log(plain: dict, log: str) -> None:
    """(a) in a child, one JSON line per run: end time, epoch seconds, seconds outside epochs."""
    training = {k: plain[k] for k in TRAINING_KEYS}
    for run in plan_runs(plain):
        start = time.perf_counter()
        _, _, records = train_from_scratch(training, run, threads=1)
        inside = sum(r.seconds for r in records)
        line = {"end": time.time(), "outside": time.perf_counter() - start - inside,
                "epochs": [[bool(r.deficit_on), r.seconds] for r in records]}
        with open(log, "a") as out:
            out.write(json.dumps(line) + "\n")


def same_moment(plain: dict, overrides: list[str]) -> dict[str, float]:
    """(a) and (c) with one worker started together, one core each.

    Run one after the other, the two ways meet different spells of a shared machine (identical
    runs here vary by a third within minutes). Run at the same moment they meet the same ones.
    (c) runs to the end; (a) is stopped then, and its cost is projected from the epochs it
    trained meanwhile: its planned clean and deficit epochs times its mean seconds for each,
    plus its mean time outside epochs per run. Both ways slow each other a little (shared
    memory bandwidth), equally.
    """
    context = multiprocessing.get_context("spawn")
    with tempfile.TemporaryDirectory() as tmp:
        log = str(Path(tmp) / "scratch.jsonl")
        child = context.Process(target=_scratch_log, args=(plain, log), daemon=True)
        child.start()
        start = time.perf_counter()
        run_sweep([*overrides, "executor=local", "executor.workers=1", f"results_dir={tmp}",
                   "name=bench"], quiet=True)
        wall_c, end_c = time.perf_counter() - start, time.time()
        child.terminate()
        child.join()
        with sqlite3.connect(Path(tmp) / "bench" / "ledger.sqlite") as con:
            tree = con.execute("SELECT deficit_on, seconds FROM epochs").fetchall()
        lines = [json.loads(t) for t in Path(log).read_text().splitlines()] if Path(
            log).exists() else []
    get_reusable_executor().shutdown(wait=True)
    done = [line for line in lines if line["end"] <= end_c]
    if not done:
        return {}
    scratch = [(flag, sec) for line in done for flag, sec in line["epochs"]]
    mean = {flag: statistics.mean([sec for f, sec in scratch if f == flag] or [math.nan])
            for flag in (False, True)}
    planned = {False: 0, True: 0}
    for run in plan_runs(plain):
        for epoch in range(run.end):
            planned[run.deficit_on(epoch)] += 1
    projected_a = (planned[False] * mean[False] + planned[True] * mean[True]
                   + len(plan_runs(plain)) * statistics.mean(line["outside"] for line in done))
    tree_mean = {flag: statistics.mean([sec for f, sec in tree if bool(f) == flag] or [math.nan])
                 for flag in (False, True)}
    return {"a_clean": mean[False], "a_deficit": mean[True], "c_clean": tree_mean[False],
            "c_deficit": tree_mean[True], "a_projected": projected_a, "c_wall": wall_c,
            "a_runs_done": len(done)}


def timed(fn, *args):
    with PeakMemory() as memory:
        start = time.perf_counter()
        result = fn(*args)
        seconds = time.perf_counter() - start
    return result, seconds, memory.peak


def _minimal_epoch(model, opt, data, batch: int) -> None:
    """The loop anyone would write: shuffle, slice, forward, backward, step."""
    x, y = data.x_train, data.y_train
    model.train()
    order = torch.randperm(len(y))
    for begin in range(0, len(y), batch):
        idx = order[begin:begin + batch]
        loss = F.cross_entropy(model(x[idx]), y[idx])
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()


def loop_overhead(plain: dict, repeats: int = 9) -> tuple[float, float, float]:
    """Median seconds per epoch of periodscan's train_epoch and of a minimal loop, and the median
    of their paired ratios (each pair run back to back, order alternated, so a slow spell of a
    shared machine hits both sides of a pair). One unmeasured epoch of each warms up first."""
    torch.set_num_threads(1)
    data = load_data(plain["data"])
    schedule = plain["schedule"]
    timings: dict[str, list[float]] = {"ours": [], "minimal": []}
    for rep in range(-1, repeats):
        order = ("ours", "minimal") if rep % 2 == 0 else ("minimal", "ours")
        for which in order:
            model = build_model(plain, data, seed=rep)
            opt = build_optimizer(model.parameters(), schedule)
            start = time.perf_counter()
            if which == "ours":
                train_epoch(model, opt, data, schedule, seed=rep, epoch=0, deficit=None)
            else:
                _minimal_epoch(model, opt, data, int(schedule["batch_size"]))
            if rep >= 0:
                timings[which].append(time.perf_counter() - start)
    ratios = [a / b for a, b in zip(timings["ours"], timings["minimal"], strict=True)]
    return (statistics.median(timings["ours"]), statistics.median(timings["minimal"]),
            statistics.median(ratios))


def _spread(values: list[float]) -> str:
    # Floor and ceiling, so that the range printed always contains the median printed.
    return (f"{math.floor(min(values))}-{math.ceil(max(values))}" if len(values) > 1
            else "-")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--sweeps", nargs="+", default=list(SWEEPS), choices=list(SWEEPS))
    parser.add_argument("--workers", nargs="+", type=int, default=[1, 2])
    parser.add_argument("--quick", action="store_true",
                        help="1,000 training examples instead of 4,000 (same epoch arithmetic)")
    parser.add_argument("--repeats", type=int, default=2,
                        help="times each way runs, order reversed every other time; medians "
                             "are reported (default 2)")
    parser.add_argument("--out", default=str(HERE / "results" / "speed.txt"))
    parser.add_argument("--no-same-moment", dest="same_moment", action="store_false",
                        help="skip the 1-worker (a)/(c) measurement with both started together")
    parser.add_argument("--loop-only", action="store_true",
                        help="only the per-epoch loop ratio (periodscan's epoch vs a minimal "
                             "hand-written one, --repeats pairs, at least 101), a minute "
                             "instead of an hour")
    args = parser.parse_args()
    if args.loop_only:
        args.sweeps = []
    extra = ["data.n_train=1000"] if args.quick else []

    lines = [f"# periodscan speed benchmark  ({time.strftime('%Y-%m-%d %H:%M')}, "
             f"{os.cpu_count()} cores, torch {torch.__version__}, 1 torch thread per worker"
             f"{', --quick' if args.quick else ''}, {args.repeats} repeat(s), medians)", ""]

    def emit(text: str = "") -> None:
        print(text, flush=True)
        lines.append(text)

    for name in args.sweeps:
        overrides = SWEEPS[name] + extra
        plain = to_plain(compose_config(overrides))
        runs = plan_runs(plain)
        tree = build_tree(runs, "bench")
        unshared, shared = tree.epochs_unshared, tree.epochs_shared
        emit(f"## sweep {name}: {len(runs)} runs, {unshared} epochs from scratch, "
             f"{shared} in the tree (ideal sharing ratio {unshared / shared:.2f})")
        # Every way once per repeat; the order is reversed on odd repeats so a slow spell of
        # this shared machine does not always land on the same way. Medians are reported.
        ways = [("a", 1)] + [(w, n) for n in args.workers
                             for w in (("a", "b", "c") if n > 1 else ("b", "c"))]
        walls: dict[tuple[str, int], list[float]] = {k: [] for k in ways}
        peaks: dict[tuple[str, int], int] = dict.fromkeys(ways, 0)
        metrics: dict[tuple[str, int], dict[str, float]] = {}
        for rep in range(args.repeats):
            for way, workers in (ways if rep % 2 == 0 else ways[::-1]):
                if way == "a":
                    result, seconds, peak = timed(way_scratch, plain, workers)
                elif way == "b":
                    result, seconds, peak = timed(way_hydra, overrides, workers, len(runs))
                else:
                    result, seconds, peak = timed(way_periodscan, overrides, workers)
                print(f"   repeat {rep + 1}: ({way}) {workers} worker(s) {seconds:.1f} s",
                      flush=True)
                walls[(way, workers)].append(seconds)
                peaks[(way, workers)] = max(peaks[(way, workers)], peak)
                metrics.setdefault((way, workers), result)
                if metrics[(way, workers)] != result:
                    metrics[(way, workers)] = {}  # not reproducible between repeats
        reference = metrics[("a", 1)]
        t_a = statistics.median(walls[("a", 1)])

        emit(f"{'way':<34}{'workers':>8}{'epochs':>8}{'wall s':>9}{'range':>9}{'peak MiB':>10}"
             f"{'(a)/(c)':>9}{'(b)/(c)':>9}{'ideal':>7}{'effic.':>8}{'machine':>9}"
             "  same metrics")
        emit(f"{'(a) from scratch, one by one':<34}{1:>8}{unshared:>8}{t_a:>9.1f}"
             f"{_spread(walls[('a', 1)]):>9}{peaks[('a', 1)] / 2**20:>10.0f}")
        for workers in args.workers:
            # What the machine gives independent runs on `workers` cores, from (a) itself.
            scaling = 1.0
            if workers > 1:
                t_an = statistics.median(walls[("a", workers)])
                scaling = t_a / t_an
                same_a = bool(reference) and metrics[("a", workers)] == reference
                emit(f"{'(a) from scratch, split':<34}{workers:>8}{unshared:>8}{t_an:>9.1f}"
                     f"{_spread(walls[('a', workers)]):>9}"
                     f"{peaks[('a', workers)] / 2**20:>10.0f}{'':>18}{'':>7}{'':>8}"
                     f"{scaling:>9.2f}  {same_a}")
            t_b = statistics.median(walls[("b", workers)])
            t_c = statistics.median(walls[("c", workers)])
            ideal = unshared / shared * workers
            same_b = bool(reference) and metrics[("b", workers)] == reference
            same_c = bool(reference) and metrics[("c", workers)] == reference
            emit(f"{'(b) Hydra multirun + joblib':<34}{workers:>8}{unshared:>8}{t_b:>9.1f}"
                 f"{_spread(walls[('b', workers)]):>9}{peaks[('b', workers)] / 2**20:>10.0f}"
                 f"{'':>18}{'':>7}{'':>8}  {same_b}")
            emit(f"{'(c) periodscan sweep':<34}{workers:>8}{shared:>8}{t_c:>9.1f}"
                 f"{_spread(walls[('c', workers)]):>9}{peaks[('c', workers)] / 2**20:>10.0f}"
                 f"{t_a / t_c:>9.2f}{t_b / t_c:>9.2f}{ideal:>7.2f}{t_a / t_c / ideal:>8.2f}"
                 f"{t_a / t_c / (ideal / workers * scaling):>9.2f}  {same_c}")
        emit("ideal = epochs from scratch / epochs in the tree x workers; effic. = ((a)/(c)) / "
             "ideal; machine (on (a) split rows) = (a) one by one / (a) split, the speed-up this "
             "machine gives independent runs; machine (on (c) rows) = effic. with the ideal "
             "taken as sharing ratio x that speed-up")
        if args.same_moment and 1 in args.workers:
            print("   same moment: (a) and (c) with 1 worker started together", flush=True)
            both = same_moment(plain, overrides)
            if both:
                ratio = both["a_projected"] / both["c_wall"]
                ideal = unshared / shared
                emit(f"same moment, 1 worker, (a) and (c) started together on one core each: "
                     f"per clean epoch (a) {1000 * both['a_clean']:.1f} ms, (c) "
                     f"{1000 * both['c_clean']:.1f} ms; per deficit epoch (a) "
                     f"{1000 * both['a_deficit']:.1f} ms, (c) {1000 * both['c_deficit']:.1f} ms;"
                     f" (a) projected {both['a_projected']:.1f} s (from its "
                     f"{both['a_runs_done']} runs done meanwhile), (c) {both['c_wall']:.1f} s: "
                     f"(a)/(c) {ratio:.2f}, ideal {ideal:.2f}, effic. {ratio / ideal:.2f}")
        emit()

    pairs = max(args.repeats, 101) if args.loop_only else 9
    ours, minimal, ratio = loop_overhead(to_plain(compose_config(extra)), pairs)
    emit(f"## one epoch of the demo ({pairs} pairs, order alternated, medians): "
         f"periodscan {ours * 1000:.0f} ms, minimal hand-written loop {minimal * 1000:.0f} ms, "
         f"median paired ratio {ratio:.3f}")
    Path(args.out).parent.mkdir(parents=True, exist_ok=True)
    Path(args.out).write_text("\n".join(lines) + "\n")
    print(f"\nwritten to {args.out}")


if __name__ == "__main__":
    main()
