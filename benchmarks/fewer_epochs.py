"""The planning question answered four ways: naive grid, tree grid, sequential design, and the
sequential design at every start (a replay on the tree grid's runs).

For each configuration:

(a) **naive grid**: every run of the full grid at the seed cap (the baseline and every
    start x severity level, ``cap`` seeds) trained from scratch, one process per core;
(b) **tree grid**: the same runs as one ``periodscan sweep`` (``design=window``), where the
    runs of a seed share their clean trunk;
(c) **sequential**: ``design=sequential`` (starts and levels bisected, seeds added in stages,
    group-sequential verdicts) in a fresh folder;
(d) **sequential at every start**: the same design told to measure every start and level of
    the grid (``initial_step`` = ``resolution``) with futility stopping off: the most a
    sequential test can decide at this cap. It needs no training of its own: the runs it asks
    for are runs of (b) (same seeds, exact branching), so it is replayed on a copy of (b)'s
    folder, and its epochs are the ones it would have trained (no wall time).

It reports total epochs trained (trunks plus branches), wall time, and whether the planner's
answer is the same: for each severity level, the critical window (first and latest critical
start), the start from which every later start is safe, and the best safe slot; the critical
and safe starts as sets are printed beside it. (a) trains exactly the runs of (b), which exact
branching makes bit-identical, so its answer is (b)'s; the script checks the final accuracies
of the runs (a) trained against (b)'s. With ``--naive-share K`` (a) trains every K-th run only
and projects its wall time from them (the report says so).

    python benchmarks/fewer_epochs.py [--only demo noise40 severity] [--ways grid seq naive every]
                                      [--naive-share 1] [--results-dir DIR] [--out FILE]

Each way's measurement is kept in --results-dir, so the ways can be trained at different times
and the report printed once all four are there.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing
import os
import shutil
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.api import load_sweep
from periodscan.config import TRAINING_KEYS
from periodscan.engine.segment import train_from_scratch
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep

HERE = Path(__file__).resolve().parent
STAGES = [3, 5, 8, 12, 16]
WAYS = ("grid", "seq", "naive", "every")
CAP = STAGES[-1]
LENGTH, EPOCHS = 15, 60

CONFIGS = {
    # The demo: mnist1d signals, 1-D CNN, blur sigma 2 for 15 of 60 epochs, tolerance 0.5.
    "demo": dict(overrides=[], resolution=2, initial_step=10),
    # The same model and data with 40% of training labels wrong for 15 epochs.
    "noise40": dict(overrides=["deficit=label_noise", "deficit.rate=0.4"], resolution=2,
                    initial_step=10),
    # The demo's blur at three strengths (sigma 1, 2, 4), one Holm family per level.
    "severity": dict(overrides=["design.severity={param:sigma,levels:[1,2,4]}"], resolution=4,
                     initial_step=12),
}


def last_start() -> int:
    """The sequential design's default last start: a tenth of the schedule left to recover."""
    return EPOCHS - LENGTH - -(-EPOCHS // 10)


def grid_starts(resolution: int) -> list[int]:
    return list(range(0, last_start() + 1, resolution))


def common(results_dir: Path, name: str, config: dict) -> list[str]:
    return [*config["overrides"], f"results_dir={results_dir}", f"name={name}",
            "tolerance=0.5", "executor=local", "executor.workers=2"]


def grid_overrides(results_dir: Path, name: str, config: dict) -> list[str]:
    starts = grid_starts(config["resolution"])
    return [*common(results_dir, name, config), "design=window",
            f"design.starts=[{','.join(map(str, starts))}]", f"design.lengths=[{LENGTH}]",
            f"seeds={CAP}"]


def sequential_overrides(results_dir: Path, name: str, config: dict,
                         every: bool = False) -> list[str]:
    step = config["resolution"] if every else config["initial_step"]
    return [*common(results_dir, name, config), "design=sequential", f"design.length={LENGTH}",
            f"design.resolution={config['resolution']}", f"design.initial_step={step}",
            f"design.stages=[{','.join(map(str, STAGES))}]", f"seeds={CAP}",
            *(["design.futility=0"] if every else [])]


def answers(folder: Path) -> dict[str, dict]:
    """Per level (label): the planner's answer as comparable pieces."""
    with load_sweep(folder) as view:
        plan = view.plan(LENGTH)
    per_level = getattr(plan, "answers", None) or {"": plan}
    labels = getattr(plan, "labels", None) or {"": "-"}
    out = {}
    for key, a in per_level.items():
        best = a.best.start if a.best is not None and a.best_is_safe else None
        out[labels.get(key, key)] = dict(
            window=(min(a.critical_starts), max(a.critical_starts)) if a.critical_starts
            else None, safe_from=a.safe_from, best=best, critical=list(a.critical_starts),
            safe=list(a.safe_starts),
            damage={s.start: s.damage for s in a.starts})
    return out


def _train_share(overrides: list[str], share: int, stride: int, workers: int) -> dict:
    torch_threads = 1
    prep = prepare(overrides)
    blocks = prep.design.variant_blocks()
    runs = sorted(prep.design.preview(), key=lambda r: r.run_id)[share::stride * workers]
    accs = {}
    for run in runs:
        training = {k: prep.plain[k] for k in TRAINING_KEYS}
        if run.variant:
            training["deficit"] = blocks[run.variant]
        _, _, records = train_from_scratch(training, run, threads=torch_threads)
        accs[run.run_id] = records[-1].test_acc
    return accs


def naive_grid(overrides: list[str], stride: int, workers: int = 2) -> tuple[dict, float]:
    """Train every ``stride``-th run of the grid from scratch on ``workers`` processes."""
    context = multiprocessing.get_context("spawn")
    started = time.perf_counter()
    with ProcessPoolExecutor(max_workers=workers, mp_context=context) as pool:
        parts = [pool.submit(_train_share, overrides, i * stride, stride, workers)
                 for i in range(workers)]
        accs = {k: v for p in parts for k, v in p.result().items()}
    return accs, time.perf_counter() - started


def compare(grid: dict, seq: dict) -> list[str]:
    """The two answers side by side, level by level, and where their verdicts part."""
    lines, same_all = [], True
    for level, g in grid.items():
        s = seq[level]
        same = g["window"] == s["window"] and g["safe_from"] == s["safe_from"]
        best_ok = s["best"] is None if g["best"] is None else s["best"] in g["safe"]
        same_all &= same and best_ok
        verdict = {**{x: "safe" for x in g["safe"]}, **{x: "critical" for x in g["critical"]}}
        mine = {**{x: "safe" for x in s["safe"]}, **{x: "critical" for x in s["critical"]}}
        clash = sorted(x for x in verdict if x in mine and mine[x] != verdict[x])
        lost = sorted(x for x in verdict if x not in mine)
        extra = sorted(x for x in mine if x not in verdict)
        lines += [
            f"  level {level}: critical window grid {g['window']} seq {s['window']}; safe from "
            f"grid {g['safe_from']} seq {s['safe_from']}; best safe slot grid {g['best']} seq "
            f"{s['best']} (safe in the grid: {best_ok}); same answer: {same and best_ok}",
            f"    grid critical {g['critical']}, safe {g['safe']}",
            f"    seq  critical {s['critical']}, safe {s['safe']}",
            f"    opposite verdicts: {clash or 'none'}; decided by the grid, undetermined by seq: "
            f"{lost or 'none'}; decided (or implied) by seq, undetermined by the grid: "
            f"{extra or 'none'}"]
    lines.append(f"  same planner answer on every level: {same_all}")
    return lines


def _record(root: Path, name: str, way: str, data: dict | None = None) -> dict | None:
    """Each way's measurement is kept in the results folder, so ways can run at different
    times (a way already measured is not trained again)."""
    path = root / f"{name}.{way}.json"
    if data is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(data))
    return json.loads(path.read_text()) if path.exists() else None


