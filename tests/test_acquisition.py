"""Tests of routeplan.acquisition: scoring (case, expert) pairs and choosing a round.

The pools here are seeded numpy arrays built for the checks; the expected values come from
the published definitions named beside each check, from reference libraries (scipy), or
from hand computation shown in the comments.
"""

from __future__ import annotations

import math
from fractions import Fraction

import numpy as np
import pytest
from scipy import stats

from routeplan.acquisition import (
    PlannerInput,
    RegionCosts,
    beta_posterior,
    betabinomial_pmf,
    class_probabilities,
    knowledge_gradient,
    model_decision_cost,
    router_focus,
    select_assignments,
)


def make_pool(
    n: int = 600,
    fees=(0.05, 0.2, 0.4),
    capacities=(1.0, 0.5, 0.3),
    n_regions: int = 4,
    n_classes: int = 3,
    seed: int = 0,
    answered: np.ndarray | None = None,
    correct: np.ndarray | None = None,
) -> PlannerInput:
    """A seeded pool: every pair eligible unless a test says otherwise."""
    rng = np.random.default_rng(seed)
    m = len(fees)
    region = rng.integers(0, n_regions, n)
    zeros = np.zeros((m, n_regions))
    return PlannerInput(
        eligible=np.ones((n, m), dtype=bool),
        region=region,
        stratum=rng.integers(0, n_classes, n),
        fees=np.asarray(fees, dtype=float),
        capacities=np.asarray(capacities, dtype=float),
        correct=zeros if correct is None else correct,
        answered=zeros if answered is None else answered,
        pending=zeros,
        model_cost=rng.uniform(0.0, 0.6, n),
        population_region=region,
        error_cost=1.0,
    )


def with_(pool: PlannerInput, **changes) -> PlannerInput:
    return PlannerInput(**{**pool.__dict__, **changes})


# --------------------------------------------------------------------------- building blocks


def test_betabinomial_pmf_matches_scipy():
    # Reference: scipy.stats.betabinom (the beta-binomial law).
    for q, a, b in [(1, 1.0, 1.0), (7, 2.5, 0.7), (40, 13.0, 4.0)]:
        s = np.arange(q + 1)
        assert np.allclose(betabinomial_pmf(s, q, a, b), stats.betabinom.pmf(s, q, a, b), rtol=1e-10, atol=1e-14)


def test_beta_posterior_is_conjugate_update():
    # Beta-binomial conjugacy (Gelman et al., Bayesian Data Analysis, 3rd ed., 2013, sec. 2.4):
    # Beta(a0 + k, b0 + n - k); the mean is checked against scipy.stats.beta.
    alpha, beta = beta_posterior([3, 0], [5, 2], prior=(2.0, 1.0))
    assert np.array_equal(alpha, [5.0, 2.0]) and np.array_equal(beta, [3.0, 3.0])
    assert np.isclose(stats.beta(alpha[0], beta[0]).mean(), 5 / 8)
    with pytest.raises(ValueError):
        beta_posterior([3], [2])


def test_model_decision_cost_is_chow_rule():
    # Chow (1957): the Bayes risk of the plug-in decision under 0/1 loss is 1 - max_k P(k|x).
    p = np.array([[0.7, 0.2, 0.1], [0.34, 0.33, 0.33]])
    assert np.allclose(model_decision_cost(p, error_cost=2.0), [0.6, 1.32])


def test_class_probabilities_fallback_is_laplace_rule():
    # Fewer than ten cases with truth: class frequencies with one pseudo-count each
    # (Laplace's rule of succession): counts (3, 1, 0) -> (4, 2, 1) / 7.
    X = np.arange(12.0).reshape(6, 2)
    y = np.array([0, 0, 0, 1, -1, -1])
    p = class_probabilities(X, y, 3)
    assert np.allclose(p, np.tile([4 / 7, 2 / 7, 1 / 7], (6, 1)))


def test_class_probabilities_on_iris_are_calibrated_enough():
    # scikit-learn's bundled iris data: a logistic regression separates the classes well,
    # so the most probable class is right on most cases (accuracy about 0.96-0.98 on iris,
    # from memory; scikit-learn's own LogisticRegression reaches it too).
    from sklearn.datasets import load_iris

    X, y = load_iris(return_X_y=True)
    p = class_probabilities(X, y, 3, random_state=0)
    assert np.allclose(p.sum(axis=1), 1.0)
    assert (p.argmax(axis=1) == y).mean() > 0.9


