"""Rehearsal on the synthetic scenario of routeplan.simulate, and its measuring devices."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy import signal, stats
from sklearn.datasets import load_digits

from routeplan.rehearse import (
    budget_schedule,
    budget_to_reach,
    digits_experts_scenario,
    rehearse,
    stabilized_weights,
    system_cost_exact,
)
from sklearn_workspace import invoke

TINY_ROUTER = {"hidden": (16,), "max_epochs": 8, "patience": 3}


@pytest.fixture(scope="module")
def small():
    return rehearse(n_pool=600, n_eval=1500, budgets=[2.0, 5.0], router_params=TINY_ROUTER, n_folds=2,
                    n_reference_fits=1, strategies=("value", "random"), random_state=3)


@pytest.mark.slow
def test_bayes_cost_is_the_deferral_bayes_rule_on_the_held_out_cases(small):
    # Bayes rule of learning to defer with fees (Mozannar & Sontag, ICML 2020; Verma,
    # Barrejon & Nalisnick, AISTATS 2023), written out here from the scenario's known
    # probabilities with 0/1 costs: the model's option k costs 1 - P(k | x); expert j costs
    # 1 - P(j right | x) plus its fee (a wrong answer is an error). The rehearsal's yardstick
    # must be the mean over the held-out cases (the scenario's cases after the pool) of the
    # least of these.
    from routeplan.simulate import make_scenario

    scn = make_scenario(600 + 1500, random_state=3)
    held = np.arange(600, 2100)
    options = np.hstack([1.0 - scn.proba[held], 1.0 - scn.correct_proba[held] + scn.fees])
    assert small.bayes_cost == pytest.approx(options.min(axis=1).mean(), rel=1e-12)
    # ... and no rehearsed router, nor the full-information one, is below it
    assert (small.curves["system_cost"] >= small.bayes_cost - 1e-12).all()
    assert small.bayes_cost < small.full_information_cost


@pytest.mark.slow
def test_spend_never_exceeds_the_cumulative_budgets(small):
    # The schedule is cumulative: after round t the fees paid add up to at most budgets[t] (definition).
    for _, rows in small.curves.groupby("strategy"):
        assert (rows["spend"].to_numpy() <= np.array([2.0, 5.0]) + 1e-9).all()
        assert np.all(np.diff(rows["answers"].to_numpy()) > 0)


def test_system_cost_exact_picks_the_routed_entries():
    costs = np.array([[0.1, 0.5], [0.7, 0.2]])
    assert system_cost_exact(costs, np.array([1, 1])) == pytest.approx(0.35)  # (0.5 + 0.2) / 2, arithmetic


def test_budget_to_reach_first_and_sustained():
    # Hand-made curve: "a" dips under 0.25 at 10, comes back above at 20, stays under from 40.
    curves = pd.DataFrame({"strategy": ["a"] * 4 + ["b"], "spend": [5.0, 10.0, 20.0, 40.0, 5.0],
                           "system_cost": [0.3, 0.2, 0.3, 0.2, 0.4]})
    assert budget_to_reach(curves, 0.25) == {"a": 10.0, "b": float("inf")}
    assert budget_to_reach(curves, 0.25, sustained=True) == {"a": 40.0, "b": float("inf")}


def test_budget_schedule_is_geometric():
    # Geometric progression (definition): constant ratio, given end points.
    steps = np.array(budget_schedule(2.0, 128.0, 7))
    assert steps[0] == pytest.approx(2.0) and steps[-1] == pytest.approx(128.0)
    assert np.allclose(steps[1:] / steps[:-1], 2.0)
    assert budget_schedule(3.0, 5.0, 1) == [5.0]
    with pytest.raises(ValueError):
        budget_schedule(5.0, 3.0, 4)


def test_digits_scenario_pools_scikit_learn_digits():
    # scikit-learn's bundled digits (1797 images of 8x8): a 4x4 feature is the mean of a 2x2 block,
    # computed here by another route (scipy.signal.convolve2d with a 2x2 box, every second value).
    data = load_digits()
    scn = digits_experts_scenario(random_state=5)
    order = np.random.default_rng(5).permutation(1797)
    assert scn.X.shape == (1797, 16) and np.array_equal(scn.y, data.target[order])
    image = data.images[order[0]] / 16.0
    box = signal.convolve2d(image, np.full((2, 2), 0.25), mode="valid")[::2, ::2]
    assert np.allclose(scn.X[0], box.ravel(), atol=1e-6)


@pytest.mark.slow
def test_digits_experts_follow_the_published_protocol():
    # Mozannar & Sontag (ICML 2020, section 7): the expert is always right on its classes and
    # answers uniformly at random over all 10 classes elsewhere. Pearson's chi-square test
    # (scipy.stats.chisquare) against the uniform law on the other classes' answers.
    scn = digits_experts_scenario(subsets=((0, 1, 2),), fees=(0.1,), random_state=0)
    answers = np.concatenate([scn.answers(seed)[:, 0] for seed in range(20)])
    y = np.tile(scn.y, 20)
    mine = y <= 2
    assert np.all(answers[mine] == y[mine])
    counts = np.bincount(answers[~mine], minlength=10)
    assert stats.chisquare(counts).pvalue > 1e-3
    assert abs(np.mean(answers[~mine] == y[~mine]) - 0.1) < 0.01  # right 1 time in 10 by chance


def test_stabilized_weights_hand_example():
    # One region, two strata of 100 cases sampled at 0.2 and 0.05: the region's mean chance is
    # 0.125, so the weights are 0.125 / 0.2 = 0.625 and 0.125 / 0.05 = 2.5 (already mean 1 over
    # the 20 + 5 answers), and the weighted strata shares equal the population's, 1/2 each
    # (stabilized weights, Robins, Hernan & Brumback, Epidemiology 2000; hand computation).
    region = np.zeros(200, dtype=int)
    stratum = np.repeat([0, 1], 100)
    design = np.array([[[0.2, 0.05]]])
    answered = np.zeros((200, 1), dtype=bool)
    answered[:20, 0] = True
    answered[100:105, 0] = True
    w = stabilized_weights([design], region, stratum, answered)[:, 0]
    assert np.allclose(w[:20], 0.625) and np.allclose(w[100:105], 2.5)
    assert np.isnan(w[~answered[:, 0]]).all()
    assert w[:20].sum() == pytest.approx(w[100:105].sum())


def test_stabilized_weights_sum_rounds_and_ignore_the_region():
    # Two rounds, balance heuristic (Veach & Guibas, SIGGRAPH 1995): chances add up over rounds;
    # a design that differs only between regions needs no correction, so every weight is 1.
    region = np.repeat([0, 1], 50)
    stratum = np.tile([0, 1], 50)
    first = np.array([[[0.1, 0.1], [0.4, 0.4]]])
    second = np.array([[[0.3, 0.3], [0.0, 0.0]]])
    answered = np.ones((100, 1), dtype=bool)
    assert np.allclose(stabilized_weights([first, second], region, stratum, answered), 1.0)
    uneven = np.array([[[0.3, 0.1], [0.2, 0.2]]])
    w = stabilized_weights([first, uneven], region, stratum, answered)[:, 0]
    # region 0: chances 0.4 and 0.2, mean 0.3 -> 0.75 and 1.5 before scaling to mean 1 (mean 1.0625)
    assert w[0] / w[1] == pytest.approx(0.75 / 1.5)


@pytest.mark.slow
def test_cli_rehearse_json_and_plot(tmp_path):
    png = tmp_path / "curves.png"
    result = invoke(tmp_path, "rehearse", "--rounds", "1", "--budget", "3", "--cases", "300",
                    "--strategies", "random", "--weighting", "recorded", "--plot", str(png), "--json")
    data = json.loads(result.stdout)
    assert [row["strategy"] for row in data["curves"]] == ["random"]
    assert data["settings"]["weighting"] == "recorded"
    assert 0.0 < data["bayes_cost"] < data["full_information_cost"]
    assert png.read_bytes()[:4] == b"\x89PNG"


def test_cli_rehearse_refuses_unknown_strategy(tmp_path):
    from click.testing import CliRunner

    from routeplan.cli import cli

    result = CliRunner().invoke(cli, ["rehearse", "--strategies", "psychic"])
    assert result.exit_code == 2 and "psychic" in result.stderr


def test_rehearse_refuses_unknown_weighting():
    with pytest.raises(ValueError, match="weighting"):
        rehearse(n_pool=100, n_eval=100, weighting="magic")


def test_cli_weighting_choices_are_the_library_s():
    # The CLI spells the choices out (it may not import numpy at start-up); they must stay the
    # library's own (common practice: one source of truth for a public option).
    from routeplan.cli import cli
    from routeplan.rehearse import WEIGHTINGS

    option = next(p for p in cli.commands["rehearse"].params if p.name == "weighting")
    assert tuple(option.type.choices) == WEIGHTINGS


# --------------------------------------------------------------------------- own cases, assumed profiles


def test_pool_scenario_follows_the_assumed_profiles():
    # scikit-learn's bundled iris, with two assumed experts: the scenario keeps every case (in a
    # seeded order), its truth model is the one-hot truth, and each expert is right on a case of
    # truth k with the assumed accuracy[j, k]; over 400 draws the share of right answers per
    # (expert, class) stays within 4 binomial standard errors (common practice), and the wrong
    # answers fall on the other classes, each of them seen (the answer rule of routeplan.simulate:
    # a uniformly random other class).
    from sklearn.datasets import load_iris

    from routeplan.rehearse import pool_scenario

    X, y = load_iris(return_X_y=True)
    accuracy = np.array([[0.9, 0.5, 0.2], [0.6, 0.95, 0.7]])
    scn = pool_scenario(X, y, accuracy, [0.1, 0.3], ["ana", "ben"], random_state=1)
    assert scn.names == ("ana", "ben") and scn.n_classes == 3 and scn.n_experts == 2
    assert sorted(map(tuple, scn.X.astype(float).round(4))) == sorted(map(tuple, X.round(4)))
    np.testing.assert_array_equal(scn.proba.argmax(axis=1), scn.y)
    assert np.all(scn.proba.max(axis=1) == 1.0)
    np.testing.assert_allclose(scn.correct_proba, accuracy[:, scn.y].T)
    draws = np.stack([scn.answers(seed) for seed in range(400)])  # (400, n, M)
    right = draws == scn.y[None, :, None]
    for k in range(3):
        n = 400 * int((scn.y == k).sum())
        share = right[:, scn.y == k, :].mean(axis=(0, 1))
        se = np.sqrt(accuracy[:, k] * (1 - accuracy[:, k]) / n)
        assert np.all(np.abs(share - accuracy[:, k]) <= 4 * se + 1e-12)
        for j in range(2):
            answers = draws[:, scn.y == k, j]
            assert set(np.unique(answers[answers != k]).tolist()) == {0, 1, 2} - {k}
    with pytest.raises(ValueError, match="accuracy"):
        pool_scenario(X, y, np.full((1, 3), 1.5), [0.1])


@pytest.fixture(scope="module")
def digits5(tmp_path_factory):
    """scikit-learn's digits as a workspace with the expert oracle_k (fee 0; a few answers)."""
    from sklearn_workspace import digits_workspace

    return digits_workspace(tmp_path_factory.mktemp("profiles"), k=5, n_answers=20)


