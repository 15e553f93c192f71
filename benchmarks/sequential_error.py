"""Wrong-verdict rates of staged (group-sequential) verdicts, by full-size simulation.

Per-seed damages are drawn Normal(mean, sd); a window is tested after each stage of seeds with
the two-sided t test of "mean damage = tolerance" against the nominal level of that look
(periodscan.analysis.sequential: Lan-DeMets spending, t critical values by the significance-level
approach), with Holm over the windows of a family in its group-sequential form. A window stops
at the stage where it is first rejected (its verdict: the direction of its mean at the look that
crossed), else at the cap; no futility stopping here. Cases:

* one window at the tolerance, both spending functions, stages 3,5,8,12,16 and 3,6,9,12
  (any verdict is wrong), and the same with the variance known (z tests: the boundaries alone);
* 9 windows all at the tolerance (any verdict in the family is wrong);
* 9 windows: 3 far above, 3 far below, 3 at the tolerance (wrong: any verdict among the 3 at
  the tolerance, or a verdict in the wrong direction anywhere).

Each case also runs with the windows at the tolerance moved to tolerance +- 2 sd (half the
sequences each way) to show the saving: mean seeds used per such window and the share stopped
before the cap. Holm is vectorised here and checked against sequential_holm on a subset.

    python benchmarks/sequential_error.py [--sequences 20000] [--seed 0]
"""

from __future__ import annotations

import argparse
import datetime
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import scipy
from scipy import stats

from periodscan.analysis.sequential import Stages, sequential_holm

ALPHA = 0.05
TOLERANCE, SD = 0.5, 0.8  # points of accuracy; only (mean - tolerance) / sd matters
FAR = 3.0  # "far" windows sit this many sd from the tolerance
SHIFT = 2.0  # the saving is measured at tolerance +- this many sd
CHECKED = 300  # sequences per case on which the vectorised Holm is compared with the package's
RESULTS = Path(__file__).resolve().parent / "results" / "sequential_error.txt"


@dataclass(frozen=True)
class Case:
    name: str
    stages: Stages
    offsets: tuple[float, ...]  # per window, (true mean - tolerance) / sd
    known_variance: bool = False


def cases() -> list[Case]:
    long, short = (3, 5, 8, 12, 16), (3, 6, 9, 12)
    out = []
    for kind in ("obrien_fleming", "pocock"):
        for seeds in (long, short):
            out.append(Case("1 window at tolerance, t", Stages(seeds, kind), (0.0,)))
        out.append(Case("1 window at tolerance, z (sd known)", Stages(long, kind), (0.0,), True))
    for kind in ("obrien_fleming", "pocock"):
        out.append(Case("9 windows at tolerance", Stages(long, kind), (0.0,) * 9))
        out.append(Case("9 windows: 3 above, 3 below, 3 at", Stages(long, kind),
                        (FAR,) * 3 + (-FAR,) * 3 + (0.0,) * 3))
    return out


def pvalues(case: Case, offsets: np.ndarray, rng) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided p-values and statistics, shape (sequences, windows, looks)."""
    n = np.asarray(case.stages.seeds)
    draws = rng.normal(TOLERANCE + offsets[..., None] * SD, SD,
                       offsets.shape + (case.stages.cap,))
    mean = np.cumsum(draws, axis=-1)[..., n - 1] / n
    if case.known_variance:
        stat = (mean - TOLERANCE) / (SD / np.sqrt(n))
        return 2 * stats.norm.sf(np.abs(stat)), stat
    squares = np.cumsum(draws ** 2, axis=-1)[..., n - 1]
    var = (squares - n * mean ** 2) / (n - 1)
    stat = (mean - TOLERANCE) / np.sqrt(var / n)
    return 2 * stats.t.sf(np.abs(stat), n - 1), stat


def holm(p: np.ndarray, table: np.ndarray) -> np.ndarray:
    """Vectorised sequential Holm: first crossing look per window at the level it was rejected
    with (-1: not rejected); ``table[r]`` holds the nominal levels with r rejected."""
    sequences, windows, looks = p.shape
    look = np.full((sequences, windows), -1)
    count = np.zeros(sequences, dtype=int)
    for _ in range(windows):
        cross = p <= table[np.minimum(count, windows - 1)][:, None, :looks]
        new = cross.any(axis=2) & (look < 0)
        if not new.any():
            break
        look = np.where(new, cross.argmax(axis=2), look)
        count = (look >= 0).sum(axis=1)
    return look


def run_live(p: np.ndarray, table: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Stage by stage as a design would: (stop stage, crossing look) per window; stop stage is
    the number of looks when the window is first rejected, the last look if never."""
    sequences, windows, looks = p.shape
    stop = np.full((sequences, windows), looks - 1)
    crossed = np.full((sequences, windows), -1)
    for k in range(looks):
        now = holm(p[:, :, :k + 1], table)
        if np.any((crossed >= 0) & (now < 0)):
            raise AssertionError("a rejection was undone by more looks")
        new = (now >= 0) & (crossed < 0)
        stop[new], crossed[new] = k, now[new]
    return stop, crossed