def measure(name: str, config: dict, root: Path, way: str, stride: int) -> dict:
    """Train one way (unless already measured) and return its record."""
    done = _record(root, name, way)
    if done is not None:
        return done
    grid_o = grid_overrides(root / "grid", name, config)
    if way == "grid":
        g = run_sweep(grid_o, quiet=True)
        data = dict(epochs=g.epochs_shared, seconds=g.seconds, folder=str(g.folder))
    elif way in ("seq", "every"):
        every = way == "every"
        folder = root / way / name
        if folder.exists():
            shutil.rmtree(folder)
        if every:  # a replay: start from the grid's runs, train nothing new
            shutil.copytree(_record(root, name, "grid")["folder"], folder,
                            ignore=shutil.ignore_patterns("checkpoints"))
        s = run_sweep(sequential_overrides(root / way, name, config, every=every), quiet=True)
        data = dict(epochs=s.epochs_shared, seconds=None if every else s.seconds,
                    folder=str(s.folder), notes=s.notes)
    else:
        runs = len(prepare(grid_o).design.preview())
        accs, seconds = naive_grid(grid_o, stride)
        data = dict(epochs=runs * EPOCHS, runs=runs, trained=len(accs), seconds=seconds,
                    projected=seconds * runs / max(len(accs), 1), accs=accs)
    return _record(root, name, way, data)


