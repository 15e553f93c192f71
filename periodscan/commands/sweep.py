"""``periodscan sweep``: run or resume a sweep, or describe it with --dry-run."""

from __future__ import annotations

import argparse
import shlex
import sys

#: Exit codes beyond 0 (done) and 2 (a user error, printed as one line by the CLI).
EXIT_NO_BASELINE = 3
EXIT_SOME_FAILED = 4


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
    ]
    return "\n".join(lines)


def add_config_arguments(parser: argparse.ArgumentParser, overrides_help: str) -> None:
    """The options every command that composes a config shares: overrides, -q, --config-dir."""
    parser.add_argument("overrides", nargs="*", metavar="KEY=VALUE", help=overrides_help)
    parser.add_argument("-q", "--quiet", action="store_true", help="no progress bar (for logs)")
    parser.add_argument("--config-dir", metavar="DIR",
                        help="folder of your own config groups, searched before the built-ins")


def command_line(verb: str, args: argparse.Namespace, *extra: str) -> str:
    """The shell command that reproduces this invocation (recorded with the sweep)."""
    return shlex.join(["periodscan", verb, *args.overrides, *extra]
                      + (["--config-dir", args.config_dir] if args.config_dir else []))


def register(verbs) -> None:
    parser = verbs.add_parser(
        "sweep", help="run or resume a deficit-window sweep",
        description="Run or resume a sweep. Rerunning the same command skips finished runs and "
                    "continues from the last checkpoints.",
        epilog=_groups_help(), formatter_class=argparse.RawDescriptionHelpFormatter)
    add_config_arguments(parser, "Hydra overrides: config group options and values")
    parser.add_argument("--dry-run", action="store_true",
                        help="print the run tree, epochs with and without sharing and an "
                             "estimated time; train nothing")
    parser.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    from periodscan.config import compose_config
    from periodscan.sweep import dry_run, run_sweep
    from periodscan.terminal import format_table

    cfg = compose_config(args.overrides, args.config_dir)
    if cfg.design.get("kind") == "adaptive":
        return _run_adaptive(cfg, args)
    if args.dry_run:
        print(dry_run(cfg))
        return 0
    command = command_line("sweep", args)
    outcome = run_sweep(cfg, quiet=args.quiet, command=command)
    print(format_table(outcome.table, removal=cfg.design.kind == "removal"))
    print(f"\ntrained {outcome.epochs_shared} epochs in the tree for runs that would take "
          f"{outcome.epochs_unshared} from scratch; {outcome.seconds:.0f} s this session")
    if outcome.counts["failed"] or outcome.counts["diverged"]:
        print(f"segments failed: {outcome.counts['failed']}, diverged: "
              f"{outcome.counts['diverged']} (see the ledger)")
    print(f"results: {outcome.folder}/sensitivity.csv, {outcome.folder}/sensitivity.png")
    return _exit_status(outcome.runs, cfg.schedule.optimizer.lr)


def _run_adaptive(cfg, args: argparse.Namespace) -> int:
    """design=adaptive: rounds of ordinary sweeps until the critical window's edges settle."""
    from periodscan.adaptive import coarse_config, run_adaptive
    from periodscan.sweep import dry_run
    from periodscan.terminal import format_table

    if args.dry_run:
        print("adaptive design: the first round is this sweep; later rounds bisect toward "
              "each edge of the critical window and raise the starts the edges stand on to "
              "design.seeds_max seeds, reusing everything already trained\n")
        print(dry_run(coarse_config(cfg)))
        return 0
    outcome = run_adaptive(cfg, quiet=args.quiet)
    print(format_table(outcome.table))
    edge = outcome.critical_until
    safe = outcome.safe_from
    print(f"\n{outcome.length}-epoch deficit at a tolerance of {outcome.tolerance:g} points: "
          f"latest critical start {edge if edge is not None else 'none'}; every start from "
          f"{safe if safe is not None else '(none found)'} on is safe")
    print(f"{outcome.rounds} round(s), {outcome.branch_epochs} branch epochs")
    return 0


def _exit_status(runs, lr) -> int:
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
