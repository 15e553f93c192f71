"""Every statistic against its reference: scipy.stats, statsmodels, and published examples."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats
from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar
from statsmodels.stats.multitest import multipletests

from periodscan.analysis.chance import at_chance, chance_pvalues
from periodscan.analysis.mcnemar import (
    EXACT_BELOW,
    mcnemar_counts,
    mcnemar_frame,
    mcnemar_test,
    unpack_correct,
)
from periodscan.analysis.sensitivity import TableOptions, sensitivity_table
from periodscan.analysis.stats import (
    BOOTSTRAP_MIN_SEEDS,
    bootstrap_interval,
    damage_interval,
    holm,
    holm_levels,
    seeds_to_settle,
    t_interval,
    t_test_vs,
)
from periodscan.analysis.verdicts import add_verdicts

# Student's sleep data (Cushny & Peebles 1905, as analysed by "Student" 1908): extra hours of
# sleep of ten patients under two drugs. Values recalled from memory (they are R's `sleep`).
SLEEP_1 = np.array([0.7, -1.6, -0.2, -1.2, -0.1, 3.4, 3.7, 0.8, 0.0, 2.0])
SLEEP_2 = np.array([1.9, 0.8, 1.1, 0.1, -0.1, 4.4, 5.5, 1.6, 4.6, 3.4])

# Fixed per-seed accuracies of a baseline and a window run (fractions), five seeds.
BASE = np.array([0.936, 0.921, 0.944, 0.930, 0.939])
RUN = np.array([0.905, 0.910, 0.917, 0.899, 0.921])


@pytest.mark.parametrize("confidence", [0.9, 0.95, 0.99])
def test_t_interval_matches_scipy_ttest_rel(confidence):
    # Reference: scipy.stats.ttest_rel(...).confidence_interval (paired t interval).
    damage = (BASE - RUN) * 100
    ours = t_interval(damage, confidence)
    ref = stats.ttest_rel(BASE * 100, RUN * 100).confidence_interval(confidence)
    assert ours.mean == pytest.approx(np.mean(damage), abs=1e-12)
    assert (ours.low, ours.high) == pytest.approx((ref.low, ref.high), abs=1e-10)
    # Reference: scipy.stats.t.interval with the standard error of the mean.
    alt = stats.t.interval(confidence, len(damage) - 1, loc=damage.mean(),
                           scale=stats.sem(damage))
    assert (ours.low, ours.high) == pytest.approx(alt, abs=1e-10)
    assert ours.method == "t" and ours.n == 5


def test_t_interval_on_students_sleep_data():
    # Published result (recalled from memory: R's t.test(extra ~ group, sleep, paired = TRUE)):
    # mean difference 1.58 hours, t = 4.0621, 95% CI 0.7001 to 2.4599.
    diff = SLEEP_2 - SLEEP_1
    ours = t_interval(diff, 0.95)
    assert ours.mean == pytest.approx(1.58, abs=1e-12)
    assert (ours.low, ours.high) == pytest.approx((0.7001142, 2.4598858), abs=1e-6)
    assert t_test_vs(diff, 0.0).statistic == pytest.approx(4.0621, abs=1e-4)


def test_t_interval_small_samples_and_floor():
    assert math.isnan(t_interval([], 0.95).mean)
    one = t_interval([1.5], 0.95)
    assert one.n == 1 and math.isnan(one.low) and math.isnan(one.high)
    flat = t_interval([0.5, 0.5, 0.5], 0.95)
    assert flat.low == flat.high == 0.5
    floored = t_interval([0.5, 0.5, 0.5], 0.95, sd_floor=0.2)
    half = stats.t.ppf(0.975, 2) * 0.2 / math.sqrt(3)  # Student-t half width, sd = floor
    assert (floored.low, floored.high) == pytest.approx((0.5 - half, 0.5 + half))
    assert floored.method == "t, sd floor"


def test_rounding_sized_spread_counts_as_no_spread():
    # Three seeds that each lost 3 of 1,000 test examples, computed the way the table does
    # (baseline minus window accuracy, in points): equal damages whose float spread is ~6e-15.
    correct = np.array([956, 873, 940])
    damage = (correct / 1000 - (correct - 3) / 1000) * 100
    assert 0 < damage.std(ddof=1) < 1e-9
    floored = t_interval(damage, 0.95, sd_floor=0.1)
    half = stats.t.ppf(0.975, 2) * 0.1 / math.sqrt(3)  # Student-t half width, sd = floor
    assert floored.method == "t, sd floor"
    assert floored.high - floored.low == pytest.approx(2 * half)
    # Without the floor a rounding-sized spread would make the test against a tolerance of
    # 0.5 points "certain" (p ~ 0); with it, the p-value is the floored t test's.
    test = t_test_vs(damage, 0.5, sd_floor=0.1)
    ref = stats.ttest_1samp([0.3 - 0.1, 0.3, 0.3 + 0.1], 0.5)  # same mean 0.3, sd 0.1
    assert test.pvalue == pytest.approx(ref.pvalue)
    assert bootstrap_interval(damage, 0.95).method == "t"


@pytest.mark.parametrize("method", ["BCa", "percentile"])
def test_bootstrap_interval_matches_scipy_bootstrap(method):
    # Reference: scipy.stats.bootstrap on the same sample, statistic and seed.
    diff = SLEEP_2 - SLEEP_1
    ours = bootstrap_interval(diff, 0.95, method=method, seed=3)
    ref = stats.bootstrap((diff,), np.mean, confidence_level=0.95, method=method, rng=3)
    assert (ours.low, ours.high) == pytest.approx(tuple(ref.confidence_interval), abs=1e-12)
    # Reference: scipy's paired form on the two samples; a different resampling stream, so with
    # 10^5 resamples both agree up to Monte Carlo error (0.05 h on an interval 1.8 h wide; our
    # tolerance).
    big = 100_000
    ours = bootstrap_interval(diff, 0.95, method=method, n_resamples=big, seed=3)
    paired = stats.bootstrap((SLEEP_2, SLEEP_1), lambda a, b, axis=-1: np.mean(a - b, axis=axis),
                             paired=True, vectorized=True, confidence_level=0.95, method=method,
                             n_resamples=big, rng=11)
    assert ours.low == pytest.approx(paired.confidence_interval.low, abs=0.05)
    assert ours.high == pytest.approx(paired.confidence_interval.high, abs=0.05)


def test_damage_interval_switches_to_bootstrap_at_threshold():
    rng = np.random.default_rng(5)
    few = rng.normal(1.0, 0.5, BOOTSTRAP_MIN_SEEDS - 1)
    many = rng.normal(1.0, 0.5, BOOTSTRAP_MIN_SEEDS)
    assert damage_interval(few).method == "t"
    assert damage_interval(many).method == "BCa bootstrap"
    # A degenerate sample cannot be bootstrapped (scipy returns NaN): fall back to t.
    assert damage_interval(np.ones(12)).method == "t"


def test_t_test_vs_matches_scipy_ttest_1samp_and_ttest_rel():
    damage = (BASE - RUN) * 100
    for tau in (0.0, 0.5, 2.0, 4.0):
        ours = t_test_vs(damage, tau)
        ref = stats.ttest_1samp(damage, tau)  # reference: scipy one-sample t test
        assert ours.statistic == pytest.approx(ref.statistic, rel=1e-10)
        assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-10)
        # Same test as scipy's paired test with the tolerance added to the run's accuracy.
        rel = stats.ttest_rel(BASE * 100, RUN * 100 + tau)
        assert ours.pvalue == pytest.approx(rel.pvalue, rel=1e-9)
    assert math.isnan(t_test_vs([1.0], 0.5).pvalue)


@pytest.mark.parametrize("pvalues", [
    [0.01, 0.04, 0.03, 0.005],
    [0.2, 0.01, 0.01, 0.5, 0.04, 0.0001],
    [0.9, 0.8, 0.95],
    [0.001],
])
def test_holm_matches_statsmodels_multipletests(pvalues):
    # Reference: statsmodels.stats.multitest.multipletests(method="holm").
    reject, adjusted, _, _ = multipletests(pvalues, alpha=0.05, method="holm")
    ours = holm(pvalues)
    assert ours == pytest.approx(adjusted, abs=1e-12)
    assert list(ours <= 0.05) == list(reject)


def test_holm_ignores_missing_pvalues():
    p = [0.01, np.nan, 0.04, 0.03]
    ours = holm(p)
    ref = multipletests([0.01, 0.04, 0.03], method="holm")[1]
    assert math.isnan(ours[1])
    assert ours[[0, 2, 3]] == pytest.approx(ref, abs=1e-12)


def test_holm_levels_match_step_down_bounds():
    # Holm compares the k-th smallest p with alpha / (m - k + 1) (Holm 1979); a two-sided t
    # interval at 1 - that level excludes the reference exactly when p <= level (scipy check).
    samples = [np.array([2.1, 2.9, 3.4, 2.2]), np.array([0.4, 1.9, 1.1, 0.2]),
               np.array([-0.3, 0.8, 0.1, 0.4])]
    tau = 0.5
    p = np.array([stats.ttest_1samp(s, tau).pvalue for s in samples])
    levels = holm_levels(p, 0.05)
    assert sorted(levels) == pytest.approx([0.05 / 3, 0.05 / 2, 0.05])
    for sample, pv, level in zip(samples, p, levels, strict=True):
        ci = stats.ttest_1samp(sample, tau).confidence_interval(1 - level)
        excluded = ci.low > tau or ci.high < tau
        assert excluded == (pv <= level)


def test_seeds_to_settle_is_the_first_n_whose_bound_clears():
    mean, sd, n, tau, level = 1.3, 0.9, 3, 0.5, 0.05 / 4
    extra = seeds_to_settle(mean, sd, n, tau, level)
    total = n + int(extra)

    def clears(k):  # reference: scipy.stats.t.interval at the same level and spread
        low, high = stats.t.interval(1 - level, k - 1, loc=mean, scale=sd / math.sqrt(k))
        return low > tau or high < tau

    assert clears(total) and not clears(total - 1)
    assert seeds_to_settle(0.5, 1.0, 4, 0.5, 0.05) == math.inf  # mean on the tolerance
    assert seeds_to_settle(0.51, 5.0, 4, 0.5, 0.05, cap=50) == math.inf
    assert math.isnan(seeds_to_settle(1.0, math.nan, 1, 0.5, 0.05))


# --- McNemar ------------------------------------------------------------------------------

COUNTS = [(0, 0), (0, 3), (4, 9), (12, 12), (7, 17), (30, 12), (150, 86), (1, 60)]


@pytest.mark.parametrize("b, c, exact", [(b, c, e) for b, c in COUNTS for e in (True, False)
                                         if b + c > 0 or e])
def test_mcnemar_matches_statsmodels(b, c, exact):
    # Reference: statsmodels.stats.contingency_tables.mcnemar(table, exact, correction=True).
    table = [[50, b], [c, 40]]
    ref = sm_mcnemar(table, exact=exact, correction=True)
    ours = mcnemar_counts(b, c, exact=exact)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-10, abs=1e-300)


def test_mcnemar_without_discordant_pairs_finds_no_difference():
    # statsmodels' chi-square divides by b + c = 0 here; with no discordant example there is no
    # evidence of a difference, so p = 1 (common practice).
    assert mcnemar_counts(0, 0, exact=False).pvalue == 1.0
    assert mcnemar_counts(0, 0).pvalue == 1.0


def test_mcnemar_published_example():
    # Agresti, Categorical Data Analysis (2nd ed.), presidential approval in two surveys:
    # discordant counts 150 and 86, McNemar z^2 = 17.36 without continuity correction
    # (recalled from memory). With the correction: (|150 - 86| - 1)^2 / 236 = 16.818.
    ours = mcnemar_counts(150, 86, exact=False)
    assert ours.statistic == pytest.approx(63 ** 2 / 236, rel=1e-12)
    assert (150 - 86) ** 2 / 236 == pytest.approx(17.36, abs=0.01)
    ref = sm_mcnemar([[794, 150], [86, 570]], exact=False, correction=False)
    assert ref.statistic == pytest.approx(17.36, abs=0.01)


def test_mcnemar_auto_choice_and_vectors():
    assert mcnemar_counts(3, EXACT_BELOW - 4).method == "exact"
    assert mcnemar_counts(3, EXACT_BELOW - 3).method == "chi2"
    rng = np.random.default_rng(0)
    base = rng.random(300) < 0.8
    run = base.copy()
    flip = rng.choice(300, 30, replace=False)
    run[flip] = ~run[flip]
    ours = mcnemar_test(base, run)
    table = pd.crosstab(base, run).reindex(index=[True, False], columns=[True, False]).to_numpy()
    ref = sm_mcnemar(table, exact=ours.method == "exact", correction=True)
    assert (ours.b, ours.c) == (table[0, 1], table[1, 0])
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-10)


def test_unpack_round_trips_packbits_and_frame_pairs_by_seed():
    rng = np.random.default_rng(1)
    vectors = {rid: rng.random(37) < 0.7 for rid in ("s0-base", "s0-win", "s1-base", "s1-win")}
    blobs = {rid: (np.packbits(v).tobytes(), 37) for rid, v in vectors.items()}
    assert np.array_equal(unpack_correct(*blobs["s0-win"]), vectors["s0-win"])
    runs = pd.DataFrame({
        "run_id": ["s0-base", "s0-win", "s1-base", "s1-win"], "seed": [0, 0, 1, 1],
        "start_epoch": [0, 2, 0, 2], "length": [0, 3, 0, 3], "end_epoch": 8,
        "is_baseline": [1, 0, 1, 0], "status": "done"})
    frame = mcnemar_frame(runs, blobs.get)
    assert list(frame.seed) == [0, 1]
    for row in frame.itertuples():
        ref = mcnemar_test(vectors[f"s{row.seed}-base"], vectors[f"s{row.seed}-win"])
        assert (row.b, row.c, row.pvalue) == (ref.b, ref.c, ref.pvalue)


# --- verdicts and the table ------------------------------------------------------------------

def _damages():
    return {
        (0, 5): np.array([3.1, 2.6, 3.8, 2.9, 3.3]),     # well above a 0.5 tolerance
        (5, 5): np.array([1.9, -0.2, 2.5, 0.1, 3.0]),    # above on average, too noisy
        (10, 5): np.array([0.0, 0.1, -0.1, 0.05, 0.0]),  # well below
        (15, 5): np.array([0.2, -3.0, 2.4, -2.6, 1.5]),  # mean below, huge spread
        (20, 5): np.array([0.1]),                        # one seed
    }


def _table(damages):
    rows = [{"start": s, "length": n, "damage": float(np.mean(v)), "seeds": len(v)}
            for (s, n), v in damages.items()]
    return pd.DataFrame(rows)


def test_verdicts_follow_holm_and_direction():
    damages, tau, conf = _damages(), 0.5, 0.95
    table = add_verdicts(_table(damages), damages, tau, conf)
    verdict = dict(zip(table.start, table.verdict, strict=True))
    assert verdict == {0: "critical", 5: "undetermined", 10: "safe", 15: "undetermined",
                       20: "undetermined"}
    # Reference: multipletests(method="holm") on scipy's one-sample t test p-values.
    tested = [k for k in damages if len(damages[k]) > 1]
    p = [stats.ttest_1samp(damages[k], tau).pvalue for k in tested]
    reject = multipletests(p, alpha=1 - conf, method="holm")[0]
    for key, rej in zip(tested, reject, strict=True):
        row = table[table.start == key[0]].iloc[0]
        assert (row.verdict != "undetermined") == rej
        if row.verdict == "critical":
            assert row.holm_low > tau
        if row.verdict == "safe":
            assert row.holm_high < tau
    # Never safe because the interval is wide: start 15 has a mean below tau.
    assert table.loc[table.start == 15, "damage"].iloc[0] < tau
    assert table.loc[table.start == 15, "more_seeds"].iloc[0] > 0
    assert math.isnan(table.loc[table.start == 20, "p_value"].iloc[0])


def test_family_size_pads_holm_with_unmeasured_windows():
    # A design that measured 4 of 12 candidate starts: Holm over 12 hypotheses, the 8
    # unmeasured ones entering with p = 1. Reference: multipletests(method="holm") on the
    # padded vector.
    damages = {k: v for k, v in _damages().items() if len(v) > 1}
    table = add_verdicts(_table(damages), damages, 0.5, 0.95, family_size=12)
    p = [stats.ttest_1samp(v, 0.5).pvalue for v in damages.values()] + [1.0] * 8
    reject, adjusted, _, _ = multipletests(p, alpha=0.05, method="holm")
    assert list(table.p_holm) == pytest.approx(list(adjusted[:4]))
    assert list(table.verdict != "undetermined") == list(reject[:4])
    # Padding can only make the verdicts more cautious than the unpadded family's.
    unpadded = add_verdicts(_table(damages), damages, 0.5, 0.95)
    assert ((table.verdict == "undetermined") | (table.verdict == unpadded.verdict)).all()


def test_families_are_separate_per_length():
    damages = {(0, 3): np.array([1.0, 1.3, 0.8]), (0, 6): np.array([1.0, 1.3, 0.8]),
               (4, 6): np.array([0.9, 1.2, 1.1])}
    table = add_verdicts(_table(damages), damages, 0.0, 0.95)
    p_alone = stats.ttest_1samp(damages[(0, 3)], 0.0).pvalue
    assert table.p_holm.iloc[0] == pytest.approx(p_alone)  # a family of one: no adjustment
    pooled = add_verdicts(_table(damages), damages, 0.0, 0.95, family="all")
    ref = multipletests([stats.ttest_1samp(v, 0.0).pvalue for v in damages.values()],
                        method="holm")[1]
    assert list(pooled.p_holm) == pytest.approx(list(ref))


def _runs():
    """Fixed outcomes of 3 seeds: one diverged window run, one failed, one without baseline."""
    rows = []
    accs = {0: 0.90, 1: 0.91, 2: 0.92}
    for seed, acc in accs.items():
        rows.append(("base", seed, 0, 0, 1, "done" if seed < 2 else "failed",
                     acc if seed < 2 else None))
        rows.append(("w0", seed, 0, 3, 0, "diverged" if seed == 1 else "done",
                     0.10 if seed == 1 else acc - 0.05))
        rows.append(("w4", seed, 4, 3, 0, "failed" if seed == 0 else "done",
                     None if seed == 0 else acc - 0.01))
    frame = pd.DataFrame(rows, columns=["kind", "seed", "start_epoch", "length", "is_baseline",
                                        "status", "test_acc"])
    frame["run_id"] = frame.kind + frame.seed.astype(str)
    frame["end_epoch"] = 10
    frame["n_test"] = 1000
    return frame


def test_table_counts_diverged_failed_and_unpaired_runs():
    table = sensitivity_table(_runs(), 10, TableOptions(confidence=0.95, tolerance=0.5))
    w0 = table[table.start == 0].iloc[0]
    w4 = table[table.start == 4].iloc[0]
    # Window 0: seeds 0 (done) and 1 (diverged, counted) are paired; seed 2 lacks a baseline.
    assert w0.seeds == 2 and w0.diverged == 1 and w0.no_baseline == 1
    assert w0.damage == pytest.approx(np.mean([5.0, 81.0]))
    # Window 4: seed 0 failed (not in the mean), seed 1 paired, seed 2 without baseline.
    assert w4.seeds == 1 and w4.failed == 1 and w4.no_baseline == 1
    assert w4.verdict == "undetermined" and w4.interval == "t"
    assert set(table.columns) >= {"start_frac", "verdict", "p_holm", "more_seeds", "planned"}


def test_table_bootstraps_from_ten_seeds_and_floors_a_zero_spread():
    rng = np.random.default_rng(7)
    seeds = BOOTSTRAP_MIN_SEEDS
    base = 0.9 + rng.integers(-20, 20, seeds) / 1000
    loss = rng.integers(0, 40, seeds) / 1000
    rows = [(f"b{s}", s, 0, 0, 1, base[s]) for s in range(seeds)]
    rows += [(f"w{s}", s, 2, 3, 0, base[s] - loss[s]) for s in range(seeds)]
    rows += [(f"z{s}", s, 5, 3, 0, base[s] - 0.002) for s in range(3)]  # same damage, 3 seeds
    runs = pd.DataFrame(rows, columns=["run_id", "seed", "start_epoch", "length", "is_baseline",
                                       "test_acc"]).assign(end_epoch=10, status="done",
                                                           n_test=1000)
    table = sensitivity_table(runs, 10, TableOptions(confidence=0.95))
    boot = table[table.start == 2].iloc[0]
    # Reference: scipy.stats.bootstrap (BCa) on the per-seed damages, same seed as ours (0).
    damage = (base - (base - loss)) * 100  # as the table computes it, rounding included
    ref = stats.bootstrap((damage,), np.mean, method="BCa", rng=0)
    assert boot.interval == "BCa bootstrap" and boot.seeds == seeds
    assert (boot.damage_low, boot.damage_high) == pytest.approx(
        tuple(ref.confidence_interval), abs=1e-9)
    flat = table[table.start == 5].iloc[0]
    # All three seeds lost exactly 0.2 points: the spread is floored at one test example
    # (100 / n_test = 0.1 points) instead of claiming a zero-width interval.
    half = stats.t.ppf(0.975, 2) * 0.1 / math.sqrt(3)
    assert flat.interval == "t, sd floor"
    assert (flat.damage_low, flat.damage_high) == pytest.approx((0.2 - half, 0.2 + half))


# --- runs at chance level ----------------------------------------------------------------------

@pytest.mark.parametrize("n, classes", [(300, 10), (1000, 10), (50, 2), (97, 7)])
def test_chance_pvalue_matches_scipy_binomtest(n, classes):
    # Reference: scipy.stats.binomtest(k, n, 1 / classes, alternative="greater").pvalue.
    correct = np.arange(0, n + 1, max(1, n // 40))
    ours = chance_pvalues(correct / n, np.full(len(correct), n), classes)
    ref = [stats.binomtest(int(k), n, 1 / classes, alternative="greater").pvalue
           for k in correct]
    assert ours == pytest.approx(ref, rel=1e-9, abs=1e-300)
    assert math.isnan(chance_pvalues([np.nan], [n], classes)[0])
    assert math.isnan(chance_pvalues([0.5], [0], classes)[0])


def test_at_chance_flags_finished_runs_the_test_cannot_tell_from_guessing():
    runs = pd.DataFrame({
        "status": ["done", "done", "done", "diverged", "failed", "done"],
        "test_acc": [0.10, 0.115, 0.14, 0.10, None, 0.11],
        "n_test": [1000, 1000, 1000, 1000, 1000, None]})
    flags = at_chance(runs, 10, 0.95)
    # 100 and 115 of 1000 correct: one-sided p = 0.52 and 0.065 (> 0.05, scipy's binomtest);
    # 140 of 1000: p = 3.6e-5. Diverged and failed runs are not this check's business, and a run
    # without a test-set size cannot be tested.
    assert list(flags) == [True, True, False, False, False, False]
    assert stats.binomtest(115, 1000, 0.1, alternative="greater").pvalue > 0.05
    assert stats.binomtest(140, 1000, 0.1, alternative="greater").pvalue < 0.05
    assert not at_chance(runs, None, 0.95).any()


def test_table_counts_runs_at_chance_with_the_diverged_ones():
    # Three seeds, 10 classes, 1000 test examples. Seed 2's baseline spiked and stayed at
    # chance (10.3%); seed 1's window run ended at chance too (9.8%).
    rows = []
    for seed, base, run in ((0, 0.91, 0.88), (1, 0.90, 0.098), (2, 0.103, 0.87)):
        rows += [(f"b{seed}", seed, 0, 0, 1, base), (f"w{seed}", seed, 2, 3, 0, run)]
    runs = pd.DataFrame(rows, columns=["run_id", "seed", "start_epoch", "length",
                                       "is_baseline", "test_acc"]).assign(
        end_epoch=10, status="done", n_test=1000)
    checked = sensitivity_table(runs, 10, TableOptions(num_classes=10)).iloc[0]
    assert (checked.diverged, checked.baseline_diverged) == (1, 1)
    unchecked = sensitivity_table(runs, 10, TableOptions()).iloc[0]
    assert (unchecked.diverged, unchecked.baseline_diverged) == (0, 0)
    # The flag only counts: the runs stay in the means with the accuracy they ended at.
    for column in ("damage", "damage_low", "damage_high", "baseline_acc", "run_acc"):
        assert checked[column] == unchecked[column]
    assert checked.damage == pytest.approx(np.mean([3.0, 80.2, -76.7]))
