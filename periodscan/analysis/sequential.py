"""Group-sequential two-sided tests with alpha spending, for seeds added to a window in stages.

A window's seeds arrive in stages (say 3, then 5, 8, 12, 16). Testing after every stage at the
full level would reject a true "damage = tolerance" far more often than ``alpha``; spending
``alpha`` over the looks keeps the chance of *any* wrong verdict at ``alpha``.

* :func:`spent` - Lan & DeMets (1983) spending functions, O'Brien-Fleming and Pocock type;
* :func:`z_boundaries` - the boundaries c_1..c_K of the standardized statistic, found by the
  recursive numerical integration of Armitage, McPherson & Rowe (1969) in the form given by
  Jennison & Turnbull (2000), "Group Sequential Methods with Applications to Clinical Trials",
  ch. 19;
* :func:`nominal_levels`, :class:`Stages` - the per-look two-sided p-value levels and the t
  critical values of the significance-level approach (Jennison & Turnbull 2000, section 3.8);
* :func:`sequential_holm` - Holm's procedure over windows in its group-sequential, graphical
  form (Maurer & Bretz 2013);
* :func:`conditional_power` - a non-binding futility aid (stochastic curtailment).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import optimize, stats

#: The spending functions :func:`spent` knows.
SPENDING = ("obrien_fleming", "pocock")
#: Largest boundary used. A look that may spend less than P(|Z| >= 8.5) ~ 2e-17 asks for a tail
#: below double precision relative to the probabilities (~1) the recursion carries, so brentq
#: cannot resolve it; 8.5 stands for "practically never rejects here".
MAX_BOUNDARY = 8.5
#: Grid for the recursion: spacing at most this fraction of the smaller of the two normal
#: increments the grid meets (its own and the next), so Simpson's rule sees smooth integrands.
SPACING_PER_SD = 1.0 / 8.0
#: Points per look on the score scale: at least a few hundred, at most what the n x n
#: propagation matrix of one look can hold comfortably in memory.
MIN_POINTS, MAX_POINTS = 301, 4001
#: Relative slack when checking that nominal levels do not shrink as alpha grows (root finding
#: leaves ~1e-10 noise in the boundaries).
MONOTONE_SLACK = 1e-7


def _check_alpha(alpha: float) -> float:
    alpha = float(alpha)
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must lie in (0, 1), got {alpha}")
    return alpha


def _check_fractions(fractions) -> np.ndarray:
    t = np.asarray(fractions, dtype=float).ravel()
    if t.size == 0 or not np.all(np.isfinite(t)) or t[0] <= 0.0 or t[-1] > 1.0 \
            or np.any(np.diff(t) <= 0.0):
        raise ValueError("fractions must be strictly increasing in (0, 1], got "
                         f"{list(np.round(t, 6))}")
    return t


def _check_kind(kind: str) -> str:
    if kind not in SPENDING:
        raise ValueError(f"kind must be one of {SPENDING}, got {kind!r}")
    return kind


def spent(kind: str, alpha: float, fractions) -> np.ndarray:
    """Cumulative two-sided alpha spent by information fraction t (Lan & DeMets 1983).

    O'Brien-Fleming type: a(t) = 2 - 2 Phi(z_{1-alpha/2} / sqrt(t)) (spends almost nothing
    early); Pocock type: a(t) = alpha ln(1 + (e - 1) t) (spends evenly). Both give alpha at t = 1.
    """
    kind, alpha, t = _check_kind(kind), _check_alpha(alpha), _check_fractions(fractions)
    if kind == "obrien_fleming":
        return 2.0 * stats.norm.sf(stats.norm.isf(alpha / 2.0) / np.sqrt(t))
    return alpha * np.log1p((math.e - 1.0) * t)


@dataclass(frozen=True)
class _Continuation:
    """Sub-density of the score S_k = Z_k sqrt(t_k) on paths not yet stopped, on a grid."""

    x: np.ndarray
    weights: np.ndarray  # Simpson weights times the density: sum(weights * g(x)) = integral
    t: float


def _simpson(lo: float, hi: float, spacing: float) -> tuple[np.ndarray, np.ndarray]:
    """Grid and Simpson weights on [lo, hi] with at most ``spacing`` between points."""
    n = int(np.clip(math.ceil((hi - lo) / spacing), MIN_POINTS - 1, MAX_POINTS - 1))
    n += n % 2  # an even number of intervals
    x = np.linspace(lo, hi, n + 1)
    w = np.ones(n + 1)
    w[1:-1:2], w[2:-1:2] = 4.0, 2.0
    return x, w * (hi - lo) / n / 3.0


def _first(t1: float, bound: float, spacing: float) -> _Continuation:
    x, w = _simpson(-bound, bound, spacing)
    sd = math.sqrt(t1)
    return _Continuation(x, w * stats.norm.pdf(x / sd) / sd, t1)


def _cross(state: _Continuation, t: float, bound: float) -> float:
    """P(not stopped before, |S| >= bound at information t): the next look's exit mass."""
    sd = math.sqrt(t - state.t)
    out = stats.norm.cdf((-bound - state.x) / sd) + stats.norm.sf((bound - state.x) / sd)
    return float(np.dot(state.weights, out))


