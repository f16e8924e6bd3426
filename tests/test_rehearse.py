"""Rehearsal on the synthetic scenario of routeplan.simulate."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

pytestmark = pytest.mark.slow

from routeplan.rehearse import budget_to_reach, rehearse, system_cost_exact
from sklearn_workspace import invoke


@pytest.fixture(scope="module")
def small():
    return rehearse(n_pool=600, n_eval=1500, n_rounds=2, budget_per_round=4.0, max_epochs=10,
                    strategies=("value", "random"), random_state=3)


def test_no_router_beats_the_bayes_optimal_cost(small):
    # Bayes decision theory: the option of least expected cost per case is a lower bound for any
    # routing evaluated with the same known probabilities (common textbook fact).
    assert (small.curves["system_cost"] >= small.bayes_cost - 1e-12).all()
    assert small.full_information_cost >= small.bayes_cost - 1e-12


def test_spend_never_exceeds_the_budgets(small):
    for _, rows in small.curves.groupby("strategy"):
        assert (rows["spend"].to_numpy() <= 4.0 * rows["round"].to_numpy() + 1e-9).all()
        assert np.all(np.diff(rows["answers"].to_numpy()) > 0)


def test_system_cost_exact_picks_the_routed_entries():
    costs = np.array([[0.1, 0.5], [0.7, 0.2]])
    assert system_cost_exact(costs, np.array([1, 1])) == pytest.approx(0.35)  # (0.5 + 0.2) / 2, arithmetic


def test_budget_to_reach():
    curves = pd.DataFrame({"strategy": ["a", "a", "b"], "spend": [5.0, 10.0, 5.0], "system_cost": [0.3, 0.2, 0.4]})
    assert budget_to_reach(curves, 0.25) == {"a": 10.0, "b": float("inf")}


def test_cli_rehearse_json_and_plot(tmp_path):
    png = tmp_path / "curves.png"
    result = invoke(tmp_path, "rehearse", "--rounds", "1", "--budget", "3", "--cases", "300",
                    "--strategies", "random", "--plot", str(png), "--json")
    data = json.loads(result.stdout)
    assert [row["strategy"] for row in data["curves"]] == ["random"]
    assert png.read_bytes()[:4] == b"\x89PNG"


def test_cli_rehearse_refuses_unknown_strategy(tmp_path):
    from click.testing import CliRunner
    from routeplan.cli import cli

    result = CliRunner().invoke(cli, ["rehearse", "--strategies", "psychic"])
    assert result.exit_code == 2 and "psychic" in result.stderr
