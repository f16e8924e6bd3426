"""Tests of routeplan.baselines: yardstick costs, coverage and workload."""

import numpy as np
import pytest

from routeplan.baselines import (
    confidence_routes,
    coverage,
    expert_alone_cost,
    model_alone_cost,
    oracle_cost,
    system_cost,
    workload,
)
from routeplan.costs import cost_vectors

# K = 2 classes, M = 2 experts; hand-written option costs (common practice: worked by hand).
COSTS = np.array(
    [
        [0.0, 1.0, 0.1, 1.2],
        [1.0, 0.0, 1.1, 0.2],
        [1.0, 0.0, 0.1, np.nan],
        [0.0, 1.0, 1.1, 0.2],
    ]
)


def test_system_cost_hand_example():
    # Routes: model says 0, expert 0, model says 1, expert 1 -> (0 + 1.1 + 0 + 0.2) / 4.
    assert system_cost(COSTS, [0, 2, 1, 3]) == pytest.approx(1.3 / 4)


def test_system_cost_refuses_unknown_answer():
    with pytest.raises(ValueError, match="unknown"):
        system_cost(COSTS, [0, 2, 3, 3])


def test_model_and_expert_alone_hand_example():
    assert model_alone_cost(COSTS, [0, 0, 1, 1], n_classes=2) == pytest.approx(2.0 / 4)
    assert expert_alone_cost(COSTS, 0, n_classes=2) == pytest.approx(2.4 / 4)
    with pytest.raises(ValueError, match="unknown"):
        expert_alone_cost(COSTS, 1, n_classes=2)
    assert expert_alone_cost(COSTS, 1, n_classes=2, missing="skip") == pytest.approx(1.6 / 3)
    with pytest.raises(ValueError):
        model_alone_cost(COSTS, [0, 2, 1, 1], n_classes=2)  # 2 is an expert, not a class


def test_oracle_hand_example():
    # Per case cheapest known option: 0, 0, 0, 0.
    assert oracle_cost(COSTS) == pytest.approx(0.0)
    assert oracle_cost(COSTS[:, 2:][[0, 1, 3]]) == pytest.approx((0.1 + 0.2 + 0.2) / 3)


@pytest.mark.parametrize("seed", range(5))
def test_oracle_beats_every_router(seed):
    # The full-information oracle is a lower bound on any routing (common practice).
    rng = np.random.default_rng(seed)
    K, M, n = 4, 3, 200
    y = rng.integers(0, K, n)
    answers = np.where(rng.uniform(size=(n, M)) < 0.7, y[:, None], rng.integers(0, K, (n, M)))
    C = rng.uniform(0.2, 3.0, (K, K)) * (1 - np.eye(K))
    costs = cost_vectors(y, answers, cost_matrix=C, fees=rng.uniform(0, 0.3, M))
    best = oracle_cost(costs)
    assert best <= model_alone_cost(costs, rng.integers(0, K, n), n_classes=K)
    for j in range(M):
        assert best <= expert_alone_cost(costs, j, n_classes=K)
    for _ in range(20):
        assert best <= system_cost(costs, rng.integers(0, K + M, n)) + 1e-12


def test_coverage_and_workload_hand_example():
    routes = [0, 1, 2, 4, 4, 1, 0, 3]  # K = 2, M = 3: 4 model, then 1, 1, 2 for the experts
    assert coverage(routes, 2) == pytest.approx(0.5)
    np.testing.assert_allclose(workload(routes, 2, 3), [1 / 8, 1 / 8, 2 / 8])
    assert coverage(routes, 2) + workload(routes, 2, 3).sum() == pytest.approx(1.0)
    with pytest.raises(ValueError):
        workload(routes, 2, 2)  # route 4 does not exist with two experts


def test_confidence_routes_hand_example():
    # Raghu et al. (2019) confidence comparison: defer when P(right) - fee > max_k P(k).
    P = np.array([[0.9, 0.1], [0.4, 0.6], [0.5, 0.5]])
    Q = np.array([[0.95, 0.5], [0.7, 0.8], [0.6, 0.9]])
    routes = confidence_routes(P, Q, fees=[0.1, 0.15])
    # case 0: 0.9 vs 0.85, 0.35 -> class 0; case 1: 0.6 vs 0.6, 0.65 -> expert 1;
    # case 2: 0.5 vs 0.5, 0.75 -> expert 1.
    np.testing.assert_array_equal(routes, [0, 3, 3])
