"""Scoring (case, expert) pairs and choosing a labelling round under a budget and capacities.

Pure functions over arrays: no workspace, no files (``routeplan.rounds`` does the I/O).

The decision model
------------------
Cases are split into regions of the feature space (k-means, see
:func:`routeplan.regions.regions_from_features`). For case ``i`` the options are

* the model: expected cost ``C * (1 - max_k P(k | x_i))`` (``C`` = cost of one error,
  ``P(y | x)`` from :func:`class_probabilities`);
* expert ``j``: ``(1 - acc_jr) * C + fee_j``, where ``acc_jr`` is the posterior mean of the
  expert's accuracy in the case's region ``r``: a Beta posterior from the answers on cases
  with known truth (Beta-binomial conjugacy, e.g. Gelman et al., *Bayesian Data Analysis*,
  3rd ed., 2013, ch. 2).

A region's decision cost is the sum over the workspace's cases in it of the cheapest option.

Strategies
----------
``value`` (default)
    Value of information per unit of fee, in the knowledge-gradient style (Frazier, Powell &
    Dayanik, "A knowledge-gradient policy for sequential information collection", SIAM J.
    Control Optim. 47(5), 2008; for labelling under a budget with Beta posteriors, Chen, Lin
    & Zhou, "Optimistic knowledge gradient policy for optimal budget allocation in
    crowdsourcing", ICML 2013). The knowledge gradient of ``q`` more answers of expert ``j``
    in region ``r`` is the expected drop of the region's decision cost after the Beta
    update (:func:`knowledge_gradient`); a cell is scored by the best ``KG_q / (q * fee)``
    over ``q`` in 1, 2, 4, ..., 64, the KG(*) rule of Frazier & Powell ("Paradoxes in
    learning and the marginal value of information", Decision Analysis 7(4), 2010), which
    keeps a cell whose single answer cannot change a decision from scoring zero. Cells are
    chosen greedily; after each pick the cell's Beta posterior takes a "fantasy" update
    (pseudo-counts grow by the expected outcome, so its mean stays and its variance
    shrinks), so a batch does not pile onto one cell. Ties go to the larger posterior
    variance per fee.

    A cell is bought by value only while its knowledge gradient per answer is at least
    ``min_value_per_fee`` times its fee (default 3: an answer must be expected to save at
    least three times what it costs, summed over the population's cases, which stand in for
    the cases the policy will route; the region model behind the knowledge gradient is
    coarser than the router that decides, so its value is discounted). Measured
    (``benchmarks/bench_rounds.py``, 2 router fits per point, with the router's focus): with
    a bar of 1 the median budget to get within 0.01 of the full-information cost was 96.6
    fee units on the synthetic scenario and 3.4 on digits over seeds 0-7, 137 and 5.7 over
    seeds 0-11 (median of the per-seed budgets of a run on seeds 0-7 and one with
    ``--first-seed 8 --seeds 4``); with 3, 80 and 3.4 over seeds 0-7, 96.6 and 4.8 over
    seeds 0-11 (``random`` 273 and 10.8, then 273 and 27.3). On seeds 12-19, not used for
    the choice, bar 3 needed 96.6 against ``random``'s 226 on the synthetic scenario and 6.8
    against 19.3 on digits (ratios 0.43 and 0.35, against 0.29 and 0.32 on seeds 0-7; bar 1
    was not run on those seeds). The budget left after that is spread over the cells of the
    experts that could matter, leaving out (expert, region) cells where the expert, even if
    always right, would not beat the model's cost on any case. By default
    (``spread="variance"``) the rest goes greedily to the cell of largest posterior variance
    of its accuracy per unit of fee, with the same fantasy update (as ``uncertain`` ranks
    cells), so that every cell the router may need is learned, the cheap ones first;
    ``spread="spend"`` gives each expert a spend proportional to its remaining pairs and
    ``spread="pairs"`` picks proportional to them (as ``random``), then per region in
    proportion to size. The reasons are measured, not assumed
    (``benchmarks/bench_rounds.py``, synthetic scenario, 8 seeds, 2 router fits per point):
    the router learns ``P(right | x)`` from the answers and extrapolates where it has none,
    so it needs answers spread over the feature space, which the knowledge gradient of the
    region model cannot value. Mean over the budget schedule of the median gap to the
    full-information cost: ``variance`` 0.025, ``spend`` 0.034, ``pairs`` 0.037 (``random``
    0.039); with ``variance`` the median curve is at or below ``random``'s at every budget,
    with the others not at the smallest budgets. Leaving out cells where an expert is
    dominated by another (95% Beta credible bounds) made things worse (median budget to
    reach the full-information cost 226 against 160 fee units; 5 seeds). See also "Focus"
    below.
    ``min_value_per_fee=0`` keeps the greedy to the end.
``uncertain``
    Largest posterior variance of the cell's accuracy per unit of fee, with the same fantasy
    update (uncertainty sampling at the level of the cell; Lewis & Gale, SIGIR 1994).
``random``
    Uniform over eligible pairs: each expert gets a number of picks proportional to its
    eligible cases, drawn by simple random sampling.

Both ``value`` and ``uncertain`` first keep a floor of exploration: every (expert, region)
cell whose accuracy is not yet known tightly (fewer than ``tight_n`` answers with truth and
a posterior standard deviation of at least ``tight_sd``) gets up to ``explore_min`` picks,
handed out round-robin in a seeded order, spending at most ``explore_share`` of the budget
left after the audit (so that on a small budget the floor does not crowd out the chosen
strategy). On a cold start (no answers) every cell is loose, so the first round is spread
over experts and regions; inside a cell the picks are spread over classes (below), so it is
spread over classes too.

Focus on the router's open decisions
------------------------------------
``focus`` (from :func:`router_focus`) restricts what ``value`` and ``uncertain`` may pick,
after the audit, to the pairs where the current router's estimated cost of asking the expert
is within a margin of its best other option, on either side: the cases where the router's
choice about that expert is open, so that an answer there can change one of its decisions
(two-sided since 12-05; the measurements below first describe the one-sided focus that held
also the cases the router clearly sends to the expert). This is margin sampling (Scheffer,
Decomain & Wrobel, "Active hidden Markov models for information extraction", IDA 2001)
applied to the router's deferral decisions, with the router's own beliefs: where it wrongly
trusts an expert near one of its decisions, the pairs are in focus and the answers correct
it; where it rightly distrusts one, no money goes there (the audit still samples
everywhere). The audit, the floor's seeded order and ``random`` are unchanged; within the focused pairs the cell counts,
the spread over classes and the selection probabilities are as below. When the focused pairs
run out before the budget (a confident router has few open decisions), the rest is spent on
the pairs out of focus by the same strategy, so a round spends what ``random`` would. The
design of a round treats the focus as part of eligibility, or, when the rest went outside
it, averages the chances over both: an approximation, since within a group the focused cases
were likelier to be asked. Measured (``benchmarks/bench_rounds.py``, 8 seeds, 2 router fits
per point, margin 0.1, against the same planner without focus; both then spread picks over
the true classes, weighted the answers and used a knowledge-gradient bar of 1): on the
synthetic scenario the median budget to get within 0.01 of the full-information cost fell from 160 to 113 fee
units (``random`` 273), staying within from 193 to 113 (``random`` 320), and the median
curve goes below the full-information cost from 160 fee units; on digits from 9.7 to 4.8
(``random`` 10.8), staying within from 9.7 to 6.8 (``random`` 16). Margins 0.05 and 0.2 did
worse on the synthetic scenario (median budget 137 for both; mean over the schedule of the
median gap 0.028 and 0.026, against 0.024 with 0.1). Without the fallback to the pairs out
of focus (the same script on that version), ``value`` left up to half of the digits budget
unspent and was worse than ``random`` at the four largest budgets. A focus drawn from the
*true* costs instead fails badly (``benchmarks/probe_focus.py``): the router must see its
own mistakes, not only the places that matter.

The one-sided focus (``router_focus(..., two_sided=False)``, ``bench_rounds.py
--one-sided-focus``) also held every case the router sends to the expert by more than the
margin, so much of the cheapest expert's budget confirmed what the router already believed;
on the synthetic scenario its remaining mistakes lie near the boundaries between regions of
competence, not far from the expert's answers (``benchmarks/probe_misroutes.py``). Measured
(``bench_rounds.py --first-seed 108 --seeds 16 --strategies value,random``, seeds fresh for
every setting, on a copy of the library with each focus): on the synthetic scenario ``value``
needed 80 fee units against ``random``'s 226 (0.35; read between budgets 70.2 against 213,
0.33) with the two-sided focus and 113 (0.50; 98.6 against 213) with the one-sided one, the
seed-paired difference of the gap -0.0036 over the schedule and -0.0125 at 56.6 fee units
(standard error 0.0027); on digits 1.41 against 4 (0.35; between budgets 0.28) and 1.91
(0.48; 0.45), -0.0012 over the schedule. On seeds 92-107, where it was chosen among four
variants, -0.0018 on the synthetic scenario and +0.0014 on digits (reaching the target at
2.41 against 1.41 fee units); over the 32 seeds -0.0027 and +0.0001. On seeds 124-139, also
fresh, the synthetic median reach stayed at 113 fee units (0.59 of ``random``'s) with either focus
but the two-sided curve was lower, -0.0026 over the schedule; over the 48 seeds 92-139 the
synthetic ratio read between budgets is 0.42 against 0.50.

Audit share
-----------
``audit_share`` of the budget is spent first, by simple random sampling of each expert's
eligible cases, with equal counts per expert (water-filling) as far as fees, caps and
eligible cases allow; these picks are flagged ``audit``. Because each expert's audit is a
simple random sample of its eligible cases, its mean correctness is an unbiased estimate of
the expert's accuracy over them (Horvitz & Thompson, JASA 47(260), 1952; stratified sampling
with the expert as stratum, Cochran, *Sampling Techniques*, 3rd ed., 1977, ch. 5).

Selection probabilities
-----------------------
Every pick records the probability that it was chosen, given the counts the planner fixed
from cell-level figures (conditional on those counts):

* audit: ``a_j / e_j``: audit picks of expert ``j`` over its eligible cases;
* ``random``: ``k_j / e'_j``: picks of expert ``j`` over its eligible cases left after
  the audit;
* ``value`` and ``uncertain``: within a cell the picks are spread over the classes present
  (the strata: the model's predicted classes, as :mod:`routeplan.rounds` passes them): each
  class gets one pick, the rest go in proportion to the class's eligible cases (largest
  remainders), and the cases are drawn by simple random sampling inside each (cell, class).
  A pick's probability is ``k_cy / e_cy``; when a cell has fewer picks than classes, the
  classes that get one are drawn at random and the probability is ``(k_c / S_c) / e_cy``
  (``S_c`` classes present).

Design of a round
-----------------
``Selection.design[j, r, s]`` is the probability that a case eligible for expert ``j`` in
region ``r`` and stratum ``s`` was asked of that expert in the round, by the audit or by the
strategy: ``p_audit + (1 - p_audit) * p_strategy`` (the strategy draws from what the audit
left). Unlike ``selection_prob`` (the probability of the part that made the pick, which the
audit's unbiased estimates need), it covers the whole round and every group, picked or not,
so that answers of several rounds and parts can be weighted together
(:func:`routeplan.rehearse.stabilized_weights`).

Budget, caps and capacities
---------------------------
Spend is the sum of the fees of the picks; fees below ``fee_floor * error_cost`` count as
that floor when spending (so an expert with fee 0 cannot absorb an unbounded round), while
the fee recorded stays the real one. ``max_per_expert`` caps each expert's picks in the
round (audit included). Capacity is read as the largest share of the round's candidate
cases an expert may be asked about: ``n_j <= ceil(capacity_j * n_cases)`` (``n_cases`` = rows
of the pool). It is the same share that bounds the expert's workload when routing, so a
round never asks an expert about more cases than it could be sent. An expert with capacity 0 gets nothing.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.special import betaln, gammaln

__all__ = [
    "STRATEGIES",
    "PlannerInput",
    "cell_counts",
    "Selection",
    "RegionCosts",
    "beta_posterior",
    "betabinomial_pmf",
    "class_probabilities",
    "model_decision_cost",
    "knowledge_gradient",
    "router_focus",
    "select_assignments",
]

STRATEGIES = ("value", "uncertain", "random")
"""Names accepted by :func:`select_assignments`."""

_KG_GRID = (1, 2, 4, 8, 16, 32, 64)
_BIG = np.iinfo(np.int64).max // 4
_EPS = 1e-9


# --------------------------------------------------------------------------- inputs and outputs


@dataclass(frozen=True)
class PlannerInput:
    """What the planner knows about one round's candidates, as arrays.

    Attributes
    ----------
    eligible : ndarray of bool of shape (n_cases, n_experts)
        True where the pair may be asked (not answered, not assigned before).
    region : ndarray of int of shape (n_cases,)
        Region code ``0..n_regions-1`` of each candidate case.
    stratum : ndarray of int of shape (n_cases,)
        Class code of each candidate, to spread picks; :mod:`routeplan.rounds` passes the
        model's predicted class (a function of the features, so that the chance of being
        asked does not depend on the outcome).
    fees : ndarray of shape (n_experts,)
        Fee per case of each expert (>= 0).
    capacities : ndarray of shape (n_experts,)
        Largest share of the round's assignments each expert may take, in [0, 1].
    correct : ndarray of shape (n_experts, n_regions)
        Answers on cases with truth that were right, per expert and region.
    answered : ndarray of shape (n_experts, n_regions)
        Answers on cases with truth, per expert and region.
    pending : ndarray of shape (n_experts, n_regions)
        Open assignments of earlier rounds (answers still to come).
    model_cost : ndarray of shape (n_population,)
        Expected cost of letting the model decide each case of the population (every
        case of the workspace, with or without truth).
    population_region : ndarray of int of shape (n_population,)
        Region code of each population case.
    error_cost : float, default=1.0
        Cost of one wrong decision, in the unit of fees.
    """

    eligible: NDArray[np.bool_]
    region: NDArray[np.int64]
    stratum: NDArray[np.int64]
    fees: NDArray[np.float64]
    capacities: NDArray[np.float64]
    correct: NDArray[np.float64]
    answered: NDArray[np.float64]
    pending: NDArray[np.float64]
    model_cost: NDArray[np.float64]
    population_region: NDArray[np.int64]
    error_cost: float = 1.0

    @property
    def n_regions(self) -> int:
        """Number of regions."""
        return int(self.correct.shape[1])

    @property
    def n_experts(self) -> int:
        """Number of experts."""
        return int(self.eligible.shape[1])


@dataclass(frozen=True)
class Selection:
    """A chosen round.

    Attributes
    ----------
    case : ndarray of int of shape (n_picks,)
        Row of each pick in the pool.
    expert : ndarray of int of shape (n_picks,)
        Expert index of each pick.
    selection_prob : ndarray of shape (n_picks,)
        Probability with which each pick was chosen (see the module docstring).
    audit : ndarray of bool of shape (n_picks,)
        True for the audit share.
    cell_picks : ndarray of int of shape (n_experts, n_regions)
        Picks per expert and region, audit included.
    gain : ndarray of shape (n_experts,)
        Expected drop of the summed decision cost if the picks are answered, per expert:
        the knowledge gradient of each cell's picks from the posterior before the round,
        summed over the expert's regions (cells taken one at a time).
    spend : ndarray of shape (n_experts,)
        Sum of the real fees of each expert's picks.
    audit_spend : float
        Sum of the real fees of the audit picks.
    budget_used : float
        Spend as counted against the budget (fees below the floor count as the floor).
    notes : tuple of str
        Why budget was left, if it was.
    design : ndarray of shape (n_experts, n_regions, n_strata)
        Probability that a case eligible for expert ``j`` in region ``r`` and stratum ``s``
        was chosen for that expert in this round, by the audit or the strategy (see
        "Design of a round" in the module docstring).
    """

    case: NDArray[np.int64]
    expert: NDArray[np.int64]
    selection_prob: NDArray[np.float64]
    audit: NDArray[np.bool_]
    cell_picks: NDArray[np.int64]
    gain: NDArray[np.float64]
    spend: NDArray[np.float64]
    audit_spend: float
    budget_used: float
    notes: tuple[str, ...] = field(default_factory=tuple)
    design: NDArray[np.float64] = field(default_factory=lambda: np.zeros((0, 0, 0)))


# --------------------------------------------------------------------------- building blocks


def beta_posterior(
    correct: ArrayLike, answered: ArrayLike, prior: tuple[float, float] = (1.0, 1.0)
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Beta posterior of an accuracy from ``correct`` successes in ``answered`` trials.

    Beta-binomial conjugacy (e.g. Gelman et al., *Bayesian Data Analysis*, 3rd ed., 2013,
    section 2.4): ``Beta(a0 + correct, b0 + answered - correct)``.

    Parameters
    ----------
    correct, answered : array-like of the same shape
        Counts, ``0 <= correct <= answered``.
    prior : tuple of float, default=(1.0, 1.0)
        Prior pseudo-counts ``(a0, b0)``; both > 0. The default is uniform.

    Returns
    -------
    alpha, beta : ndarray
    """
    k = np.asarray(correct, dtype=np.float64)
    n = np.asarray(answered, dtype=np.float64)
    if k.shape != n.shape or np.any(k < 0) or np.any(k > n):
        raise ValueError("correct and answered must have one shape with 0 <= correct <= answered")
    a0, b0 = float(prior[0]), float(prior[1])
    if not (a0 > 0 and b0 > 0):
        raise ValueError(f"prior pseudo-counts must be positive, got {prior!r}")
    return a0 + k, b0 + (n - k)