def _profiles(tmp_path, rows):
    path = tmp_path / "profiles.csv"
    path.write_text("expert,label,accuracy\n" + "".join(f"{r}\n" for r in rows), encoding="utf-8")
    return path


def test_scenario_from_workspace_uses_the_profile_per_case(tmp_path, digits5):
    # The profile of the Mozannar & Sontag expert (ICML 2020, section 7) on the workspace's
    # digits: P(right) is 1 on cases of truth 0-4 and 0.1 elsewhere, case by case; every case
    # with truth is kept, and the fee is in units of one error (error cost 1 here).
    from routeplan.rehearse import scenario_from_workspace
    from routeplan.workspace import Workspace

    path = _profiles(tmp_path, ["oracle_k,,0.1", *[f"oracle_k,{k},1" for k in range(5)]])
    with Workspace.open(digits5) as ws:
        scn = scenario_from_workspace(ws, path, random_state=0)
    assert scn.names == ("oracle_k",) and scn.fees.tolist() == [0.0] and len(scn.y) == 1797
    np.testing.assert_array_equal(scn.correct_proba[:, 0], np.where(scn.y < 5, 1.0, 0.1))
    assert np.bincount(scn.y).tolist() == np.bincount(load_digits().target).tolist()


@pytest.mark.slow
def test_cli_rehearse_on_own_cases_with_assumed_profiles(tmp_path, digits5):
    # The Mozannar & Sontag (ICML 2020, section 7) expert written as a profile: right on digits
    # 0-4, and right 1 time in 10 elsewhere, which the answer rule turns into a uniform guess.
    # The rehearsal uses the workspace's 1,797 digits (300 in the pool, the rest held out), its
    # expert and fee; with the truth as truth model there is no Bayes-optimal yardstick.
    path = _profiles(tmp_path, ["oracle_k,,0.1", *[f"oracle_k,{k},1" for k in range(5)]])
    result = invoke(digits5, "rehearse", "--profiles", path, "--rounds", "1", "--budget", "3",
                    "--cases", "300", "--strategies", "random", "--json")
    data = json.loads(result.stdout)
    assert data["bayes_cost"] is None
    assert data["settings"]["experts"] == ["oracle_k"] and data["settings"]["fees"] == [0.0]
    assert data["settings"]["n_pool"] == 300 and data["settings"]["n_eval"] == 1797 - 300
    assert [row["strategy"] for row in data["curves"]] == ["random"]
    assert 0 <= data["full_information_cost"] < 1


