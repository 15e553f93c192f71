"""benchmarks/edge_shares.py's arithmetic: Holm's step levels and the smallest share of alpha
with which a look of the sequential test crosses."""

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
from statsmodels.stats.multitest import multipletests

from periodscan.analysis.sequential import Stages
from periodscan.analysis.verdicts import CRITICAL, SAFE, UNDETERMINED

SCRIPT = Path(__file__).resolve().parent.parent / "benchmarks" / "edge_shares.py"


@pytest.fixture(scope="module")
def edge_shares():
    sys.path.insert(0, str(SCRIPT.parent))
    try:
        spec = importlib.util.spec_from_file_location("edge_shares", SCRIPT)
        module = importlib.util.module_from_spec(spec)
        sys.modules["edge_shares"] = module
        spec.loader.exec_module(module)
        yield module
    finally:
        sys.modules.pop("edge_shares", None)
        sys.path.remove(str(SCRIPT.parent))


def test_holm_step_levels_reject_what_statsmodels_rejects(edge_shares):
    # Holm (1979): reject the i-th smallest p while each one so far is at most alpha/(m-i+1);
    # statsmodels' multipletests(method="holm") is the reference.
    import pandas as pd
    rng = np.random.default_rng(3)
    for _ in range(200):
        m = int(rng.integers(2, 25))
        p = pd.Series(rng.uniform(0, 0.02, m) ** rng.uniform(0.5, 2), index=range(0, 2 * m, 2))
        shares = edge_shares.holm_shares(p)
        order = p.sort_values(kind="stable").index
        rejected, ok = set(), True
        for s in order:
            ok = ok and p[s] <= shares[s]
            if ok:
                rejected.add(s)
        reference = multipletests(p.to_numpy(), alpha=edge_shares.ALPHA, method="holm")[0]
        assert rejected == {s for s, r in zip(p.index, reference, strict=True) if r}


@pytest.mark.parametrize("kind", ["obrien_fleming", "pocock"])
def test_needed_share_is_the_smallest_that_crosses(edge_shares, kind):
    stages = Stages((3, 5, 8, 12, 16), kind)
    rng = np.random.default_rng(7)
    for _ in range(50):
        p = tuple(float(v) for v in 10 ** rng.uniform(-5, -1.5, 5))
        share, look = edge_shares.needed_share(p, stages)
        if look < 0:
            assert all(stages.levels(edge_shares.ALPHA)[k] < p[k] for k in range(5))
            continue
        assert stages.levels(share)[look] == pytest.approx(p[look], rel=1e-6)
        below = stages.levels(share * (1 - 1e-4))
        assert all(below[k] < p[k] for k in range(5))


def test_edges_are_the_last_critical_start_and_the_safe_tail(edge_shares):
    verdicts = {0: CRITICAL, 2: CRITICAL, 4: UNDETERMINED, 6: SAFE, 8: UNDETERMINED,
                10: SAFE, 12: SAFE}
    assert edge_shares.edge_starts(verdicts) == [(2, "critical to"), (10, "safe from")]
    assert edge_shares.edge_starts({0: UNDETERMINED, 2: CRITICAL}) == [(2, "critical to")]
    assert edge_shares.edge_starts({0: SAFE, 2: SAFE}) == [(0, "safe from")]
