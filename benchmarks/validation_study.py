"""Validation study: does periodscan find critical periods where they exist, and only there?

Users act on what the tool tells them, so we publish how it behaves on cases whose outcome the
field expects. Every sweep of the study is a Hydra preset, configs/experiment/validation_*.yaml;
this script runs them one after another through the library (``periodscan.sweep.run_sweep``),
then writes into docs/validation/:

* ``results.csv`` - one row per sweep x window: damage with its interval, the verdicts, and the
  expectation the window is checked against (if any) with whether the finding matched it;
* ``results.md``  - the same as readable tables, the expectation summary and the commands;
* ``fig_*.png``   - damage curves by sweep family and learning curves.

Two verdicts are reported for every window, both from ``periodscan.analysis`` with Holm's
correction over the windows of a sweep: ``significant`` (mean damage significantly above zero)
and ``verdict`` (critical / safe / undetermined against the configured tolerance, 0.5 points).
An expectation of damage is met when the window is significant; an expectation of no damage is
met when it is not (absence of evidence; the tolerance verdict says whether the tool could also
call the window safe).

Run (the exact commands behind the committed outputs):

    nice -n 10 python benchmarks/validation_study.py              # full study, ~35 min idle 2 cores
    python benchmarks/validation_study.py --reduced               # the CI-sized sweeps, ~3 min
    python benchmarks/validation_study.py --report-only           # redraw from finished sweeps
    python benchmarks/validation_study.py --only validation_blur  # one sweep (and the outputs)

Sweeps resume where they stopped: rerun the same command after an interruption.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import pandas as pd  # noqa: E402
import torch  # noqa: E402

from periodscan.analysis.verdicts import CRITICAL  # noqa: E402
from periodscan.api import load_sweep  # noqa: E402
from periodscan.sweep import run_sweep  # noqa: E402

REPO = Path(__file__).resolve().parents[1]
DOCS = REPO / "docs" / "validation"
DEFAULT_RESULTS = REPO / "results" / "validation"
TOLERANCE = 0.5  # accuracy points; the configured default tolerance of every preset

# Expectation kinds. Each is "common practice in the field", not a measured or cited fact.
EARLY = "critical early"   # damage for early windows, none for late ones
NONE = "no critical period"  # no window significantly damaging once recovery time is allowed
REPORT = "report only"     # no expectation stated; the study reports what happens


@dataclass(frozen=True)
class Sweep:
    """One preset of the study and how its windows are read."""

    preset: str
    family: str      # figure it belongs to
    label: str       # legend text
    expect: str      # EARLY, NONE or REPORT
    early_max: int = -1   # starts <= this are "early" (EARLY only)
    late_min: int = 10**9  # starts >= this are "late" (EARLY only)


FULL = [
    Sweep("validation_blur", "blur_lr", "decay, fixed_total", EARLY, 10, 30),
    Sweep("validation_blur_constant", "blur_lr", "constant, fixed_total", EARLY, 10, 30),
    Sweep("validation_blur_recovery", "blur_lr", "decay, fixed_recovery 30", EARLY, 10, 30),
    Sweep("validation_blur_constant_recovery", "blur_lr", "constant, fixed_recovery 30",
          EARLY, 10, 30),
    Sweep("validation_vflip", "null", "mnist1d flip, decay", NONE),
    Sweep("validation_vflip_constant", "null", "mnist1d flip, constant", NONE),
    Sweep("validation_permutation", "null", "mnist1d permutation, decay", NONE),
    Sweep("validation_permutation_constant", "null", "mnist1d permutation, constant", NONE),
    Sweep("validation_digits_blur", "depth", "digits MLP", EARLY, 5, 20),
    Sweep("validation_digits_vflip", "null", "digits flip, decay", NONE),
    Sweep("validation_digits_permutation", "null", "digits permutation, decay", NONE),
    Sweep("validation_noise40", "noise", "label noise 0.4", REPORT),
    Sweep("validation_noise80", "noise", "label noise 0.8", REPORT),
    Sweep("validation_digits_blur_resnet", "depth", "digits TinyResNet", EARLY, 5, 20),
    Sweep("validation_blur_resnet", "depth", "mnist1d TinyResNet", EARLY, 10, 30),
]

REDUCED = [
    Sweep("validation_reduced_blur", "blur_lr", "reduced: decay, fixed_total", EARLY, 5, 30),
    Sweep("validation_reduced_vflip", "null", "reduced: digits flip, decay", NONE),
]


# --- running ------------------------------------------------------------------------------
def run_all(sweeps: list[Sweep], results_dir: Path, workers: int | None,
            extra: list[str]) -> dict[str, float]:
    """Run (or resume) every sweep; return wall seconds per preset for this session."""
    seconds = {}
    for i, sweep in enumerate(sweeps, 1):
        overrides = [f"experiment={sweep.preset}", f"results_dir={results_dir}", *extra]
        if workers:
            overrides.append(f"executor.workers={workers}")
        print(f"[{i}/{len(sweeps)}] {sweep.preset} ...", flush=True)
        outcome = run_sweep(overrides, quiet=True,
                            command=f"periodscan sweep experiment={sweep.preset}")
        seconds[sweep.preset] = outcome.seconds
        print(f"    {outcome.epochs_shared} epochs in the tree, {outcome.seconds:.0f} s, "
              f"counts {outcome.counts}", flush=True)
    return seconds


# --- tables -------------------------------------------------------------------------------
def expectation(sweep: Sweep, row: pd.Series) -> str:
    """What the study expects of one window: 'damage', 'none' or '' (nothing checked)."""
    if row.short_recovery:
        return "damage (control)"  # the deficit is still in effect: it must show
    if sweep.expect == EARLY:
        if row.start <= sweep.early_max:
            return "damage"
        if row.start >= sweep.late_min:
            return "none"
        return ""
    if sweep.expect == NONE:
        return "none"
    return ""


def sweep_table(sweep: Sweep, results_dir: Path) -> tuple[pd.DataFrame, dict]:
    """The study's rows for one finished sweep, plus facts about it for the markdown."""
    with load_sweep(results_dir / sweep.preset) as view:
        table = view.table(tolerance=TOLERANCE, with_mcnemar=False)
        zero = view.table(tolerance=0.0, with_mcnemar=False)
        config = view.config
        runs = view.runs
    table["p_holm_zero"] = zero.p_holm.to_numpy()
    table["significant"] = (zero.verdict == CRITICAL).to_numpy()
    table.insert(0, "sweep", sweep.preset)
    table.insert(1, "data", str(config["data"]["_target_"]).rsplit("_", 1)[-1])
    table.insert(2, "model", str(config["model"]["_target_"]).rsplit(".", 1)[-1])
    table.insert(3, "deficit", _deficit_name(config["deficit"]))
    table.insert(4, "lr_schedule", config["schedule"]["lr_schedule"]["kind"])
    table.insert(5, "budget", config["design"]["budget"])
    table["expected"] = [expectation(sweep, row) for _, row in table.iterrows()]
    table["matched"] = [_matched(e, s) for e, s in zip(table.expected, table.significant,
                                                         strict=True)]
    facts = {"epochs": int(config["schedule"]["epochs"]), "seeds": len(set(runs.seed)),
             "runs": len(runs), "finished": int(runs.status.isin(["done", "diverged"]).sum()),
             "diverged": int((runs.status == "diverged").sum())}
    return table, facts


