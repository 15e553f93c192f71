"""``periodscan forecast``: trunks only, with the Fisher monitor; a predicted critical window."""

from __future__ import annotations

import argparse

from periodscan.commands.common import add_config_arguments, command_line, groups_help

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


def register(verbs) -> None:
    parser = verbs.add_parser(
        "forecast", help="predict the critical window from the Fisher trace of the trunks",
        description="Train only the clean baseline trunks with the Fisher monitor and predict "
                    "where the critical window lies, in a fraction of the sweep's time.",
        epilog=EPILOG + groups_help(), formatter_class=argparse.RawDescriptionHelpFormatter)
    add_config_arguments(parser, "Hydra overrides, as for `periodscan sweep`")
    parser.add_argument("--seeds", type=int, metavar="N",
                        help="train only the first N seeds of the config (default: all)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.config import compose_config
    from periodscan.jobs.forecast import forecast
    from periodscan.views.forecast import format_forecast

    cfg = compose_config(args.overrides, args.config_dir)
    command = command_line("forecast", args,
                           *(["--seeds", str(args.seeds)] if args.seeds else []))
    outcome = forecast(cfg, seeds=args.seeds, quiet=args.quiet, command=command)
    print(format_forecast(outcome, command_line("sweep", args)))
    return 0