def _beta_var(alpha: NDArray[np.float64], beta: NDArray[np.float64]) -> NDArray[np.float64]:
    """Variance of Beta(alpha, beta)."""
    total = alpha + beta
    return alpha * beta / (total * total * (total + 1.0))


def betabinomial_pmf(s: ArrayLike, q: ArrayLike, alpha: float, beta: float) -> NDArray[np.float64]:
    """Probability of ``s`` successes in ``q`` trials whose rate has a Beta(alpha, beta) law.

    ``C(q, s) B(s + alpha, q - s + beta) / B(alpha, beta)`` (the beta-binomial law; Gelman
    et al., 2013, appendix A), computed in logs.

    Parameters
    ----------
    s : array-like of int
        Success counts in ``0..q``.
    q : int or array-like of int
        Number of trials, >= 0 (broadcast against ``s``).
    alpha, beta : float
        Positive Beta parameters.

    Returns
    -------
    ndarray of float
    """
    s = np.asarray(s, dtype=np.float64)
    q = np.asarray(q, dtype=np.float64)
    log_choose = gammaln(q + 1.0) - gammaln(s + 1.0) - gammaln(q - s + 1.0)
    return np.exp(log_choose + betaln(s + alpha, q - s + beta) - betaln(alpha, beta))


def class_probabilities(
    X: ArrayLike,
    y: ArrayLike,
    n_classes: int,
    *,
    random_state: int | np.random.Generator | None = 0,
    fit_size: int = 20_000,
) -> NDArray[np.float64]:
    """Estimate ``P(y | x)`` for every case from the cases with truth.

    A multinomial logistic regression (scikit-learn ``LogisticRegression``, L2 penalty
    ``C=1``) on standardised features, fitted on at most ``fit_size`` cases with truth
    (a seeded random subset beyond that). With fewer than two classes among the truth,
    or fewer than ten cases with truth, it falls back to the class frequencies with one
    pseudo-count each (Laplace's rule of succession).

    Parameters
    ----------
    X : array-like of shape (n_cases, n_features)
    y : array-like of int of shape (n_cases,)
        Class code ``0..n_classes-1``, or -1 where truth is unknown.
    n_classes : int
    random_state : int, Generator or None, default=0
        Seed of the subset.
    fit_size : int, default=20_000

    Returns
    -------
    ndarray of shape (n_cases, n_classes)
        Rows sum to 1; classes missing from the truth get probability 0 under the model.
    """
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.int64)
    if X.ndim != 2 or y.shape != (X.shape[0],):
        raise ValueError("X must be 2-D and y must have one code per row of X")
    known = np.flatnonzero(y >= 0)
    present = np.unique(y[known])
    if present.size < 2 or known.size < 10 or X.shape[1] == 0:
        counts = np.bincount(y[known], minlength=n_classes)[:n_classes] + 1.0
        return np.tile(counts / counts.sum(), (X.shape[0], 1))
    rng = np.random.default_rng(random_state)
    if known.size > fit_size:
        known = np.sort(rng.choice(known, int(fit_size), replace=False))
    model = make_pipeline(StandardScaler(), LogisticRegression(max_iter=500))
    model.fit(X[known], y[known])
    proba = np.zeros((X.shape[0], n_classes))
    proba[:, model.classes_] = model.predict_proba(X)
    return proba