def _deficit_name(deficit: dict) -> str:
    name = str(deficit["_target_"]).rsplit(".", 1)[-1]
    params = [f"{k}={v}" for k, v in deficit.items()
              if k in ("sigma", "rate", "factor") and v is not None]
    return name + (f" ({', '.join(params)})" if params else "")


def _matched(expected: str, significant: bool) -> str:
    if not expected:
        return ""
    wants_damage = expected.startswith("damage")
    return "yes" if wants_damage == bool(significant) else "no"


COLUMNS = ["sweep", "data", "model", "deficit", "lr_schedule", "budget", "start", "length",
           "end", "recovery_epochs", "short_recovery", "seeds", "baseline_acc", "baseline_sd",
           "damage", "damage_low", "damage_high", "interval", "p_holm_zero", "significant",
           "tolerance", "p_holm", "verdict", "diverged", "failed", "expected", "matched"]


# --- figures ------------------------------------------------------------------------------
def damage_panel(ax, table: pd.DataFrame, label: str, color: str, offset: float = 0.0) -> None:
    """Damage against window start with its interval; filled dots = significant (Holm, > 0).

    Windows without recovery time (positive controls) are left off the curve and named in the
    legend text instead, so their tens of points do not flatten everything else.
    """
    main = table[~table.short_recovery]
    x = main.start.to_numpy() + offset
    ax.errorbar(x, main.damage, yerr=[main.damage - main.damage_low,
                                      main.damage_high - main.damage],
                color=color, lw=1.3, capsize=2.5, marker="", label=_label(label, table))
    sig = main.significant.to_numpy(bool)
    ax.scatter(x[sig], main.damage[sig], color=color, s=28, zorder=3)
    ax.scatter(x[~sig], main.damage[~sig], facecolor="white", edgecolor=color, s=28, zorder=3)