def check_against_package(p: np.ndarray, case: Case, table: np.ndarray) -> None:
    ours = holm(p, table)
    for s in range(min(CHECKED, len(p))):
        theirs = sequential_holm(p[s].tolist(), case.stages, ALPHA)
        if [(-1 if x is None else x) for x in theirs] != ours[s].tolist():
            raise AssertionError(f"vectorised Holm differs from sequential_holm: {case}")


def wrong_verdicts(case: Case, offsets: np.ndarray, stat, crossed) -> np.ndarray:
    """Per sequence: any verdict at the tolerance or in the wrong direction."""
    rows, cols = np.indices(crossed.shape)
    said = np.sign(stat[rows, cols, np.maximum(crossed, 0)]) * (crossed >= 0)
    truth = np.sign(offsets)
    return np.any((said != 0) & (said != truth), axis=1)


def simulate(case: Case, sequences: int, rng) -> dict:
    windows = len(case.offsets)
    table = np.array([case.stages.levels(ALPHA / (windows - r)) for r in range(windows)])
    offsets = np.broadcast_to(np.asarray(case.offsets), (sequences, windows))
    p, stat = pvalues(case, offsets, rng)
    check_against_package(p, case, table)
    _, crossed = run_live(p, table)
    wrong = int(wrong_verdicts(case, offsets, stat, crossed).sum())
    ci = stats.binomtest(wrong, sequences).proportion_ci(0.95, method="exact")
    sign = np.where(np.arange(sequences) % 2 == 0, SHIFT, -SHIFT)[:, None]
    moved = np.where(offsets == 0.0, sign, offsets)
    p2, _ = pvalues(case, moved, rng)
    stop, crossed2 = run_live(p2, table)
    at = offsets == 0.0  # the windows moved off the tolerance
    used = np.asarray(case.stages.seeds)[stop][at]
    return {"wrong": wrong, "rate": wrong / sequences, "low": ci.low, "high": ci.high,
            "seeds": float(used.mean()),
            "early": float(np.mean(stop[at] < len(case.stages.seeds) - 1)),
            "decided": float(np.mean(crossed2[at] >= 0))}


def header(args) -> str:
    stamp = datetime.datetime.now().strftime("%Y-%m-%d %H:%M")
    return (f"# python benchmarks/sequential_error.py --sequences {args.sequences} --seed "
            f"{args.seed}  ({stamp}, {os.cpu_count()} cores, numpy {np.__version__}, scipy "
            f"{scipy.__version__}; alpha {ALPHA}, tolerance {TOLERANCE}, per-seed sd {SD}, "
            f"far = {FAR} sd, saving at tolerance +- {SHIFT} sd)")


def boundary_lines() -> list[str]:
    lines = ["## boundaries at alpha 0.05 (one window): |t| needed per look (z boundary)"]
    for kind in ("obrien_fleming", "pocock"):
        for seeds in ((3, 5, 8, 12, 16), (3, 6, 9, 12)):
            s = Stages(seeds, kind)
            z = stats.norm.isf(s.levels(ALPHA) / 2)
            cells = "  ".join(f"n={n}: {t:.3f} ({c:.3f})"
                              for n, t, c in zip(seeds, s.t_critical(ALPHA), z, strict=True))
            lines.append(f"{kind:15s} {cells}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sequences", type=int, default=20_000)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=RESULTS)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    tick = time.perf_counter()
    lines = [header(args), "", *boundary_lines(), "",
             f"## wrong-verdict rate per sequence ({args.sequences} sequences per case, 95% "
             "Clopper-Pearson interval); pass = rate <= nominal; saving = windows at tolerance "
             f"+- {SHIFT} sd: mean seeds used, share stopped before the cap, share decided"]
    for case in cases():
        r = simulate(case, args.sequences, rng)
        verdict = "pass" if r["rate"] <= ALPHA else (
            "FAIL (interval above nominal)" if r["low"] > ALPHA else "FAIL (within noise)")
        lines.append(
            f"{case.name:36s} {case.stages.kind:14s} {','.join(map(str, case.stages.seeds)):11s}"
            f" rate {r['rate']:.4f} [{r['low']:.4f}, {r['high']:.4f}] nominal {ALPHA:.2f} "
            f"{verdict:29s} | seeds {r['seeds']:5.2f} of {case.stages.cap}, early "
            f"{r['early']:.3f}, decided {r['decided']:.3f}")
        print(lines[-1], flush=True)
    lines += ["", f"total time {time.perf_counter() - tick:.0f} s; vectorised Holm matched "
              f"sequential_holm on the first {CHECKED} sequences of every case"]
    print(lines[-1])
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