def cell_counts(case: ArrayLike, expert: ArrayLike, answer: ArrayLike, truth: ArrayLike,
                region: ArrayLike, n_experts: int, n_regions: int) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Answers on cases with truth, right and in all, per (expert, region).

    Parameters
    ----------
    case, expert, answer : array-like of int of shape (n_answers,)
        Case row, expert index and label code of each answer; rows with a negative case or
        expert index are ignored.
    truth : array-like of int of shape (n_cases,)
        Label code per case, -1 where unknown (such answers are not counted).
    region : array-like of int of shape (n_cases,)
    n_experts, n_regions : int

    Returns
    -------
    correct, answered : ndarray of shape (n_experts, n_regions)
    """
    case, expert, answer = (np.asarray(a, dtype=np.int64) for a in (case, expert, answer))
    truth, region = np.asarray(truth, dtype=np.int64), np.asarray(region, dtype=np.int64)
    correct, answered = np.zeros((n_experts, n_regions)), np.zeros((n_experts, n_regions))
    keep = (case >= 0) & (expert >= 0)
    keep[keep] &= truth[case[keep]] >= 0
    case, expert, answer = case[keep], expert[keep], answer[keep]
    np.add.at(answered, (expert, region[case]), 1.0)
    np.add.at(correct, (expert, region[case]), (answer == truth[case]).astype(float))
    return correct, answered


def model_decision_cost(proba: ArrayLike, error_cost: float = 1.0) -> NDArray[np.float64]:
    """Expected cost of letting the model decide: ``error_cost * (1 - max_k P(k | x))``.

    The Bayes decision under 0/1 loss scaled by ``error_cost`` picks the most probable class,
    whose probability of being wrong is ``1 - max_k P(k | x)`` (Chow, IRE Trans. Electronic
    Computers 1957, the reject-option rule).

    Parameters
    ----------
    proba : array-like of shape (n_cases, n_classes)
    error_cost : float, default=1.0

    Returns
    -------
    ndarray of shape (n_cases,)
    """
    p = np.asarray(proba, dtype=np.float64)
    return float(error_cost) * (1.0 - p.max(axis=1))


class RegionCosts:
    """Model costs of the population sorted per region, to sum ``min(model cost, t)`` fast.

    Parameters
    ----------
    model_cost : array-like of shape (n_population,)
    region : array-like of int of shape (n_population,)
    n_regions : int
    """

    def __init__(self, model_cost: ArrayLike, region: ArrayLike, n_regions: int) -> None:
        cost = np.asarray(model_cost, dtype=np.float64)
        reg = np.asarray(region, dtype=np.int64)
        order = np.lexsort((cost, reg))
        cost, reg = cost[order], reg[order]
        bounds = np.searchsorted(reg, np.arange(n_regions + 1))
        self._sorted = [cost[bounds[r] : bounds[r + 1]] for r in range(n_regions)]
        self._prefix = [np.concatenate(([0.0], np.cumsum(s))) for s in self._sorted]

    def size(self, r: int) -> int:
        """Number of population cases in region ``r``."""
        return int(self._sorted[r].size)

    def max(self, r: int) -> float:
        """Largest model cost in region ``r`` (0 if empty)."""
        return float(self._sorted[r][-1]) if self._sorted[r].size else 0.0

    def total(self, r: int, t: ArrayLike) -> NDArray[np.float64]:
        """``sum_i min(model_cost_i, t)`` over region ``r``, for each threshold in ``t``."""
        t = np.asarray(t, dtype=np.float64)
        k = np.searchsorted(self._sorted[r], t, side="left")
        return self._prefix[r][k] + (self._sorted[r].size - k) * t


def knowledge_gradient(
    costs: RegionCosts,
    r: int,
    alpha: float,
    beta: float,
    q: int,
    fee: float,
    other: float,
    error_cost: float = 1.0,
) -> float:
    """Expected drop of region ``r``'s decision cost after ``q`` more answers of one expert.

    With the expert's accuracy ``~ Beta(alpha, beta)``, ``s`` right answers out of ``q``
    follow the beta-binomial law and move the posterior mean to
    ``(alpha + s) / (alpha + beta + q)``. The region's decision cost at mean accuracy ``mu``
    is ``V(mu) = sum_i min(m_i, min((1 - mu) * C + fee, other))`` (``m_i`` the model costs).
    The knowledge gradient (Frazier, Powell & Dayanik, SIAM J. Control Optim. 2008) is
    ``V(mu_now) - E_s[V(mu_s)]``; it is >= 0 because ``V`` is concave in ``mu`` and the
    posterior mean is a martingale.

    Parameters
    ----------
    costs : RegionCosts
    r : int
        Region.
    alpha, beta : float
        Current Beta posterior of the expert's accuracy in the region.
    q : int
        Number of further answers, >= 1.
    fee : float
        The expert's fee.
    other : float
        Expected cost of the best other expert in the region (``inf`` if none).
    error_cost : float, default=1.0

    Returns
    -------
    float
    """
    return float(_kg(costs, r, alpha, beta, (int(q),), fee, other, error_cost)[0])


def _kg(costs: RegionCosts, r: int, alpha: float, beta: float, qs: tuple[int, ...],
        fee: float, other: float, error_cost: float) -> NDArray[np.float64]:
    """Knowledge gradient for each ``q`` in ``qs`` (one region, one expert), in one pass."""
    now = min((1.0 - alpha / (alpha + beta)) * error_cost + fee, other)
    v_now = float(costs.total(r, [now])[0])
    q = np.asarray(qs, dtype=np.int64)
    sizes = q + 1
    starts = np.cumsum(sizes) - sizes
    q_rep = np.repeat(q, sizes).astype(np.float64)
    s = np.arange(int(sizes.sum()), dtype=np.float64) - np.repeat(starts, sizes)
    pmf = betabinomial_pmf(s, q_rep, alpha, beta)
    mean = (alpha + s) / (alpha + beta + q_rep)
    after = np.minimum((1.0 - mean) * error_cost + fee, other)
    expected = np.add.reduceat(pmf * costs.total(r, after), starts) / np.add.reduceat(pmf, starts)
    return np.maximum(0.0, v_now - expected)


# --------------------------------------------------------------------------- budget ledger


def _capacity_limit(n_cases: int, capacity: float) -> int:
    """Most picks an expert may take in a round over ``n_cases`` candidates: ``ceil(c * n_cases)``."""
    if capacity >= 1.0:
        return _BIG
    return max(0, math.ceil(capacity * n_cases - _EPS))


def _whole(x: float) -> int:
    """``floor(x)`` as an int, at most ``_BIG`` (a budget divided by a tiny fee may be inf)."""
    return _BIG if not x < _BIG else int(math.floor(x))


class _Ledger:
    """Picks per expert, picks in all, and budget left (counted with the fee floor)."""

    def __init__(self, fee_eff: NDArray[np.float64], capacities: NDArray[np.float64],
                 max_per_expert: int | None, budget: float, n_cases: int) -> None:
        self.fee = fee_eff
        self.limit = np.array([_capacity_limit(n_cases, float(c)) for c in capacities], dtype=np.int64)
        self.max_per = _BIG if max_per_expert is None else int(max_per_expert)
        self.n = np.zeros(fee_eff.size, dtype=np.int64)
        self.total = 0
        self.left = float(budget)
        self.tol = _EPS * max(1.0, float(budget))

    def room(self, j: int, left: float | None = None) -> int:
        """Most picks expert ``j`` can take now (budget, cap, capacity)."""
        money = self.left if left is None else left
        afford = _whole((money + self.tol) / float(self.fee[j])) if money + self.tol >= self.fee[j] else 0
        cap = int(self.limit[j] - self.n[j])
        return max(0, min(afford, cap, self.max_per - int(self.n[j])))

    def take(self, j: int, q: int) -> float:
        """Book ``q`` picks of expert ``j``; return what they cost against the budget."""
        self.n[j] += q
        self.total += q
        cost = q * float(self.fee[j])
        self.left -= cost
        return cost


# --------------------------------------------------------------------------- the planner


def _check_pool(pool: PlannerInput) -> None:
    """Check shapes and ranges of a PlannerInput."""
    n, m = pool.eligible.shape
    r = pool.n_regions
    if pool.region.shape != (n,) or pool.stratum.shape != (n,):
        raise ValueError("region and stratum must have one entry per row of eligible")
    if pool.fees.shape != (m,) or pool.capacities.shape != (m,):
        raise ValueError("fees and capacities must have one entry per expert")
    for name in ("correct", "answered", "pending"):
        if getattr(pool, name).shape != (m, r):
            raise ValueError(f"{name} must have shape (n_experts, n_regions)")
    if np.any(pool.fees < 0) or np.any((pool.capacities < 0) | (pool.capacities > 1)):
        raise ValueError("fees must be >= 0 and capacities in [0, 1]")
    if n and (pool.region.min() < 0 or pool.region.max() >= r):
        raise ValueError("region codes must lie in 0..n_regions-1")
    if n and pool.stratum.min() < 0:
        raise ValueError("stratum codes must be >= 0")
    if pool.model_cost.shape != pool.population_region.shape:
        raise ValueError("model_cost and population_region must have the same shape")
    if not (np.isfinite(pool.error_cost) and pool.error_cost > 0):
        raise ValueError("error_cost must be a positive number")


def router_focus(expected_costs: ArrayLike, n_classes: int, margin: float = 0.1,
                 two_sided: bool | ArrayLike = True) -> NDArray[np.bool_]:
    """Pairs where the current router's choice about the expert is open.

    Parameters
    ----------
    expected_costs : array-like of shape (n_cases, n_classes + n_experts)
        The router's estimated expected cost of every option (``predict_costs``): the
        model deciding class ``k < K``, then each expert.
    n_classes : int
        K.
    margin : float, default=0.1
        In units of one error: expert ``j`` is in focus on a case when its estimated cost
        is within ``margin`` of the best other option's.
    two_sided : bool or array-like of bool of shape (n_experts,), default=True
        Within the margin on either side (margin sampling), so that the cases the router
        sends to the expert by more than the margin are left out; False (for every expert,
        or per expert) keeps them too: the expert's cost at most the best other option's
        plus ``margin``, the one-sided focus of the versions before 12-05.

    Returns
    -------
    ndarray of bool of shape (n_cases, n_experts)
    """
    E = np.asarray(expected_costs, dtype=np.float64)
    K = int(n_classes)
    if E.ndim != 2 or not 0 < K <= E.shape[1] or not np.all(np.isfinite(E)):
        raise ValueError(f"expected_costs must be a finite (n, K + M) matrix with K = {K}")
    if not (np.isfinite(margin) and margin >= 0):
        raise ValueError(f"margin must be a number >= 0, got {margin!r}")
    M = E.shape[1] - K
    sides = np.asarray(two_sided)
    if sides.dtype != bool or sides.shape not in ((), (M,)):
        raise ValueError(f"two_sided must be a bool or {M} bools, one per expert")
    sides = np.broadcast_to(sides, (M,))
    focus = np.zeros((E.shape[0], M), dtype=bool)
    if M == 0 or E.shape[0] == 0:
        return focus
    # best and second-best option per case: the best other option of the arg-min is the second
    order = np.argsort(E, axis=1, kind="stable")[:, :2]  # K >= 1 and M >= 1: two options at least
    rows = np.arange(E.shape[0])
    best, second = E[rows, order[:, 0]], E[rows, order[:, 1]]
    for j in range(M):
        other = np.where(order[:, 0] == K + j, second, best)
        gap = E[:, K + j] - other
        focus[:, j] = (np.abs(gap) if sides[j] else gap) <= margin
    return focus


def select_assignments(
    pool: PlannerInput,
    *,
    budget: float,
    strategy: str = "value",
    audit_share: float = 0.1,
    max_per_expert: int | None = None,
    explore_min: int = 2,
    explore_share: float = 0.2,
    tight_sd: float = 0.1,
    tight_n: int = 10,
    prior: tuple[float, float] = (1.0, 1.0),
    fee_floor: float = 1e-3,
    min_value_per_fee: float = 3.0,
    spread: str = "variance",
    kg_min_answers: int = 0,
    max_steps: int = 2000,
    focus: ArrayLike | None = None,
    random_state: int | np.random.Generator | None = None,
) -> Selection:
    """Choose a round of (case, expert) assignments under a budget, caps and capacities.

    See the module docstring for the strategies, the audit share, the selection
    probabilities and the reading of capacities.

    Parameters
    ----------
    pool : PlannerInput
    budget : float
        Largest sum of fees, > 0.
    strategy : {"value", "uncertain", "random"}, default="value"
    audit_share : float, default=0.1
        Share of the budget spent on the uniformly drawn audit, in [0, 1].
    max_per_expert : int, optional
        Most assignments per expert in this round.
    explore_min : int, default=2
        Floor of picks per loose (expert, region) cell and round (value, uncertain).
    explore_share : float, default=0.2
        Largest share of the budget left after the audit that the floor may spend.
    tight_sd : float, default=0.1
        A cell is tight once its posterior standard deviation is below this...
    tight_n : int, default=10
        ...or once it has this many answers with truth (open assignments count).
    prior : tuple of float, default=(1.0, 1.0)
        Beta prior of every accuracy.
    fee_floor : float, default=1e-3
        Fees below ``fee_floor * error_cost`` count as that when spending and scoring.
    min_value_per_fee : float, default=3.0
        ``value`` buys a cell only while its knowledge gradient per answer is at least this
        times the fee; the rest of the budget is spread (module docstring). 0 keeps the
        greedy to the end.
    spread : {"variance", "spend", "pairs"}, default="variance"
        How ``value`` spreads the rest: by posterior variance of each cell's accuracy per
        unit of fee (greedy, as ``uncertain``), spend proportional to each expert's
        remaining pairs, or picks proportional to them (as ``random``).
    kg_min_answers : int, default=0
        ``value`` scores a cell by its knowledge gradient only once it holds this many
        answers with truth (earlier rounds' and this round's picks); looser cells are left
        to the variance spread.
    max_steps : int, default=2000
        Rough number of greedy steps; larger rounds take picks in chunks.
    focus : array-like of bool of shape (n_cases, n_experts), optional
        Pairs ``value`` and ``uncertain`` may pick after the audit (:func:`router_focus`);
        default every eligible pair. Ignored by ``random`` and by the audit.
    random_state : int, Generator or None
        Seed; the same seed and inputs give the same plan.

    Returns
    -------
    Selection
    """
    _check_pool(pool)
    if strategy not in STRATEGIES:
        raise ValueError(f"strategy must be one of {', '.join(STRATEGIES)}, got {strategy!r}")
    if not (np.isfinite(budget) and budget > 0):
        raise ValueError(f"budget must be a positive number, got {budget!r}")
    if not 0.0 <= audit_share <= 1.0:
        raise ValueError(f"audit_share must lie in [0, 1], got {audit_share!r}")
    if max_per_expert is not None and max_per_expert < 0:
        raise ValueError("max_per_expert must be >= 0")
    if not (np.isfinite(min_value_per_fee) and min_value_per_fee >= 0):
        raise ValueError(f"min_value_per_fee must be a number >= 0, got {min_value_per_fee!r}")
    if isinstance(kg_min_answers, bool) or not isinstance(kg_min_answers, (int, np.integer)) or kg_min_answers < 0:
        raise ValueError(f"kg_min_answers must be an integer >= 0, got {kg_min_answers!r}")
    if spread not in ("spend", "pairs", "variance"):
        raise ValueError(f"spread must be 'spend', 'pairs' or 'variance', got {spread!r}")
    if focus is not None:
        focus = np.asarray(focus)
        if focus.shape != pool.eligible.shape or focus.dtype != bool:
            raise ValueError(f"focus must be a boolean array of shape {pool.eligible.shape}")
    rng = np.random.default_rng(random_state)
    eligible = pool.eligible.copy()
    eligible[:, pool.capacities <= 0] = False
    fee_eff = np.maximum(pool.fees.astype(np.float64), fee_floor * pool.error_cost)
    ledger = _Ledger(fee_eff, pool.capacities.astype(np.float64), max_per_expert, budget, pool.eligible.shape[0])
    notes: list[str] = []

    audit_budget = audit_share * budget
    before = eligible.copy()
    counts = _audit_counts(ledger, eligible.sum(axis=0), audit_budget, rng)
    if audit_budget > 0 and counts.sum() == 0:
        notes.append("the audit share buys no assignment (fees, caps or eligible cases)")
    picks = [_draw_audit(eligible, counts, rng)]

    alpha, beta = _cell_posterior(pool, prior)
    costs = RegionCosts(pool.model_cost, pool.population_region, pool.n_regions)
    if strategy == "random":
        picks.append(_random_picks(eligible, ledger, rng, max_steps))
    else:
        options = (explore_min, explore_share, tight_sd, tight_n, min_value_per_fee, spread, kg_min_answers)
        unfocused = eligible.copy() if focus is not None else eligible
        if focus is not None:
            eligible &= focus  # in place: the design below reads the focused eligibility
        k = _cell_counts(pool, costs, eligible, ledger, alpha, beta, fee_eff, strategy, options, max_steps, rng)
        picks.append(_draw_cells(pool, eligible, k, rng))
        if focus is not None and ledger.left >= _cheapest_fee(ledger) - ledger.tol:
            # the focus ran out of pairs before the budget: the rest goes outside it, same strategy
            rest = unfocused & ~focus
            k = _cell_counts(pool, costs, rest, ledger, alpha, beta, fee_eff, strategy, options, max_steps, rng)
            if k.any():
                picks.append(_draw_cells(pool, rest, k, rng))
                eligible = unfocused  # the design: chances averaged over focused and other pairs
    case, expert, prob, audit = (np.concatenate(parts) for parts in zip(*picks))
    sel = _finish(pool, costs, case, expert, prob, audit, alpha, beta, ledger, budget, notes,
                  why_left="caps, capacities or eligible cases ran out" if strategy == "random" else
                  "no other pair was worth its fee to the strategy, or caps, capacities or eligible "
                  "cases ran out")
    design = _design(pool, before, eligible, counts, strategy, sel)
    return Selection(**{**sel.__dict__, "design": design})


def _design(pool: PlannerInput, before: NDArray[np.bool_], after: NDArray[np.bool_], audit_counts: NDArray[np.int64],
            strategy: str, sel: Selection) -> NDArray[np.float64]:
    """Per (expert, region, stratum): chance that an eligible case was chosen this round."""
    m, r = pool.n_experts, pool.n_regions
    n_strata = int(pool.stratum.max()) + 1 if pool.stratum.size else 1
    key = pool.region * n_strata + pool.stratum
    own = ~sel.audit
    design = np.zeros((m, r * n_strata))
    for j in range(m):
        e0 = int(before[:, j].sum())
        p_audit = audit_counts[j] / e0 if e0 else 0.0
        sizes = np.bincount(key[after[:, j]], minlength=r * n_strata)
        mine = own & (sel.expert == j)
        if strategy == "random":
            p_own = np.full(r * n_strata, mine.sum() / max(int(sizes.sum()), 1))
        else:
            cells = np.bincount(pool.region[sel.case[mine]], minlength=r)
            p_own = np.concatenate([_spread_rate(int(cells[g]), sizes[g * n_strata:(g + 1) * n_strata])
                                    for g in range(r)])
        design[j] = np.where(np.bincount(key[before[:, j]], minlength=r * n_strata) > 0,
                             p_audit + (1.0 - p_audit) * p_own, 0.0)
    return design.reshape(m, r, n_strata)


def _spread_rate(k: int, sizes: NDArray[np.int64]) -> NDArray[np.float64]:
    """Chance per case of each stratum under :func:`_spread` of ``k`` picks (0 where empty)."""
    present = sizes > 0
    if k == 0 or not present.any():
        return np.zeros(sizes.size)
    if k < present.sum():
        return np.where(present, (k / present.sum()) / np.maximum(sizes, 1), 0.0)
    per, _ = _spread(k, sizes, np.random.default_rng(0))  # no draw when k covers every stratum
    return np.where(present, per / np.maximum(sizes, 1), 0.0)


def _finish(pool, costs, case, expert, prob, audit, alpha, beta, ledger, budget, notes, why_left) -> Selection:
    """Assemble the Selection: per-cell counts, gains, spend and notes."""
    m, r = pool.n_experts, pool.n_regions
    cell = np.zeros((m, r), dtype=np.int64)
    np.add.at(cell, (expert, pool.region[case]), 1)
    fees = pool.fees.astype(np.float64)
    spend = np.bincount(expert, weights=fees[expert], minlength=m)
    used = budget - ledger.left
    if ledger.left >= _cheapest_fee(ledger) and len(case):
        notes.append(f"{ledger.left:.6g} of the budget is left: {why_left}")
    gain = _gains(pool, costs, cell, alpha, beta)
    return Selection(
        case=case.astype(np.int64), expert=expert.astype(np.int64), selection_prob=prob,
        audit=audit.astype(bool), cell_picks=cell, gain=gain, spend=spend,
        audit_spend=float(fees[expert[audit]].sum()), budget_used=float(used), notes=tuple(notes),
    )


def _cheapest_fee(ledger: _Ledger) -> float:
    """Cheapest counted fee among experts that could still take a pick (inf if none)."""
    able = [ledger.fee[j] for j in range(ledger.fee.size) if ledger.limit[j] > ledger.n[j]]
    return float(min(able)) if able else math.inf


def _cell_posterior(pool: PlannerInput, prior: tuple[float, float]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Beta posterior per cell, with open assignments as fantasy answers at the posterior mean."""
    alpha, beta = beta_posterior(pool.correct, pool.answered, prior)
    mean = alpha / (alpha + beta)
    return alpha + pool.pending * mean, beta + pool.pending * (1.0 - mean)


