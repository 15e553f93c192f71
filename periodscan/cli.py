"""Command line: thin verbs over library calls.

Errors of the user's making print one line and exit 2.
"""

from __future__ import annotations

import argparse
import importlib
import os
import signal
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
    "compare",
    "export",
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
    if extra and hasattr(args, "overrides") and all(is_override(e) for e in extra):
        args.overrides = [*args.overrides, *extra]
    elif extra:
        parser.error(f"unrecognized arguments: {' '.join(extra)}")
    previous = signal.signal(signal.SIGTERM, terminate)
    try:
        with warnings.catch_warnings():
            warnings.showwarning = show_warning
            warnings.filterwarnings("default", category=UserWarning, module="periodscan")
            return args.func(args)
    except PeriodscanError as err:
        print(f"periodscan: error: {err}", file=sys.stderr)
        return 2
    except Terminated:
        print("periodscan: terminated; rerun the same command to resume", file=sys.stderr)
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        print("periodscan: interrupted; rerun the same command to resume", file=sys.stderr)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        return reader_went_away()
    finally:
        signal.signal(signal.SIGTERM, previous)


#: Shell conventions: 128 + the signal's number.
EXIT_INTERRUPTED = 128 + signal.SIGINT
EXIT_TERMINATED = 128 + signal.SIGTERM
EXIT_BROKEN_PIPE = 128 + signal.SIGPIPE


class Terminated(KeyboardInterrupt):
    """SIGTERM, taken down the same path as Ctrl-C: workers stopped, ledger consistent."""


def terminate(signum, frame) -> None:
    raise Terminated()


def is_override(text: str) -> bool:
    """Hydra's ``key=value``, ``+key=value`` or ``~key`` (not an option such as ``--seeds``)."""
    return text.startswith("~") or ("=" in text and not text.startswith("-"))


def show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """One plain line per warning, without the source line Python prints by default."""
    print(f"periodscan: warning: {message}", file=file or sys.stderr)


def reader_went_away() -> int:
    """``periodscan ... | head`` closed the pipe: stop printing, no traceback."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    os.dup2(devnull, sys.stdout.fileno())  # Python flushes stdout at exit; let it go nowhere
    return EXIT_BROKEN_PIPE


if __name__ == "__main__":
    sys.exit(main())
