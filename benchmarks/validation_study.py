"""Validation study: does periodscan find critical periods where they exist, and only there?

Users act on what the tool tells them, so we publish how it behaves on cases whose outcome the
field expects. Every sweep of the study is a Hydra preset, configs/experiment/validation_*.yaml;
this script runs them one after another through the library (``periodscan.jobs.sweep.run_sweep``),
then writes into docs/validation/:

* ``results.csv`` - one row per sweep x window: damage with its interval, the verdicts, and the
  expectation the window is checked against (if any) with whether the finding matched it;
* ``results.md``  - the same as readable tables, the expectation summary and the commands;
* ``fig_*.png``   - damage curves (one figure per question) and learning curves.

Two verdicts are reported for every window, both from ``periodscan.analysis`` with Holm's
correction over the windows of a sweep: ``significant`` (mean damage significantly above zero)
and ``verdict`` (critical / safe / undetermined against the configured tolerance, 0.5 points).
An expectation of damage is met when the window is significant; an expectation of no damage is
met when it is not (absence of evidence; the tolerance verdict says whether the tool could also
call the window safe).

Run (the exact commands behind the committed outputs):

    nice -n 10 python benchmarks/validation_study.py              # full study (see below)
    python benchmarks/validation_study.py --reduced               # the CI-sized sweeps
    python benchmarks/validation_study.py --report-only           # redraw from finished sweeps
    python benchmarks/validation_study.py --only validation_blur  # one sweep (and the outputs)

Sweeps resume where they stopped: rerun the same command after an interruption. Measured: the
full study (25,365 epochs) took about 80 minutes on our shared 2-core machine and should take
about half an hour on an idle one; the reduced study 1-3 minutes.
"""

from __future__ import annotations

import argparse
import os
import platform
import sys
import textwrap
import time
from dataclasses import dataclass
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import pandas as pd  # noqa: E402
import torch  # noqa: E402

from periodscan.analysis.sensitivity import paired_damage  # noqa: E402
from periodscan.analysis.verdicts import CRITICAL  # noqa: E402
from periodscan.api import load_sweep  # noqa: E402
from periodscan.jobs.sweep import run_sweep  # noqa: E402

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
    expect: str      # EARLY, NONE or REPORT
    early_max: int = -1   # starts <= this are "early" (EARLY only)
    late_min: int = 10**9  # starts >= this are "late" (EARLY only)


FULL = [
    # mnist1d / CNN1d, blur: the learning-rate schedule and the budget crossed (first: the demo)
    Sweep("validation_blur", EARLY, 10, 30),
    Sweep("validation_blur_constant", EARLY, 10, 30),
    Sweep("validation_blur_recovery", EARLY, 10, 30),
    Sweep("validation_blur_constant_recovery", EARLY, 10, 30),
    # mnist1d / CNN1d, deficits expected to leave no critical period
    Sweep("validation_vflip", NONE),
    Sweep("validation_vflip_constant", NONE),
    Sweep("validation_permutation", NONE),
    Sweep("validation_permutation_constant", NONE),
    # digits 8x8 / MLP
    Sweep("validation_digits_blur", EARLY, 5, 20),
    Sweep("validation_digits_vflip", NONE),
    Sweep("validation_digits_permutation", NONE),
    # label noise, two rates
    Sweep("validation_noise40", REPORT),
    Sweep("validation_noise80", REPORT),
    # the deeper model (slowest last)
    Sweep("validation_digits_blur_resnet", EARLY, 5, 20),
    Sweep("validation_blur_resnet", EARLY, 10, 30),
]

REDUCED = [
    Sweep("validation_reduced_blur", EARLY, 5, 30),
    Sweep("validation_reduced_vflip", NONE),
]


# --- running ------------------------------------------------------------------------------
def run_all(sweeps: list[Sweep], results_dir: Path, workers: int | None,
            extra: list[str]) -> None:
    """Run (or resume) every sweep, printing one progress line each."""
    for i, sweep in enumerate(sweeps, 1):
        overrides = [f"experiment={sweep.preset}", f"results_dir={results_dir}", *extra]
        if workers:
            overrides.append(f"executor.workers={workers}")
        print(f"[{i}/{len(sweeps)}] {sweep.preset} ...", flush=True)
        outcome = run_sweep(overrides, quiet=True,
                            command=" ".join(["periodscan sweep", *overrides]))
        print(f"    {outcome.epochs_shared} epochs in the tree, {outcome.seconds:.0f} s, "
              f"counts {outcome.counts}", flush=True)


