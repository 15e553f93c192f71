"""``periodscan sweep``: run or resume a sweep, or describe it with --dry-run."""

from __future__ import annotations

import argparse
import sys

from periodscan.commands.common import (
    EXIT_NO_BASELINE,
    EXIT_SOME_FAILED,
    add_config_arguments,
    command_line,
    groups_help,
)


def register(verbs) -> None:
    parser = verbs.add_parser(
        "sweep", help="run or resume a deficit-window sweep",
        description="Run or resume a sweep. Rerunning the same command skips finished runs and "
                    "continues from the last checkpoints.",
        epilog=groups_help(), formatter_class=argparse.RawDescriptionHelpFormatter)
    add_config_arguments(parser, "Hydra overrides: config group options and values")
    parser.add_argument("--dry-run", action="store_true",
                        help="print the run tree, epochs with and without sharing and an "
                             "estimated time; train nothing")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.config import compose_config
    from periodscan.jobs.preview import preview
    from periodscan.jobs.sweep import run_sweep
    from periodscan.views.dry_run import format_preview

    cfg = compose_config(args.overrides, args.config_dir)
    if args.dry_run:
        print(format_preview(preview(cfg)))
        return 0
    outcome = run_sweep(cfg, quiet=args.quiet, command=command_line("sweep", args))
    print(table_text(outcome))
    for note in outcome.notes:
        print(note)
    print(f"\ntrained {outcome.epochs_shared} epochs in the tree for runs that would take "
          f"{outcome.epochs_unshared} from scratch; {outcome.seconds:.0f} s this session")
    if outcome.counts["failed"] or outcome.counts["diverged"]:
        print(f"segments failed: {outcome.counts['failed']}, diverged: "
              f"{outcome.counts['diverged']} (see the ledger)")
    print(f"results: {outcome.folder}/sensitivity.csv, {outcome.folder}/sensitivity.png")
    return exit_status(outcome.runs, cfg.schedule.optimizer.lr)


def table_text(outcome) -> str:
    """The sweep's table as text, with each window's gap trend and the established bound
    (sensitivity.csv keeps the table without them)."""
    from periodscan.analysis.recovery import join_recovery
    from periodscan.api import load_sweep
    from periodscan.views.tables import format_table

    with load_sweep(outcome.folder) as view:
        table = join_recovery(outcome.table, view.recovery())
        family = view.design.holm_family_size() if view.design else None
    return format_table(table, outcome.layout, family_size=family)


def exit_status(runs, lr) -> int:
    """3 when no baseline finished (damage undefined), 4 when some runs failed, else 0."""
    status = runs.status
    base = runs.is_baseline == 1
    if not (status[base] == "done").any():
        if (status == "diverged").all():
            why = (f"every run diverged (non-finite training loss); schedule.optimizer.lr={lr} "
                   "is probably too high")
        else:
            counts = ", ".join(f"{n} {s}" for s, n in status[base].value_counts().items())
            why = f"no baseline run finished cleanly ({counts})"
        print(f"periodscan: {why}; damage cannot be measured", file=sys.stderr)
        return EXIT_NO_BASELINE
    failed = int((status == "failed").sum())
    if failed:
        print(f"periodscan: {failed} run(s) failed with an error (periodscan status lists them); "
              "rerun the same command to retry them", file=sys.stderr)
        return EXIT_SOME_FAILED
    return 0
