"""Command line: thin verbs over library calls.

Errors of the user's making print one line and exit 2.
"""

from __future__ import annotations

import argparse
import importlib
import sys
import warnings
from collections.abc import Sequence

from periodscan.errors import PeriodscanError

DESCRIPTION = """\
Measure when in training a temporary data deficit (blur, noisy labels, a shard down, ...)
does lasting damage. A sweep trains small models with the deficit switched on during sliding
epoch windows, compares each against a clean baseline of the same seed, and writes a
sensitivity table and curve to results/<name>/."""

#: Modules under periodscan.commands, one per verb, in the order --help lists them.
COMMANDS = (
    "sweep",
    "forecast",
    "status",
    "report",
    "plan",
)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="periodscan", description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    verbs = parser.add_subparsers(dest="verb", metavar="VERB")
    verbs.required = True
    for name in COMMANDS:
        importlib.import_module(f"periodscan.commands.{name}").register(verbs)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args, extra = parser.parse_known_args(argv)
    # Overrides may come after options (``sweep -q seeds=3``); argparse leaves those over.
    if extra and hasattr(args, "overrides") and all("=" in e and not e.startswith("-")
                                                    for e in extra):
        args.overrides = [*args.overrides, *extra]
    elif extra:
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    warnings.filterwarnings("default", category=UserWarning, module="periodscan")
    try:
        return args.func(args)
    except PeriodscanError as err:
        print(f"periodscan: error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("periodscan: interrupted; rerun the same command to resume", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