def _advance(state: _Continuation, t: float, bound: float, spacing: float) -> _Continuation:
    """Carry the sub-density to information t, keeping |S| < bound (one convolution)."""
    sd = math.sqrt(t - state.t)
    y, w = _simpson(-bound, bound, spacing)
    kernel = stats.norm.pdf((y[:, None] - state.x[None, :]) / sd) / sd
    return _Continuation(y, w * (kernel @ state.weights), t)


def _spacing(t: np.ndarray, k: int) -> float:
    """Grid spacing at look k: a fraction of its own increment's sd and the next one's."""
    steps = np.diff(np.concatenate(([0.0], t)))
    near = steps[k:k + 2]
    return SPACING_PER_SD * math.sqrt(float(near.min()))


def _solve(state: _Continuation, t: float, target: float) -> float:
    """The z boundary at information t whose exit mass is ``target`` (capped at 8.5)."""
    def excess(c: float) -> float:
        return _cross(state, t, c * math.sqrt(t)) - target

    if excess(MAX_BOUNDARY) >= 0.0:
        return MAX_BOUNDARY
    return float(optimize.brentq(excess, 0.0, MAX_BOUNDARY, xtol=1e-12, rtol=1e-12))


@functools.lru_cache(maxsize=512)
def _boundaries(fractions: tuple[float, ...], alpha: float, kind: str) -> tuple[float, ...]:
    t = np.asarray(fractions)
    increments = np.diff(np.concatenate(([0.0], spent(kind, alpha, t))))
    first = stats.norm.isf(increments[0] / 2.0) if increments[0] > 0 else math.inf
    bounds = [min(float(first), MAX_BOUNDARY)]
    state = _first(t[0], bounds[0] * math.sqrt(t[0]), _spacing(t, 0))
    for k in range(1, len(t)):
        bounds.append(_solve(state, float(t[k]), float(increments[k])))
        if k + 1 < len(t):
            state = _advance(state, float(t[k]), bounds[k] * math.sqrt(t[k]), _spacing(t, k))
    return tuple(bounds)


def z_boundaries(fractions, alpha: float, kind: str) -> np.ndarray:
    """Two-sided boundaries c_k for Z_k such that, under H0, the chance of first crossing
    |Z| >= c at look k is a(t_k) - a(t_{k-1}) of the chosen spending function.

    Z_k is Brownian motion on the information scale (corr(Z_j, Z_k) = sqrt(t_j / t_k)); the
    continuation sub-density is carried from look to look on a Simpson grid (Armitage, McPherson
    & Rowe 1969; Jennison & Turnbull 2000 ch. 19) and each c_k found by brentq. Cached.
    """
    t = _check_fractions(fractions)
    return np.array(_boundaries(tuple(float(v) for v in t), _check_alpha(alpha),
                                _check_kind(kind)))


