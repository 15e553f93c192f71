"""The run tree: which runs a design asks for and the shared segments that train them.

A run is fully described by its seed, its deficit window ``[start, start + length)``, the
epoch ``end`` at which it is evaluated and its deficit ``variant`` ("" = the config's deficit;
otherwise the key of one of a design's deficit variants, such as a severity level). Two runs of
one seed train identically for as long as their per-epoch deficit flags agree and, once a
deficit epoch is among them, their variants agree too. So the runs of a seed form a prefix tree
of segments: a segment trains epochs ``[begin, end)`` with the deficit on or off, starting from
its parent's checkpoint, and every variant shares the clean trunk up to its window. The
baseline is simply the run with no deficit; the removal design is the window design with
start 0.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable
from dataclasses import dataclass, field


@dataclass(frozen=True, kw_only=True)
class RunSpec:
    """One training run: a seed, a deficit window (length 0 = baseline), an end epoch and the
    deficit variant it trains with ("" = the config's deficit; a baseline has none)."""

    seed: int
    start: int
    length: int
    end: int
    variant: str = ""

    def __post_init__(self) -> None:
        assert not (self.variant and self.length == 0), "a baseline has no deficit variant"

    @property
    def is_baseline(self) -> bool:
        return self.length == 0

    @property
    def run_id(self) -> str:
        if self.is_baseline:
            return f"seed{self.seed}-baseline-to{self.end}"
        run_id = f"seed{self.seed}-w{self.start}+{self.length}-to{self.end}"
        return f"{run_id}@{self.variant}" if self.variant else run_id

    def deficit_on(self, epoch: int) -> bool:
        return self.start <= epoch < self.start + self.length

    def flags(self) -> str:
        """'1' for every epoch trained with the deficit, '0' for clean ones."""
        return "".join("1" if self.deficit_on(e) else "0" for e in range(self.end))


def baseline(seed: int, end: int) -> RunSpec:
    return RunSpec(seed=seed, start=0, length=0, end=end)


@dataclass(kw_only=True)
class Segment:
    """Epochs ``[begin, end)`` of one seed, all with the deficit on or all off.

    ``variant`` is the deficit variant of the runs through it once a deficit epoch lies at or
    before it ("" on the clean trunk every variant shares, and for the config's own deficit).
    """

    segment_id: str
    seed: int
    begin: int
    end: int
    deficit_on: bool
    parent: str | None
    variant: str = ""
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


def segment_id(identity: str, seed: int, flags: str, variant: str = "") -> str:
    """Stable id of the segment ending after the epochs described by ``flags`` (trained with
    deficit ``variant`` where a flag is '1'; "" keeps the ids of sweeps without variants)."""
    history = f"{identity}|{seed}|{flags}" + (f"|{variant}" if variant else "")
    return hashlib.sha1(history.encode()).hexdigest()[:16]


def build_tree(runs: Iterable[RunSpec], identity: str) -> RunTree:
    """Group runs into shared segments, seed by seed (segments break where flags differ)."""
    runs = sorted(set(runs), key=lambda r: (r.seed, r.start, r.length, r.end, r.variant))
    tree = RunTree(segments={}, paths={r.run_id: [] for r in runs},
                   runs={r.run_id: r for r in runs})
    by_seed: dict[int, list[RunSpec]] = {}
    for run in runs:
        by_seed.setdefault(run.seed, []).append(run)
    for seed, group in by_seed.items():
        flags = {r.run_id: r.flags() for r in group}
        _grow(tree, identity, seed, group, flags, begin=0, parent=None)
    return tree


def _branches(group, flags, begin) -> dict[tuple[str, str], list[RunSpec]]:
    """The runs of ``group`` alive at ``begin``, split by that epoch's flag and, on a deficit
    epoch, by variant (after one, a group holds a single variant already)."""
    out: dict[tuple[str, str], list[RunSpec]] = {}
    for flag in ("0", "1"):
        for r in group:
            if r.end > begin and flags[r.run_id][begin] == flag:
                out.setdefault((flag, r.variant if flag == "1" else ""), []).append(r)
    return out


def _grow(tree, identity, seed, group, flags, begin, parent) -> None:
    """Create the segments that the runs in ``group`` share from epoch ``begin``, then recurse."""
    for (flag, _), members in _branches(group, flags, begin).items():
        end = begin + 1
        while all(r.end > end and flags[r.run_id][end] == flag for r in members):
            end += 1
        history = flags[members[0].run_id][:end]
        variant = members[0].variant if "1" in history else ""
        sid = segment_id(identity, seed, history, variant)
        seg = Segment(segment_id=sid, seed=seed, begin=begin, end=end, deficit_on=flag == "1",
                      parent=parent, variant=variant)
        seg.finishes = [r for r in members if r.end == end]
        tree.segments[sid] = seg
        if parent is not None:
            tree.segments[parent].children.append(sid)
        for r in members:
            tree.paths[r.run_id].append(sid)
        rest = [r for r in members if r.end > end]
        if rest:
            _grow(tree, identity, seed, rest, flags, end, sid)
