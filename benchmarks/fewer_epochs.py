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
(e) optional (``--ways fresh seqfresh``): **(b) and (c) again on fresh seeds** (cap .. 2 cap - 1):
    whether each repeats its own answer, and whether (c) matches (b) on those seeds too;
(f) with (e): **the grid on all 2 cap seeds**, (b) and (e)'s grid pooled, the best answer at
    hand, against which every 16-seed answer is read.

It reports total epochs trained (trunks plus branches), wall time, and whether the planner's
answer is the same: for each severity level, the critical window (first and latest critical
start), the start from which every later start is safe, and the best safe slot; the critical
and safe starts as sets are printed beside it. (a) trains exactly the runs of (b), which exact
branching makes bit-identical, so its answer is (b)'s; the script checks the final accuracies
of the runs (a) trained against (b)'s. With ``--naive-share K`` (a) trains every K-th run only
and projects its wall time from them (the report says so).

    python benchmarks/fewer_epochs.py [--only demo noise40 severity]
                                      [--ways grid seq naive every fresh seqfresh]
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

import pandas as pd

from periodscan.analysis.recovery import join_recovery, recovery_frame
from periodscan.analysis.verdicts import CRITICAL, SAFE
from periodscan.api import load_sweep
from periodscan.config import TRAINING_KEYS
from periodscan.engine.segment import train_from_scratch
from periodscan.jobs.prepare import prepare
from periodscan.jobs.sweep import run_sweep

HERE = Path(__file__).resolve().parent
STAGES = [3, 5, 8, 12, 16]
WAYS = ("grid", "seq", "naive", "every")
#: Optional: the tree grid and the sequential design again on fresh seeds (cap .. 2 cap - 1),
#: to see how far each one's answer repeats.
FRESH, SEQ_FRESH = "fresh", "seqfresh"
CAP = STAGES[-1]
#: design.alpha_passing of (c), (d) and (e): benchmarks/results/fewer_epochs.txt was measured
#: with even shares (Holm), before the bisection's shares existed; split_halves.py replays both.
PASSING = "even"
#: Likewise the level search it ran with: both ends of the severity levels first.
LEVEL_SEARCH = "ends"
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


def seeds_override(first_seed: int) -> str:
    """``cap`` seeds from ``first_seed`` on (a count when they start at 0, as before)."""
    if not first_seed:
        return f"seeds={CAP}"
    return f"seeds=[{','.join(map(str, range(first_seed, first_seed + CAP)))}]"


def grid_overrides(results_dir: Path, name: str, config: dict,
                   first_seed: int = 0) -> list[str]:
    starts = grid_starts(config["resolution"])
    return [*common(results_dir, name, config), "design=window",
            f"design.starts=[{','.join(map(str, starts))}]", f"design.lengths=[{LENGTH}]",
            seeds_override(first_seed)]


def sequential_overrides(results_dir: Path, name: str, config: dict,
                         every: bool = False, first_seed: int = 0) -> list[str]:
    step = config["resolution"] if every else config["initial_step"]
    return [*common(results_dir, name, config), "design=sequential", f"design.length={LENGTH}",
            f"design.resolution={config['resolution']}", f"design.initial_step={step}",
            f"design.stages=[{','.join(map(str, STAGES))}]", seeds_override(first_seed),
            f"design.alpha_passing={PASSING}", f"design.level_search={LEVEL_SEARCH}",
            *(["design.futility=0"] if every else [])]


def answers(folder: Path) -> dict[str, dict]:
    """Per level (label): the planner's answer as comparable pieces."""
    with load_sweep(folder) as view:
        return pieces(view.plan(LENGTH))


def pooled_records(folders: list[Path]) -> tuple[pd.DataFrame, pd.DataFrame, int | None]:
    """The runs and epoch records of several folders as one (their seeds pooled), and the
    number of classes."""
    views = [load_sweep(folder) for folder in folders]
    try:
        return (pd.concat([v.runs for v in views], ignore_index=True),
                pd.concat([v.epochs for v in views], ignore_index=True),
                views[0].meta.get("num_classes"))
    finally:
        for view in views:
            view.close()


