"""Where a decided window's share of alpha goes: the graphical multiple-test procedure.

Each hypothesis i starts with a share w_i of alpha (the shares add up to at most 1). A
hypothesis whose test crosses at level w_i alpha is rejected, and passes w_j g_jl of its share
on to each other hypothesis l; the passing weights are then rewired around it,
g_lk <- (g_lk + g_lj g_jk) / (1 - g_lj g_jl). The family-wise error rate stays at alpha for any
shares and passing weights fixed before the data are seen (Bretz, Maurer, Brannath & Posch
2009, "A graphical approach to sequentially rejective multiple test procedures", Statistics in
Medicine 28:586-604, algorithm 1, recalled from memory); with tests at several looks, each
hypothesis is judged at every look it has reached with the boundaries of its current share
(Maurer & Bretz 2013, also recalled from memory).

Holm's procedure is the graph w_i = 1/m, g_jl = 1/(m - 1); a fixed order (test 1, then 2 once
1 is rejected, ...) is w = (1, 0, ..., 0), g_{j,j+1} = 1. A hypothesis never measured is never
rejected; that can only withhold rejections, so it keeps the guarantee (the procedure is
monotone in its p-values) whichever hypotheses the data led a design to measure.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from periodscan.analysis.sequential import MONOTONE_SLACK, Stages

#: Rounding slack when checking that shares add up to at most 1.
SUM_SLACK = 1e-9


@dataclass(frozen=True)
class AlphaGraph:
    """Initial shares of alpha and passing weights; ``passes[j][l]`` is the part of j's share
    that goes to l when j is rejected."""

    weights: tuple[float, ...]
    passes: tuple[tuple[float, ...], ...]

    def __post_init__(self) -> None:
        w = np.asarray(self.weights, dtype=float)
        g = np.asarray(self.passes, dtype=float).reshape(len(w), len(w)) if len(w) else \
            np.zeros((0, 0))
        if np.any(w < 0) or w.sum() > 1.0 + SUM_SLACK:
            raise ValueError(f"weights must be >= 0 and add up to at most 1, got {list(w)}")
        if np.any(g < 0) or np.any(g.sum(axis=1) > 1.0 + SUM_SLACK) or np.any(np.diag(g) != 0):
            raise ValueError("passes must be >= 0, zero on the diagonal, each row adding up "
                             "to at most 1")
        object.__setattr__(self, "weights", tuple(float(v) for v in w))
        object.__setattr__(self, "passes", tuple(tuple(float(v) for v in row) for row in g))

    @property
    def size(self) -> int:
        return len(self.weights)

    @classmethod
    def holm(cls, m: int) -> AlphaGraph:
        """Holm's procedure: equal shares, a rejected share split evenly over the rest."""
        g = np.full((m, m), 1.0 / (m - 1)) if m > 1 else np.zeros((m, m))
        np.fill_diagonal(g, 0.0)
        return cls(tuple([1.0 / m] * m), tuple(map(tuple, g)))

    @classmethod
    def fixed_order(cls, m: int) -> AlphaGraph:
        """All of alpha on the first hypothesis, passed down the line."""
        g = np.eye(m, k=1)
        return cls(tuple([1.0] + [0.0] * (m - 1)) if m else (), tuple(map(tuple, g)))


@dataclass(frozen=True)
class GraphResult:
    """Per hypothesis: the first look that crossed at the share it was rejected with (None if
    not rejected), its share at the end (a rejected one: the share it was rejected with), and
    the share it would reach if the hypotheses passing to it, directly or through one other,
    were rejected next (what a futility rule may hope for; 0 once rejected)."""

    crossed: list[int | None]
    shares: np.ndarray
    reachable: np.ndarray


def _levels(stages: Stages, alpha: float, share: float) -> np.ndarray:
    """Nominal level per look at ``share`` of alpha (none at a share of zero)."""
    return stages.levels(alpha * share) if share > 0 else np.zeros(len(stages.seeds))


def graph_rejections(looks: Sequence[Sequence[float]], stages: Stages, alpha: float,
                     graph: AlphaGraph) -> GraphResult:
    """The graphical procedure over hypotheses tested at several looks.

    ``looks[i]`` holds the two-sided p-values of hypothesis i at looks 0..j_i (empty when it was
    not measured). Hypotheses that cross at the current shares are rejected together and pass
    their shares on, until nothing changes. A share only grows, and a larger share must not
    tighten any look (checked), so more looks never undo a rejection.
    """
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must lie in (0, 1), got {alpha}")
    m = graph.size
    if len(looks) != m:
        raise ValueError(f"looks has {len(looks)} hypotheses, the graph {m}")
    p = [np.asarray(v, dtype=float).ravel() for v in looks]
    if any(v.size > len(stages.seeds) for v in p):
        raise ValueError(f"looks has more p-values than the {len(stages.seeds)} stages")
    w = np.asarray(graph.weights, dtype=float)
    g = np.asarray(graph.passes, dtype=float)
    active = np.ones(m, dtype=bool)
    crossed: list[int | None] = [None] * m
    rejected_with = np.zeros(m)
    while True:
        new = {}
        for i in np.flatnonzero(active):
            if p[i].size:
                hit = np.flatnonzero(p[i] <= _levels(stages, alpha, w[i])[:p[i].size])
                if hit.size:
                    new[int(i)] = (int(hit[0]), float(w[i]))
        if not new:
            break
        for j, (look, share) in new.items():
            crossed[j], rejected_with[j] = look, share
            w, g = _reject(j, w, g, active, stages, alpha)
    return GraphResult(crossed, np.where(active, w, rejected_with), _reachable(w, g, active))


def _reachable(w: np.ndarray, g: np.ndarray, active: np.ndarray) -> np.ndarray:
    """The share each open hypothesis would hold if the open ones passing to it, and those
    passing to them, were rejected next (two steps; its own share passed round and back is not
    counted twice)."""
    g = np.where(np.outer(active, active), g, 0.0)
    two = g @ g
    np.fill_diagonal(two, 0.0)
    out = w + w @ g + w @ two
    return np.where(active, out, 0.0)


def _reject(j: int, w: np.ndarray, g: np.ndarray, active: np.ndarray, stages: Stages,
            alpha: float) -> tuple[np.ndarray, np.ndarray]:
    """Algorithm 1's update after rejecting j (``active`` is updated in place)."""
    active[j] = False
    new_w = w.copy()
    new_w[active] += w[j] * g[j, active]
    for i in np.flatnonzero(active & (new_w > w)):
        if np.any(_levels(stages, alpha, new_w[i]) < _levels(stages, alpha, w[i])
                  * (1.0 - MONOTONE_SLACK)):
            raise RuntimeError(f"nominal levels shrink as alpha grows for {stages} at share "
                               f"{w[i]:.4g} -> {new_w[i]:.4g}; verdicts would not be final")
    new_w[j] = 0.0
    through = np.outer(g[:, j], g[j, :])  # l -> j -> k
    denom = (1.0 - g[:, j] * g[j, :])[:, None]  # 1 - g_lj g_jl, per row l
    with np.errstate(divide="ignore", invalid="ignore"):
        new_g = np.where(denom > 0, (g + through) / denom, 0.0)
    np.fill_diagonal(new_g, 0.0)
    new_g[j, :], new_g[:, j] = 0.0, 0.0
    new_g[~active, :], new_g[:, ~active] = 0.0, 0.0
    return new_w, new_g


__all__ = ["AlphaGraph", "GraphResult", "graph_rejections"]