def _audit_counts(ledger: _Ledger, eligible_counts: NDArray[np.int64], audit_budget: float,
                  rng: np.random.Generator) -> NDArray[np.int64]:
    """Audit picks per expert: equal counts, water-filled under the audit budget and caps."""
    m = eligible_counts.size
    counts = np.zeros(m, dtype=np.int64)
    left = float(audit_budget)
    order = rng.permutation(m)

    def room(j: int) -> int:
        return min(ledger.room(j, left), int(eligible_counts[j] - counts[j]))

    while True:
        able = [j for j in order if room(j) > 0]
        if not able:
            return counts
        level = min(min(room(j) for j in able), _whole((left + ledger.tol) / float(ledger.fee[able].sum())))
        if level >= 1:
            for j in able:
                left -= ledger.take(j, level)
                counts[j] += level
            continue
        progressed = False
        for j in sorted(able, key=lambda e: (counts[e], list(order).index(e))):
            if room(j) > 0:
                left -= ledger.take(j, 1)
                counts[j] += 1
                progressed = True
        if not progressed:
            return counts


def _draw_audit(eligible: NDArray[np.bool_], counts: NDArray[np.int64], rng: np.random.Generator):
    """Simple random sample of each expert's eligible cases; removes them from ``eligible``."""
    cases, experts, probs = [], [], []
    for j in range(eligible.shape[1]):
        if counts[j] == 0:
            continue
        members = np.flatnonzero(eligible[:, j])
        chosen = np.sort(rng.choice(members, int(counts[j]), replace=False))
        eligible[chosen, j] = False
        cases.append(chosen)
        experts.append(np.full(chosen.size, j))
        probs.append(np.full(chosen.size, counts[j] / members.size))
    return _stack(cases, experts, probs, audit=True)


