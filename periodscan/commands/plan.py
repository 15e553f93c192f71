"""``periodscan plan``: where may a deficit of L epochs go? Answered from a sweep's ledger."""

from __future__ import annotations

import argparse

from periodscan.commands.common import add_sweep_argument


def register(verbs) -> None:
    parser = verbs.add_parser(
        "plan", help="which start epochs are safe or critical for a deficit of L epochs",
        description="Answer a maintenance question from a sweep: for a deficit of --length\n"
                    "epochs and a --tolerance in accuracy points, which window starts are safe,\n"
                    "which are critical, the earliest start from which every later start is\n"
                    "safe, and the expected damage in the best slot. An onset sweep answers\n"
                    "the latest epoch at which the change costs at most the tolerance more\n"
                    "than making it at epoch 0; a removal sweep the latest epoch the deficit\n"
                    "(a curriculum, say) may last to.",
        epilog="example: periodscan plan demo --length 15 --tolerance 1.0 "
               "--production-epochs 180",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    add_sweep_argument(parser)
    parser.add_argument("--length", type=int, metavar="L",
                        help="deficit length in epochs of the sweep's schedule (default: the "
                             "shortest measured); an unmeasured length is answered from the "
                             "nearest longer measured one")
    parser.add_argument("--tolerance", type=float, metavar="POINTS",
                        help="acceptable damage in accuracy points (default: the sweep's)")
    parser.add_argument("--confidence", type=float, metavar="C",
                        help="confidence level, e.g. 0.95 (default: the sweep's)")
    parser.add_argument("--production-epochs", type=int, metavar="N",
                        help="map starts onto an N-epoch production schedule by fraction of "
                             "training")
    parser.add_argument("--json", action="store_true", help="print the answer as JSON")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.api import load_sweep
    from periodscan.views.answers import answer_json, answer_text

    with load_sweep(args.sweep, args.results_dir) as view:
        answer = view.plan(args.length, args.tolerance, args.confidence, args.production_epochs)
    print(answer_json(answer) if args.json else answer_text(answer))
    return 0
