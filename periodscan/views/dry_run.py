"""What ``sweep --dry-run`` prints: the run tree, the epochs with and without sharing, the time.

Reads the facts a preview gathered (:class:`periodscan.jobs.preview.SweepPreview`: its
``tree``, ``prep.seeds``, ``prep.folder``, run and epoch counts, workers and timings).
"""

from __future__ import annotations

from periodscan.engine.tree import RunTree
from periodscan.views.words import human_duration


def _run_label(run) -> str:
    if run.is_baseline:
        return f"baseline@{run.end}"
    label = f"[{run.start},{run.start + run.length})@{run.end}"
    return f"{label} {run.variant}" if run.variant else label


def format_tree(tree: RunTree, seeds: list[int]) -> str:
    """The segment tree of the first seed, indented; other seeds have the same shape."""
    first = seeds[0]
    lines = [f"run tree of seed {first}" + (f" (seeds {seeds[1:]} are the same shape)"
                                             if len(seeds) > 1 else "")]

    def walk(sid: str, depth: int) -> None:
        seg = tree.segments[sid]
        kind = f"DEFICIT {seg.variant}".strip() if seg.deficit_on else "clean  "
        ends = ", ".join(_run_label(r) for r in seg.finishes)
        store = "  [checkpoint]" if seg.children else ""
        tail = f"  -> {ends}" if ends else ""
        lines.append(f"{'  ' * depth}{kind} epochs {seg.begin:>3}-{seg.end:<3}{store}{tail}")
        for child in sorted(seg.children, key=lambda c: (tree.segments[c].begin,
                                                          not tree.segments[c].deficit_on,
                                                          tree.segments[c].variant)):
            walk(child, depth + 1)

    for root in tree.roots():
        if root.seed == first:
            walk(root.segment_id, 1)
    return "\n".join(lines)


def trunk_lines(tree: RunTree, seeds: list[int]) -> list[str]:
    """For a sweep of deficit variants: the clean trunk each seed trains, which every variant
    forks from (nothing for a sweep of one deficit). It is trained once when its epochs add up
    to the longest baseline of the seed."""
    variants = list(dict.fromkeys(r.variant for r in tree.runs.values() if r.variant))
    if not variants:
        return []
    trunk = sum(s.epochs for s in tree.segments.values()
                if s.seed == seeds[0] and not s.deficit_on and not s.variant)
    longest = max((r.end for r in tree.runs.values() if r.is_baseline and r.seed == seeds[0]),
                  default=0)
    times = "once" if trunk == longest else f"{trunk / max(longest, 1):.2f} times"
    return [f"clean trunk: {longest} epochs per seed, trained {times} per seed; all "
            f"{len(variants)} deficit variants fork from it ({', '.join(variants)})"]


def format_preview(preview) -> str:
    """The dry run's text; on a folder that holds part of the sweep, what is left to train."""
    p, tree = preview, preview.tree
    seeds = sorted({run.seed for run in tree.runs.values()})  # the first round's seeds
    lines = [format_tree(tree, seeds), ""]
    if p.first_round_only:
        lines.append("the design chooses later rounds from the results: this is its first round")
    lines.append(f"{len(tree.runs)} runs ({p.window_runs} window runs, {p.baselines} baselines) "
                 f"over {len(seeds)} seeds, {len(tree.segments)} segments")
    lines.append(f"epochs to train: {tree.epochs_shared} with sharing, "
                 f"{tree.epochs_unshared} trained one by one from scratch "
                 f"(saving x{tree.epochs_unshared / max(tree.epochs_shared, 1):.2f})")
    lines += trunk_lines(tree, seeds)
    if p.epochs_left < tree.epochs_shared or p.runs_finished:
        lines.append(f"already in the results folder: {p.runs_finished} of {len(tree.runs)} runs "
                     f"finished; {p.epochs_left} of {tree.epochs_shared} epochs left to train")
    if p.seconds_per_epoch is not None:
        lines.append(f"one epoch takes about {p.seconds_per_epoch:.3g} s on this machine now; "
                     f"estimated wall time with {p.workers} worker(s): "
                     f"{human_duration(p.estimated_seconds)}")
    lines.append(f"results folder: {p.prep.folder}")
    return "\n".join(lines)