def _stack(cases: list, experts: list, probs: list, *, audit: bool):
    """Concatenate per-group picks into (case, expert, prob, audit) arrays."""
    if not cases:
        empty = np.zeros(0, dtype=np.int64)
        return empty, empty, np.zeros(0), np.zeros(0, dtype=bool)
    case = np.concatenate(cases).astype(np.int64)
    return case, np.concatenate(experts).astype(np.int64), np.concatenate(probs), np.full(case.size, audit)


def _step_size(ledger: _Ledger, n_eligible: int, max_steps: int) -> int:
    """Chunk size so that the greedy takes about ``max_steps`` steps."""
    affordable = ledger.left / float(ledger.fee.min()) if ledger.fee.size else 0.0
    return max(1, math.ceil(min(float(n_eligible), affordable) / max(1, max_steps)))


def _greedy(score: Callable[[], NDArray[np.float64]], cell_expert: NDArray[np.int64],
            room: NDArray[np.int64], ledger: _Ledger, step: int, rng: np.random.Generator,
            update: Callable[[int, int], None], worth: Callable[[int], bool] | None = None) -> None:
    """Give picks to the best-scoring feasible cell, ``step`` at a time, until nothing fits
    (or, given ``worth``, until the best cell is no longer worth a pick)."""
    order = rng.permutation(cell_expert.size)
    while True:
        expert_room = np.array([ledger.room(j) for j in range(ledger.fee.size)], dtype=np.int64)
        can = np.minimum(room, expert_room[cell_expert])
        feasible = can[order] > 0
        if not feasible.any():
            return
        values = score()[order]
        best = order[int(np.argmax(np.where(feasible, values, -np.inf)))]
        if worth is not None and not worth(int(best)):
            return
        q = int(min(step, can[best]))
        ledger.take(int(cell_expert[best]), q)
        room[best] -= q
        update(int(best), q)