def crossing_probability(boundaries, fractions) -> float:
    """P under H0 that |Z_k| >= boundaries[k] at some look (same recursion as the boundaries)."""
    t = _check_fractions(fractions)
    c = np.asarray(boundaries, dtype=float).ravel()
    if c.shape != t.shape or np.any(c <= 0.0):
        raise ValueError(f"boundaries must be {t.size} positive values, got {list(c)}")
    total = 2.0 * float(stats.norm.sf(c[0]))
    state = _first(t[0], c[0] * math.sqrt(t[0]), _spacing(t, 0))
    for k in range(1, len(t)):
        total += _cross(state, float(t[k]), c[k] * math.sqrt(t[k]))
        if k + 1 < len(t):
            state = _advance(state, float(t[k]), c[k] * math.sqrt(t[k]), _spacing(t, k))
    return total


def nominal_levels(fractions, alpha: float, kind: str) -> np.ndarray:
    """Two-sided nominal p-value level of each look, 2 (1 - Phi(c_k))."""
    return 2.0 * stats.norm.sf(z_boundaries(fractions, alpha, kind))


#: How a look's level is set from the spending function (see :class:`Stages`).
BOUNDARIES = ("union", "correlated")


@dataclass(frozen=True)
class Stages:
    """Seed counts at which a window is tested (the looks), the spending function, and how
    each look's level is read from it.

    * ``"union"`` (what the sequential design uses): look k is tested at the alpha the
      spending function assigns it, a(t_k) - a(t_{k-1}), on the exact t distribution with
      n_k - 1 degrees of freedom. The chance of any false crossing is at most the sum of the
      looks' levels, alpha, by the union bound: valid at any seed count, with an unknown
      spread, whatever the correlation between looks. It gives up the correlation between
      looks, which the correlated boundaries spend, so it is conservative.
    * ``"correlated"``: the group-sequential boundaries of :func:`z_boundaries` (exact for a
      known spread), read on the t distribution (the significance-level approach, Jennison &
      Turnbull 2000 section 3.8). With 3 to 16 seeds the spread estimate makes it overshoot
      alpha (benchmarks/results/sequential_error.txt measures by how much); kept as the
      reference the union rule is compared with.
    """

    seeds: tuple[int, ...]
    kind: str = "obrien_fleming"
    boundary: str = "union"

    def __post_init__(self) -> None:
        seeds = tuple(int(n) for n in self.seeds)
        if not seeds or seeds[0] < 2 or any(np.diff(seeds) <= 0):
            raise ValueError(f"seeds must be strictly increasing from at least 2, got {seeds}")
        _check_kind(self.kind)
        if self.boundary not in BOUNDARIES:
            raise ValueError(f"boundary must be one of {BOUNDARIES}, got {self.boundary!r}")
        object.__setattr__(self, "seeds", seeds)

    @property
    def cap(self) -> int:
        return self.seeds[-1]

    @property
    def fractions(self) -> tuple[float, ...]:
        return tuple(n / self.cap for n in self.seeds)

    def look_of(self, n: int) -> int | None:
        """Index of the stage with exactly ``n`` seeds (None between stages)."""
        return self.seeds.index(n) if n in self.seeds else None

    def levels(self, alpha: float) -> np.ndarray:
        """Two-sided p-value level per look."""
        return np.array(_stage_levels(self, float(alpha)))

    def t_critical(self, alpha: float) -> np.ndarray:
        """|t| needed at each look: the look's level read on the t distribution with its
        n_k - 1 degrees of freedom. ``isf`` is t.ppf(1 - level/2) without losing the tail."""
        return np.array(_stage_t_critical(self, float(alpha)))

    def next_stage(self, n: int) -> int | None:
        """The smallest stage above ``n`` seeds (None at or past the cap)."""
        return next((s for s in self.seeds if s > n), None)


@functools.lru_cache(maxsize=8192)
def _stage_levels(stages: Stages, alpha: float) -> tuple[float, ...]:
    """:meth:`Stages.levels`, cached: Holm's steps and a search's rounds ask for the same few
    levels again and again."""
    if stages.boundary == "union":
        return tuple(np.diff(np.concatenate(([0.0], spent(stages.kind, alpha,
                                                            stages.fractions)))))
    return tuple(nominal_levels(stages.fractions, alpha, stages.kind))


