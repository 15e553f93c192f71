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
    return f"[{run.start},{run.start + run.length})@{run.end}"


def format_tree(tree: RunTree, seeds: list[int]) -> str:
    """The segment tree of the first seed, indented; other seeds have the same shape."""
    first = seeds[0]
    lines = [f"run tree of seed {first}" + (f" (seeds {seeds[1:]} are the same shape)"
                                             if len(seeds) > 1 else "")]

    def walk(sid: str, depth: int) -> None:
        seg = tree.segments[sid]
        kind = "DEFICIT" if seg.deficit_on else "clean  "
        ends = ", ".join(_run_label(r) for r in seg.finishes)
        store = "  [checkpoint]" if seg.children else ""
        tail = f"  -> {ends}" if ends else ""
        lines.append(f"{'  ' * depth}{kind} epochs {seg.begin:>3}-{seg.end:<3}{store}{tail}")
        for child in sorted(seg.children, key=lambda c: (tree.segments[c].begin,
                                                          not tree.segments[c].deficit_on)):
            walk(child, depth + 1)

    for root in tree.roots():
        if root.seed == first:
            walk(root.segment_id, 1)
    return "\n".join(lines)


def format_preview(preview) -> str:
    """The dry run's text; on a folder that holds part of the sweep, what is left to train."""
    p, tree = preview, preview.tree
    seeds = p.prep.seeds
    lines = [format_tree(tree, seeds), ""]
    if p.first_round_only:
        lines.append("the design chooses later rounds from the results: this is its first round")
    lines.append(f"{len(tree.runs)} runs ({p.window_runs} window runs, {p.baselines} baselines) "
                 f"over {len(seeds)} seeds, {len(tree.segments)} segments")
    lines.append(f"epochs to train: {tree.epochs_shared} with sharing, "
                 f"{tree.epochs_unshared} trained one by one from scratch "
                 f"(saving x{tree.epochs_unshared / max(tree.epochs_shared, 1):.2f})")
    if p.epochs_left < tree.epochs_shared or p.runs_finished:
        lines.append(f"already in the results folder: {p.runs_finished} of {len(tree.runs)} runs "
                     f"finished; {p.epochs_left} of {tree.epochs_shared} epochs left to train")
    if p.seconds_per_epoch is not None:
        lines.append(f"one epoch takes about {p.seconds_per_epoch:.3g} s on this machine now; "
                     f"estimated wall time with {p.workers} worker(s): "
                     f"{human_duration(p.estimated_seconds)}")
    lines.append(f"results folder: {p.prep.folder}")
    return "\n".join(lines)