def _random_picks(eligible: NDArray[np.bool_], ledger: _Ledger, rng: np.random.Generator, max_steps: int):
    """Strategy ``random``: picks per expert proportional to eligible cases, then simple random samples."""
    e = eligible.sum(axis=0).astype(np.int64)
    k = np.zeros(e.size, dtype=np.int64)
    room = e.copy()

    def score() -> NDArray[np.float64]:
        return -k / np.maximum(e, 1)

    def update(j: int, q: int) -> None:
        k[j] += q

    _greedy(score, np.arange(e.size), room, ledger, _step_size(ledger, int(e.sum()), max_steps), rng, update)
    cases, experts, probs = [], [], []
    for j in np.flatnonzero(k):
        members = np.flatnonzero(eligible[:, j])
        chosen = np.sort(rng.choice(members, int(k[j]), replace=False))
        cases.append(chosen)
        experts.append(np.full(chosen.size, j))
        probs.append(np.full(chosen.size, k[j] / members.size))
    return _stack(cases, experts, probs, audit=False)


def _picks_to_tight(alpha, beta, have, tight_sd: float, tight_n: int) -> NDArray[np.int64]:
    """Fantasy answers each cell needs before it is tight (sd < tight_sd or n >= tight_n)."""
    mean = alpha / (alpha + beta)
    q = np.arange(tight_n + 1, dtype=np.float64)[:, None]
    sd = np.sqrt(_beta_var(alpha.ravel() + q * mean.ravel(), beta.ravel() + q * (1 - mean.ravel())))
    tight = (have.ravel() + q >= tight_n) | (sd < tight_sd)
    return np.argmax(tight, axis=0).astype(np.int64)