def pooled_answer(folders: list[Path], overrides: list[str]) -> dict[str, dict]:
    """The grid's answer on the runs of several folders at once (their seeds pooled), read
    the way ``SweepView.plan`` reads one folder: verdicts, then the recovery trends joined in."""
    runs, epochs, classes = pooled_records(folders)
    seeds = f"seeds={runs.seed.nunique()}"
    design = prepare([o if not o.startswith("seeds=") else seeds for o in overrides]).design
    return answer_on(design, runs, epochs, classes)


def answer_on(design, runs: pd.DataFrame, epochs: pd.DataFrame, classes: int | None,
              table: pd.DataFrame | None = None) -> dict[str, dict]:
    """A design's answer on runs held in memory (``table``: its verdict table, when the
    design has already computed it), read as ``SweepView.plan`` reads a folder."""
    used = design.runs_used(runs)
    if table is None:
        table = design.table(used, 0.95, 0.5, None, num_classes=classes)
    trends = recovery_frame(used, epochs[epochs.run_id.isin(used.run_id)], EPOCHS,
                            tolerance=0.5, confidence=0.95, family=design.family,
                            family_size=design.holm_family_size())
    return pieces(design.plan(used, join_recovery(table, trends), length=LENGTH,
                              sweep="in memory"))


def pieces(plan) -> dict[str, dict]:
    """Per level (label): a plan's answer as comparable pieces."""
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


def same_answer(ref: dict, other: dict) -> tuple[bool, bool]:
    """Of one level: the same critical window and safe-from; the other's best slot safe in the
    reference (or both without one)."""
    edges = ref["window"] == other["window"] and ref["safe_from"] == other["safe_from"]
    best_ok = other["best"] is None if ref["best"] is None else other["best"] in ref["safe"]
    return edges, best_ok


