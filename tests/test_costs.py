"""Tests of routeplan.costs: cost vectors of the K + M options."""

import itertools

import numpy as np
import pytest

from routeplan.costs import (
    cost_vectors,
    error_cost_matrix,
    expected_cost_vectors,
    impute_missing_costs,
    wrong_answer_costs,
)


def test_default_matrix_is_scaled_zero_one():
    # 0/1 loss scaled by the error cost (Mozannar & Sontag, ICML 2020, 0-1 deferral loss).
    C = error_cost_matrix(3, error_cost=2.5)
    assert np.array_equal(C, 2.5 * (1 - np.eye(3)))


def test_explicit_matrix_checked():
    M = [[0, 1, 4], [1, 0, 1], [2, 1, 0]]
    assert np.array_equal(error_cost_matrix(3, matrix=M), np.array(M, dtype=float))
    with pytest.raises(ValueError):
        error_cost_matrix(3, matrix=np.eye(2))
    with pytest.raises(ValueError):
        error_cost_matrix(2, matrix=[[0, -1], [1, 0]])
    with pytest.raises(ValueError):
        error_cost_matrix(1)


def test_cost_vectors_hand_example():
    # Hand-computed from the cost definition c_k = C[y,k], c_{K+j} = C[y,m_j] + fee_j
    # (DESIGN.md, after Verma, Barrejon & Nalisnick, AISTATS 2023); common practice.
    C = np.array([[0.0, 1.0, 3.0], [1.0, 0.0, 1.0], [2.0, 1.0, 0.0]])
    y = [0, 2]
    answers = [[0, 2], [-1, 1]]
    c = cost_vectors(y, answers, cost_matrix=C, fees=[0.1, 0.5])
    expected = np.array(
        [
            [0.0, 1.0, 3.0, 0.0 + 0.1, 3.0 + 0.5],
            [2.0, 1.0, 0.0, np.nan, 1.0 + 0.5],
        ]
    )
    np.testing.assert_array_equal(c, expected)


def test_cost_vectors_without_experts():
    c = cost_vectors([1, 0], np.zeros((2, 0), dtype=int), cost_matrix=error_cost_matrix(2), fees=[])
    np.testing.assert_array_equal(c, [[1.0, 0.0], [0.0, 1.0]])


@pytest.mark.parametrize(
    "y, answers",
    [([0, 3], [[0], [1]]), ([0, 1], [[0], [-2]]), ([0, 1], [[0, 1], [1, 0]]), ([[0, 1]], [[0]])],
)
def test_cost_vectors_rejects_bad_input(y, answers):
    with pytest.raises(ValueError):
        cost_vectors(y, answers, cost_matrix=error_cost_matrix(3), fees=[0.2])


def test_wrong_answer_cost_is_off_diagonal_row_mean():
    # Mean of the off-diagonal entries of each row (uniform wrong answer; common practice).
    C = np.array([[0.0, 1.0, 3.0], [1.0, 0.0, 1.0], [2.0, 4.0, 0.0]])
    np.testing.assert_allclose(wrong_answer_costs(C), [2.0, 1.0, 3.0])


def test_expected_costs_zero_one_reduce_to_error_rates():
    # Under 0/1 costs the expected cost of class k is 1 - P(k|x) and of expert j is
    # (1 - P(j right | x)) + fee_j (Mozannar & Sontag, ICML 2020, Bayes deferral rule).
    rng = np.random.default_rng(0)
    P = rng.dirichlet(np.ones(4), size=6)
    q = rng.uniform(size=(6, 2))
    fees = np.array([0.05, 0.2])
    e = expected_cost_vectors(P, q, cost_matrix=error_cost_matrix(4, 2.0), fees=fees)
    np.testing.assert_allclose(e[:, :4], 2.0 * (1 - P))
    np.testing.assert_allclose(e[:, 4:], 2.0 * (1 - q) + fees)


def _enumerated_expected_costs(p_y, confusion, C, fees):
    """Expected cost vector by summing cost_vectors over every (y, answers) outcome."""
    n_classes, n_experts = len(p_y), len(fees)
    total = np.zeros(n_classes + n_experts)
    for y in range(n_classes):
        for answers in itertools.product(range(n_classes), repeat=n_experts):
            prob = p_y[y] * np.prod([confusion[j, y, a] for j, a in enumerate(answers)])
            total += prob * cost_vectors([y], [answers], cost_matrix=C, fees=fees)[0]
    return total


def test_expected_costs_match_enumeration_with_confusion():
    # Definition of expectation: brute-force sum over all outcomes (common practice).
    rng = np.random.default_rng(1)
    C = rng.uniform(0.5, 3.0, size=(3, 3)) * (1 - np.eye(3))
    fees = np.array([0.3, 0.1])
    confusion = rng.dirichlet(np.ones(3), size=(2, 3))
    P = rng.dirichlet(np.ones(3), size=4)
    got = expected_cost_vectors(P, cost_matrix=C, fees=fees, expert_confusion=confusion)
    for i in range(4):
        np.testing.assert_allclose(got[i], _enumerated_expected_costs(P[i], confusion, C, fees))
    per_case = np.broadcast_to(confusion, (4, 2, 3, 3))
    got_per_case = expected_cost_vectors(P, cost_matrix=C, fees=fees, expert_confusion=per_case)
    np.testing.assert_allclose(got_per_case, got)


def test_correct_proba_equals_symmetric_confusion():
    # A wrong answer uniform over the other classes is the confusion with q on the diagonal
    # and (1 - q) / (K - 1) elsewhere; both descriptions must give the same costs.
    rng = np.random.default_rng(2)
    K = 4
    C = rng.uniform(0.5, 2.0, size=(K, K)) * (1 - np.eye(K))
    q = np.array([0.9, 0.4])
    confusion = np.stack([qj * np.eye(K) + (1 - qj) / (K - 1) * (1 - np.eye(K)) for qj in q])
    P = rng.dirichlet(np.ones(K), size=5)
    fees = [0.1, 0.0]
    a = expected_cost_vectors(P, np.tile(q, (5, 1)), cost_matrix=C, fees=fees)
    b = expected_cost_vectors(P, cost_matrix=C, fees=fees, expert_confusion=confusion)
    np.testing.assert_allclose(a, b)


def test_expected_costs_validation():
    C = error_cost_matrix(3)
    P = np.full((2, 3), 1 / 3)
    with pytest.raises(ValueError):
        expected_cost_vectors(P, cost_matrix=C, fees=[0.1])  # no description of the expert
    with pytest.raises(ValueError):
        expected_cost_vectors(P, [[1.2], [0.5]], cost_matrix=C, fees=[0.1])
    with pytest.raises(ValueError):
        expected_cost_vectors(P * 2, [[0.2], [0.5]], cost_matrix=C, fees=[0.1])
    assert expected_cost_vectors(P, cost_matrix=C, fees=[]).shape == (2, 3)


def test_impute_fills_only_missing():
    costs = np.array([[0.0, 1.0, np.nan], [1.0, 0.0, 0.2]])
    imputed = np.array([[9.0, 9.0, 0.4], [9.0, 9.0, 9.0]])
    out = impute_missing_costs(costs, imputed)
    np.testing.assert_array_equal(out, [[0.0, 1.0, 0.4], [1.0, 0.0, 0.2]])
    assert np.isnan(costs[0, 2])  # input untouched
    with pytest.raises(ValueError):
        impute_missing_costs(costs, np.full_like(costs, np.nan))
    with pytest.raises(ValueError):
        impute_missing_costs(costs, imputed[:, :2])