def _cell_counts(pool, costs, eligible, ledger, alpha0, beta0, fee_eff, strategy, floor,
                 max_steps, rng) -> NDArray[np.int64]:
    """Strategy picks per (expert, region) cell: exploration floor, then the greedy."""
    explore_min, explore_share, tight_sd, tight_n, min_value, spread, kg_min = floor
    m, r = pool.n_experts, pool.n_regions
    room = np.zeros((m, r), dtype=np.int64)
    for j in range(m):
        room[j] = np.bincount(pool.region[eligible[:, j]], minlength=r)
    room = room.ravel()
    alpha, beta = alpha0.ravel().copy(), beta0.ravel().copy()
    cell_expert = np.repeat(np.arange(m), r)
    cell_fee = fee_eff[cell_expert]
    k = np.zeros(m * r, dtype=np.int64)
    scorer: list[_ValueScore] = []

    def variance() -> NDArray[np.float64]:
        return _beta_var(alpha, beta) / cell_fee

    def update(c: int, q: int) -> None:
        mean = alpha[c] / (alpha[c] + beta[c])
        alpha[c] += q * mean
        beta[c] += q * (1.0 - mean)
        k[c] += q
        for s in scorer:
            s.refresh(c, int(room[c]))

    have = (pool.answered + pool.pending).ravel()
    need = np.minimum(_picks_to_tight(alpha0, beta0, have, tight_sd, tight_n), explore_min)
    _explore(need, room, cell_expert, ledger, explore_share * ledger.left, rng, update)
    if strategy == "value":
        scorer.append(_ValueScore(pool, costs, alpha, beta))
        scorer[0].refresh_all(room)

    def ready() -> NDArray[np.bool_]:
        return have + k >= kg_min

    def score() -> NDArray[np.float64]:
        if not scorer:
            return variance()
        return scorer[0].score(cell_fee, variance(), ready())

    step = _step_size(ledger, int(room.sum()), max_steps)
    if not scorer or min_value <= 0:
        _greedy(score, cell_expert, room, ledger, step, rng, update)
        return k.reshape(m, r)

    def worth(c: int) -> bool:
        return bool(have[c] + k[c] >= kg_min and scorer[0].kg[c] >= min_value * cell_fee[c])

    _greedy(score, cell_expert, room, ledger, step, rng, update, worth)
    useful = _could_matter(pool, costs, fee_eff).ravel()
    room_rest = np.where(useful, room, 0)
    if spread == "variance":
        _greedy(variance, cell_expert, room_rest, ledger, step, rng, update)
    else:
        _spread_rest(room_rest, cell_expert, ledger, step, rng, update, by_spend=spread == "spend")
    return k.reshape(m, r)


def _could_matter(pool: PlannerInput, costs: RegionCosts, fee_eff: NDArray[np.float64]) -> NDArray[np.bool_]:
    """Per (expert, region): could the expert, even if always right, beat the model on some case there?"""
    top = np.array([costs.max(g) for g in range(pool.n_regions)])
    return (fee_eff[:, None] < top[None, :]) & (pool.capacities > 0)[:, None]


