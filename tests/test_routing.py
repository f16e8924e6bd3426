"""Tests of routeplan.routing: the capacity LP, its dual prices, and the two routing modes."""

import itertools

import numpy as np
import pytest
from scipy.optimize import linprog

from routeplan.costs import error_cost_matrix, expected_cost_vectors
from routeplan.routing import capacity_lp, route_exact, route_with_prices
from routeplan.simulate import make_scenario


def _dense_lp(costs, caps, n_classes):
    """The assignment LP written out densely over all K + M options, solved by scipy."""
    n, n_options = costs.shape
    n_experts = n_options - n_classes
    A_eq = np.kron(np.eye(n), np.ones((1, n_options)))
    A_ub = np.zeros((n_experts, n * n_options))
    for j in range(n_experts):
        A_ub[j, n_classes + j :: n_options] = 1.0
    return linprog(costs.ravel(), A_ub=A_ub, b_ub=np.asarray(caps) * n, A_eq=A_eq,
                   b_eq=np.ones(n), bounds=(0, None), method="highs")


def _shares(routes, n_classes, n_experts):
    counts = np.bincount(routes, minlength=n_classes + n_experts)[n_classes:]
    return counts / len(routes)


def _scenario_costs(n, *, region_accuracy, fees, random_state, n_classes=4):
    sc = make_scenario(n, n_classes=n_classes, n_experts=len(fees), n_regions=4,
                       region_accuracy=region_accuracy, fees=fees, random_state=random_state)
    C = error_cost_matrix(n_classes)
    return expected_cost_vectors(sc.proba, sc.correct_proba, cost_matrix=C, fees=sc.fees)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_lp_matches_dense_linprog(seed):
    # Reference: scipy.optimize.linprog on the full dense LP (all K + M options per case).
    rng = np.random.default_rng(seed)
    n, K, M = 9, 3, 2
    costs = rng.uniform(0, 1, size=(n, K + M))
    costs[:, K:] -= 0.4  # make deferring attractive so that the caps bind
    caps = np.array([0.15, 0.25])  # 1.35 and 2.25 cases: fractional limits
    ours = capacity_lp(costs, caps, K)
    ref = _dense_lp(costs, caps, K)
    assert ref.status == 0
    assert ours.objective == pytest.approx(ref.fun, rel=1e-9, abs=1e-12)
    np.testing.assert_allclose(ours.assignment.sum(axis=1), 1.0, atol=1e-9)
    assert np.all(ours.loads <= caps * n + 1e-9)
    np.testing.assert_allclose(ours.prices, -ref.ineqlin.marginals, atol=1e-7)


def test_lp_strong_duality_and_complementary_slackness():
    # LP duality (textbook, e.g. Bertsimas & Tsitsiklis, "Introduction to Linear
    # Optimization", 1997, ch. 4): the dual of the assignment LP is
    #   max sum_i min_o (c_io + p_o) - sum_j p_j L_j  over p >= 0,
    # its optimum equals the primal one, and p_j (L_j - load_j) = 0.
    rng = np.random.default_rng(7)
    n, K = 60, 2
    costs = np.column_stack([rng.uniform(0.2, 1.0, size=(n, K)),  # model options
                             rng.uniform(0.0, 0.3, size=n),       # cheap expert, capped hard
                             rng.uniform(0.5, 0.9, size=n)])      # dear expert, cap loose
    caps = np.array([0.2, 0.9])
    res = capacity_lp(costs, caps, K)
    assert np.all(res.prices >= 0)
    assert res.loads[0] == pytest.approx(0.2 * n)  # binding
    assert res.prices[0] > 0
    assert res.loads[1] < 0.9 * n - 1  # slack ...
    assert res.prices[1] == 0.0  # ... so its price is zero
    np.testing.assert_allclose(res.prices * (res.limits - res.loads), 0.0, atol=1e-7)
    surcharge = np.concatenate([np.zeros(K), res.prices])
    dual = np.min(costs + surcharge, axis=1).sum() - res.prices @ res.limits
    assert dual == pytest.approx(res.objective, rel=1e-9)


