"""Tests of routeplan.simulate: synthetic scenarios and the digits expert."""

import dataclasses

import numpy as np
import pytest
from scipy import stats

from routeplan.costs import cost_vectors, error_cost_matrix, expected_cost_vectors
from routeplan.simulate import (
    bayes_optimal_cost,
    bayes_optimal_routes,
    digits_scenario,
    make_scenario,
    sample_answers,
)

NON_UNIFORM = np.array(
    [
        [0.0, 1.0, 2.0, 1.0],
        [0.5, 0.0, 1.0, 3.0],
        [1.0, 1.0, 0.0, 1.0],
        [4.0, 1.0, 0.5, 0.0],
    ]
)


def test_scenario_shapes_and_reproducibility():
    a = make_scenario(300, n_features=6, n_classes=4, n_experts=2, random_state=3)
    b = make_scenario(300, n_features=6, n_classes=4, n_experts=2, random_state=3)
    assert a.X.dtype == np.float32 and a.X.shape == (300, 6)
    assert a.proba.shape == (300, 4) and a.correct_proba.shape == (300, 2)
    np.testing.assert_allclose(a.proba.sum(axis=1), 1.0)
    for name in ("X", "proba", "y", "regions", "correct_proba", "fees"):
        np.testing.assert_array_equal(getattr(a, name), getattr(b, name))
    np.testing.assert_array_equal(a.answers(7), b.answers(7))
    assert len(set(a.names)) == 2 and "model" not in a.names


def test_experts_are_strong_somewhere_and_weak_elsewhere():
    s = make_scenario(50, n_experts=3, n_regions=4, random_state=0)
    assert (s.region_accuracy.max(axis=1) > 0.85).all()
    assert (s.region_accuracy.min(axis=1) < 0.6).all()
    np.testing.assert_array_equal(s.correct_proba, s.region_accuracy[:, s.regions].T)


def test_answers_follow_the_rule():
    # Correct rate per expert and region within a binomial 99.9% interval (scipy.stats.binomtest),
    # and wrong answers uniform over the other classes (scipy.stats.chisquare).
    s = make_scenario(6000, n_classes=4, n_experts=2, n_regions=2, random_state=1)
    answers = s.answers(random_state=2)
    for j in range(2):
        for r in range(2):
            rows = s.regions == r
            hits = int((answers[rows, j] == s.y[rows]).sum())
            ci = stats.binomtest(hits, int(rows.sum())).proportion_ci(0.999)
            assert ci.low <= s.region_accuracy[j, r] <= ci.high
    wrong = answers[:, 0] != s.y
    offsets = (answers[wrong, 0] - s.y[wrong]) % 4  # 1, 2 or 3 with equal chance
    assert stats.chisquare(np.bincount(offsets, minlength=4)[1:]).pvalue > 1e-3


def test_sample_answers_pairs():
    s = make_scenario(100, n_experts=2, random_state=4,
                      region_accuracy=np.array([[1.0, 1.0, 1.0, 1.0], [0.0, 0.0, 0.0, 0.0]]))
    cases = np.array([0, 5, 5, 99])
    got = sample_answers(s, cases, np.array([0, 0, 1, 1]), random_state=0)
    # Expert 0 always right, expert 1 always wrong (accuracy 1 and 0 set above).
    assert got[0] == s.y[0] and got[1] == s.y[5]
    assert got[2] != s.y[5] and got[3] != s.y[99]
    with pytest.raises(ValueError):
        sample_answers(s, [0], [2])


@pytest.mark.parametrize("cost_matrix", [None, NON_UNIFORM])
def test_bayes_cost_below_model_and_each_expert(cost_matrix):
    # The Bayes rule minimises expected cost per case, so it cannot lose to any fixed
    # policy using the same probabilities (common practice; Bayes decision rule).
    s = make_scenario(2000, n_classes=4, n_experts=3, random_state=5)
    C = error_cost_matrix(4, matrix=cost_matrix)
    expected = expected_cost_vectors(s.proba, s.correct_proba, cost_matrix=C, fees=s.fees)
    best = bayes_optimal_cost(s, cost_matrix)
    model_alone = expected[:, :4].min(axis=1).mean()  # classifier with the true proba
    assert best <= model_alone + 1e-12
    for j in range(3):
        assert best <= expected[:, 4 + j].mean() + 1e-12
    assert best < model_alone - 0.01  # deferral helps in this scenario


@pytest.mark.parametrize("cost_matrix", [None, NON_UNIFORM])
def test_bayes_cost_matches_monte_carlo(cost_matrix):
    # Monte-Carlo: realised cost of the Bayes routes on freshly drawn truth and answers
    # agrees with the exact expectation within 4 standard errors (common practice).
    s = make_scenario(20000, n_classes=4, n_experts=3, random_state=6)
    C = error_cost_matrix(4, matrix=cost_matrix)
    routes = bayes_optimal_routes(s, cost_matrix)
    rng = np.random.default_rng(11)
    u = rng.uniform(size=(len(s.y), 1))
    y = np.minimum((np.cumsum(s.proba, axis=1) < u).sum(axis=1), 3)  # fresh truth
    fresh = dataclasses.replace(s, y=y)
    realised = cost_vectors(y, fresh.answers(rng), cost_matrix=C, fees=s.fees)
    per_case = realised[np.arange(len(y)), routes]
    se = per_case.std(ddof=1) / np.sqrt(len(y))
    assert abs(per_case.mean() - bayes_optimal_cost(s, cost_matrix)) < 4 * se


def test_digits_expert_protocol():
    # Mozannar & Sontag (ICML 2020): right on classes < k, uniform over the 10 classes
    # otherwise; data from sklearn.datasets.load_digits (1797 cases, 64 pixels).
    X, y, answers = digits_scenario(4, random_state=0)
    assert X.shape == (1797, 64) and X.dtype == np.float32
    assert 0.0 <= X.min() and X.max() <= 1.0
    assert answers.shape == (1797, 1)
    low = y < 4
    assert (answers[low, 0] == y[low]).all()
    hits = int((answers[~low, 0] == y[~low]).sum())
    assert stats.binomtest(hits, int((~low).sum()), 0.1).pvalue > 1e-3
    again = digits_scenario(4, random_state=0)
    np.testing.assert_array_equal(again.answers, answers)
    with pytest.raises(ValueError):
        digits_scenario(11)
