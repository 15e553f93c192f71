"""``periodscan export``: write a sweep's curves, table and figure to TensorBoard event files."""

from __future__ import annotations

import argparse

from periodscan.commands.common import add_sweep_argument

EPILOG = """\
what is written (one TensorBoard run per folder, so runs overlay in one chart):
  DIR/runs/<run id>/           per epoch: loss/train, loss/test, accuracy/train, accuracy/test,
                               lr, deficit_on, seconds_per_epoch, monitor readings (fisher/total)
  DIR/sensitivity/length_<n>/  per window start: sensitivity/damage, damage_low, damage_high,
                               holm_low, holm_high, baseline_acc, run_acc, seeds
  DIR/sweep/                   the table as text and as CSV, the sensitivity curve as an image

A new export replaces the previous one in DIR. Needs the tensorboard package:
  pip install "periodscan[tensorboard]"

examples:
  periodscan export demo
  periodscan export results/demo --tensorboard runs/periodscan-demo
  tensorboard --logdir results/demo/tensorboard
"""


def register(verbs) -> None:
    parser = verbs.add_parser(
        "export", help="write learning curves, table and curve to TensorBoard event files",
        description="Write a sweep (finished or partial) to TensorBoard event files: every "
                    "run's learning curves, the sensitivity table per window and as text, and "
                    "the sensitivity curve as an image.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    add_sweep_argument(parser)
    parser.add_argument("--tensorboard", metavar="DIR",
                        help="folder to write the event files into (default: "
                             "<sweep folder>/tensorboard)")
    parser.add_argument("--tolerance", type=float, metavar="POINTS",
                        help="acceptable damage in accuracy points (default: the sweep's)")
    parser.add_argument("--confidence", type=float, metavar="C",
                        help="confidence level, e.g. 0.95 (default: the sweep's)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.api import load_sweep
    from periodscan.views.tensorboard import write_tensorboard

    with load_sweep(args.sweep, args.results_dir) as view:
        done = write_tensorboard(view, args.tensorboard, tolerance=args.tolerance,
                                 confidence=args.confidence)
    print(f"tensorboard: {done.directory} ({done.runs} runs, {done.windows} windows"
          + (", sensitivity curve" if done.image else "") + ")")
    print(f"view with:   tensorboard --logdir {done.directory}")
    return 0
