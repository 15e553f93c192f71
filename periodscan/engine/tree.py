"""The run tree: which runs a design asks for and the shared segments that train them.

A run is fully described by its seed, its deficit window ``[start, start + length)`` and the
epoch ``end`` at which it is evaluated. Two runs of one seed train identically for as long as
their per-epoch deficit flags agree, so the runs of a seed form a prefix tree of segments: a
segment trains epochs ``[begin, end)`` with the deficit on or off, starting from its parent's
checkpoint. The baseline is simply the run with no deficit; the removal design is the window
design with start 0.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable
from dataclasses import dataclass, field


@dataclass(frozen=True, kw_only=True)
class RunSpec:
    """One training run: a seed, a deficit window (length 0 = baseline) and an end epoch."""

    seed: int
    start: int
    length: int
    end: int

    @property
    def is_baseline(self) -> bool:
        return self.length == 0

    @property
    def run_id(self) -> str:
        if self.is_baseline:
            return f"seed{self.seed}-baseline-to{self.end}"
        return f"seed{self.seed}-w{self.start}+{self.length}-to{self.end}"

    def deficit_on(self, epoch: int) -> bool:
        return self.start <= epoch < self.start + self.length

    def flags(self) -> str:
        """'1' for every epoch trained with the deficit, '0' for clean ones."""
        return "".join("1" if self.deficit_on(e) else "0" for e in range(self.end))


def baseline(seed: int, end: int) -> RunSpec:
    return RunSpec(seed=seed, start=0, length=0, end=end)


@dataclass(kw_only=True)
class Segment:
    """Epochs ``[begin, end)`` of one seed, all with the deficit on or all off."""

    segment_id: str
    seed: int
    begin: int
    end: int
    deficit_on: bool
    parent: str | None
    children: list[str] = field(default_factory=list)
    finishes: list[RunSpec] = field(default_factory=list)  # runs evaluated at ``end``

    @property
    def epochs(self) -> int:
        return self.end - self.begin


@dataclass(kw_only=True)
class RunTree:
    """All segments of a sweep, keyed by id, plus each run's path from root to leaf."""

    segments: dict[str, Segment]
    paths: dict[str, list[str]]  # run_id -> segment ids, root first
    runs: dict[str, RunSpec]

    @property
    def epochs_shared(self) -> int:
        """Epochs trained with the tree (each shared segment once)."""
        return sum(s.epochs for s in self.segments.values())

    @property
    def epochs_unshared(self) -> int:
        """Epochs the same runs would cost trained one by one from scratch."""
        return sum(r.end for r in self.runs.values())

    def roots(self) -> list[Segment]:
        return [s for s in self.segments.values() if s.parent is None]

    def ancestors(self, segment_id: str) -> list[str]:
        """Ids from the root down to and including ``segment_id``."""
        chain = []
        current: str | None = segment_id
        while current is not None:
            chain.append(current)
            current = self.segments[current].parent
        return chain[::-1]

    def critical_path(self, segment_id: str) -> int:
        """Longest chain of epochs from the start of this segment to any leaf below it."""
        seg = self.segments[segment_id]
        below = [self.critical_path(c) for c in seg.children]
        return seg.epochs + (max(below) if below else 0)


def segment_id(identity: str, seed: int, flags: str) -> str:
    """Stable id of the segment ending after the epochs described by ``flags``."""
    return hashlib.sha1(f"{identity}|{seed}|{flags}".encode()).hexdigest()[:16]


def build_tree(runs: Iterable[RunSpec], identity: str) -> RunTree:
    """Group runs into shared segments, seed by seed (segments break where flags differ)."""
    runs = sorted(set(runs), key=lambda r: (r.seed, r.start, r.length, r.end))
    tree = RunTree(segments={}, paths={r.run_id: [] for r in runs},
                   runs={r.run_id: r for r in runs})
    by_seed: dict[int, list[RunSpec]] = {}
    for run in runs:
        by_seed.setdefault(run.seed, []).append(run)
    for seed, group in by_seed.items():
        flags = {r.run_id: r.flags() for r in group}
        _grow(tree, identity, seed, group, flags, begin=0, parent=None)
    return tree


def _grow(tree, identity, seed, group, flags, begin, parent) -> None:
    """Create the segment that the runs in ``group`` share from epoch ``begin``, then recurse."""
    for flag in ("0", "1"):
        members = [r for r in group if r.end > begin and flags[r.run_id][begin] == flag]
        if not members:
            continue
        end = begin + 1
        while all(r.end > end and flags[r.run_id][end] == flag for r in members):
            end += 1
        sid = segment_id(identity, seed, flags[members[0].run_id][:end])
        seg = Segment(segment_id=sid, seed=seed, begin=begin, end=end, deficit_on=flag == "1",
                      parent=parent)
        seg.finishes = [r for r in members if r.end == end]
        tree.segments[sid] = seg
        if parent is not None:
            tree.segments[parent].children.append(sid)
        for r in members:
            tree.paths[r.run_id].append(sid)
        rest = [r for r in members if r.end > end]
        if rest:
            _grow(tree, identity, seed, rest, flags, end, sid)