def tables(folder: Path) -> dict[tuple[str, int], object]:
    """Each measured (level label, start) row of a folder's verdict table."""
    with load_sweep(folder) as view:
        table = view.table()
    level = table["variant"] if "variant" in table else ["-"] * len(table)
    return {(str(v).replace("=", " "), int(r.start)): r
            for v, r in zip(level, table.itertuples(), strict=True)}


def why(grid: Path, seq: Path) -> list[str]:
    """For each start the grid decided and the sequential way measured but left undetermined:
    its seeds, how it stopped, its p value (against the grid's Holm-adjusted one)."""
    g, s = tables(grid), tables(seq)
    out = []
    for key, row in sorted(s.items()):
        mine, theirs = row.verdict, g[key].verdict
        if mine not in (CRITICAL, SAFE) and theirs in (CRITICAL, SAFE):
            out.append(f"    level {key[0]} start {key[1]}: grid {theirs} at {g[key].seeds} seeds "
                       f"(Holm-adjusted p {g[key].p_holm:.4f}); here {row.stopped} after "
                       f"{row.seeds} seeds, mean damage {row.damage:+.2f}, p {row.p_value:.4f}")
    return out or ["    none"]


def report(name: str, config: dict, root: Path) -> list[str]:
    g, s, a, e = (_record(root, name, way) for way in ("grid", "seq", "naive", "every"))
    with load_sweep(Path(g["folder"])) as view:
        tree_accs = dict(zip(view.runs.run_id, view.runs.test_acc, strict=True))
    identical = all(tree_accs.get(k) == v for k, v in a["accs"].items())
    naive = a["epochs"]
    projected = a["trained"] < a["runs"]
    grid_answer = answers(Path(g["folder"]))
    lines = [f"## {name}: {LENGTH}-epoch deficit of {EPOCHS}, starts 0..{last_start()} every "
             f"{config['resolution']} ({len(grid_starts(config['resolution']))} starts), "
             f"cap {CAP} seeds, stages {STAGES}, tolerance 0.5",
             "way                          epochs   ratio to naive   wall s",
             f"(a) naive grid               {naive:6d}   1.000            {a['projected']:7.0f}"
             + (f"  (projected from {a['trained']} of {a['runs']} runs)" if projected else ""),
             f"(b) tree grid                {g['epochs']:6d}   {g['epochs'] / naive:.3f}"
             f"            {g['seconds']:7.0f}",
             f"(c) sequential               {s['epochs']:6d}   {s['epochs'] / naive:.3f}"
             f"            {s['seconds']:7.0f}",
             f"(d) sequential, every start  {e['epochs']:6d}   {e['epochs'] / naive:.3f}"
             "                  -  (replayed on (b)'s runs)",
             f"(a) runs trained from scratch identical to (b)'s: {identical} "
             f"({a['trained']} runs compared)"]
    for label, way in (("(c) sequential", s), ("(d) sequential, every start", e)):
        lines += [f"{label}:", *[f"  {n}" for n in way["notes"]],
                  *compare(grid_answer, answers(Path(way["folder"]))),
                  "  decided by the grid, measured here but left undetermined:",
                  *why(Path(g["folder"]), Path(way["folder"]))]
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--only", nargs="+", choices=list(CONFIGS), default=list(CONFIGS))
    parser.add_argument("--naive-share", type=int, default=1,
                        help="train every K-th naive run and project its wall time "
                             "(default 1: all)")
    parser.add_argument("--results-dir", default=None,
                        help="keep the folders here (default: a folder under /tmp)")
    parser.add_argument("--out", default=str(HERE / "results" / "fewer_epochs.txt"))
    parser.add_argument("--ways", nargs="+", choices=WAYS, default=list(WAYS),
                        help="which ways to measure now (each is kept in --results-dir; the "
                             "report needs all four)")
    args = parser.parse_args()
    root = Path(args.results_dir or f"/tmp/fewer_epochs_{os.getpid()}")
    lines = [f"# fewer epochs for the same answer ({time.strftime('%Y-%m-%d %H:%M')}, "
             f"{os.cpu_count()} cores, 2 workers each way)", ""]
    for name in args.only:
        for way in args.ways:
            measure(name, CONFIGS[name], root, way, args.naive_share)
        if all(_record(root, name, way) for way in WAYS):
            lines += [*report(name, CONFIGS[name], root), ""]
            print("\n".join(lines), flush=True)
    if len(lines) > 2:
        Path(args.out).write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