def test_lp_without_binding_caps_is_plain_argmin():
    # With no binding cap the LP optimum is each case's cheapest option (common practice).
    rng = np.random.default_rng(3)
    costs = rng.uniform(size=(30, 5))
    res = capacity_lp(costs, [1.0, np.inf], 3)
    assert res.objective == pytest.approx(costs.min(axis=1).sum())
    np.testing.assert_array_equal(res.prices, 0.0)


def _brute_force(costs, caps, n_classes):
    """Least total cost over every integral assignment that keeps the caps."""
    n, n_options = costs.shape
    best = np.inf
    for routes in itertools.product(range(n_options), repeat=n):
        routes = np.array(routes)
        counts = np.bincount(routes, minlength=n_options)[n_classes:]
        if np.all(counts <= caps * n + 1e-9):
            best = min(best, costs[np.arange(n), routes].sum())
    return best


@pytest.mark.parametrize("seed", range(6))
def test_route_exact_matches_brute_force(seed):
    # Reference: exhaustive enumeration of all (K + M)^n assignments (n <= 6, K = M = 2).
    rng = np.random.default_rng(100 + seed)
    n = 4 + seed % 3
    costs = rng.uniform(size=(n, 4))
    costs[:, 2:] -= rng.uniform(0.2, 0.6)
    if seed % 2:
        costs = np.round(costs * 4) / 4  # many exact ties
    caps = rng.choice([0.0, 1 / 6, 0.25, 0.34, 0.5], size=2)
    routes = route_exact(costs, caps, 2)
    counts = np.bincount(routes, minlength=4)[2:]
    assert np.all(counts <= caps * n + 1e-9)
    assert costs[np.arange(n), routes].sum() == pytest.approx(_brute_force(costs, caps, 2))


def test_route_exact_keeps_caps_and_is_integral_optimum():
    # Tie-heavy batch (costs on a coarse grid). Caps never exceeded (the contract); the
    # routing's cost equals the LP bound with limits floor(cap * n): the constraint matrix
    # is a bipartite incidence matrix, totally unimodular (Hoffman & Kruskal, 1956; e.g.
    # Schrijver, "Theory of Linear and Integer Programming", 1986, ch. 19).
    rng = np.random.default_rng(11)
    n, K, M = 500, 3, 3
    costs = rng.integers(0, 4, size=(n, K + M)) / 4.0
    caps = np.array([0.05, 0.123, 0.2])
    routes = route_exact(costs, caps, K)
    counts = np.bincount(routes, minlength=K + M)[K:]
    assert np.all(counts <= caps * n)
    bound = capacity_lp(costs, np.floor(caps * n) / n, K).objective
    assert costs[np.arange(n), routes].sum() == pytest.approx(bound, abs=1e-9)


def test_priced_streaming_on_ties_keeps_caps_and_cost():
    # Two experts of constant competence and equal fee: their options tie on every case.
    # Caps binding for both. Prices alone overshoot (every tie goes to one expert); the
    # running count keeps the caps and stays within 1% of the LP optimum (LP duality:
    # with optimal prices the priced choice is optimal up to the split of tied cases).
    acc = np.full((2, 4), 0.85)
    costs = _scenario_costs(4000, region_accuracy=acc, fees=[0.1, 0.1], random_state=5)
    K, caps = 4, np.array([0.1, 0.15])
    free = _shares(np.argmin(costs, axis=1), K, 2)
    assert free.sum() > caps.sum() + 0.05  # both caps bind
    lp = capacity_lp(costs, caps, K)
    plain = route_with_prices(costs, lp.prices, K, caps, stream_caps=False)
    assert _shares(plain, K, 2)[0] > caps[0] + 0.05  # the failure the running count prevents
    routes = route_with_prices(costs, lp.prices, K, caps)
    assert np.all(_shares(routes, K, 2) <= caps)
    routed = costs[np.arange(len(costs)), routes].mean()
    assert routed <= lp.mean_cost * 1.01


