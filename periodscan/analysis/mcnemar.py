"""McNemar's test between a window run and its baseline on the shared test set.

Both models of one seed are evaluated on the same held-out examples, so the per-example
correctness vectors are paired. Only the discordant examples carry information: ``b`` (baseline
right, window run wrong) and ``c`` (baseline wrong, window run right). With few discordant
examples the exact binomial test is used, otherwise the chi-square statistic with continuity
correction; both as in ``statsmodels.stats.contingency_tables.mcnemar``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from periodscan.errors import DataError

#: Below this many discordant examples the exact binomial test is used (common practice).
EXACT_BELOW = 25


@dataclass(frozen=True)
class McNemar:
    """Counts of the paired 2x2 table's off-diagonal cells and the test result."""

    b: int  # baseline correct, window run wrong
    c: int  # baseline wrong, window run correct
    statistic: float
    pvalue: float
    method: str  # "exact" or "chi2"


def mcnemar_counts(b: int, c: int, exact: bool | None = None) -> McNemar:
    """McNemar's test from the discordant counts.

    ``exact=None`` chooses: exact binomial when ``b + c < EXACT_BELOW``, else chi-square with
    continuity correction. The exact statistic is ``min(b, c)`` and the p-value
    ``min(1, 2 * Binom(b + c, 1/2).cdf(min(b, c)))``; the chi-square statistic is
    ``(|b - c| - 1)^2 / (b + c)`` on one degree of freedom.
    """
    b, c = int(b), int(c)
    n = b + c
    if exact is None:
        exact = n < EXACT_BELOW
    if n == 0:
        return McNemar(b, c, 0.0, 1.0, "exact" if exact else "chi2")
    if exact:
        low = min(b, c)
        return McNemar(b, c, float(low), float(min(1.0, 2 * stats.binom.cdf(low, n, 0.5))),
                       "exact")
    statistic = (abs(b - c) - 1.0) ** 2 / n
    return McNemar(b, c, statistic, float(stats.chi2.sf(statistic, 1)), "chi2")


def mcnemar_test(baseline_correct, run_correct, exact: bool | None = None) -> McNemar:
    """McNemar's test from two boolean correctness vectors over the same test examples."""
    base = np.asarray(baseline_correct, dtype=bool)
    run = np.asarray(run_correct, dtype=bool)
    if base.shape != run.shape:
        raise DataError(f"correctness vectors differ in length: baseline {base.shape}, "
                        f"run {run.shape}; both must cover the same test set")
    b = int(np.sum(base & ~run))
    c = int(np.sum(~base & run))
    return mcnemar_counts(b, c, exact)


def unpack_correct(blob: bytes, n_test: int) -> np.ndarray:
    """Inverse of the ledger's ``np.packbits`` storage: a boolean vector of length ``n_test``."""
    return np.unpackbits(np.frombuffer(blob, dtype=np.uint8))[:n_test].astype(bool)


def mcnemar_frame(runs: pd.DataFrame,
                  correctness: Callable[[str], tuple[bytes, int] | None]) -> pd.DataFrame:
    """One McNemar test per finished window run against its baseline (same seed and end).

    ``correctness`` is ``Ledger.correctness``: run id -> (packed bits, n_test) or None. Runs
    whose vectors are missing are left out (their rows would have no counts to test).
    """
    done = runs[runs.status.isin(["done", "diverged"])]
    base = done[done.is_baseline == 1].set_index(["seed", "end_epoch"]).run_id
    rows = []
    for row in done[done.is_baseline == 0].itertuples():
        base_id = base.get((row.seed, row.end_epoch))
        if base_id is None:
            continue
        got_run, got_base = correctness(row.run_id), correctness(base_id)
        if got_run is None or got_base is None:
            continue
        result = mcnemar_test(unpack_correct(*got_base), unpack_correct(*got_run))
        rows.append({"run_id": row.run_id, "seed": int(row.seed), "start": int(row.start_epoch),
                     "length": int(row.length), "end": int(row.end_epoch), "b": result.b,
                     "c": result.c, "statistic": result.statistic, "pvalue": result.pvalue,
                     "method": result.method})
    columns = ["run_id", "seed", "start", "length", "end", "b", "c", "statistic", "pvalue",
               "method"]
    return pd.DataFrame(rows, columns=columns)


def summarize_mcnemar(tests: pd.DataFrame, alpha: float) -> pd.DataFrame:
    """Per (start, length): seeds tested, seeds whose run differs from its baseline at ``alpha``
    (unadjusted), and the smallest p-value."""
    columns = ["start", "length", "mcnemar_tested", "mcnemar_differ", "mcnemar_min_p"]
    if tests.empty:
        return pd.DataFrame(columns=columns)
    grouped = tests.groupby(["start", "length"])
    out = grouped.pvalue.agg(
        mcnemar_tested="size",
        mcnemar_differ=lambda p: int((p <= alpha).sum()),
        mcnemar_min_p="min").reset_index()
    return out[columns]