@pytest.mark.parametrize("rows, message", [
    (["nobody,,0.9"], "line 2: unknown expert 'nobody'"),
    (["oracle_k,0,0.9"], "no assumed accuracy for expert 'oracle_k' on label '1'"),
    (["oracle_k,,1.5"], "line 2"),
    (["oracle_k,,0.9", "oracle_k,,0.8"], "line 3: conflicting accuracy for expert 'oracle_k', label '': 0.8 here, 0.9 on line 2"),
])
def test_cli_rehearse_refuses_bad_profiles(tmp_path, digits5, rows, message):
    # Contract of DESIGN.md: bad input -> exit 2, one line naming the file (and line), no traceback.
    from click.testing import CliRunner

    from routeplan.cli import cli

    path = _profiles(tmp_path, rows)
    result = CliRunner().invoke(cli, ["--workspace", str(digits5), "rehearse", "--profiles", str(path)])
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "profiles.csv" in lines[0] and message in lines[0], lines
    assert "Traceback" not in result.stderr


@pytest.mark.slow
def test_rehearsal_router_can_be_the_average_of_plug_in_routers():
    # n_members in the router settings rehearses with an average of plug-in routers (two-stage:
    # one cross-fitted classifier, averaged correctness models);
    # its cost is the exact cost of its routes (system_cost_exact), so it cannot beat Bayes
    # (common textbook fact), and the recorded settings say which router was rehearsed
    from routeplan.learner import EnsembleRouter, PluginRouter
    from routeplan.rehearse import _router

    assert isinstance(_router({**TINY_ROUTER, "n_members": 2}, 0), EnsembleRouter)
    assert isinstance(_router(TINY_ROUTER, 0), PluginRouter)
    result = rehearse(n_pool=600, n_eval=1500, budgets=[2.0, 5.0], router_params={**TINY_ROUTER, "n_members": 2},
                      n_folds=2, n_reference_fits=1, strategies=("random",), random_state=3)
    assert result.settings["router"]["n_members"] == 2
    # the averaged router's costs are exact costs of real routings: above the Bayes cost (a
    # router fitted on a few answers does not reach it) and below 1, the cost of a model
    # that is always wrong
    assert (result.curves["system_cost"] > result.bayes_cost).all()
    assert (result.curves["system_cost"] < 1.0).all()


@pytest.mark.parametrize("args, message", [
    (["--budget", "0.001"], "buys no answer"),
    (["--plot", "no_such_folder/curves.png"], "does not exist"),
])
def test_cli_rehearse_refuses_before_it_runs(args, message):
    # common practice: an option that dooms the run is refused at once, not after the work
    from click.testing import CliRunner

    from routeplan.cli import cli

    result = CliRunner().invoke(cli, ["rehearse", "--rounds", "2", "--cases", "300", *args],
                                catch_exceptions=False)
    assert result.exit_code == 2 and message in result.stderr and "Traceback" not in result.stderr
