"""``periodscan report``: write the sensitivity table, figures and an HTML page for a sweep."""

from __future__ import annotations

import argparse

from periodscan.commands.common import add_sweep_argument


def _window(text: str) -> tuple[int, int]:
    try:
        start, length = (int(v) for v in text.split("+"))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"a window must be START+LENGTH, e.g. 10+5; got {text!r}") from None
    return start, length


def register(verbs) -> None:
    parser = verbs.add_parser(
        "report", help="write table, plots and an HTML report into the sweep folder",
        description="Write sensitivity.csv and .parquet, PNG plots (sensitivity curve per "
                    "length, start x length heatmap for 2-D grids, learning curves) and a "
                    "self-contained report.html into the sweep folder. Works on partial sweeps.")
    add_sweep_argument(parser)
    parser.add_argument("--tolerance", type=float, metavar="POINTS",
                        help="acceptable damage in accuracy points (default: the sweep's)")
    parser.add_argument("--confidence", type=float, metavar="C",
                        help="confidence level, e.g. 0.95 (default: the sweep's)")
    parser.add_argument("--production-epochs", type=int, metavar="N",
                        help="also map planner starts onto an N-epoch production schedule")
    parser.add_argument("--curves", nargs="+", type=_window, metavar="START+LENGTH",
                        help="windows whose learning curves to draw (default: chosen for you)")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.api import load_sweep

    with load_sweep(args.sweep, args.results_dir) as view:
        files = view.report(tolerance=args.tolerance, confidence=args.confidence,
                            production_epochs=args.production_epochs, windows=args.curves)
    print(f"report: {files.html}")
    print(f"table:  {files.csv}, {files.parquet}")
    for path in files.figures:
        print(f"figure: {path}")
    return 0