def _label(label: str, table: pd.DataFrame) -> str:
    control = table[table.short_recovery]
    if control.empty:
        return label
    parts = [f"{int(r.start)}: {r.damage:+.0f}" for _, r in control.iterrows()]
    return f"{label} (no-recovery control, start {', '.join(parts)})"


def _axes_style(ax, title: str) -> None:
    ax.axhline(0, color="#333333", lw=0.8)
    ax.axhline(TOLERANCE, color="#b8322a", lw=0.8, ls="--")
    ax.set_title(title, fontsize=10)
    ax.set_xlabel("window start (epoch)")
    ax.set_ylabel("damage (accuracy points)")
    ax.legend(fontsize=7, loc="upper right")
    ax.grid(alpha=0.25)


COLORS = ["#1b6f8a", "#c2571a", "#5b8c2a", "#7a4f9a", "#a33b55", "#3f3f3f"]


def figure_family(rows: pd.DataFrame, sweeps: list[Sweep], family: str, panels: dict,
                  path: Path, title: str) -> Path | None:
    """One figure: ``panels`` maps a panel title to the presets drawn in it."""
    present = set(rows.sweep)
    panels = {k: [p for p in v if p in present] for k, v in panels.items()}
    panels = {k: v for k, v in panels.items() if v}
    if not panels:
        return None
    labels = {s.preset: s.label for s in sweeps}
    fig, axes = plt.subplots(1, len(panels), figsize=(5.2 * len(panels), 3.9), squeeze=False)
    for ax, (panel, presets) in zip(axes[0], panels.items(), strict=True):
        for i, preset in enumerate(presets):
            offset = (i - (len(presets) - 1) / 2) * 0.5
            damage_panel(ax, rows[rows.sweep == preset], labels[preset], COLORS[i], offset)
        _axes_style(ax, panel)
    fig.suptitle(title + "\nfilled dot: damage significantly above 0 (Holm, 95%); "
                 "bars: 95% t interval; dashed: tolerance 0.5", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def figure_learning_curves(results_dir: Path, picks: list[tuple[str, list[int]]],
                           path: Path) -> Path | None:
    """Held-out accuracy by epoch (mean over seeds): baseline and a few windows per sweep."""
    picks = [(p, s) for p, s in picks if (results_dir / p / "ledger.sqlite").is_file()]
    if not picks:
        return None
    fig, axes = plt.subplots(1, len(picks), figsize=(5.0 * len(picks), 3.8), squeeze=False)
    for ax, (preset, starts) in zip(axes[0], picks, strict=True):
        with load_sweep(results_dir / preset) as view:
            epochs = view.epochs
            runs = view.runs
        longest = runs[runs.is_baseline == 1].end_epoch.max()
        base = runs[(runs.is_baseline == 1) & (runs.end_epoch == longest)].run_id
        curves = [("baseline", epochs[epochs.run_id.isin(base)], "#333333")]
        for i, start in enumerate(starts):
            ids = runs[(runs.is_baseline == 0) & (runs.start_epoch == start)].run_id
            length = int(runs[runs.run_id.isin(ids)].length.iloc[0]) if len(ids) else 0
            curves.append((f"deficit on [{start}, {start + length})",
                           epochs[epochs.run_id.isin(ids)], COLORS[i]))
        for label, frame, color in curves:
            if frame.empty:
                continue
            mean = frame.groupby("epoch").test_acc.mean() * 100
            ax.plot(mean.index + 1, mean.to_numpy(), color=color, lw=1.2, label=label)
        ax.set_ylim(0, 100)
        ax.set_title(preset, fontsize=10)
        ax.set_xlabel("epochs trained")
        ax.set_ylabel("held-out accuracy % (mean over seeds)")
        ax.legend(fontsize=7, loc="lower right")
        ax.grid(alpha=0.25)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


FIGURES = {
    "fig_blur_lr.png": ("blur_lr", "mnist1d / CNN1d, blur sigma 2 for 15 of 60 epochs: "
                        "decaying vs constant learning rate, two budgets", {
        "fixed_total (every run ends at epoch 60)": [
            "validation_blur", "validation_blur_constant", "validation_reduced_blur"],
        "fixed_recovery (30 clean epochs after each window)": [
            "validation_blur_recovery", "validation_blur_constant_recovery"]}),
    "fig_depth.png": ("depth", "blur on both datasets, shallow and deep models", {
        "mnist1d (15 of 60 epochs, fixed_total)": ["validation_blur", "validation_blur_resnet"],
        "digits 8x8 (10 of 40 epochs, fixed_total)": [
            "validation_digits_blur", "validation_digits_blur_resnet"]}),
    "fig_no_critical.png": ("null", "vertical flip and label permutation "
                            "(fixed_recovery: every window followed by clean epochs)", {
        "mnist1d / CNN1d (15-epoch windows, 30 recovery)": [
            "validation_vflip", "validation_vflip_constant", "validation_permutation",
            "validation_permutation_constant"],
        "digits / MLP (10-epoch windows, 20 recovery)": [
            "validation_digits_vflip", "validation_digits_permutation",
            "validation_reduced_vflip"]}),
    "fig_label_noise.png": ("noise", "label noise at two rates, mnist1d / CNN1d "
                            "(15-epoch windows, 30 recovery)", {
        "label noise": ["validation_noise40", "validation_noise80"]}),
}

CURVES = [("validation_blur", [0, 30]), ("validation_vflip", [0, 30]),
          ("validation_permutation", [0, 20]), ("validation_digits_blur", [0, 20])]


# --- markdown -----------------------------------------------------------------------------
def markdown(rows: pd.DataFrame, sweeps: list[Sweep], facts: dict, seconds: dict,
             figures: list[Path], argv: list[str]) -> str:
    lines = ["# Validation study: results", "",
             "Generated by `benchmarks/validation_study.py`; do not edit by hand. "
             "Command that produced this file:", "", "```bash",
             "nice -n 10 python benchmarks/validation_study.py " + " ".join(argv), "```", "",
             f"Machine: {platform.platform()}, {os.cpu_count()} cores, torch "
             f"{torch.__version__}, one torch thread per worker. Damage = baseline accuracy "
             "minus run accuracy in points, paired by seed, same held-out set; interval = "
             "95% Student-t over seeds. `sig.` = mean damage significantly above 0 after "
             "Holm's correction over the sweep's windows; `verdict` = critical / safe / "
             f"undetermined against the tolerance {TOLERANCE} points (Holm). Expectations are "
             "common practice in the field (no source attached); `expected` is empty where a "
             "window is not checked. Small proxy models: evidence, not a guarantee.", "",
             "## Expectations against findings", "",
             "| sweep | expectation | windows checked | matched | not matched (start: damage) |",
             "| --- | --- | --- | --- | --- |"]
    by_preset = {s.preset: s for s in sweeps}
    for preset, group in rows.groupby("sweep", sort=False):
        checked = group[group.expected != ""]
        misses = checked[checked.matched == "no"]
        miss = ", ".join(f"{int(r.start)}: {r.damage:+.2f}" for _, r in misses.iterrows())
        lines.append(f"| {preset} | {by_preset[preset].expect} | {len(checked)} | "
                     f"{int((checked.matched == 'yes').sum())} | {miss or '-'} |")
    lines += ["", "## Figures", ""]
    lines += [f"![{p.stem}]({p.name})" for p in figures]
    lines += ["", "## Every window", ""]
    for preset, group in rows.groupby("sweep", sort=False):
        f = facts[preset]
        first = group.iloc[0]
        took = f", {seconds[preset]:.0f} s this session" if preset in seconds else ""
        lines += [f"### {preset}", "",
                  f"`periodscan sweep experiment={preset}` - {first.data} / {first.model}, "
                  f"{first.deficit}, {first.lr_schedule} learning rate, {first.budget}, "
                  f"{f['epochs']} epochs, {f['seeds']} seeds, {f['finished']}/{f['runs']} runs "
                  f"finished ({f['diverged']} diverged){took}.", "",
                  "| window | recovery | seeds | baseline % | damage | 95% interval | sig. | "
                  "verdict | expected | matched |",
                  "| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
        for _, r in group.iterrows():
            lines.append(
                f"| [{int(r.start)}, {int(r.start + r.length)}) | {int(r.recovery_epochs)} | "
                f"{int(r.seeds)} | {r.baseline_acc:.2f} | {r.damage:+.2f} | "
                f"[{r.damage_low:+.2f}, {r.damage_high:+.2f}] | "
                f"{'yes' if r.significant else 'no'} | {r.verdict} | {r.expected or '-'} | "
                f"{r.matched or '-'} |")
        lines.append("")
    return "\n".join(lines)


def write_outputs(sweeps: list[Sweep], results_dir: Path, out: Path, seconds: dict,
                  argv: list[str]) -> pd.DataFrame:
    """Tables and figures from every sweep that has a ledger; returns the rows."""
    out.mkdir(parents=True, exist_ok=True)
    tables, facts = [], {}
    for sweep in sweeps:
        if not (results_dir / sweep.preset / "ledger.sqlite").is_file():
            print(f"    {sweep.preset}: no results yet, left out", flush=True)
            continue
        table, facts[sweep.preset] = sweep_table(sweep, results_dir)
        tables.append(table)
    if not tables:
        raise SystemExit(f"no finished sweeps under {results_dir}")
    rows = pd.concat(tables, ignore_index=True)
    rows = rows[[c for c in COLUMNS if c in rows]]
    rows.to_csv(out / "results.csv", index=False, float_format="%.4f")
    figures = []
    for name, (family, title, panels) in FIGURES.items():
        drawn = figure_family(rows, sweeps, family, panels, out / name, title)
        figures += [drawn] if drawn else []
    curves = figure_learning_curves(results_dir, [c for c in CURVES if c[0] in set(rows.sweep)],
                                    out / "fig_learning_curves.png")
    figures += [curves] if curves else []
    (out / "results.md").write_text(markdown(rows, sweeps, facts, seconds, figures, argv))
    return rows


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--reduced", action="store_true",
                        help="run the reduced (CI-sized) sweeps instead of the full study")
    parser.add_argument("--results-dir", type=Path, default=DEFAULT_RESULTS,
                        help=f"where the sweep folders go (default {DEFAULT_RESULTS})")
    parser.add_argument("--out", type=Path, default=None,
                        help="where tables and figures go (default docs/validation/, or "
                             "docs/validation/reduced/ with --reduced)")
    parser.add_argument("--only", nargs="+", metavar="PRESET",
                        help="run only these presets (outputs still cover every finished one)")
    parser.add_argument("--workers", type=int, default=None,
                        help="worker processes per sweep (default: one per core)")
    parser.add_argument("--override", nargs="+", default=[], metavar="KEY=VALUE",
                        help="extra Hydra overrides for every sweep, e.g. seeds=3 (a study "
                             "under other settings; give it its own --results-dir and --out)")
    parser.add_argument("--report-only", action="store_true",
                        help="train nothing; redraw tables and figures from finished sweeps")
    args = parser.parse_args(argv)

    sweeps = REDUCED if args.reduced else FULL
    out = args.out or (DOCS / "reduced" if args.reduced else DOCS)
    todo = [s for s in sweeps if not args.only or s.preset in args.only]
    if args.only and len(todo) != len(args.only):
        known = ", ".join(s.preset for s in sweeps)
        raise SystemExit(f"--only must name presets of this study ({known}); got {args.only}")
    started = time.perf_counter()
    seconds = {} if args.report_only else run_all(todo, args.results_dir, args.workers,
                                                    args.override)
    rows = write_outputs(sweeps, args.results_dir, out, seconds, argv)
    checked = rows[rows.expected != ""]
    print(f"wrote {out}/results.csv, results.md and figures; {len(checked)} windows checked, "
          f"{int((checked.matched == 'yes').sum())} matched; "
          f"{time.perf_counter() - started:.0f} s", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