@functools.lru_cache(maxsize=8192)
def _stage_t_critical(stages: Stages, alpha: float) -> tuple[float, ...]:
    return tuple(stats.t.isf(np.array(_stage_levels(stages, alpha)) / 2.0,
                             np.asarray(stages.seeds) - 1))


def _level_table(stages: Stages, alpha: float, m: int) -> list[np.ndarray]:
    """Nominal levels with r hypotheses rejected (level alpha / (m - r)), r = 0 .. m - 1.

    Checks what :func:`sequential_holm` relies on: a larger alpha never tightens a look.
    """
    table = [stages.levels(alpha / (m - r)) for r in range(m)]
    for low, high in zip(table[:-1], table[1:], strict=True):
        if np.any(high < low * (1.0 - MONOTONE_SLACK)):
            raise RuntimeError(f"nominal levels shrink as alpha grows for {stages}: "
                               f"{low} -> {high}; the sequential Holm steps would not be final")
    return table


def sequential_holm(looks: Sequence[Sequence[float]], stages: Stages, alpha: float,
                    family_size: int | None = None) -> list[int | None]:
    """Holm over hypotheses tested at several looks (graphical Holm for group-sequential
    trials, Maurer & Bretz 2013; Ye et al. 2013 "group sequential Holm").

    ``looks[i]`` holds the two-sided p-values of hypothesis i at looks 0..j_i. Each of the
    m = max(family_size, len(looks)) hypotheses starts at level alpha / m; any hypothesis whose
    p at some look is at most the nominal level of that look (for its current level) is rejected,
    and the rest move to alpha / (m - rejected), until nothing changes. Padding hypotheses (the
    family beyond ``looks``) are never rejected. Returns, per hypothesis, the first look that
    crosses at the level it was rejected with, None if not rejected. Levels only grow, and a
    larger level needs boundaries that do not rise (checked), so more looks never undo a
    rejection: verdicts are final.
    """
    alpha = _check_alpha(alpha)
    m = max(family_size or 0, len(looks))
    if m == 0:
        return []
    p = [np.asarray(v, dtype=float).ravel() for v in looks]
    if any(v.size > len(stages.seeds) for v in p):
        raise ValueError(f"looks has more p-values than the {len(stages.seeds)} stages")
    table = _level_table(stages, alpha, m)
    found: list[int | None] = [None] * len(p)
    rejected = 0
    while rejected < m:
        levels = table[rejected]
        new = [i for i, v in enumerate(p)
               if found[i] is None and np.any(v <= levels[:v.size])]
        for i in new:
            found[i] = int(np.flatnonzero(p[i] <= levels[:p[i].size])[0])
        if not new:
            break
        rejected += len(new)
    return found


def conditional_power(mean: float, sd: float, n: int, reference: float, cap: int,
                      critical: float) -> float:
    """Chance that the test at the cap reaches |t| >= ``critical`` if the observed standardized
    effect were the truth: stochastic curtailment, Lan, Simon & Halperin 1982 (recalled from
    memory). Non-binding futility aid; Brownian-motion approximation with normal tails.

    With theta = (mean - reference) / sd and B = z_n sqrt(n / cap), Z_cap is normal with mean
    B + theta (cap - n) / sqrt(cap) and variance (cap - n) / cap. No information (sd 0 or NaN,
    mean NaN) gives 1.0, so futility is never called on nothing.
    """
    if not (np.isfinite(mean) and np.isfinite(sd) and sd > 0 and n > 0):
        return 1.0
    theta = (mean - reference) / sd
    z_n = theta * math.sqrt(n)
    if n >= cap:
        return 1.0 if abs(z_n) >= critical else 0.0
    centre = z_n * math.sqrt(n / cap) + theta * (cap - n) / math.sqrt(cap)
    spread = math.sqrt((cap - n) / cap)
    return float(stats.norm.cdf((-critical - centre) / spread)
                 + stats.norm.sf((critical - centre) / spread))