# --- tables -------------------------------------------------------------------------------
def expectation(sweep: Sweep, row: pd.Series) -> str:
    """What the study expects of one window: 'damage', 'none' or '' (nothing checked)."""
    if row.recovery_epochs == 0:
        return "damage (control)"  # the deficit is still in effect: it must show
    if row.short_recovery:
        return ""  # lasting damage mixed with a model still readjusting: not checked
    if sweep.expect == EARLY:
        if row.start <= sweep.early_max:
            return "damage"
        if row.start >= sweep.late_min:
            return "none"
        return ""
    if sweep.expect == NONE:
        return "none"
    return ""


def sweep_table(sweep: Sweep, results_dir: Path) -> tuple[pd.DataFrame, dict, pd.DataFrame]:
    """The study's rows for one finished sweep, facts about it for the markdown, and the
    per-seed damages (for the figures)."""
    with load_sweep(results_dir / sweep.preset) as view:
        table = view.table(tolerance=TOLERANCE, with_mcnemar=False)
        zero = view.table(tolerance=0.0, with_mcnemar=False)
        config = view.config
        runs = view.runs
        trained = view.epochs.drop_duplicates(["segment_id", "epoch"])
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
    table["above_zero"] = table.damage_low > 0  # the 95% interval alone, no Holm correction
    table["matched_uncorrected"] = [_matched(e, s) for e, s in zip(table.expected,
                                                                   table.above_zero, strict=True)]
    facts = {"epochs": int(config["schedule"]["epochs"]), "seeds": len(set(runs.seed)),
             "runs": len(runs), "finished": int(runs.status.isin(["done", "diverged"]).sum()),
             "diverged": int((runs.status == "diverged").sum()),
             "epochs_trained": len(trained), "train_seconds": float(trained.seconds.sum())}
    return table, facts, paired_damage(runs)


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
           "tolerance", "p_holm", "verdict", "diverged", "failed", "expected", "matched",
           "above_zero", "matched_uncorrected"]


# --- figures ------------------------------------------------------------------------------
COLORS = ["#1b6f8a", "#c2571a", "#5b8c2a", "#7a4f9a", "#a33b55", "#3f3f3f"]
KEY = ("line: mean damage over seeds; bars: 95% t interval; small dots: single seeds; filled "
       "marker: significantly above 0 (Holm, 95%), hollow: not; dashed: tolerance 0.5 points")


@dataclass(frozen=True)
class Panel:
    """One axes of a figure: presets with their legend labels, and an optional y range."""

    title: str
    lines: tuple[tuple[str, str], ...]  # (preset, label)
    ylim: tuple[float, float] | None = None


def damage_panel(ax, table: pd.DataFrame, seeds: pd.DataFrame, label: str, color: str,
                 offset: float, ylim: tuple[float, float] | None) -> str:
    """Damage against window start with its interval and the per-seed values.

    Windows without recovery time (positive controls) are left off the curve and named in the
    legend text instead, so their tens of points do not flatten everything else. With ``ylim``,
    values beyond the range are drawn at its edge as triangles; the returned text lists them.
    """
    main = table[table.recovery_epochs > 0]
    x = main.start.to_numpy() + offset
    ax.errorbar(x, main.damage, yerr=[main.damage - main.damage_low,
                                      main.damage_high - main.damage],
                color=color, lw=1.3, capsize=2.5, marker="", label=_label(label, table))
    sig = main.significant.to_numpy(bool)
    ax.scatter(x[sig], main.damage[sig], color=color, s=30, zorder=3)
    ax.scatter(x[~sig], main.damage[~sig], facecolor="white", edgecolor=color, s=30, zorder=3)
    per_seed = seeds[seeds.start_epoch.isin(main.start)]
    ax.scatter(per_seed.start_epoch + offset + 0.25, per_seed.damage, color=color, s=6,
               alpha=0.45, lw=0, zorder=2)
    if ylim is None:
        return ""
    ax.set_ylim(*ylim)
    off = []
    for start, group in per_seed.groupby("start_epoch"):
        mean = float(main[main.start == start].damage.iloc[0])
        far = group[(group.damage > ylim[1]) | (group.damage < ylim[0])].damage
        if far.empty and ylim[0] <= mean <= ylim[1]:
            continue
        for y in far:
            ax.scatter(start + offset + 0.25, ylim[1] if y > 0 else ylim[0], clip_on=False,
                       marker="^" if y > 0 else "v", color=color, s=16, zorder=4)
        seeds_text = ", ".join(f"{y:+.0f}" for y in far)
        off.append(f"{int(start)}: mean {mean:+.1f}" + (f", seed {seeds_text}" if len(far) else ""))
    return f"{label}: " + "; ".join(off) if off else ""


