"""The seed-paired comparison of benchmarks/compare_rounds.py."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

_PATH = Path(__file__).resolve().parents[1] / "benchmarks" / "compare_rounds.py"
_SPEC = importlib.util.spec_from_file_location("compare_rounds", _PATH)
compare_rounds = importlib.util.module_from_spec(_SPEC)
_SPEC.loader.exec_module(compare_rounds)


def _curves(seeds, budgets, cost, full):
    rows = [{"kind": "synthetic", "seed": s, "strategy": st, "budget": b, "system_cost": cost[i, j] + (st == "random"),
             "full": full[i]}
            for i, s in enumerate(seeds) for j, b in enumerate(budgets) for st in ("value", "random")]
    return pd.DataFrame(rows)


def test_paired_difference_matches_scipy_paired_t_test():
    # Reference: scipy.stats.ttest_rel, the paired t-test, whose statistic is the mean
    # per-seed difference over its standard error; the gap is system cost - full-information
    # cost per seed, so a seed's own full cost must cancel in the difference.
    rng = np.random.default_rng(0)
    seeds, budgets = list(range(60, 72)), [10.0, 14.1, 20.0]
    full = rng.uniform(0.1, 0.3, len(seeds))
    before_cost = full[:, None] + rng.uniform(0.0, 0.05, (len(seeds), len(budgets)))
    after_cost = before_cost + rng.normal(-0.005, 0.01, before_cost.shape)
    table = compare_rounds.paired_differences(_curves(seeds, budgets, before_cost, full),
                                              _curves(seeds, budgets, after_cost, full))
    assert list(table.index) == budgets
    for j, budget in enumerate(budgets):
        ref = stats.ttest_rel(after_cost[:, j], before_cost[:, j])
        row = table.loc[budget]
        assert row["difference"] == pytest.approx(np.mean(after_cost[:, j] - before_cost[:, j]))
        assert row["difference"] / row["se"] == pytest.approx(ref.statistic)
        assert row["worse"] == int(np.sum(after_cost[:, j] > before_cost[:, j]))
        assert row["seeds"] == len(seeds)


def test_only_seeds_in_both_files_are_paired_and_bad_input_is_refused(tmp_path):
    rng = np.random.default_rng(1)
    budgets = [1.0, 2.0]
    cost = rng.uniform(0.2, 0.3, (4, 2))
    before = _curves([1, 2, 3, 4], budgets, cost, np.full(4, 0.2))
    after = _curves([3, 4, 5], budgets, np.vstack([cost[2:], [[0.25, 0.25]]]), np.full(3, 0.2))
    table = compare_rounds.paired_differences(before, after)
    assert table["seeds"].tolist() == [2, 2]
    assert np.allclose(table["difference"], 0.0)
    with pytest.raises(ValueError, match="share no"):
        compare_rounds.paired_differences(before, _curves([9], budgets, cost[:1], np.full(1, 0.2)))
    with pytest.raises(ValueError, match="one scenario"):
        compare_rounds.paired_differences(pd.concat([before, before.assign(kind="digits")]), after)
    path = tmp_path / "c.csv"
    before.drop(columns="full").to_csv(path, index=False)
    with pytest.raises(ValueError, match="'full'"):
        compare_rounds.read_curves(path)
