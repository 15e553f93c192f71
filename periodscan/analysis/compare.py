"""Several finished sweeps side by side: damage per window, its difference, the critical edge.

What it is for: a ladder of proxies (``model.channels=16``, ``32``, ``64``) or two recipes
measured with the same windows. For every window the sweeps share, the difference of mean
damage (this sweep minus the one it is compared with) gets a confidence interval:

* **paired by seed** when the two baselines are the same runs: same seed, same training apart
  from the deficit (the baseline never trains with it), and the same baseline run id, test
  accuracy and per-example correctness for every shared seed. Then damage_b - damage_a of one
  seed is window accuracy a minus window accuracy b, and the Student-t interval of those
  differences is what ``scipy.stats.ttest_rel(b, a).confidence_interval()`` gives;
* **Welch** otherwise (different models or recipes train different baselines): the two samples
  of per-seed damage are independent, and the interval uses Welch's unequal-variance t with
  the Welch-Satterthwaite degrees of freedom, as ``scipy.stats.ttest_ind(b, a,
  equal_var=False).confidence_interval()``.

Intervals are per window at the chosen confidence, not corrected for the number of windows.
The edge of the critical window is read from each sweep's verdicts (one tolerance and
confidence for all sweeps) on the starts every sweep measured: the latest critical start and
the earliest start from which every later start is safe. Numbers only; words are in
:mod:`periodscan.views.compare`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from periodscan.analysis.planner import check_question
from periodscan.analysis.sensitivity import paired_damage, resolution
from periodscan.analysis.stats import t_interval, t_test_vs
from periodscan.designs.adaptive_search import boundaries
from periodscan.designs.layout import Layout
from periodscan.errors import SweepError, bad_value

PAIRED, WELCH = "paired", "welch"
#: Which sweep each sweep is compared with: the one given before it, or the first one.
AGAINST = ("previous", "first")
#: Why two sweeps were (not) paired by seed; views put these into words.
SAME_RUNS = "same baseline runs"
TRAINING_DIFFERS = "training differs"
NO_SHARED_SEEDS = "no shared seeds"
BASELINES_DIFFER = "baseline runs differ"


@dataclass(frozen=True)
class Difference:
    """Mean damage of sample b minus sample a, with its interval and two-sided p-value."""

    mean: float
    low: float
    high: float
    n_a: int
    n_b: int
    df: float
    pvalue: float
    method: str


def _clean(values) -> np.ndarray:
    values = np.asarray(values, dtype=float).ravel()
    return values[np.isfinite(values)]


def paired_difference(a, b, confidence: float = 0.95, sd_floor: float = 0.0) -> Difference:
    """Mean of ``b - a`` over seeds (same order) with its Student-t interval and p-value.

    ``sd_floor`` replaces a spread of zero, as in :func:`periodscan.analysis.stats.t_interval`.
    """
    a, b = np.asarray(a, dtype=float), np.asarray(b, dtype=float)
    keep = np.isfinite(a) & np.isfinite(b)
    diffs = b[keep] - a[keep]
    interval = t_interval(diffs, confidence, sd_floor=sd_floor)
    test = t_test_vs(diffs, 0.0, sd_floor=sd_floor)
    n = len(diffs)
    method = "paired t" + (", sd floor" if interval.method.endswith("floor") else "")
    return Difference(interval.mean, interval.low, interval.high, n, n,
                      float(n - 1) if n > 1 else math.nan, test.pvalue, method)


def welch_difference(a, b, confidence: float = 0.95, sd_floor: float = 0.0) -> Difference:
    """Mean of ``b`` minus mean of ``a`` for independent samples, Welch's t interval.

    Degrees of freedom by Welch-Satterthwaite. When neither sample has any spread, each
    variance is replaced by ``sd_floor`` squared (one test example's worth of accuracy).
    """
    a, b = _clean(a), _clean(b)
    na, nb = len(a), len(b)
    mean = float(b.mean() - a.mean()) if na and nb else math.nan
    if na < 2 or nb < 2:
        return Difference(mean, math.nan, math.nan, na, nb, math.nan, math.nan, "welch")
    va, vb = float(a.var(ddof=1)), float(b.var(ddof=1))
    method = "welch"
    if va == 0.0 and vb == 0.0 and sd_floor > 0:
        va = vb = sd_floor ** 2
        method = "welch, sd floor"
    se2 = va / na + vb / nb
    if se2 == 0.0:
        return Difference(mean, mean, mean, na, nb, math.nan, 1.0 if mean == 0 else 0.0, method)
    df = se2 ** 2 / ((va / na) ** 2 / (na - 1) + (vb / nb) ** 2 / (nb - 1))
    se = math.sqrt(se2)
    half = float(stats.t.ppf(0.5 + confidence / 2, df)) * se
    pvalue = float(2 * stats.t.sf(abs(mean) / se, df))
    return Difference(mean, mean - half, mean + half, na, nb, float(df), pvalue, method)


@dataclass(frozen=True)
class Pairing:
    """Whether sweep ``b`` is compared with sweep ``a`` seed by seed, and why (or why not)."""

    a: str
    b: str
    method: str
    reason: str
    seeds: list[int] = field(default_factory=list)
    keys: list[str] = field(default_factory=list)  # training keys that differ (no deficit)


def _flat(node: Any, key: str = "") -> dict[str, Any]:
    """{'model.channels': 16, ...} from nested dicts."""
    if not isinstance(node, dict):
        return {key: node}
    out: dict[str, Any] = {}
    for name, value in node.items():
        out.update(_flat(value, f"{key}.{name}" if key else str(name)))
    return out


def training_of(view) -> dict[str, Any]:
    """A sweep's training settings, flattened: the ledger's record, else config.yaml's."""
    training = view.meta.get("training")
    if not isinstance(training, dict):
        training = {k: view.config.get(k) for k in ("data", "model", "deficit", "schedule")}
    return _flat(training)


def config_changes(before: dict[str, Any], after: dict[str, Any]) -> dict[str, list]:
    """Flattened keys whose values differ: key -> [before, after] (None when unset)."""
    keys = sorted(set(before) | set(after))
    return {k: [before.get(k), after.get(k)] for k in keys if before.get(k) != after.get(k)}


def _baselines(view) -> pd.DataFrame:
    runs = view.runs
    done = runs[(runs.is_baseline == 1) & (runs.status == "done")]
    return done[["seed", "run_id", "end_epoch", "test_acc", "n_test"]]


def _same_correctness(view_a, view_b, run_id: str) -> bool:
    """True when both ledgers hold the same per-example correctness for the run (or neither)."""
    return view_a.ledger.correctness(run_id) == view_b.ledger.correctness(run_id)


def baseline_training(view) -> dict[str, Any]:
    """The training settings a baseline depends on: all of them but the deficit's."""
    return {k: v for k, v in training_of(view).items() if not k.startswith("deficit.")}


def same_data(view_a, view_b) -> bool:
    """False only when both ledgers recorded a digest of the data loaded and they differ."""
    digests = [(v.meta.get("fingerprint") or {}).get("data") for v in (view_a, view_b)]
    return None in digests or digests[0] == digests[1]


def pairing(view_a, view_b, a: str, b: str) -> Pairing:
    """Pair by seed only when the baselines of the shared seeds are literally the same runs."""
    mine, other = baseline_training(view_a), baseline_training(view_b)
    identity = view_a.meta.get("identity")
    same_identity = identity is not None and identity == view_b.meta.get("identity")
    if not same_identity and (mine != other or not same_data(view_a, view_b)):
        return Pairing(a, b, WELCH, TRAINING_DIFFERS, keys=sorted(config_changes(mine, other)))
    both = _baselines(view_a).merge(_baselines(view_b), on=["seed", "run_id"],
                                    suffixes=("_a", "_b"))
    if both.empty:
        return Pairing(a, b, WELCH, NO_SHARED_SEEDS)
    same = ((both.test_acc_a == both.test_acc_b) & (both.n_test_a == both.n_test_b)
            & both.run_id.map(lambda r: _same_correctness(view_a, view_b, r)))
    if not same.all():
        return Pairing(a, b, WELCH, BASELINES_DIFFER)
    return Pairing(a, b, PAIRED, SAME_RUNS, sorted(int(s) for s in both.seed))


@dataclass(frozen=True)
class Rung:
    """One sweep of the comparison, with what sets it apart from the first one."""

    label: str
    folder: str
    schedule_epochs: int
    seeds: int
    baseline_acc: float
    tolerance: float
    changes: dict[str, list]


@dataclass
class Comparison:
    """Everything :func:`compare_sweeps` measured; frames in long form, one row per sweep.

    ``curves``: each sweep's windows of the compared lengths (its own table at the common
    tolerance and confidence). ``differences``: per shared window, ``sweep`` minus ``against``
    in damage points with its interval. ``edges``: per sweep and length, the latest critical
    start and the start from which all later ones are safe, on the ``starts`` every sweep
    measured, and whether undetermined starts blur it (``located``). ``edge_moves``: per
    length, whether the edge ``moves`` between sweeps and whether it is ``backed`` by a damage
    difference whose interval excludes 0 at a start whose verdict changes (``changes`` lists
    those starts).
    """

    rungs: list[Rung]
    tolerance: float
    confidence: float
    against: str
    lengths: list[int]
    layout: Layout
    pairings: list[Pairing]
    curves: pd.DataFrame
    differences: pd.DataFrame
    edges: pd.DataFrame
    edge_moves: pd.DataFrame
    changes: pd.DataFrame


CURVE_COLUMNS = ["sweep", "start", "length", "x", "seeds", "baseline_acc", "damage",
                 "damage_low", "damage_high", "interval", "verdict", "short_recovery"]
DIFFERENCE_COLUMNS = ["sweep", "against", "start", "length", "x", "method", "n_against",
                      "n_sweep", "difference", "low", "high", "df", "p_value", "differs"]


def unique_labels(views) -> list[str]:
    """Sweep names, or their folders where two sweeps share a name."""
    names = [v.name for v in views]
    return [v.name if names.count(v.name) == 1 else str(v.folder) for v in views]


def rung_of(view, label: str, first_training: dict[str, Any]) -> Rung:
    base = _baselines(view)
    base = base[base.end_epoch == view.schedule_epochs]
    return Rung(label=label, folder=str(view.folder), schedule_epochs=view.schedule_epochs,
                seeds=len(base), baseline_acc=float(base.test_acc.mean() * 100)
                if len(base) else math.nan, tolerance=view.tolerance,
                changes=config_changes(first_training, training_of(view)))


def common_lengths(tables: dict[str, pd.DataFrame], length: int | None) -> list[int]:
    """Deficit lengths every sweep measured (only ``length`` when given)."""
    sets = [set(int(n) for n in t.length) if len(t) else set() for t in tables.values()]
    shared = sorted(set.intersection(*sets))
    if length is None:
        if not shared:
            raise SweepError("the sweeps share no deficit length: each measured "
                             + "; ".join(f"{k}: {sorted(s)}" for k, s in
                                         zip(tables, sets, strict=True)))
        return shared
    if length not in shared:
        raise bad_value("length", f"a deficit length every sweep measured ({shared})", length)
    return [length]


def curves_frame(tables: dict[str, pd.DataFrame], lengths: list[int], layout) -> pd.DataFrame:
    frames = []
    for label, table in tables.items():
        rows = table[table.length.isin(lengths)].copy()
        rows.insert(0, "sweep", label)
        rows["x"] = [layout.x_value(s, n) for s, n in zip(rows.start, rows.length, strict=True)]
        frames.append(rows[CURVE_COLUMNS])
    return pd.concat(frames, ignore_index=True)


def shared_starts(curves: pd.DataFrame, length: int) -> list[int]:
    """Starts of ``length`` that every sweep measured (at least one seed with a damage)."""
    rows = curves[(curves.length == length) & (curves.seeds > 0)]
    sets = [set(int(s) for s in rows.start[rows.sweep == label])
            for label in dict.fromkeys(curves.sweep)]
    return sorted(set.intersection(*sets)) if sets else []


def window_differences(damage_a: pd.DataFrame, damage_b: pd.DataFrame, pair: Pairing,
                       windows: list[tuple[int, int]], confidence: float,
                       sd_floor: float) -> list[dict]:
    """One row per shared window: damage of ``pair.b`` minus damage of ``pair.a``."""
    rows = []
    for start, length in windows:
        a = damage_a[(damage_a.start_epoch == start) & (damage_a.length == length)]
        b = damage_b[(damage_b.start_epoch == start) & (damage_b.length == length)]
        if pair.method == PAIRED:
            both = a.merge(b, on="seed", suffixes=("_a", "_b"))
            both = both[both.seed.isin(pair.seeds)]
            diff = paired_difference(both.damage_a, both.damage_b, confidence, sd_floor)
        else:
            diff = welch_difference(a.damage, b.damage, confidence, sd_floor)
        rows.append({"sweep": pair.b, "against": pair.a, "start": start, "length": length,
                     "method": diff.method, "n_against": diff.n_a, "n_sweep": diff.n_b,
                     "difference": diff.mean, "low": diff.low, "high": diff.high,
                     "df": diff.df, "p_value": diff.pvalue,
                     "differs": bool(diff.low > 0 or diff.high < 0)})
    return rows


def located(starts: list[int], critical_until: int | None, safe_from: int | None) -> bool:
    """True when no undetermined start lies at the edge: the latest critical start and the
    first of the trailing safe ones are neighbours among ``starts`` (or every start is safe,
    or the critical stretch reaches the last start)."""
    if not starts:
        return False
    if safe_from is None:
        return critical_until == starts[-1]
    if critical_until is None:
        return safe_from == starts[0]
    return starts.index(safe_from) == starts.index(critical_until) + 1


def edges_frame(curves: pd.DataFrame, lengths: list[int]) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Per sweep and length the critical edge on the shared starts; per length, whether it moves.

    ``critical_until`` is the latest critical start, ``safe_from`` the earliest start from
    which every later shared start is safe (None: no such start), as the adaptive design's
    :func:`periodscan.designs.adaptive_search.boundaries` reads them; ``located`` as
    :func:`located`.
    """
    rows, moves = [], []
    for length in lengths:
        starts = shared_starts(curves, length)
        mine = curves[(curves.length == length) & curves.start.isin(starts)]
        found = []
        for label in dict.fromkeys(curves.sweep):
            critical_until, safe_from = boundaries(mine[mine.sweep == label])
            found.append((critical_until, safe_from))
            rows.append({"sweep": label, "length": length, "critical_until": critical_until,
                         "safe_from": safe_from,
                         "located": located(starts, critical_until, safe_from)})
        moves.append({"length": length, "starts": starts,
                      "critical_until_moves": len({f[0] for f in found}) > 1,
                      "safe_from_moves": len({f[1] for f in found}) > 1})
    edge_moves = pd.DataFrame(moves)
    edge_moves["moves"] = edge_moves.critical_until_moves | edge_moves.safe_from_moves
    edges = pd.DataFrame(rows, columns=["sweep", "length", "critical_until", "safe_from",
                                        "located"])
    for column in ("critical_until", "safe_from"):  # None stays None, not NaN
        edges[column] = pd.Series([r[column] for r in rows], index=edges.index, dtype=object)
    return edges, edge_moves


def verdict_changes(curves: pd.DataFrame, differences: pd.DataFrame) -> pd.DataFrame:
    """Shared windows whose verdict differs between a sweep and the one it is compared with,
    with the difference of damage measured there (does the data back the change?)."""
    verdicts = curves.set_index(["sweep", "start", "length"]).verdict
    rows = []
    for r in differences.itertuples():
        before = verdicts.get((r.against, r.start, r.length))
        after = verdicts.get((r.sweep, r.start, r.length))
        if before != after:
            rows.append({"sweep": r.sweep, "against": r.against, "start": r.start,
                         "length": r.length, "verdict_against": before, "verdict": after,
                         "difference": r.difference, "low": r.low, "high": r.high,
                         "differs": r.differs})
    return pd.DataFrame(rows, columns=["sweep", "against", "start", "length",
                                       "verdict_against", "verdict", "difference", "low",
                                       "high", "differs"])


def backed(edges: pd.DataFrame, changes: pd.DataFrame) -> bool:
    """Whether, at some start between the earliest and the latest edge any sweep reads, a
    verdict changes with a difference of damage whose interval excludes 0."""
    values = [int(v) for v in (*edges.critical_until, *edges.safe_from) if v is not None]
    if not values:
        return False
    near = changes[(changes.start >= min(values)) & (changes.start <= max(values))]
    return bool(near.differs.any())


def pairs_of(count: int, against: str) -> list[tuple[int, int]]:
    """(index compared with, index) for every sweep after the first."""
    return [(i - 1 if against == "previous" else 0, i) for i in range(1, count)]


def check_inputs(views, against: str) -> None:
    if len(views) < 2:
        raise bad_value("sweeps", "at least two sweep folders or names", [str(v.folder)
                                                                           for v in views])
    folders = [str(v.folder.resolve()) for v in views]
    if len(set(folders)) < len(folders):
        raise bad_value("sweeps", "different sweep folders (each given once)",
                        [str(v.folder) for v in views])
    if against not in AGAINST:
        raise bad_value("against", f"one of {', '.join(AGAINST)}", against)
    for view in views:
        if not comparable(view.layout):
            raise SweepError(
                f"compare reads sweeps of deficit windows (a curve per deficit length over "
                f"window starts, one deficit); sweep {view.name!r} is {view.design_summary}"
                + (" with deficit variants" if view.layout.variant_axis else "")
                + ": read its table or plan instead")


def comparable(layout: Layout) -> bool:
    """Window designs: plannable, a curve per length over starts, no deficit variants."""
    return (layout.plannable and layout.per_length and layout.axis == "start"
            and not layout.variant_axis)


def compare_sweeps(views, *, tolerance: float | None = None, confidence: float | None = None,
                   length: int | None = None, against: str = "previous") -> Comparison:
    """Compare finished sweeps (:class:`periodscan.api.SweepView`, in ladder order).

    ``tolerance`` and ``confidence`` default to the first sweep's and apply to every sweep's
    verdicts; ``length`` keeps one deficit length (default: every length all sweeps measured);
    ``against`` compares each sweep with the one before it ("previous") or the first ("first").
    """
    check_inputs(views, against)
    tolerance = views[0].tolerance if tolerance is None else tolerance
    confidence = views[0].confidence if confidence is None else confidence
    check_question(1, tolerance, confidence, None)
    labels = unique_labels(views)
    tables = {label: view.table(tolerance, confidence, with_mcnemar=False)
              for label, view in zip(labels, views, strict=True)}
    lengths = common_lengths(tables, length)
    layout = views[0].layout
    curves = curves_frame(tables, lengths, layout)
    damages = [paired_damage(view.runs) for view in views]
    pairings, rows = [], []
    for i, j in pairs_of(len(views), against):
        pair = pairing(views[i], views[j], labels[i], labels[j])
        pairings.append(pair)
        both = curves[curves.sweep.isin([labels[i], labels[j]])]
        windows = [(s, n) for n in lengths for s in shared_starts(both, n)]
        floor = max(resolution(views[i].runs), resolution(views[j].runs))
        rows += window_differences(damages[i], damages[j], pair, windows, confidence, floor)
    differences = pd.DataFrame(rows, columns=DIFFERENCE_COLUMNS)
    differences["x"] = [layout.x_value(s, n) for s, n in
                        zip(differences.start, differences.length, strict=True)]
    edges, edge_moves = edges_frame(curves, lengths)
    changes = verdict_changes(curves, differences)
    edge_moves["backed"] = [backed(edges[edges.length == n], changes[changes.length == n])
                            for n in edge_moves.length]
    first = training_of(views[0])
    rungs = [rung_of(view, label, first) for view, label in zip(views, labels, strict=True)]
    return Comparison(rungs, float(tolerance), float(confidence), against, lengths, layout,
                      pairings, curves, differences, edges, edge_moves, changes)