def _label(label: str, table: pd.DataFrame) -> str:
    control = table[table.recovery_epochs == 0]
    if control.empty:
        return label
    parts = [f"{int(r.start)}: {r.damage:+.0f}" for _, r in control.iterrows()]
    return f"{label} (no-recovery control, start {', '.join(parts)})"


def _axes_style(ax, title: str) -> None:
    ax.axhline(0, color="#333333", lw=0.8)
    ax.axhline(TOLERANCE, color="#b8322a", lw=0.8, ls="--")
    ax.set_title(title, fontsize=9.5)
    ax.set_xlabel("window start (epoch)")
    ax.set_ylabel("damage (accuracy points)")
    ax.legend(fontsize=7, loc="upper right")
    ax.grid(alpha=0.25)


def figure_family(rows: pd.DataFrame, seeds: dict[str, pd.DataFrame], panels: list[Panel],
                  path: Path, title: str) -> Path | None:
    """One figure of side-by-side panels; presets without results are left out."""
    present = set(rows.sweep)
    panels = [Panel(p.title, tuple(x for x in p.lines if x[0] in present), p.ylim)
              for p in panels]
    panels = [p for p in panels if p.lines]
    if not panels:
        return None
    width = max(7.5, 5.6 * len(panels))
    fig, axes = plt.subplots(1, len(panels), figsize=(width, 4.6), squeeze=False)
    for ax, panel in zip(axes[0], panels, strict=True):
        notes = []
        for i, (preset, label) in enumerate(panel.lines):
            offset = (i - (len(panel.lines) - 1) / 2) * 0.6
            notes.append(damage_panel(ax, rows[rows.sweep == preset], seeds[preset], label,
                                      COLORS[i], offset, panel.ylim))
        notes = [n for n in notes if n]
        if notes:
            text = "off scale (start: value):\n" + "\n".join(textwrap.fill(n, 60) for n in notes)
            ax.text(0.02, 0.03, text, transform=ax.transAxes, fontsize=6.5, va="bottom",
                    bbox={"facecolor": "white", "alpha": 0.85, "lw": 0.3})
        _axes_style(ax, panel.title)
    fig.suptitle(textwrap.fill(title, int(width * 14)) + "\n" + textwrap.fill(KEY, int(width * 16)),
                 fontsize=8.5)
    fig.tight_layout(rect=(0, 0, 1, 0.94))
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def figure_learning_curves(results_dir: Path, picks: list[tuple[str, str, list[int]]],
                           path: Path) -> Path | None:
    """Held-out accuracy by epoch, per seed and mean: baseline and a few windows per sweep."""
    picks = [pick for pick in picks if (results_dir / pick[0] / "ledger.sqlite").is_file()]
    if not picks:
        return None
    ncols = min(len(picks), 2)
    nrows = -(-len(picks) // ncols)
    fig, axes = plt.subplots(nrows, ncols, figsize=(6.2 * ncols, 4.0 * nrows), squeeze=False)
    for ax in axes.flat[len(picks):]:
        ax.set_visible(False)
    for ax, (preset, title, starts) in zip(axes.flat, picks, strict=False):
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
            for _, seed in frame.groupby("seed"):  # thin: each seed; thick: the mean
                ax.plot(seed.epoch + 1, seed.test_acc * 100, color=color, lw=0.5, alpha=0.35)
            mean = frame.groupby("epoch").test_acc.mean() * 100
            ax.plot(mean.index + 1, mean.to_numpy(), color=color, lw=1.6, label=label)
        ax.set_ylim(0, 100)
        ax.set_title(f"{title} ({preset})", fontsize=9.5)
        ax.set_xlabel("epochs trained")
        ax.set_ylabel("held-out accuracy % (thick: mean over seeds)")
        ax.legend(fontsize=7, loc="lower right")
        ax.grid(alpha=0.25)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


FIGURES = {
    "fig_blur_lr.png": ("mnist1d / CNN1d, blur sigma 2 for 15 of 60 epochs: decaying against "
                        "constant learning rate, under both budgets", [
        Panel("fixed_total (every run ends at epoch 60)", (
            ("validation_blur", "decaying rate"), ("validation_blur_constant", "constant rate"),
            ("validation_reduced_blur", "decaying rate (reduced study)"))),
        Panel("fixed_recovery (30 clean epochs after each window)", (
            ("validation_blur_recovery", "decaying rate"),
            ("validation_blur_constant_recovery", "constant rate")))]),
    "fig_depth.png": ("blur on both datasets, a shallow and a deeper model (fixed_total, "
                      "decaying rate)", [
        Panel("mnist1d, 15 of 60 epochs", (
            ("validation_blur", "CNN1d (3 conv layers)"),
            ("validation_blur_resnet", "TinyResNet (stem + 3 residual blocks, BN)"))),
        Panel("digits 8x8, 10 of 40 epochs", (
            ("validation_digits_blur", "MLP (2 hidden layers)"),
            ("validation_digits_blur_resnet", "TinyResNet (stem + 3 residual blocks, BN)")))]),
    "fig_no_critical.png": ("vertical flip and label permutation; fixed_recovery: every window "
                            "is followed by clean epochs", [
        Panel("mnist1d / CNN1d: flip (15 epochs, 30 recovery)", (
            ("validation_vflip", "decaying rate"), ("validation_vflip_constant", "constant rate")),
            (-3.0, 8.0)),
        Panel("mnist1d / CNN1d: permutation (15 epochs, 30 recovery)", (
            ("validation_permutation", "decaying rate"),
            ("validation_permutation_constant", "constant rate")), (-3.0, 8.0)),
        Panel("digits / MLP (10 epochs, 20 recovery)", (
            ("validation_digits_vflip", "flip"), ("validation_digits_permutation", "permutation"),
            ("validation_reduced_vflip", "flip (reduced study)")))]),
    "fig_label_noise.png": ("label noise at two rates, mnist1d / CNN1d (15-epoch windows, 30 "
                            "recovery, decaying rate)", [
        Panel("rate 0.4", (("validation_noise40", "label noise 0.4"),)),
        Panel("rate 0.8 (y range cut at 30)", (("validation_noise80", "label noise 0.8"),),
              (-3.0, 30.0))]),
}

CURVES = [
    ("validation_blur", "mnist1d / CNN1d, blur", [0, 30]),
    ("validation_vflip", "mnist1d / CNN1d, flip", [0, 30]),
    ("validation_permutation", "mnist1d / CNN1d, label permutation", [0, 20]),
    ("validation_digits_blur", "digits / MLP, blur", [0, 20]),
    ("validation_reduced_blur", "mnist1d / CNN1d, blur", [5, 30]),
    ("validation_reduced_vflip", "digits / MLP, flip", [0, 10]),
]


# --- markdown -----------------------------------------------------------------------------
def markdown(rows: pd.DataFrame, sweeps: list[Sweep], facts: dict, figures: list[Path],
             argv: list[str]) -> str:
    command = " ".join(["nice -n 10 python benchmarks/validation_study.py",
                        *[a for a in argv if a != "--report-only"]]).strip()
    lines = ["# Validation study: results", "",
             "Generated by `benchmarks/validation_study.py`; do not edit by hand. Command that "
             "trains the sweeps (resuming any that stopped) and writes this file and the "
             "figures; add `--report-only` to redraw from finished sweeps without training:",
             "", "```bash", command, "```", "",
             f"Machine: {platform.platform()}, {os.cpu_count()} cores, torch "
             f"{torch.__version__}, one torch thread per worker. Damage = baseline accuracy "
             "minus run accuracy in points, paired by seed, same held-out set; interval = "
             f"95% ({' / '.join(sorted(set(rows.interval)))} over seeds). `sig.` = mean "
             "damage significantly above 0 after "
             "Holm's correction over the sweep's windows; `verdict` = critical / safe / "
             f"undetermined against the tolerance {TOLERANCE} points (Holm). Expectations are "
             "common practice in the field (no source attached); `expected` is empty where a "
             "window is not checked. Small proxy models: evidence, not a guarantee.", "",
             "## Expectations against findings", "",
             "`matched` judges significance with Holm's correction (the tool's verdict); "
             "`uncorrected` with each window's own 95% interval.", "",
             "| sweep | expectation | windows checked | matched | uncorrected | "
             "not matched (start: damage [95% interval]) |",
             "| --- | --- | --- | --- | --- | --- |"]
    by_preset = {s.preset: s for s in sweeps}
    for preset, group in rows.groupby("sweep", sort=False):
        checked = group[group.expected != ""]
        misses = checked[checked.matched == "no"]
        miss = ", ".join(f"{int(r.start)}: {r.damage:+.2f} [{r.damage_low:+.2f}, "
                         f"{r.damage_high:+.2f}]" for _, r in misses.iterrows())
        lines.append(f"| {preset} | {by_preset[preset].expect} | {len(checked)} | "
                     f"{int((checked.matched == 'yes').sum())} | "
                     f"{int((checked.matched_uncorrected == 'yes').sum())} | {miss or '-'} |")
    lines += ["", "## Figures", ""]
    lines += [f"![{p.stem}]({p.name})" for p in figures]
    lines += ["", "## Every window", ""]
    for preset, group in rows.groupby("sweep", sort=False):
        f = facts[preset]
        first = group.iloc[0]
        took = (f"; {f['epochs_trained']} epochs trained, {f['train_seconds'] / 60:.1f} "
                "worker-minutes (one torch thread each; shared machine)")
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


def write_outputs(sweeps: list[Sweep], results_dir: Path, out: Path,
                  argv: list[str]) -> pd.DataFrame:
    """Tables and figures from every sweep that has a ledger; returns the rows."""
    out.mkdir(parents=True, exist_ok=True)
    tables, facts, seeds = [], {}, {}
    for sweep in sweeps:
        if not (results_dir / sweep.preset / "ledger.sqlite").is_file():
            print(f"    {sweep.preset}: no results yet, left out", flush=True)
            continue
        table, facts[sweep.preset], seeds[sweep.preset] = sweep_table(sweep, results_dir)
        tables.append(table)
    if not tables:
        raise SystemExit(f"no finished sweeps under {results_dir}")
    rows = pd.concat(tables, ignore_index=True)
    rows = rows[[c for c in COLUMNS if c in rows]]
    rows.to_csv(out / "results.csv", index=False, float_format="%.4f")
    figures = []
    for name, (title, panels) in FIGURES.items():
        drawn = figure_family(rows, seeds, panels, out / name, title)
        figures += [drawn] if drawn else []
    curves = figure_learning_curves(results_dir, [c for c in CURVES if c[0] in set(rows.sweep)],
                                    out / "fig_learning_curves.png")
    figures += [curves] if curves else []
    (out / "results.md").write_text(markdown(rows, sweeps, facts, figures, argv))
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
    if not args.report_only:
        run_all(todo, args.results_dir, args.workers, args.override)
    rows = write_outputs(sweeps, args.results_dir, out, argv)
    checked = rows[rows.expected != ""]
    print(f"wrote {out}/results.csv, results.md and figures; {len(checked)} windows checked, "
          f"{int((checked.matched == 'yes').sum())} matched; "
          f"{time.perf_counter() - started:.0f} s", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