def _spread_rest(room: NDArray[np.int64], cell_expert: NDArray[np.int64], ledger: _Ledger, step: int,
                 rng: np.random.Generator, update: Callable[[int, int], None], *, by_spend: bool = True) -> None:
    """Budget the value scores leave, spread over the remaining pairs cell by cell.

    ``by_spend``: each expert's spend is proportional to its remaining pairs (counts
    proportional to pairs over fee); otherwise its picks are (as ``random``).
    """
    m = ledger.fee.size
    r = room.size // max(m, 1)
    e = room.reshape(m, r).sum(axis=1)
    n = np.zeros(m, dtype=np.int64)
    unit = ledger.fee if by_spend else np.ones(m)
    _greedy(lambda: -n * unit / np.maximum(e, 1), np.arange(m), e.copy(), ledger, step, rng,
            lambda j, q: n.__setitem__(j, n[j] + q))
    for j in np.flatnonzero(n):
        cells = room[j * r:(j + 1) * r].astype(np.float64)
        quota = n[j] * cells / cells.sum()
        base = np.minimum(np.floor(quota).astype(np.int64), cells.astype(np.int64))
        for g in np.argsort(-(quota - base), kind="stable")[: int(n[j]) - int(base.sum())]:
            base[g] += 1
        for g in np.flatnonzero(base):
            room[j * r + g] -= int(base[g])
            update(j * r + int(g), int(base[g]))


def _explore(need, room, cell_expert, ledger, money, rng, update) -> None:
    """Exploration floor: one pick at a time, round-robin over loose cells in a seeded order."""
    order = rng.permutation(need.size)
    need = need.copy()
    while True:
        progressed = False
        for c in order:
            j = int(cell_expert[c])
            if need[c] > 0 and room[c] > 0 and ledger.room(j, money) > 0 and ledger.room(j) > 0:
                money -= ledger.take(j, 1)
                room[c] -= 1
                need[c] -= 1
                update(int(c), 1)
                progressed = True
        if not progressed:
            return


class _ValueScore:
    """KG(*) score per cell: the best KG_q / (q * fee) over q in 1, 2, 4, ..., 64."""

    def __init__(self, pool: PlannerInput, costs: RegionCosts, alpha: NDArray[np.float64],
                 beta: NDArray[np.float64]) -> None:
        m, r = pool.n_experts, pool.n_regions
        self.costs = costs
        self.alpha, self.beta = alpha, beta
        self.r, self.m = r, m
        self.fees = pool.fees.astype(np.float64)
        self.c = float(pool.error_cost)
        self.other = _other_best(alpha.reshape(m, r), beta.reshape(m, r), self.fees,
                                 pool.capacities, self.c).ravel()
        self.kg = np.zeros(m * r)

    def refresh(self, c: int, room: int) -> None:
        """Recompute cell ``c``'s best KG_q / q."""
        qs = tuple(q for q in _KG_GRID if q <= max(1, room))
        if self.costs.size(c % self.r) == 0:
            self.kg[c] = 0.0
            return
        kg = _kg(self.costs, c % self.r, float(self.alpha[c]), float(self.beta[c]), qs,
                 float(self.fees[c // self.r]), float(self.other[c]), self.c)
        self.kg[c] = float(np.max(kg / np.asarray(qs, dtype=np.float64)))

    def refresh_all(self, room: NDArray[np.int64]) -> None:
        """Recompute every cell."""
        for c in range(self.kg.size):
            self.refresh(c, int(room[c]))

    def score(self, cell_fee: NDArray[np.float64], tie: NDArray[np.float64],
              ready: NDArray[np.bool_] | None = None) -> NDArray[np.float64]:
        """KG(*) per fee, with ties (within 1e-12 relative) broken by ``tie``; cells not
        ``ready`` score zero."""
        value = self.kg / cell_fee
        if ready is not None:
            value = np.where(ready, value, 0.0)
        scale = max(float(np.max(np.abs(value))), 1e-300)
        rounded = np.round(value / scale, 12)
        return rounded + 1e-13 * tie / max(float(np.max(tie)), 1e-300)


def _other_best(alpha, beta, fees, capacities, error_cost) -> NDArray[np.float64]:
    """Per cell: expected cost of the cheapest other expert in the region (inf if none)."""
    m, _ = alpha.shape
    cost = (1.0 - alpha / (alpha + beta)) * error_cost + fees[:, None]
    cost = np.where((capacities > 0)[:, None], cost, np.inf)
    out = np.full_like(cost, np.inf)
    for j in range(m):
        others = np.delete(cost, j, axis=0)
        if others.size:
            out[j] = others.min(axis=0)
    return out


def _spread(k: int, sizes: NDArray[np.int64],
            rng: np.random.Generator) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
    """Spread ``k`` picks over strata of ``sizes``: one each, the rest by largest remainders.

    Returns the picks per stratum and the factor by which a stratum was itself chosen
    (``k / S`` when fewer picks than strata, else 1).
    """
    present = np.flatnonzero(sizes > 0)
    picks = np.zeros(sizes.size, dtype=np.int64)
    factor = np.ones(sizes.size)
    if k < present.size:
        chosen = rng.choice(present, k, replace=False)
        picks[chosen] = 1
        factor[:] = k / present.size
        return picks, factor
    picks[present] = 1
    rest = k - present.size
    spare = np.where(sizes > 0, sizes - 1, 0).astype(np.float64)
    if rest > 0 and spare.sum() > 0:
        quota = rest * spare / spare.sum()
        base = np.minimum(np.floor(quota).astype(np.int64), spare.astype(np.int64))
        left = rest - int(base.sum())
        frac = np.where(base < spare, quota - base, -1.0)
        for s in np.argsort(-frac, kind="stable")[:left]:
            base[s] += 1
        picks += base
    return picks, factor


def _draw_cells(pool: PlannerInput, eligible: NDArray[np.bool_], k: NDArray[np.int64], rng: np.random.Generator):
    """Simple random samples inside each (expert, region, class) for the cell counts ``k``."""
    n_strata = int(pool.stratum.max()) + 1 if pool.stratum.size else 1
    r = pool.n_regions
    cases, experts, probs = [], [], []
    for j in np.flatnonzero(k.sum(axis=1)):
        members = np.flatnonzero(eligible[:, j])
        key = pool.region[members] * n_strata + pool.stratum[members]
        order = np.argsort(key, kind="stable")
        members, key = members[order], key[order]
        bounds = np.searchsorted(key, np.arange(r * n_strata + 1))
        for reg in np.flatnonzero(k[j]):
            lo = reg * n_strata
            sizes = np.diff(bounds[lo : lo + n_strata + 1])
            per, factor = _spread(int(k[j, reg]), sizes, rng)
            for s in np.flatnonzero(per):
                group = members[bounds[lo + s] : bounds[lo + s + 1]]
                chosen = np.sort(rng.choice(group, int(per[s]), replace=False))
                cases.append(chosen)
                experts.append(np.full(chosen.size, j))
                probs.append(np.full(chosen.size, factor[s] * per[s] / group.size))
    return _stack(cases, experts, probs, audit=False)


def _gains(pool: PlannerInput, costs: RegionCosts, cell: NDArray[np.int64], alpha, beta) -> NDArray[np.float64]:
    """Per expert: sum over regions of the knowledge gradient of the cell's picks."""
    m, r = cell.shape
    fees = pool.fees.astype(np.float64)
    other = _other_best(alpha, beta, fees, pool.capacities, float(pool.error_cost))
    gain = np.zeros(m)
    for j, reg in zip(*np.nonzero(cell)):
        if costs.size(int(reg)):
            gain[j] += _kg(costs, int(reg), float(alpha[j, reg]), float(beta[j, reg]), (int(cell[j, reg]),),
                           float(fees[j]), float(other[j, reg]), float(pool.error_cost))[0]
    return gain