def _kg_by_hand(model_costs, alpha, beta, q, fee, other, c=1.0):
    """Knowledge gradient by its definition (Frazier, Powell & Dayanik, SIAM J. Control Optim. 2008)."""
    m = np.asarray(model_costs)

    def value(mean):
        expert = min((1 - mean) * c + fee, other)
        return np.minimum(m, expert).sum()

    now = value(alpha / (alpha + beta))
    later = sum(
        stats.betabinom.pmf(s, q, alpha, beta) * value((alpha + s) / (alpha + beta + q)) for s in range(q + 1)
    )
    return now - later


def test_knowledge_gradient_hand_example():
    # Hand computation: model costs (0.2, 0.6), fee 0.1, Beta(1, 1), one answer.
    # Now: expert cost 0.5*1 + 0.1 = 0.6, V = 0.2 + 0.6 = 0.8.
    # Right (prob 1/2): mean 2/3, cost 0.4333, V = 0.6333; wrong: mean 1/3, cost 0.7667, V = 0.8.
    # KG = 0.8 - (0.6333 + 0.8) / 2 = 1/12.
    costs = RegionCosts([0.2, 0.6], [0, 0], 1)
    assert knowledge_gradient(costs, 0, 1.0, 1.0, 1, 0.1, math.inf) == pytest.approx(1 / 12)


@pytest.mark.parametrize("alpha,beta,q,fee,other", [(2.0, 1.0, 1, 0.05, 0.5), (7.3, 2.2, 5, 0.2, math.inf),
                                                    (1.0, 1.0, 16, 0.0, 0.3), (30.0, 3.0, 3, 0.4, 0.45)])
def test_knowledge_gradient_matches_definition(alpha, beta, q, fee, other):
    # Definition of the knowledge gradient (Frazier, Powell & Dayanik 2008), evaluated by brute force
    # with scipy's beta-binomial; it is >= 0 because the value is concave in the mean (Jensen).
    rng = np.random.default_rng(3)
    m = rng.uniform(0, 0.8, 200)
    costs = RegionCosts(m, np.zeros(200, dtype=int), 1)
    got = knowledge_gradient(costs, 0, alpha, beta, q, fee, other)
    assert got == pytest.approx(max(0.0, _kg_by_hand(m, alpha, beta, q, fee, other)), abs=1e-10)
    assert got >= 0.0


def test_knowledge_gradient_zero_when_expert_never_cheapest():
    # An expert whose fee exceeds one error's cost is never the cheapest option, so no answer
    # can change a decision: KG = 0 (definition, Frazier, Powell & Dayanik 2008).
    costs = RegionCosts(np.linspace(0, 0.5, 50), np.zeros(50, dtype=int), 1)
    assert knowledge_gradient(costs, 0, 1.0, 1.0, 8, 1.2, math.inf) == 0.0


# --------------------------------------------------------------------------- constraints


def _check_constraints(pool: PlannerInput, sel, budget: float, max_per_expert):
    m = pool.n_experts
    # budget: sum of real fees (common practice: a budget caps total spend); 1e-9 relative slack for float sums
    spend = pool.fees[sel.expert].sum()
    assert spend <= budget * (1 + 1e-9)
    counts = np.bincount(sel.expert, minlength=m)
    for j in range(m):
        if max_per_expert is not None:
            assert counts[j] <= max_per_expert
        # capacity: share of the round's candidate cases, ceil rule, in exact decimal arithmetic
        cap = Fraction(str(pool.capacities[j]))
        n_cases = pool.eligible.shape[0]
        assert counts[j] <= math.ceil(cap * n_cases), (j, counts[j], n_cases)
    # never the same (case, expert) twice, never an ineligible pair (common practice)
    pairs = set(zip(sel.case.tolist(), sel.expert.tolist()))
    assert len(pairs) == sel.case.size
    assert pool.eligible[sel.case, sel.expert].all()
    assert np.all((sel.selection_prob > 0) & (sel.selection_prob <= 1))


