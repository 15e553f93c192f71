"""Command line: thin verbs over library calls. Errors of the user's making print one line, exit 2."""

from __future__ import annotations

import argparse
import sys
import warnings
from collections.abc import Sequence

from periodscan.errors import PeriodscanError

DESCRIPTION = """\
Measure when in training a temporary data deficit (blur, noisy labels, a shard down, ...)
does lasting damage. A sweep trains small models with the deficit switched on during sliding
epoch windows, compares each against a clean baseline of the same seed, and writes a
sensitivity table and curve to results/<name>/."""


def _groups_help() -> str:
    from periodscan.config import GROUPS, available_options

    lines = ["config groups (choose with GROUP=OPTION, e.g. deficit=label_noise):"]
    for group in GROUPS:
        lines.append(f"  {group:<10} {', '.join(available_options(group))}")
    lines += [
        "",
        "any value can be overridden with Hydra's grammar, for example:",
        "  periodscan sweep experiment=tiny seeds=3 schedule.epochs=30",
        "  periodscan sweep design.starts=[0,10,20] design.lengths=[5,10]",
        "  periodscan sweep 'design.starts={from: 0, to: 40, step: 4}'",
        "  periodscan sweep design=removal design.budget=fixed_recovery design.recovery_epochs=20",
    ]
    return "\n".join(lines)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="periodscan", description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter)
    verbs = parser.add_subparsers(dest="verb", metavar="VERB")
    verbs.required = True

    sweep = verbs.add_parser(
        "sweep", help="run or resume a deficit-window sweep",
        description="Run or resume a sweep. Rerunning the same command skips finished runs and "
                    "continues from the last checkpoints.",
        epilog=_groups_help(), formatter_class=argparse.RawDescriptionHelpFormatter)
    sweep.add_argument("overrides", nargs="*", metavar="KEY=VALUE",
                       help="Hydra overrides: config group options and values")
    sweep.add_argument("--dry-run", action="store_true",
                       help="print the run tree, epochs with and without sharing and an "
                            "estimated time; train nothing")
    sweep.add_argument("-q", "--quiet", action="store_true",
                       help="no progress bar (for logs)")
    sweep.add_argument("--config-dir", metavar="DIR",
                       help="folder of your own config groups, searched before the built-ins")
    sweep.set_defaults(func=_cmd_sweep)
    return parser


def _cmd_sweep(args: argparse.Namespace) -> int:
    from periodscan.config import compose_config
    from periodscan.sweep import dry_run, run_sweep
    from periodscan.terminal import format_table

    cfg = compose_config(args.overrides, args.config_dir)
    if args.dry_run:
        print(dry_run(cfg))
        return 0
    outcome = run_sweep(cfg, quiet=args.quiet)
    removal = cfg.design.kind == "removal"
    print(format_table(outcome.table, removal=removal))
    print(f"\ntrained {outcome.epochs_shared} epochs in the tree for runs that would take "
          f"{outcome.epochs_unshared} from scratch; {outcome.seconds:.0f} s this session")
    if outcome.counts["failed"] or outcome.counts["diverged"]:
        print(f"segments failed: {outcome.counts['failed']}, diverged: "
              f"{outcome.counts['diverged']} (see the ledger)")
    print(f"results: {outcome.folder}/sensitivity.csv, {outcome.folder}/sensitivity.png")
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
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
