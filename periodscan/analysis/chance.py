"""Is a run's final accuracy distinguishable from guessing?

A run whose loss spiked and never came back keeps a finite loss, so the engine records it as
finished; only its accuracy gives it away. The check is a one-sided exact binomial test of
"accuracy <= 1 / num_classes" on the run's ``n_test`` held-out examples: with ``k`` correct,
``p = P(X >= k)`` for ``X ~ Binomial(n_test, 1 / num_classes)``, which is
``scipy.stats.binomtest(k, n_test, 1 / num_classes, alternative="greater").pvalue``. A run is
*at chance* when that test cannot reject at the table's level (``p > 1 - confidence``).

Guessing the most frequent class can beat ``1 / num_classes`` on an unbalanced test set; the
check then errs on the side of not flagging.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats


def chance_pvalues(acc, n_test, num_classes: int) -> np.ndarray:
    """One-sided binomial p-values of "accuracy <= 1 / num_classes" (NaN where unknown).

    ``acc`` are accuracies as fractions, ``n_test`` the examples each was measured on.
    """
    acc = np.asarray(acc, dtype=float)
    n = np.asarray(n_test, dtype=float)
    known = np.isfinite(acc) & np.isfinite(n) & (n > 0)
    out = np.full(np.broadcast(acc, n).shape, np.nan)
    n_known = np.broadcast_to(n, out.shape)[known].astype(int)
    correct = np.rint(np.broadcast_to(acc, out.shape)[known] * n_known).astype(int)
    # P(X >= k) = sf(k - 1): the upper tail binomtest(..., alternative="greater") reports.
    out[known] = stats.binom.sf(correct - 1, n_known, 1.0 / num_classes)
    return out


def at_chance(runs: pd.DataFrame, num_classes: int | None, confidence: float) -> pd.Series:
    """Per run: finished (status done) with an accuracy the test cannot tell from guessing.

    ``num_classes=None`` turns the check off (every run False). Runs without an accuracy or a
    test-set size are not flagged.
    """
    flags = pd.Series(False, index=runs.index)
    if num_classes is None or runs.empty or "n_test" not in runs:
        return flags
    done = runs.status == "done"
    p = chance_pvalues(runs.test_acc[done], pd.to_numeric(runs.n_test[done], errors="coerce"),
                       int(num_classes))
    flags[done] = np.nan_to_num(p, nan=0.0) > 1.0 - confidence
    return flags