@pytest.mark.parametrize("strategy", ["value", "uncertain", "random"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_budget_caps_capacities_never_exceeded(strategy, seed):
    rng = np.random.default_rng(100 + seed)
    pool = make_pool(seed=seed, fees=tuple(rng.choice([0.0, 0.03, 0.1, 0.25], 3)),
                     capacities=tuple(rng.choice([0.2, 0.35, 0.6, 1.0], 3)))
    eligible = rng.random(pool.eligible.shape) < 0.8  # some pairs already answered or assigned
    pool = with_(pool, eligible=eligible)
    budget = float(rng.uniform(2, 30))
    cap = int(rng.integers(20, 120))
    sel = select_assignments(pool, budget=budget, strategy=strategy, max_per_expert=cap, random_state=seed)
    _check_constraints(pool, sel, budget, cap)


@pytest.mark.parametrize("strategy", ["value", "uncertain", "random"])
def test_a_budget_beyond_every_pair_buys_every_pair_it_may(strategy):
    # a budget far above what the pool can take (1e308, so that budget / fee overflows to inf)
    # buys every eligible pair the capacities allow, and no more (common practice: a budget is
    # a ceiling, not a target)
    pool = make_pool(fees=(0.0, 0.03, 0.1), capacities=(1.0, 1.0, 1.0))
    sel = select_assignments(pool, budget=1e308, strategy=strategy, random_state=0)
    _check_constraints(pool, sel, 1e308, None)
    assert sel.case.size == int(pool.eligible.sum())


def test_zero_capacity_expert_gets_nothing():
    pool = make_pool(capacities=(1.0, 0.0, 0.5))
    sel = select_assignments(pool, budget=10, random_state=0)
    assert not np.any(sel.expert == 1)


@pytest.mark.parametrize("strategy", ["value", "uncertain", "random"])
def test_same_seed_reproduces_plan_exactly(strategy):
    pool = make_pool()
    a = select_assignments(pool, budget=12, strategy=strategy, random_state=7)
    b = select_assignments(pool, budget=12, strategy=strategy, random_state=7)
    c = select_assignments(pool, budget=12, strategy=strategy, random_state=8)
    for name in ("case", "expert", "selection_prob", "audit"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    assert not np.array_equal(a.case, c.case)  # a different seed draws other cases


@pytest.mark.parametrize("share", [0.1, 0.25, 0.5])
def test_audit_share_met_within_one_fee(share):
    # The audit spends its share of the budget unless a whole further case would not fit:
    # share*B - max fee < audit spend <= share*B (common practice for a budgeted random sample).
    pool = make_pool(fees=(0.07, 0.19, 0.31))
    budget = 17.0
    sel = select_assignments(pool, budget=budget, audit_share=share, random_state=3)
    target = share * budget
    assert target - pool.fees.max() < sel.audit_spend <= target + 1e-9
    assert sel.audit.any() and (~sel.audit).any()


def test_audit_is_simple_random_sample_per_expert():
    # Horvitz & Thompson (JASA 1952): under simple random sampling the inverse inclusion
    # probabilities of the sample add up to the population size (here, each expert's eligible
    # cases), and every unit is equally likely (checked with scipy's chi-square test).
    pool = make_pool(n=300)
    pool = with_(pool, eligible=np.random.default_rng(5).random(pool.eligible.shape) < 0.7)
    hits = np.zeros(300)
    n_seeds = 400
    for seed in range(n_seeds):
        sel = select_assignments(pool, budget=6, audit_share=0.5, strategy="random", random_state=seed)
        for j in range(pool.n_experts):
            mine = sel.audit & (sel.expert == j)
            assert np.isclose((1 / sel.selection_prob[mine]).sum(), pool.eligible[:, j].sum())
        first = sel.audit & (sel.expert == 0)
        hits[sel.case[first]] += 1
    members = pool.eligible[:, 0]
    observed = hits[members]
    assert observed.sum() > 0 and hits[~members].sum() == 0
    assert stats.chisquare(observed).pvalue > 1e-3


def test_strategy_probabilities_reweight_to_stratum_sizes():
    # Horvitz & Thompson (1952): inside each (expert, region, class) stratum drawn by simple random
    # sampling, the inverse selection probabilities add up to the stratum's eligible cases (after
    # the audit). Checked in every cell with at least one pick per class present.
    pool = make_pool(n=900, n_regions=3)
    sel = select_assignments(pool, budget=40, audit_share=0.2, random_state=2)
    left = pool.eligible.copy()
    left[sel.case[sel.audit], sel.expert[sel.audit]] = False
    strat = ~sel.audit
    checked = 0
    for j in range(pool.n_experts):
        for r in range(pool.n_regions):
            in_cell = strat & (sel.expert == j) & (pool.region[sel.case] == r)
            classes = np.unique(pool.stratum[left[:, j] & (pool.region == r)])
            if in_cell.sum() < classes.size:
                continue
            for y in classes:
                mine = in_cell & (pool.stratum[sel.case] == y)
                size = (left[:, j] & (pool.region == r) & (pool.stratum == y)).sum()
                assert np.isclose((1 / sel.selection_prob[mine]).sum(), size)
                checked += 1
    assert checked >= 9


# --------------------------------------------------------------------------- behaviour


def test_cold_start_spreads_over_experts_regions_and_classes():
    # Cold start (no answers): the exploration floor gives every (expert, region) cell picks,
    # and picks inside a cell cover every class present (common practice: stratified first round).
    pool = make_pool(fees=(0.05, 0.05, 0.05), capacities=(1.0, 1.0, 1.0))
    sel = select_assignments(pool, budget=8, audit_share=0.0, random_state=0)
    assert (sel.cell_picks >= 2).all()
    for j in range(3):
        for r in range(pool.n_regions):
            here = (sel.expert == j) & (pool.region[sel.case] == r)
            if here.sum() >= 3:
                assert len(np.unique(pool.stratum[sel.case[here]])) == 3


def test_exploration_floor_stops_when_cell_is_tight():
    # A cell with >= 10 answers with truth is tight: the floor gives it nothing, while loose cells
    # get explore_min picks first (the planner's documented rule).
    answered = np.full((2, 2), 40.0)
    answered[1, 1] = 0.0
    correct = answered * 0.8
    pool = make_pool(fees=(0.1, 0.1), capacities=(1.0, 1.0), n_regions=2, answered=answered, correct=correct)
    sel = select_assignments(pool, budget=0.2, audit_share=0.0, explore_min=2, explore_share=1.0, random_state=0)
    assert sel.cell_picks[1, 1] == 2 and sel.cell_picks.sum() == 2


def test_exploration_floor_spends_at_most_its_share():
    # The floor may spend at most explore_share of the budget left after the audit (documented rule).
    # Expert 1 costs more than an error, so its KG is 0 (Frazier, Powell & Dayanik 2008) and only the
    # floor sends it cases: its 4 loose cells want 2 picks each (8 x 1.5 = 12); a share of 0.2 of 15
    # allows 3, i.e. 2 picks; a share of 1 allows all 8.
    answered = np.array([[50.0] * 4, [0.0] * 4])
    pool = make_pool(fees=(0.1, 1.5), capacities=(1.0, 1.0), answered=answered, correct=answered * 0.8)
    capped = select_assignments(pool, budget=15, audit_share=0.0, explore_share=0.2, random_state=1)
    full = select_assignments(pool, budget=15, audit_share=0.0, explore_share=1.0, random_state=1)
    assert (capped.expert == 1).sum() == 2
    assert (full.expert == 1).sum() == 8


def test_value_avoids_expert_that_cannot_change_decisions():
    # KG = 0 for an expert whose fee exceeds one error's cost (Frazier, Powell & Dayanik 2008),
    # so once its cells are tight the value strategy spends nothing on it beyond the audit.
    answered = np.full((2, 4), 50.0)
    correct = np.array([[45.0] * 4, [49.0] * 4])
    pool = make_pool(fees=(0.1, 1.5), capacities=(1.0, 1.0), answered=answered, correct=correct)
    sel = select_assignments(pool, budget=20, audit_share=0.0, random_state=0)
    assert sel.expert.size > 0 and np.all(sel.expert == 0)
    assert sel.gain[0] > 0


def test_value_targets_region_where_model_is_unsure():
    # Where the model is always right (cost 0) an expert cannot lower the decision cost (KG = 0);
    # where the model is unsure the KG is positive, so the value strategy sends the cases there.
    n = 800
    region = np.repeat([0, 1], n // 2)
    model_cost = np.where(region == 0, 0.0, 0.45)
    answered = np.full((1, 2), 12.0)
    pool = PlannerInput(eligible=np.ones((n, 1), bool), region=region, stratum=np.zeros(n, dtype=int),
                fees=np.array([0.05]), capacities=np.array([1.0]), correct=answered * 0.75, answered=answered,
                pending=np.zeros((1, 2)), model_cost=model_cost, population_region=region)
    sel = select_assignments(pool, budget=5, audit_share=0.0, random_state=0)
    assert sel.cell_picks[0, 1] > 0 and sel.cell_picks[0, 0] == 0


def test_uncertain_prefers_widest_accuracy_estimate():
    # Uncertainty sampling (Lewis & Gale, SIGIR 1994) at the cell level: the Beta variance
    # ab / ((a+b)^2 (a+b+1)) is largest for the cell with no answers, so it gets the picks.
    answered = np.array([[200.0, 0.0]])
    pool = make_pool(fees=(0.1,), capacities=(1.0,), n_regions=2, answered=answered, correct=answered * 0.7)
    sel = select_assignments(pool, budget=1.0, audit_share=0.0, strategy="uncertain", explore_share=0.0,
                             random_state=0)
    assert sel.cell_picks[0, 1] == 10 and sel.cell_picks[0, 0] == 0


def test_random_is_uniform_over_eligible_pairs():
    # Uniform over pairs: each expert's share of the picks follows its eligible pairs, so the
    # inclusion ratio picks / eligible is the same for every expert up to one pick (definition).
    pool = make_pool(n=1200, fees=(0.1, 0.1, 0.1), capacities=(1.0, 1.0, 1.0))
    keep = np.random.default_rng(4).random(pool.eligible.shape) < np.array([0.9, 0.5, 0.2])
    pool = with_(pool, eligible=keep)
    sel = select_assignments(pool, budget=30, audit_share=0.0, strategy="random", random_state=0)
    e = keep.sum(axis=0)
    k = np.bincount(sel.expert, minlength=3)
    assert k.sum() == 300
    ratio = k / e
    assert np.all(np.abs(ratio - k.sum() / e.sum()) <= 1.0 / e)
    assert np.allclose(sel.selection_prob, ratio[sel.expert])


def test_value_spreads_budget_beyond_its_worth_uniformly():
    # Documented rule: value buys cells only while KG per answer >= min_value_per_fee x fee; with
    # spread="pairs" the rest is spread as random spreads it, so with an unreachable bar every expert
    # ends with the same share of its eligible pairs up to one pick per region (uniform over pairs).
    pool = make_pool(n=1200, fees=(0.1, 0.1, 0.1), capacities=(1.0, 1.0, 1.0))
    sel = select_assignments(pool, budget=30, audit_share=0.0, explore_share=0.0, min_value_per_fee=1e12,
                             spread="pairs", random_state=0)
    k = np.bincount(sel.expert, minlength=3)
    assert k.sum() == 300 and np.all(np.abs(k - 100) <= pool.n_regions)
    greedy = select_assignments(pool, budget=30, audit_share=0.0, explore_share=0.0, min_value_per_fee=0.0,
                                random_state=0)
    assert not np.array_equal(np.sort(greedy.cell_picks.ravel()), np.sort(sel.cell_picks.ravel()))


def test_value_default_bar_is_three_times_the_fee():
    # Documented default (module docstring, measured with benchmarks/bench_rounds.py): value buys
    # a cell only while an answer is expected to save three times its fee. The default must plan
    # exactly as the explicit bar 3 does, and the bar must matter on this pool (1 plans otherwise).
    pool = make_pool(n=600, fees=(0.05, 0.1, 0.2), capacities=(1.0, 1.0, 1.0))
    kw = dict(budget=5, audit_share=0.0, explore_share=0.0, random_state=0)
    default = select_assignments(pool, **kw)
    three = select_assignments(pool, min_value_per_fee=3.0, **kw)
    one = select_assignments(pool, min_value_per_fee=1.0, **kw)
    assert np.array_equal(default.case, three.case) and np.array_equal(default.expert, three.expert)
    assert not np.array_equal(np.sort(one.cell_picks.ravel()), np.sort(three.cell_picks.ravel()))


def test_value_leaves_loose_cells_to_the_variance_spread():
    # Documented rule (kg_min_answers): a cell is scored by its knowledge gradient only once it holds
    # that many answers. With a count no cell can reach, value must plan exactly as with a bar no cell
    # can pass (everything goes to the variance spread), and a count of 0 exactly as the default.
    pool = make_pool(n=600, fees=(0.05, 0.1, 0.2), capacities=(1.0, 1.0, 1.0))
    kw = dict(budget=5, audit_share=0.0, explore_share=0.0, random_state=0)
    gated = select_assignments(pool, kg_min_answers=10**6, **kw)
    no_bar = select_assignments(pool, min_value_per_fee=1e12, **kw)
    assert np.array_equal(gated.case, no_bar.case) and np.array_equal(gated.expert, no_bar.expert)
    default, zero = select_assignments(pool, **kw), select_assignments(pool, kg_min_answers=0, **kw)
    assert np.array_equal(default.case, zero.case) and np.array_equal(default.expert, zero.expert)
    assert not np.array_equal(np.sort(default.cell_picks.ravel()), np.sort(gated.cell_picks.ravel()))
    for bad in (-1, 2.5, True):
        with pytest.raises(ValueError, match="kg_min_answers"):
            select_assignments(pool, kg_min_answers=bad, **kw)


@pytest.mark.parametrize("spread", ["spend", "pairs"])
def test_value_spread_by_spend_or_by_pairs(spread):
    # Documented rule: with fees 0.05 / 0.1 / 0.2 and every pair eligible, spreading by spend gives each
    # expert the same spend (14 each: picks 280, 140, 70, hand computation), spreading by pairs the
    # same picks (42 / 0.35 = 120 each); both up to one pick per region per expert.
    pool = make_pool(n=1200, fees=(0.05, 0.1, 0.2), capacities=(1.0, 1.0, 1.0))
    sel = select_assignments(pool, budget=42, audit_share=0.0, explore_share=0.0, min_value_per_fee=1e12,
                             spread=spread, random_state=0)
    k = np.bincount(sel.expert, minlength=3)
    expected = np.array([280, 140, 70]) if spread == "spend" else np.array([120, 120, 120])
    assert np.all(np.abs(k - expected) <= pool.n_regions + 1), k
    assert sel.budget_used <= 42 + 1e-9
    with pytest.raises(ValueError, match="spread"):
        select_assignments(pool, budget=42, spread="evenly")


def test_value_spread_by_variance_goes_to_loose_cells_first():
    # Documented rule (spread="variance", the default): the rest goes to the cell of largest posterior
    # variance per fee. Hand computation: expert 0 (fee 0.05) has 45 right of 50 in every region, Beta(46, 6),
    # variance 46*6 / (52^2 * 53) = 0.00193, per fee 0.0385; expert 1 (fee 0.2) has none, Beta(1, 1),
    # variance 1/12, per fee 0.417, and stays above 0.0385 for its first ~30 fantasy answers per region.
    # So 10 fee units (50 picks of expert 1, 12 or 13 per region) all go to expert 1, spread evenly.
    answered = np.vstack([np.full(4, 50.0), np.zeros(4)])
    correct = np.vstack([np.full(4, 45.0), np.zeros(4)])
    pool = make_pool(n=1200, fees=(0.05, 0.2), capacities=(1.0, 1.0), answered=answered, correct=correct)
    pool = with_(pool, model_cost=np.full(1200, 0.6))
    sel = select_assignments(pool, budget=10, audit_share=0.0, explore_share=0.0, min_value_per_fee=1e12,
                             random_state=0)
    assert sel.expert.size == 50 and np.all(sel.expert == 1)
    per_region = sel.cell_picks[1]
    assert per_region.max() - per_region.min() <= 1
    by_spend = select_assignments(pool, budget=10, audit_share=0.0, explore_share=0.0, min_value_per_fee=1e12,
                                  spread="spend", random_state=0)
    assert np.any(by_spend.expert == 0)


def test_spread_leaves_out_experts_that_cannot_beat_the_model():
    # An expert whose fee exceeds every model cost of the pool cannot be the cheapest option even if
    # always right (Chow's rule, cost 1 - max P <= 0.6 here), so the spread gives it nothing.
    answered = np.full((2, 4), 50.0)
    pool = make_pool(fees=(0.1, 0.7), capacities=(1.0, 1.0), answered=answered, correct=answered * 0.9)
    sel = select_assignments(pool, budget=20, audit_share=0.0, min_value_per_fee=1e12, random_state=0)
    assert sel.expert.size > 0 and np.all(sel.expert == 0)


@pytest.mark.slow
@pytest.mark.parametrize("strategy", ["value", "random"])
def test_design_is_the_chance_of_being_asked(strategy):
    # Inclusion probability (Horvitz & Thompson, JASA 1952, definition): over many seeds, the share of
    # plans that ask expert j about a case matches design[j, region, stratum] of that case's group,
    # within 4 binomial standard errors (seeded simulation, numpy only).
    pool = make_pool(n=120, fees=(0.1, 0.2), capacities=(1.0, 1.0), n_regions=2, n_classes=2)
    n_seeds = 400
    hits = np.zeros((120, 2))
    design = np.zeros((2, 2, 2))
    for seed in range(n_seeds):
        sel = select_assignments(pool, budget=3, audit_share=0.3, strategy=strategy, random_state=seed)
        hits[sel.case, sel.expert] += 1
        design += sel.design / n_seeds
    for j in range(2):
        for r in range(2):
            for y in range(2):
                group = (pool.region == r) & (pool.stratum == y)
                p = design[j, r, y]
                observed = hits[group, j].mean() / n_seeds
                se = np.sqrt(p * (1 - p) / (n_seeds * group.sum()))
                assert abs(observed - p) <= 4 * se + 1e-3, (j, r, y, observed, p)


# --------------------------------------------------------------------------- unbiasedness


@pytest.mark.slow
def test_audit_estimate_of_accuracy_is_unbiased():
    # Design-based unbiasedness of the audit (Horvitz & Thompson, JASA 1952): over many seeds the
    # Horvitz-Thompson estimate of an expert's accuracy over its eligible cases averages to the
    # true accuracy within three standard errors, although the rest of the round is targeted
    # (value strategy) at regions where the expert's accuracy differs. Seeded simulation, numpy only.
    rng = np.random.default_rng(2024)
    n, n_regions = 500, 3
    region = rng.integers(0, n_regions, n)
    accuracy = np.array([0.95, 0.75, 0.55])[region]
    right = rng.random(n) < accuracy  # fixed finite population of the expert's correctness
    model_cost = np.array([0.02, 0.3, 0.5])[region] * rng.uniform(0.5, 1.5, n)
    answered = np.array([[30.0, 2.0, 2.0], [30.0, 30.0, 30.0]])
    pool = PlannerInput(eligible=np.ones((n, 2), bool), region=region, stratum=rng.integers(0, 2, n),
                fees=np.array([0.1, 0.15]), capacities=np.array([1.0, 1.0]),
                correct=answered * np.array([[0.95], [0.8]]), answered=answered, pending=np.zeros((2, n_regions)),
                model_cost=model_cost, population_region=region)
    truth = right.mean()
    estimates, targeted = [], []
    for seed in range(300):
        sel = select_assignments(pool, budget=4, audit_share=0.4, random_state=seed)
        audit = sel.audit & (sel.expert == 0)
        estimates.append((right[sel.case[audit]] / sel.selection_prob[audit]).sum() / n)
        chosen = ~sel.audit & (sel.expert == 0)
        targeted.append(right[sel.case[chosen]].mean())
    estimates = np.array(estimates)
    se = estimates.std(ddof=1) / np.sqrt(estimates.size)
    assert abs(estimates.mean() - truth) < 3 * se
    # the targeted picks are not a sample of the population: their mean is far off (shows the test has teeth)
    assert abs(np.mean(targeted) - truth) > 3 * se


def test_router_focus_hand_example():
    # margin sampling on the router's deferral decision (Scheffer, Decomain & Wrobel, IDA 2001):
    # expert j is in focus when its cost is within the margin of the best *other* option
    # (hand-worked; columns: class 0, class 1, expert A, expert B)
    E = np.array([
        [0.10, 0.90, 0.30, 0.15],   # model best (0.10): B within 0.1 -> in, A (0.30) out
        [0.40, 0.60, 0.20, 0.50],   # A best: its best other is the model (0.40) -> in; B 0.50 > 0.20 + 0.1
        [0.40, 0.60, 0.45, 0.45],   # A and B tie at 0.45 against the model's 0.40: both within 0.1
    ])
    assert router_focus(E, 2, 0.1, False).tolist() == [[False, True], [True, False], [True, True]]
    assert router_focus(E, 2, 0.0, False).tolist() == [[False, False], [True, False], [False, False]]
    with pytest.raises(ValueError):
        router_focus(E, 2, -0.1)
    with pytest.raises(ValueError):
        router_focus(E[:, :1], 2)


def test_two_sided_focus_hand_example():
    # margin sampling proper (Scheffer, Decomain & Wrobel, IDA 2001): the margin between the
    # option and its best alternative, on either side (the default); same hand-worked matrix
    E = np.array([
        [0.10, 0.90, 0.30, 0.15],   # B within 0.1 above the model: in either way
        [0.40, 0.60, 0.20, 0.50],   # A beats the model by 0.20 > 0.1: a clear choice, out when two-sided
        [0.40, 0.60, 0.45, 0.45],   # A and B within 0.05 of the model: in
    ])
    assert router_focus(E, 2, 0.1).tolist() == [[False, True], [False, False], [True, True]]
    # per expert: only A two-sided; B as one-sided (row 2: B 0.50 > 0.20 + 0.1, out either way)
    assert router_focus(E, 2, 0.1, np.array([True, False])).tolist() == [[False, True], [False, False], [True, True]]
    assert router_focus(E, 2, 0.1, np.array([False, True])).tolist() == router_focus(E, 2, 0.1, False).tolist()
    # with a margin of 0.25 A's clear choice (0.20 below the model) is open again
    assert router_focus(E, 2, 0.25)[1].tolist() == [True, False]
    # at margin 0 only exact ties are open: none here
    assert not router_focus(E, 2, 0.0).any()
    for bad in (np.array([True]), np.array([1, 0]), "yes"):
        with pytest.raises(ValueError, match="two_sided"):
            router_focus(E, 2, 0.1, bad)


def test_focus_limits_the_strategy_but_not_the_audit_or_random():
    pool = make_pool(seed=3)
    rng = np.random.default_rng(0)
    focus = rng.uniform(size=pool.eligible.shape) < 0.3
    for strategy in ("value", "uncertain"):
        sel = select_assignments(pool, budget=20.0, strategy=strategy, audit_share=0.2, focus=focus, random_state=1)
        own = ~sel.audit
        assert own.any() and focus[sel.case[own], sel.expert[own]].all()
        # the audit stays a simple random sample of the eligible pairs (common practice):
        # with 30% of the pairs in focus, an audit of this size almost surely leaves it
        assert not focus[sel.case[sel.audit], sel.expert[sel.audit]].all()
    sel = select_assignments(pool, budget=20.0, strategy="random", audit_share=0.0, focus=focus, random_state=1)
    assert not focus[sel.case, sel.expert].all()
    with pytest.raises(ValueError):
        select_assignments(pool, budget=20.0, focus=focus[:, :2])


def test_focus_that_runs_out_leaves_the_rest_to_the_other_pairs():
    # common practice: a round spends its budget; when the router has few open decisions the
    # focused pairs go first and the rest is spent outside the focus by the same strategy
    pool = make_pool(seed=4)
    focus = np.zeros(pool.eligible.shape, dtype=bool)
    focus[:6, 0] = True
    sel = select_assignments(pool, budget=5.0, strategy="value", audit_share=0.0, focus=focus, random_state=2)
    picked = set(zip(sel.case.tolist(), sel.expert.tolist()))
    assert {(i, 0) for i in range(6)} <= picked
    assert len(picked) > 6
    assert sel.budget_used > 5.0 - max(pool.fees)
