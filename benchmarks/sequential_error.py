"""Wrong-verdict rates of staged (group-sequential) verdicts, by full-size simulation.

Per-seed damages are drawn Normal(mean, sd); a window is tested after each stage of seeds with
the two-sided t test of "mean damage = tolerance" against the level of that look, with Holm over
the windows of a family in its group-sequential form (periodscan.analysis.sequential). Every
case runs, on the same draws, under both rules for setting a look's level from the
Lan-DeMets spending function:

* "union (used)": look k at its spending increment a(t_k) - a(t_{k-1}) on the exact t
  distribution with n_k - 1 df; the union bound caps the false-crossing chance at alpha;
* "correlated (reference)": the group-sequential z boundaries read on the t distribution (the
  significance-level approach), which spends the correlation between looks but overshoots
  alpha with a few seeds.

A window stops at the stage where it is first rejected (its verdict: the direction of its mean
at the look that crossed), else at the cap; no futility stopping here. Cases:

* one window at the tolerance, both spending functions, stages 3,5,8,12,16 and 3,6,9,12 (any
  verdict is wrong), the same with the variance known (z tests: the boundaries alone), and one
  window at a Holm-sized level alpha / 20 with many more sequences;
* 9 windows all at the tolerance (any verdict in the family is wrong);
* 9 windows (3 far above, 3 far below, 3 at the tolerance) and 20 windows (7 above, 7 below,
  6 at): wrong is any verdict among those at the tolerance, or a wrong-direction verdict.

Each case also runs with the windows at the tolerance moved to tolerance +- 2 sd (half the
sequences each way) to show what each rule costs: mean seeds used per such window, the share
stopped before the cap and the share decided; the closing price section adds +- 1 sd, where
the two rules differ more. Holm is vectorised here and checked against
sequential_holm on a subset.

    python benchmarks/sequential_error.py [--sequences 100000] [--small-sequences 400000]
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
SMALL_ALPHA = ALPHA / 20  # a Holm-sized level: the first step in a family of 20 windows
TOLERANCE, SD = 0.5, 0.8  # points of accuracy; only (mean - tolerance) / sd matters
FAR = 3.0  # "far" windows sit this many sd from the tolerance
SHIFT = 2.0  # the saving is measured at tolerance +- this many sd
NEAR = 1.0  # ... and, in the price section only, also at tolerance +- this many sd
CHECKED = 300  # sequences per case on which the vectorised Holm is compared with the package's
LONG, SHORT = (3, 5, 8, 12, 16), (3, 6, 9, 12)
RULES = {"union": "union (used)", "correlated": "correlated (reference)"}
KINDS = ("obrien_fleming", "pocock")
RESULTS = Path(__file__).resolve().parent / "results" / "sequential_error.txt"


@dataclass(frozen=True)
class Case:
    name: str
    seeds: tuple[int, ...]
    kind: str
    offsets: tuple[float, ...]  # per window, (true mean - tolerance) / sd
    known_variance: bool = False
    alpha: float = ALPHA
    small: bool = False  # runs with --small-sequences

    def stages(self, rule: str) -> Stages:
        return Stages(self.seeds, self.kind, rule)


def mixed(above: int, below: int, at: int) -> tuple[float, ...]:
    return (FAR,) * above + (-FAR,) * below + (0.0,) * at


def cases() -> list[Case]:
    out = []
    for kind in KINDS:
        for seeds in (LONG, SHORT):
            out.append(Case("1 window at tolerance, t", seeds, kind, (0.0,)))
        out.append(Case("1 window at tolerance, z (sd known)", LONG, kind, (0.0,), True))
        out.append(Case(f"1 window, t, alpha/20 = {SMALL_ALPHA:g}", LONG, kind, (0.0,),
                        alpha=SMALL_ALPHA, small=True))
    for kind in KINDS:
        out.append(Case("9 windows at tolerance", LONG, kind, (0.0,) * 9))
        out.append(Case("9 windows: 3 above, 3 below, 3 at", LONG, kind, mixed(3, 3, 3)))
        out.append(Case("20 windows: 7 above, 7 below, 6 at", LONG, kind, mixed(7, 7, 6)))
    return out


def pvalues(case: Case, offsets: np.ndarray, rng) -> tuple[np.ndarray, np.ndarray]:
    """Two-sided p-values and statistics, shape (sequences, windows, looks)."""
    n = np.asarray(case.seeds)
    draws = rng.normal(TOLERANCE + offsets[..., None] * SD, SD, offsets.shape + (n[-1],))
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


def check_against_package(p: np.ndarray, stages: Stages, alpha: float,
                          table: np.ndarray) -> None:
    ours = holm(p, table)
    for s in range(min(CHECKED, len(p))):
        theirs = sequential_holm(p[s].tolist(), stages, alpha)
        if [(-1 if x is None else x) for x in theirs] != ours[s].tolist():
            raise AssertionError(f"vectorised Holm differs from sequential_holm: {stages}")


def wrong_verdicts(offsets: np.ndarray, stat, crossed) -> np.ndarray:
    """Per sequence: any verdict at the tolerance or in the wrong direction."""
    rows, cols = np.indices(crossed.shape)
    said = np.sign(stat[rows, cols, np.maximum(crossed, 0)]) * (crossed >= 0)
    truth = np.sign(offsets)
    return np.any((said != 0) & (said != truth), axis=1)


def saving(case: Case, p_moved: np.ndarray, at: np.ndarray, table: np.ndarray) -> dict:
    """Mean seeds used, share stopped before the cap, share decided, for the moved windows."""
    stop, crossed = run_live(p_moved, table)
    return {"seeds": float(np.asarray(case.seeds)[stop][at].mean()),
            "early": float(np.mean(stop[at] < len(case.seeds) - 1)),
            "decided": float(np.mean(crossed[at] >= 0))}


def simulate(case: Case, sequences: int, rng) -> dict[str, dict]:
    """Per rule: wrong-verdict count, rate and interval, and the saving at tolerance +- SHIFT
    (and +- NEAR, under "near"). Both rules see the same draws, so their difference is not
    sampling noise."""
    windows = len(case.offsets)
    offsets = np.broadcast_to(np.asarray(case.offsets), (sequences, windows))
    p, stat = pvalues(case, offsets, rng)
    sign = np.where(np.arange(sequences) % 2 == 0, 1.0, -1.0)[:, None]
    at = offsets == 0.0  # the windows moved off the tolerance
    moved = {shift: pvalues(case, np.where(at, shift * sign, offsets), rng)[0]
             for shift in (SHIFT, NEAR)}
    out = {}
    for rule in RULES:
        stages = case.stages(rule)
        table = np.array([stages.levels(case.alpha / (windows - r)) for r in range(windows)])
        check_against_package(p, stages, case.alpha, table)
        _, crossed = run_live(p, table)
        wrong = int(wrong_verdicts(offsets, stat, crossed).sum())
        ci = stats.binomtest(wrong, sequences).proportion_ci(0.95, method="exact")
        out[rule] = {"wrong": wrong, "rate": wrong / sequences, "low": ci.low, "high": ci.high,
                     **saving(case, moved[SHIFT], at, table),
                     "near": saving(case, moved[NEAR], at, table)}
    return out


def header(args) -> str:
    stamp = datetime.datetime.now().strftime("%Y-%m-%d %H:%M")
    return (f"# python benchmarks/sequential_error.py --sequences {args.sequences} "
            f"--small-sequences {args.small_sequences} --seed {args.seed}  ({stamp}, "
            f"{os.cpu_count()} cores, numpy {np.__version__}, scipy {scipy.__version__}; alpha "
            f"{ALPHA}, tolerance {TOLERANCE}, per-seed sd {SD}, far = {FAR} sd, saving at "
            f"tolerance +- {SHIFT} sd)")


def boundary_lines() -> list[str]:
    lines = ["## boundaries (one window): |t| needed per look (two-sided level of the look)"]
    for alpha in (ALPHA, SMALL_ALPHA):
        for kind in KINDS:
            for seeds in (LONG, SHORT):
                for rule, label in RULES.items():
                    s = Stages(seeds, kind, rule)
                    cells = "  ".join(f"n={n}: {t:.3f} ({v:.2e})" for n, t, v in
                                      zip(seeds, s.t_critical(alpha), s.levels(alpha),
                                          strict=True))
                    lines.append(f"alpha {alpha:<6g} {kind:14s} {label:22s} {cells}")
    return lines


def row(case: Case, sequences: int, label: str, r: dict) -> str:
    verdict = "pass" if r["rate"] <= case.alpha else (
        "FAIL (interval above nominal)" if r["low"] > case.alpha else "FAIL (within noise)")
    return (f"{case.name:36s} {case.kind:14s} {','.join(map(str, case.seeds)):11s} "
            f"{label:22s} n {sequences:6d} rate {r['rate']:.5f} [{r['low']:.5f}, "
            f"{r['high']:.5f}] nominal {case.alpha:<6g} {verdict:29s} | seeds "
            f"{r['seeds']:5.2f} of {case.seeds[-1]}, early {r['early']:.3f}, decided "
            f"{r['decided']:.3f}")


def price_lines(done: list[tuple[Case, dict]]) -> list[str]:
    lines = []
    for shift in (SHIFT, NEAR):
        lines += ["", f"## price of the union rule at tolerance +- {shift} sd (union vs "
                  "correlated, same draws): mean seeds used, share stopped early, share decided"]
        for case, res in done:
            u, c = (res[rule] if shift == SHIFT else res[rule]["near"]
                    for rule in ("union", "correlated"))
            lines.append(
                f"{case.name:36s} {case.kind:14s} {','.join(map(str, case.seeds)):11s} seeds "
                f"{u['seeds']:5.2f} vs {c['seeds']:5.2f} ({u['seeds'] - c['seeds']:+.2f})  "
                f"early {u['early']:.3f} vs {c['early']:.3f}  decided {u['decided']:.3f} vs "
                f"{c['decided']:.3f}")
    return lines


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sequences", type=int, default=100_000)
    parser.add_argument("--small-sequences", type=int, default=400_000,
                        help="sequences for the alpha/20 cases")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--out", type=Path, default=RESULTS)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    tick = time.perf_counter()
    lines = [header(args), "", *boundary_lines(), "",
             "## wrong-verdict rate per sequence (95% Clopper-Pearson interval); pass = rate <= "
             f"nominal; saving = windows at tolerance +- {SHIFT} sd: mean seeds used, share "
             "stopped before the cap, share decided"]
    done = []
    for case in cases():
        sequences = args.small_sequences if case.small else args.sequences
        res = simulate(case, sequences, rng)
        done.append((case, res))
        for rule, label in RULES.items():
            lines.append(row(case, sequences, label, res[rule]))
            print(lines[-1], flush=True)
    lines += [*price_lines(done), "",
              f"total time {time.perf_counter() - tick:.0f} s; vectorised Holm matched "
              f"sequential_holm on the first {CHECKED} sequences of every case and rule"]
    print("\n".join(lines[-2 * len(done) - 5:]))
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    main()
