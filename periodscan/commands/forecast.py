"""``periodscan forecast``: trunks only, with the Fisher monitor; a predicted critical window."""

from __future__ import annotations

import argparse
import shlex

import numpy as np

from periodscan.commands.sweep import _groups_help, add_config_arguments, command_line

EPILOG = """\
the rule: the trace of the Fisher information of the weights (monitor=fisher) is averaged over
seeds and smoothed; the predicted critical window is the run of epochs around its peak in which
it stays above half its height over the floor. Each design window is scored by its share of the
summed trace and marked at risk if it overlaps the predicted window.

The trunks are trained in the sweep's own folder, so a later `periodscan sweep` with the same
overrides reuses them and trains only the branches.

examples:
  periodscan forecast                              # the demo, all seeds
  periodscan forecast --seeds 2 experiment=tiny
  periodscan forecast monitor=fisher monitor.probe_size=512 monitor.estimator=sampled

"""

BARS = "▁▂▃▄▅▆▇█"


def register(verbs) -> None:
    parser = verbs.add_parser(
        "forecast", help="predict the critical window from the Fisher trace of the trunks",
        description="Train only the clean baseline trunks with the Fisher monitor and predict "
                    "where the critical window lies, in a fraction of the sweep's time.",
        epilog=EPILOG + _groups_help(), formatter_class=argparse.RawDescriptionHelpFormatter)
    add_config_arguments(parser, "Hydra overrides, as for `periodscan sweep`")
    parser.add_argument("--seeds", type=int, metavar="N",
                        help="train only the first N seeds of the config (default: all)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.config import compose_config
    from periodscan.fisher.forecast import forecast

    cfg = compose_config(args.overrides, args.config_dir)
    command = command_line("forecast", args,
                           *(["--seeds", str(args.seeds)] if args.seeds else []))
    outcome = forecast(cfg, seeds=args.seeds, quiet=args.quiet, command=command)
    print(describe(outcome, args.overrides))
    return 0


def describe(outcome, overrides=()) -> str:
    """The forecast as text: curve, predicted window, per-window scores, time."""
    from periodscan.sweep import _human

    phase = outcome.phase
    low, high = phase.fraction
    trace = outcome.curve.trace.to_numpy()
    lines = [
        f"Fisher trace of the clean trunk (mean of {len(outcome.seeds)} seed(s)), "
        f"epochs 0-{len(trace) - 1}:",
        "  " + sparkline(trace),
        f"  peak at epoch {phase.peak}; above half its height over the floor in epochs "
        f"{phase.begin}-{phase.end - 1}",
        "",
        f"predicted critical window: epochs [{phase.begin}, {phase.end}) = "
        f"{100 * low:.0f}%-{100 * high:.0f}% of the {phase.epochs}-epoch schedule",
        "",
        f"{'window':>12} {'Fisher share':>12}  at risk",
    ]
    for row in outcome.scores.itertuples():
        window = f"[{row.start}, {row.start + row.length})"
        lines.append(f"{window:>12} {row.score:>12.3f}  {'yes' if row.at_risk else '-'}")
    retrained = (f"{outcome.epochs_trained} trunk epochs trained" if outcome.epochs_trained
                 else "trunks already in the folder, nothing trained")
    left = (f"{outcome.remaining_epochs} epochs, about {_human(outcome.remaining_seconds)}, "
            "are left to train in this folder" if outcome.remaining_epochs
            else "the sweep is already complete in this folder")
    lines += [
        "",
        f"forecast took {_human(outcome.seconds)} ({retrained}); the full sweep trains "
        f"{outcome.sweep_epochs} epochs: about {_human(outcome.sweep_seconds)} with "
        f"{outcome.workers} worker(s) at {outcome.seconds_per_epoch:.2f} s per epoch; {left}",
        "A forecast from the Fisher trace of a small proxy model is a hint, not a measurement; "
        "run the sweep to measure damage:",
        "  " + shlex.join(["periodscan", "sweep", *overrides]),
    ]
    return "\n".join(lines)


def sparkline(values: np.ndarray, width: int = 60) -> str:
    """The curve in block characters, averaged into at most ``width`` columns."""
    values = np.asarray(values, dtype=float)
    columns = np.array_split(values, min(width, len(values)))
    means = np.array([c.mean() for c in columns])
    low, high = np.nanmin(means), np.nanmax(means)
    scaled = (means - low) / (high - low) if high > low else np.zeros_like(means)
    return "".join(BARS[int(round(s * (len(BARS) - 1)))] for s in scaled)