def compare(grid: dict, seq: dict, names: tuple[str, str] = ("grid", "seq")) -> list[str]:
    """Two answers side by side, level by level, and where their verdicts part; the first is
    the reference (the second's best slot must be safe in it)."""
    a, b = names
    pad = " " * (len(a) - len(b))
    lines, same_all = [], True
    for level, g in grid.items():
        s = seq[level]
        same, best_ok = same_answer(g, s)
        same_all &= same and best_ok
        verdict = {**{x: "safe" for x in g["safe"]}, **{x: "critical" for x in g["critical"]}}
        mine = {**{x: "safe" for x in s["safe"]}, **{x: "critical" for x in s["critical"]}}
        clash = sorted(x for x in verdict if x in mine and mine[x] != verdict[x])
        lost = sorted(x for x in verdict if x not in mine)
        extra = sorted(x for x in mine if x not in verdict)
        lines += [
            f"  level {level}: critical window {a} {g['window']} {b} {s['window']}; safe from "
            f"{a} {g['safe_from']} {b} {s['safe_from']}; best safe slot {a} {g['best']} {b} "
            f"{s['best']} (safe in the {a}: {best_ok}); same answer: {same and best_ok}",
            f"    {a} critical {g['critical']}, safe {g['safe']}",
            f"    {b}{pad} critical {s['critical']}, safe {s['safe']}",
            f"    opposite verdicts: {clash or 'none'}; decided by the {a}, undetermined by {b}: "
            f"{lost or 'none'}; decided (or implied) by {b}, undetermined by the {a}: "
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
    if way in ("grid", FRESH):
        g = run_sweep(grid_o if way == "grid" else
                      grid_overrides(root / FRESH, name, config, first_seed=CAP), quiet=True)
        data = dict(epochs=g.epochs_shared, seconds=g.seconds, folder=str(g.folder))
    elif way in ("seq", "every", SEQ_FRESH):
        every = way == "every"
        folder = root / way / name
        if folder.exists():
            shutil.rmtree(folder)
        if every:  # a replay: start from the grid's runs, train nothing new
            shutil.copytree(_record(root, name, "grid")["folder"], folder,
                            ignore=shutil.ignore_patterns("checkpoints"))
        first_seed = CAP if way == SEQ_FRESH else 0
        s = run_sweep(sequential_overrides(root / way, name, config, every=every,
                                           first_seed=first_seed), quiet=True)
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
    fresh, seq_fresh = _record(root, name, FRESH), _record(root, name, SEQ_FRESH)
    if fresh is not None and seq_fresh is not None:
        lines += fresh_seeds(name, config, root, Path(g["folder"]), Path(s["folder"]),
                             Path(fresh["folder"]), seq_fresh)
    return lines


def fresh_seeds(name: str, config: dict, root: Path, grid: Path, seq: Path, fresh: Path,
                seq_fresh: dict) -> list[str]:
    """(e) the grid and the sequential design again on fresh seeds: does each repeat its own
    answer, and does the sequential answer match the grid's on those seeds too? (f) all 32
    seeds of the two grids pooled: the best answer at hand, that every 16-seed answer is read
    against."""
    seeds = f"{CAP}..{2 * CAP - 1}"
    answer = {"grid": answers(grid), "seq": answers(seq), "grid'": answers(fresh),
              "seq'": answers(Path(seq_fresh["folder"]))}
    pooled = pooled_answer([grid, fresh], grid_overrides(root / "grid", name, config))
    epochs = seq_fresh["epochs"]
    naive = _record(root, name, "naive")["epochs"]
    lines = [f"(e) again on fresh seeds {seeds}: tree grid (grid') and sequential (seq', "
             f"{epochs} epochs, {epochs / naive:.3f} of naive, {seq_fresh['seconds']:.0f} s)",
             *[f"  {n}" for n in seq_fresh["notes"]]]
    for a, b in (("grid", "grid'"), ("seq", "seq'"), ("grid'", "seq'")):
        lines += [f" {b} against {a}:", *compare(answer[a], answer[b], (a, b))]
    lines.append(f"(f) the grid on all {2 * CAP} seeds ((b) and grid' pooled) against each "
                 "16-seed answer:")
    for b in answer:
        lines += [f" {b}:", *compare(pooled, answer[b], ("pooled", b))]
    lines.append("  in short, per answer: same answer as pooled on every level; starts with the "
                 "opposite verdict; share of pooled's decided (level, start) cells it decides")
    for b, mine in answer.items():
        same, opposite, decided, total = tally(pooled, mine)
        lines.append(f"    {b:6s} same {str(same):5s}  opposite {opposite}  decided "
                     f"{decided}/{total}")
    return lines


def tally(reference: dict, other: dict) -> tuple[bool, int, int, int]:
    """Against a reference answer, over every level: the same answer (as :func:`compare`
    judges it), cells with the opposite verdict, and how many of the reference's decided cells
    the other decides too (of how many)."""
    same, opposite, decided, total = True, 0, 0, 0
    for level, ref in reference.items():
        mine = other[level]
        edges, best_ok = same_answer(ref, mine)
        same &= edges and best_ok
        for kind, other_kind in ((CRITICAL, SAFE), (SAFE, CRITICAL)):
            opposite += len(set(ref[kind]) & set(mine[other_kind]))
            decided += len(set(ref[kind]) & set(mine[kind]))
            total += len(ref[kind])
    return same, opposite, decided, total


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--only", nargs="+", choices=list(CONFIGS), default=list(CONFIGS))
    parser.add_argument("--naive-share", type=int, default=1,
                        help="train every K-th naive run and project its wall time "
                             "(default 1: all)")
    parser.add_argument("--results-dir", default=None,
                        help="keep the folders here (default: a folder under /tmp)")
    parser.add_argument("--out", default=str(HERE / "results" / "fewer_epochs.txt"))
    parser.add_argument("--ways", nargs="+", choices=[*WAYS, FRESH, SEQ_FRESH], default=list(WAYS),
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