def test_streaming_per_case_rule_holds_on_every_prefix():
    # chunk_size=1: after t cases an expert holds at most floor(cap * t) (the documented rule).
    rng = np.random.default_rng(2)
    costs = rng.uniform(size=(300, 4))
    costs[:, 2:] -= 0.5
    caps = np.array([0.1, 0.3])
    routes = route_with_prices(costs, [0.0, 0.0], 2, caps, chunk_size=1)
    held = np.cumsum(routes[:, None] == np.array([2, 3])[None, :], axis=0)
    t = np.arange(1, len(routes) + 1)[:, None]
    assert np.all(held <= np.floor(caps[None, :] * t + 1e-9))


def test_route_with_prices_without_caps_is_priced_argmin():
    # Definition: argmin of cost + price on the expert options (common practice).
    rng = np.random.default_rng(4)
    costs = rng.uniform(size=(50, 5))
    prices = np.array([0.1, 0.3])
    expected = np.argmin(costs + np.r_[0, 0, 0, prices], axis=1)
    np.testing.assert_array_equal(route_with_prices(costs, prices, 3), expected)


def test_streaming_fallback_moves_the_cheapest_cases_first():
    # With one expert, keeping the q cases that gain most by deferring is optimal, so one
    # chunk of the running count must match route_exact (scipy HiGHS, checked above).
    rng = np.random.default_rng(9)
    n = 200
    costs = np.column_stack([rng.uniform(0.3, 1.0, size=(n, 2)), rng.uniform(0.0, 0.3, size=n)])
    caps = np.array([0.2])
    streamed = route_with_prices(costs, [0.0], 2, caps, chunk_size=n)
    exact = route_exact(costs, caps, 2)
    rows = np.arange(n)
    assert costs[rows, streamed].sum() == pytest.approx(costs[rows, exact].sum())


@pytest.mark.slow
def test_prices_from_validation_carry_to_fresh_batch():
    # Prices learned on one validation batch, applied to a fresh batch of the same scenario:
    # expected cost within 0.01 of the fresh batch's own LP optimum and each expert's share
    # within 0.5 points of its binding cap. Tolerances from the design brief; a fixed
    # price's share on a fresh batch varies like a binomial proportion, about 0.15 points
    # here (sd of sqrt(cap (1 - cap) (1/n_val + 1/n_fresh))), so 0.5 points is > 2.5 sd.
    acc = [[0.95, 0.92, 0.5, 0.4], [0.45, 0.9, 0.95, 0.5]]
    n, K, caps = 20000, 4, np.array([0.05, 0.04])
    costs = _scenario_costs(2 * n, region_accuracy=acc, fees=[0.05, 0.1], random_state=3)
    val, fresh = costs[:n], costs[n:]
    assert np.all(_shares(np.argmin(val, axis=1), K, 2) > caps + 0.05)  # caps bind
    prices = capacity_lp(val, caps, K).prices
    best = capacity_lp(fresh, caps, K).mean_cost
    routes = route_with_prices(fresh, prices, K, caps)
    assert fresh[np.arange(n), routes].mean() - best <= 0.01
    np.testing.assert_allclose(_shares(routes, K, 2), caps, atol=0.005)


@pytest.mark.parametrize(
    "costs, caps, n_classes",
    [
        (np.full((3, 4), np.nan), [0.5, 0.5], 2),  # not finite
        (np.ones((3, 4)), [0.5], 2),  # one cap for two experts
        (np.ones((3, 4)), [0.5, -0.1], 2),  # negative cap
        (np.ones((3, 4)), [0.5, 0.5], 5),  # more classes than options
        (np.ones(4), [0.5, 0.5], 2),  # not 2-d
    ],
)
def test_bad_input_is_refused(costs, caps, n_classes):
    with pytest.raises(ValueError):
        capacity_lp(costs, caps, n_classes)
    with pytest.raises(ValueError):
        route_exact(costs, caps, n_classes)
