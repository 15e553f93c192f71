"""Arguments and help text the verbs share: overrides, --config-dir, the sweep argument."""

from __future__ import annotations

import argparse
import shlex

#: Exit codes beyond 0 (done) and 2 (a user error, printed as one line by the CLI).
EXIT_NO_BASELINE = 3
EXIT_SOME_FAILED = 4


def groups_help() -> str:
    """Config groups and their options, override examples and exit codes (for --help)."""
    from periodscan.config import GROUPS, available_options

    lines = ["config groups (choose with GROUP=OPTION, e.g. deficit=label_noise):"]
    for group in GROUPS:
        lines.append(f"  {group:<10} {', '.join(available_options(group))}")
    lines += [
        "",
        "any value can be overridden with Hydra's grammar, for example:",
        "  periodscan sweep experiment=tiny seeds=3 schedule.epochs=30",
        "  periodscan sweep design.starts=[0,10,20] design.lengths=[5,10]",
        "  periodscan sweep 'design.starts=${span:0,40,4}'   (epochs 0, 4, ..., 40)",
        "  periodscan sweep design=removal design.budget=fixed_recovery design.recovery_epochs=20",
        "",
        "exit status:",
        "  0  sweep complete (diverged runs are results and are listed)",
        "  2  bad config, data or results folder: one line on stderr; finished results are kept",
        f"  {EXIT_NO_BASELINE}  no baseline finished (e.g. every run diverged: learning rate too "
        "high), so no damage",
        f"  {EXIT_SOME_FAILED}  some runs failed with an error (`periodscan status` lists them); "
        "rerun to retry",
        "  130  interrupted (Ctrl-C or SIGTERM); rerun the same command to resume",
    ]
    return "\n".join(lines)


def add_config_arguments(parser: argparse.ArgumentParser, overrides_help: str) -> None:
    """The options every command that composes a config shares: overrides, -q, --config-dir."""
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE", help=overrides_help)
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress bar (for logs)")
    parser.add_argument("--config-dir", metavar="DIR",
                        help="folder of your own config groups, searched before the built-ins")


def command_line(verb: str, args: argparse.Namespace, *extra: str) -> str:
    """The shell command that runs ``verb`` with this invocation's overrides and --config-dir."""
    return shlex.join(["periodscan", verb, *args.overrides, *extra]
                      + (["--config-dir", args.config_dir] if args.config_dir else []))


def add_sweep_argument(parser: argparse.ArgumentParser) -> None:
    """The positional sweep (folder or name) and --results-dir, shared by the reading verbs."""
    parser.add_argument("sweep", metavar="SWEEP",
                        help="sweep folder (results/demo) or sweep name under --results-dir")
    parser.add_argument("--results-dir", default="results", metavar="DIR",
                        help="where sweep names are looked up (default: results)")
