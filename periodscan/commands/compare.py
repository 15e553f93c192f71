"""``periodscan compare``: several finished sweeps side by side (a proxy ladder, two recipes)."""

from __future__ import annotations

import argparse
import re
from contextlib import ExitStack
from pathlib import Path


def register(verbs) -> None:
    parser = verbs.add_parser(
        "compare", help="damage curves of several sweeps side by side, their differences and "
                        "the critical edge",
        description="Compare finished sweeps measured on the same windows, e.g. a ladder of\n"
                    "proxies (model.channels=16, 32, 64) or two recipes, in the order given.\n"
                    "For every shared window: each sweep's damage, and its difference from\n"
                    "the previous (or first) sweep with an interval, paired by seed when the\n"
                    "two baselines are the same runs and Welch's t otherwise. Then whether\n"
                    "the edge of the critical window moves from sweep to sweep. Writes a\n"
                    "figure of the curves overlaid.",
        epilog="example: periodscan compare ladder16 ladder32 ladder64 --tolerance 1",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("sweeps", nargs="+", metavar="SWEEP",
                        help="two or more sweep folders or names under --results-dir")
    parser.add_argument("--results-dir", default="results", metavar="DIR",
                        help="where sweep names are looked up (default: results)")
    parser.add_argument("--length", type=int, metavar="L",
                        help="compare only deficits of L epochs (default: every length all "
                             "sweeps measured)")
    parser.add_argument("--tolerance", type=float, metavar="POINTS",
                        help="acceptable damage in accuracy points, used for every sweep's "
                             "verdicts (default: the first sweep's)")
    parser.add_argument("--confidence", type=float, metavar="C",
                        help="confidence level, e.g. 0.95 (default: the first sweep's)")
    parser.add_argument("--against", choices=("previous", "first"), default="previous",
                        help="compare each sweep with the one before it (default) or with the "
                             "first")
    parser.add_argument("--figure", metavar="PATH",
                        help="where to write the PNG (default: "
                             "DIR/compare-<sweep>-<sweep>....png under --results-dir)")
    parser.add_argument("--no-figure", action="store_true", help="write no figure")
    parser.add_argument("--json", action="store_true", help="print the comparison as JSON")
    parser.set_defaults(func=run)


def default_figure(results_dir: str, labels: list[str]) -> Path:
    """results/compare-ladder16-ladder32.png (characters outside [A-Za-z0-9_.] become _)."""
    names = [re.sub(r"[^A-Za-z0-9_.]+", "_", Path(label).name) for label in labels]
    return Path(results_dir) / f"compare-{'-'.join(names)}.png"


def run(args: argparse.Namespace) -> int:
    from periodscan.analysis.compare import compare_sweeps
    from periodscan.api import load_sweep
    from periodscan.views.compare import comparison_json, format_comparison
    from periodscan.views.words import sweep_title

    with ExitStack() as stack:
        views = [stack.enter_context(load_sweep(sweep, args.results_dir))
                 for sweep in args.sweeps]
        comparison = compare_sweeps(views, tolerance=args.tolerance,
                                    confidence=args.confidence, length=args.length,
                                    against=args.against)
        titles = {sweep_title({**view.config, "name": None}) for view in views}
    figure = None
    if not args.no_figure:
        from periodscan.views.compare_figure import comparison_figure

        path = Path(args.figure) if args.figure else default_figure(
            args.results_dir, [r.label for r in comparison.rungs])
        path.parent.mkdir(parents=True, exist_ok=True)
        title = titles.pop() if len(titles) == 1 else ""  # one title only when all agree
        figure = str(comparison_figure(comparison, path, title=title))
    print(comparison_json(comparison, figure) if args.json
          else format_comparison(comparison, figure))
    return 0
