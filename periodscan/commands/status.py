"""``periodscan status``: progress of a running or stopped sweep, read from its ledger."""

from __future__ import annotations

import argparse

from periodscan.commands.common import add_sweep_argument


def register(verbs) -> None:
    parser = verbs.add_parser(
        "status", help="progress of a running or stopped sweep",
        description="Show runs and epochs done out of the total, failures, and an ETA from the "
                    "epoch times measured so far. Safe to run while the sweep trains.")
    add_sweep_argument(parser)
    parser.add_argument("--json", action="store_true", help="print the status as JSON")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.api import load_sweep
    from periodscan.views.progress import format_status, status_json

    with load_sweep(args.sweep, args.results_dir) as view:
        status = view.status()
    if args.json:
        print(status_json(status))
    else:
        print(format_status(status))
    return 0
