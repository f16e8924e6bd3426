"""Rehearsing a labelling budget on a synthetic scenario before any money is spent.

A rehearsal plays rounds for each strategy on a scenario of :mod:`routeplan.simulate`
(known ``P(y | x)`` and known per-region competence), with the same planner as
``routeplan round plan`` (:func:`routeplan.acquisition.select_assignments`). After each round a
plug-in router is fitted on the answers revealed so far, and its system cost is computed
*exactly* on held-out cases from the known probabilities, so the curves carry no evaluation
noise. Two references frame them: the Bayes-optimal cost, and the cost of the same router
fitted with every expert's answer on every pool case ("full information").

Choices that keep the measurement honest
----------------------------------------
* Every pool case has truth, so the classifier does not depend on the strategy. It is fitted
  once per rehearsal, by cross-fitting (out-of-fold probabilities on the pool, the fold
  models' mean on the held-out cases; Chernozhukov et al., "Double/debiased machine learning",
  Econometrics Journal 21(1), 2018, for the device), and every router after a round is fitted
  in two-stage mode on those probabilities (Mao, Mohri & Zhong, NeurIPS 2023). The curves
  then differ between strategies only through the answers they bought.
* The answers of every expert on every pool case are drawn once and revealed as bought, so
  strategies face the same experts (common random numbers).
* The full-information reference is the mean over ``n_reference_fits`` router seeds, fitted
  with the same settings as the routers on the curves.
* From the second round on, ``value`` and ``uncertain`` are steered by the focus of the
  router fitted after the previous round (``focus_margin``), as ``routeplan round plan`` is
  by the workspace's kept router; the full-information reference is not.
* Budgets may be a schedule of cumulative spends (``budgets``), e.g. the geometric one of
  :func:`budget_schedule`, so that a curve has resolution where costs fall fast.
* The planner spreads a cell's picks over the predicted classes of its own ``P(y | x)``
  (:func:`routeplan.acquisition.class_probabilities`), as ``routeplan round plan`` does,
  never over the truth, so the chance of a pair being asked depends on the features alone
  and the routers are fitted with every answer weighing 1, as ``routeplan fit`` fits them
  (:func:`routeplan.fitting.round_weights`; ignorable missingness, Rubin, Biometrika 63(3),
  1976). Measured with ``benchmarks/bench_rounds.py`` (seeds 0-7, 2 router fits per point,
  knowledge-gradient bar ``min_value_per_fee=1`` in both): the planner stratified by the
  truth with answers weighted by :func:`stabilized_weights` (the earlier default)
  needed a median 113 fee units on the synthetic scenario and 4.8 on digits to get within
  0.01 of the full-information cost (mean over the schedule of the median gap 0.024 and
  0.0092); stratified by predicted classes without weights, 96.6 and 3.4 (0.022 and 0.0074).
  The ``weighting`` option measures the alternatives: ``stabilized`` (over the rounds'
  designs) and ``recorded`` (the inverse of each pick's own probability,
  :func:`routeplan.fitting.answer_weights`, which lets a small early round or the audit
  outweigh everything else: on the synthetic scenario, seed 0, it cost 0.02 to 0.06 of
  system cost at budgets from 20 to 320 fee units, for ``random`` too).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from . import acquisition
from .costs import error_cost_matrix, expected_cost_vectors
from .regions import regions_from_features
from .simulate import Scenario, make_scenario

__all__ = [
    "ROUTER_SETTINGS",
    "WEIGHTINGS",
    "Rehearsal",
    "budget_schedule",
    "budget_to_reach",
    "digits_experts_scenario",
    "pool_scenario",
    "rehearse",
    "scenario_from_workspace",
    "stabilized_weights",
    "system_cost_exact",
]

STRATEGIES = ("value", "uncertain", "random")

ROUTER_SETTINGS: dict[str, Any] = {"hidden": (64, 64), "max_epochs": 100, "patience": 20, "weight_decay": 1e-2}
"""Settings of the :class:`routeplan.learner.PluginRouter` fitted after each round.

A wider network than the learner's default trained longer, with a stronger L2 penalty
(``weight_decay=1e-2``): on the synthetic scenario (seed 0, uniform answers) it reached a
held-out cost of 0.221 with 300 answers per expert and 0.199 with 1,000, against 0.227 and
0.206 with ``1e-4``; with ``5e-2`` the correctness model underfits (0.30 with every answer).
"""


@dataclass
class Rehearsal:
    """Curves of system cost against spend, per strategy.

    Attributes
    ----------
    curves : pandas.DataFrame
        One row per (strategy, round): ``strategy``, ``round``, ``spend`` (cumulative fees),
        ``answers`` (cumulative), ``system_cost`` (exact expected cost per case on held-out
        cases of the router fitted after that round).
    bayes_cost : float or None
        Bayes-optimal expected cost on the held-out cases; None when the scenario's truth
        model is the truth itself (digits, a team's own cases), where the least cost is that
        of an oracle that knows every outcome and is no yardstick.
    full_information_cost : float
        Cost of the same router fitted with all answers of all pool cases (mean over seeds).
    full_information_spend : float
        What those answers would cost.
    settings : dict
    """

    curves: pd.DataFrame
    bayes_cost: float | None
    full_information_cost: float
    full_information_spend: float
    settings: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        return {"curves": self.curves.to_dict(orient="records"), "bayes_cost": self.bayes_cost,
                "full_information_cost": self.full_information_cost,
                "full_information_spend": self.full_information_spend, "settings": self.settings}


def system_cost_exact(true_costs: np.ndarray, routes: np.ndarray) -> float:
    """Mean over cases of the true expected cost of the chosen option.

    Parameters
    ----------
    true_costs : ndarray of shape (n, K+M)
        Expected cost of each option under the known distributions.
    routes : ndarray of int of shape (n,)

    Returns
    -------
    float
    """
    return float(true_costs[np.arange(len(routes)), routes].mean())


def budget_to_reach(curves: pd.DataFrame, target: float, *, sustained: bool = False) -> dict[str, float]:
    """Smallest cumulative spend at which each strategy's cost is at most ``target`` (inf if never).

    Parameters
    ----------
    curves : pandas.DataFrame
        :attr:`Rehearsal.curves` (or any frame with ``strategy``, ``spend``, ``system_cost``).
    target : float
    sustained : bool, default=False
        Count a spend only if the cost stays at most ``target`` at every larger spend of the
        curve too (a curve that dips below once and comes back up does not count there).

    Returns
    -------
    dict of str to float
    """
    out = {}
    for strategy, rows in curves.groupby("strategy", sort=False):
        rows = rows.sort_values("spend")
        ok = rows["system_cost"].to_numpy() <= target
        if sustained:
            ok = np.logical_and.accumulate(ok[::-1])[::-1]
        hit = rows["spend"].to_numpy()[ok]
        out[str(strategy)] = float(hit.min()) if len(hit) else float("inf")
    return out


def budget_schedule(first: float, last: float, n_rounds: int) -> list[float]:
    """Cumulative budgets growing geometrically from ``first`` to ``last`` over ``n_rounds``.

    Parameters
    ----------
    first, last : float
        ``0 < first <= last``.
    n_rounds : int
        >= 1; with 1, only ``last``.

    Returns
    -------
    list of float
    """
    if not (0 < first <= last) or int(n_rounds) != n_rounds or n_rounds < 1:
        raise ValueError("need 0 < first <= last and a positive whole number of rounds")
    if n_rounds == 1:
        return [float(last)]
    return [float(v) for v in np.geomspace(first, last, int(n_rounds))]


def digits_experts_scenario(
    subsets: Sequence[Sequence[int]] = ((0, 1, 2, 3), (3, 4, 5, 6), (6, 7, 8, 9)),
    fees: Sequence[float] = (0.02, 0.05, 0.1),
    *,
    pooling: int = 2,
    random_state: int | np.random.Generator | None = 0,
) -> Scenario:
    """scikit-learn's digits with several simulated experts, as a :class:`Scenario`.

    The expert of Mozannar & Sontag ("Consistent Estimators for Learning to Defer to an
    Expert", ICML 2020, section 7) is always right on a subset of the classes and answers
    uniformly at random over all classes elsewhere (right 1 time in 10). Here there is one
    such expert per entry of ``subsets``, each with its fee. Truth is known, so ``proba`` is
    the one-hot truth and a region is a class: ``correct_proba[i, j]`` is 1 on the expert's
    classes and 0.1 elsewhere, which the scenario's answer rule (right with that probability,
    else a uniformly random other class) turns into exactly the uniform guess. Cases are the
    1797 digits of :func:`sklearn.datasets.load_digits`, pixels divided by 16, in a seeded
    random order (so the first cases are a random sample). By default the 8x8 images are
    average-pooled over 2x2 blocks to 4x4 (16 features): on the full images a small network
    is right about 97% of the time and an expert can hardly help, while in the published
    protocol the classifier is imperfect (about 90% on CIFAR-10); pooled, a logistic
    regression is right about 83% of the time (5-fold cross-validation, measured here).

    Parameters
    ----------
    subsets : sequence of sequences of int
        Classes (0..9) each expert always gets right.
    fees : sequence of float
        One fee per expert, in units of one error.
    pooling : {1, 2, 4}, default=2
        Side of the square blocks averaged into one feature (1 keeps the 64 pixels).
    random_state : int, Generator or None, default=0
        Seeds the order of the cases.

    Returns
    -------
    Scenario
    """
    from sklearn.datasets import load_digits

    if pooling not in (1, 2, 4):
        raise ValueError(f"pooling must be 1, 2 or 4, got {pooling!r}")

    if len(subsets) != len(fees) or any(f < 0 for f in fees):
        raise ValueError("give one non-negative fee per subset")
    data = load_digits()
    order = np.random.default_rng(random_state).permutation(len(data.target))
    y = data.target[order].astype(np.int64)
    accuracy = np.full((len(subsets), 10), 0.1)
    for j, classes in enumerate(subsets):
        if any(int(c) != c or not 0 <= c <= 9 for c in classes):
            raise ValueError("subsets hold classes 0..9")
        accuracy[j, list(classes)] = 1.0
    side = 8 // pooling
    X = (data.data[order] / 16.0).reshape(-1, side, pooling, side, pooling).mean(axis=(2, 4)).reshape(-1, side * side)
    return Scenario(X=X.astype(np.float32), proba=np.eye(10)[y], y=y, regions=y,
                    correct_proba=accuracy[:, y].T.copy(), region_accuracy=accuracy,
                    fees=np.asarray(fees, dtype=np.float64),
                    names=tuple(f"expert{j + 1}" for j in range(len(subsets))))


def pool_scenario(
    X: np.ndarray,
    y: np.ndarray,
    accuracy: np.ndarray,
    fees: Sequence[float],
    names: Sequence[str] | None = None,
    *,
    random_state: int | np.random.Generator | None = 0,
) -> Scenario:
    """A team's own cases with assumed expert profiles, as a :class:`Scenario`.

    The counterpart of :func:`digits_experts_scenario` for the cases of a workspace: truth is
    known, so ``proba`` is the one-hot truth and a region is a class, and expert ``j`` is
    right on a case of truth ``k`` with the assumed probability ``accuracy[j, k]`` (else a
    uniformly random other class, the scenario's answer rule). Costs are then exact given the
    truth and the assumptions, which are the user's, not measured. Cases come in a seeded
    random order, so that the first ones (the rehearsal's pool) are a random sample.

    Parameters
    ----------
    X : ndarray of shape (n, d)
        Feature matrix (as ``routeplan fit`` builds it).
    y : ndarray of int of shape (n,)
        Truth codes ``0 .. K-1``.
    accuracy : ndarray of shape (M, K)
        Assumed P(expert j right | truth k), in [0, 1]
        (:func:`routeplan.ingest.read_profiles`).
    fees : sequence of float
        Fee per case of each expert, in units of one error.
    names : sequence of str, optional
        Expert names (default ``expert1``, ...).
    random_state : int, Generator or None, default=0
        Seeds the order of the cases.

    Returns
    -------
    Scenario
    """
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.int64)
    accuracy = np.asarray(accuracy, dtype=np.float64)
    fees = np.asarray(fees, dtype=np.float64)
    if accuracy.ndim != 2 or np.any(~np.isfinite(accuracy)) or np.any((accuracy < 0) | (accuracy > 1)):
        raise ValueError("accuracy must be an (M, K) array of probabilities")
    M, K = accuracy.shape
    if X.ndim != 2 or y.shape != (X.shape[0],) or fees.shape != (M,) or np.any(fees < 0):
        raise ValueError("X (n, d), y (n,) and one non-negative fee per expert are needed")
    if y.size and (y.min() < 0 or y.max() >= K):
        raise ValueError(f"y must hold codes 0..{K - 1}")
    order = np.random.default_rng(random_state).permutation(len(y))
    y = y[order]
    return Scenario(X=X[order].astype(np.float32), proba=np.eye(K)[y], y=y, regions=y,
                    correct_proba=accuracy[:, y].T.copy(), region_accuracy=accuracy, fees=fees,
                    names=tuple(names) if names is not None else tuple(f"expert{j + 1}" for j in range(M)))


def scenario_from_workspace(ws: Any, profiles: str | Path, *, random_state: int = 0) -> Scenario:
    """The workspace's cases with truth, and assumed profiles read from a file.

    Features are built as ``routeplan fit`` builds them; fees are divided by the
    workspace's error cost, so that the rehearsal's costs are in units of one wrong
    decision, as the simulated scenarios' are.

    Parameters
    ----------
    ws : Workspace
    profiles : str or Path
        Profiles file (:func:`routeplan.ingest.read_profiles`).
    random_state : int, default=0

    Returns
    -------
    Scenario

    Raises
    ------
    InputError
        Too few cases with truth, a single label among them, no experts, or a bad profiles file.
    """
    from .errors import InputError
    from .features import fit_features
    from .fitting import MIN_TRUTH_CASES
    from .ingest import read_profiles
    from .pool import load_pool

    pool = load_pool(ws)
    if not pool.experts:
        raise InputError("no experts yet; add them with 'routeplan experts add NAME --fee F'")
    accuracy = read_profiles(profiles, pool.labels, pool.experts)
    mask = pool.has_truth
    if mask.sum() < 2 * MIN_TRUTH_CASES:
        raise InputError(f"only {int(mask.sum())} case(s) have truth; a rehearsal on them needs at least "
                         f"{2 * MIN_TRUTH_CASES} (half are held out to measure the cost)")
    if len(np.unique(pool.y[mask])) < 2:
        raise InputError("every case with truth has the same label; a rehearsal needs at least two labels")
    X = fit_features(pool.X[mask], pool.feature_names).transform(pool.X[mask])
    return pool_scenario(X, pool.y[mask], accuracy, pool.fees / pool.error_cost, pool.experts,
                         random_state=random_state)


def _router(params: dict, seed: int) -> Any:
    """The rehearsal's router from its settings: a plug-in router, or the average of
    ``n_members`` of them (the ``n_members`` key, default 1)."""
    from .learner import EnsembleRouter, PluginRouter

    params = dict(params)
    members = params.pop("n_members", 1)
    if members == 1:
        return PluginRouter(random_state=seed, **params)
    return EnsembleRouter(n_members=members, random_state=seed, **params)  # validates n_members


def _crossfit_proba(X, y, X_eval, K, n_folds, seed, router_params) -> tuple[np.ndarray, np.ndarray]:
    """Out-of-fold P(y | x) on the pool, and the fold models' mean on the held-out cases."""
    from sklearn.model_selection import StratifiedKFold

    from .learner import PluginRouter

    C = error_cost_matrix(K)
    P = np.zeros((len(y), K))
    P_eval = np.zeros((len(X_eval), K))
    folds = StratifiedKFold(n_splits=n_folds, shuffle=True, random_state=seed).split(X, y)
    classifier_params = {k: v for k, v in router_params.items() if k != "n_members"}
    for k, (fit_rows, out_rows) in enumerate(folds):
        clf = PluginRouter(random_state=seed + 1000 * (k + 1), **classifier_params)
        clf.fit(X[fit_rows], y[fit_rows], np.zeros((fit_rows.size, 0), np.int64), fees=np.zeros(0), cost_matrix=C)
        P[out_rows] = clf.predict_proba(X[out_rows])
        P_eval += clf.predict_proba(X_eval) / n_folds
    return P, P_eval


@dataclass
class _Stage:
    """What every fit of a rehearsal shares: pool, held-out cases, fixed class probabilities."""

    X: np.ndarray
    y: np.ndarray
    X_eval: np.ndarray
    P: np.ndarray
    P_eval: np.ndarray
    true_costs: np.ndarray
    fees: np.ndarray
    C: np.ndarray
    router_params: dict

    def fit(self, answers: np.ndarray, weights: np.ndarray | None, seed: int) -> Any:
        """A two-stage plug-in router fitted on the answers (an average of ``n_members`` of
        them, :class:`routeplan.learner.EnsembleRouter`, when the settings name more than one)."""
        import warnings

        router = _router(self.router_params, seed)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)  # "no known answer" early on is expected
            router.fit(self.X, self.y, answers, fees=self.fees, cost_matrix=self.C, sample_weight=weights,
                       class_proba=self.P)
        return router

    def cost(self, router: Any) -> float:
        """The exact held-out system cost of a fitted router."""
        return system_cost_exact(self.true_costs, router.predict_route(self.X_eval, class_proba=self.P_eval))

    def score(self, answers: np.ndarray, weights: np.ndarray | None, seed: int) -> float:
        """Fit a two-stage plug-in router on the answers; return its exact held-out cost."""
        return self.cost(self.fit(answers, weights, seed))

    def focus(self, router: Any, margin: float | None, two_sided: bool = True) -> np.ndarray | None:
        """The router's focus on the pool (:func:`routeplan.acquisition.router_focus`)."""
        if router is None or margin is None:
            return None
        return acquisition.router_focus(router.predict_costs(self.X, class_proba=self.P), self.C.shape[0], margin,
                                        two_sided)


def stabilized_weights(designs: Sequence[np.ndarray], region: np.ndarray, stratum: np.ndarray,
                       answered: np.ndarray) -> np.ndarray:
    """Weights of answers gathered over several rounds: stabilized inverse inclusion probabilities.

    A case's chance to be asked of expert ``j`` over the rounds is taken as the sum of the
    rounds' design probabilities of its (region, stratum) group (the balance heuristic of
    multiple importance sampling: Veach & Guibas, "Optimally combining sampling techniques
    for Monte Carlo rendering", SIGGRAPH 1995). Only the part of the selection that depends
    on more than the region needs undoing for a model of ``P(right | x)``, so the weight is
    the region's mean chance over the case's own chance: a stabilized weight whose numerator
    conditions on the covariates of the model (Robins, Hernan & Brumback, "Marginal
    structural models and causal inference in epidemiology", Epidemiology 11(5), 2000).
    Each expert's weights are then scaled to mean 1.

    Parameters
    ----------
    designs : sequence of ndarray of shape (n_experts, n_regions, n_strata)
        :attr:`routeplan.acquisition.Selection.design` of each round.
    region, stratum : ndarray of int of shape (n_cases,)
    answered : ndarray of bool of shape (n_cases, n_experts)

    Returns
    -------
    ndarray of shape (n_cases, n_experts)
        NaN where there is no answer.
    """
    if not len(designs):
        raise ValueError("give the design of at least one round")
    total = np.sum(np.stack([np.asarray(d, dtype=np.float64) for d in designs]), axis=0)
    m, r, n_strata = total.shape
    region, stratum = np.asarray(region, dtype=np.int64), np.asarray(stratum, dtype=np.int64)
    answered = np.asarray(answered, dtype=bool)
    if answered.shape != (region.size, m) or stratum.shape != region.shape:
        raise ValueError("region, stratum and answered must describe the same cases and experts")
    if region.size and (region.min() < 0 or region.max() >= r or stratum.min() < 0 or stratum.max() >= n_strata):
        raise ValueError("region and stratum codes must index the designs")
    sizes = np.bincount(region * n_strata + stratum, minlength=r * n_strata).reshape(r, n_strata)
    mean_rate = (total * sizes).sum(axis=2) / np.maximum(sizes.sum(axis=1), 1)
    own = total[:, region, stratum].T  # (n, m)
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(answered & (own > 0), mean_rate[:, region].T / own, np.nan)
    total_w = np.nansum(np.where(answered, w, 0.0), axis=0)
    scale = np.where(answered.sum(axis=0) > 0, total_w / np.maximum(answered.sum(axis=0), 1), 1.0)
    w = w / np.where(np.isfinite(scale) & (scale > 0), scale, 1.0)
    return np.where(answered, np.where(np.isfinite(w), w, 1.0), np.nan)


def _planner_input(y, strata, region, revealed, answers_all, model_cost, fees, error_cost, M, n_regions):
    """The planner's PlannerInput: every unrevealed pair eligible, counts from the revealed answers
    (judged against the truth ``y``), picks spread over ``strata``."""
    rows, cols = np.nonzero(revealed)
    correct, answered = acquisition.cell_counts(rows, cols, answers_all[rows, cols], y, region, M, n_regions)
    return acquisition.PlannerInput(
        eligible=~revealed, region=region, stratum=strata, fees=fees, capacities=np.ones(M),
        correct=correct, answered=answered, pending=np.zeros((M, n_regions)),
        model_cost=model_cost, population_region=region, error_cost=error_cost,
    )


def _schedule(budgets, n_rounds, budget_per_round) -> list[float]:
    """Cumulative budget after each round, checked."""
    if budgets is None:
        if int(n_rounds) != n_rounds or n_rounds < 1 or not budget_per_round > 0:
            raise ValueError("n_rounds must be a positive integer and budget_per_round > 0")
        return [budget_per_round * (t + 1) for t in range(int(n_rounds))]
    steps = [float(b) for b in budgets]
    if not steps or steps[0] <= 0 or np.any(np.diff(steps) <= 0):
        raise ValueError("budgets must be positive and increasing (cumulative spends)")
    return steps


def _play(stage: _Stage, plan: Callable, weigh: Callable, strategy: str, steps: list[float],
          answers_all: np.ndarray, seed: int, n_fits: int, progress: Any) -> list[dict]:
    """Play the rounds of one strategy; one curve row per round."""
    n, M = answers_all.shape
    revealed = np.zeros((n, M), dtype=bool)
    prob = np.full((n, M), np.nan)
    designs: list[np.ndarray] = []
    spend = 0.0
    rng = np.random.default_rng([seed, STRATEGIES.index(strategy)])
    rows = []
    router = None  # the last router fitted: its focus steers the next round
    for round_no, cumulative in enumerate(steps, start=1):
        if cumulative - spend >= float(stage.fees.min()):
            sel = plan(revealed, strategy, cumulative - spend, rng, router)
            revealed[sel.case, sel.expert] = True
            prob[sel.case, sel.expert] = sel.selection_prob
            designs.append(sel.design)
            spend += float(sel.spend.sum())
        shown = np.where(revealed, answers_all, -1)
        weights = weigh(designs, prob, shown, revealed) if designs else None
        costs = []
        for k in range(n_fits):
            router = stage.fit(shown, weights, seed + 7919 * k)
            costs.append(stage.cost(router))
        cost = float(np.mean(costs))
        rows.append({"strategy": strategy, "round": round_no, "spend": spend,
                     "answers": int(revealed.sum()), "system_cost": cost})
        if progress is not None:
            progress(f"{strategy} round {round_no}")
    return rows


WEIGHTINGS = ("none", "stabilized", "recorded")


def _weigher(weighting: str, region: np.ndarray, stratum: np.ndarray) -> Callable:
    """The answer weights of the fitted routers, by name."""
    from .fitting import answer_weights

    if weighting == "stabilized":
        return lambda designs, prob, shown, revealed: stabilized_weights(designs, region, stratum, revealed)
    if weighting == "recorded":
        return lambda designs, prob, shown, revealed: answer_weights(prob, shown)
    return lambda designs, prob, shown, revealed: None


def rehearse(
    scenario: Scenario | None = None,
    *,
    n_pool: int = 3000,
    n_eval: int = 5000,
    strategies: Sequence[str] = STRATEGIES,
    n_rounds: int = 6,
    budget_per_round: float = 10.0,
    budgets: Sequence[float] | None = None,
    audit_share: float = 0.1,
    n_regions: int = 6,
    planner_options: dict | None = None,
    router_params: dict | None = None,
    weighting: str = "none",
    focus_margin: float | None = 0.1,
    focus_two_sided: bool = True,
    n_router_fits: int = 1,
    n_folds: int = 5,
    n_reference_fits: int = 3,
    random_state: int = 0,
    progress: Any = None,
) -> Rehearsal:
    """Play rounds per strategy and measure the exact system cost after each.

    Parameters
    ----------
    scenario : Scenario, optional
        Default: ``make_scenario(n_pool + n_eval, random_state=random_state)``. Its first
        ``n_pool`` cases form the pool (with truth), the rest the held-out cases (a given
        scenario keeps at least half its cases held out).
    n_pool, n_eval : int
    strategies : sequence of str, default=("value", "uncertain", "random")
    n_rounds : int, default=6
    budget_per_round : float, default=10.0
        In fee units; ignored when ``budgets`` is given.
    budgets : sequence of float, optional
        Cumulative budget after each round (increasing), e.g. from :func:`budget_schedule`.
        Each round may spend what its step adds plus what earlier rounds left.
    audit_share : float, default=0.1
    n_regions : int, default=6
        Regions of the planner (k-means on the pool's features).
    planner_options : dict, optional
        Further keywords of :func:`routeplan.acquisition.select_assignments`.
    router_params : dict, optional
        Settings of the plug-in router (default :data:`ROUTER_SETTINGS`); also used for the
        cross-fitted classifier. An ``n_members`` key above 1 rehearses with the average of
        that many plug-in routers (:class:`routeplan.ensemble.EnsembleRouter`); being
        two-stage, they share the cross-fitted classifier and average only the correctness
        models.
    weighting : {"none", "stabilized", "recorded"}, default="none"
        Weights of the answers when a router is fitted: none (every answer weighs 1, as
        ``routeplan fit`` weighs answers of rounds planned on predicted classes);
        :func:`stabilized_weights` over the rounds' designs; or the recorded selection
        probabilities through :func:`routeplan.fitting.answer_weights`.
    focus_margin : float or None, default=0.1
        From the second round on, ``value`` and ``uncertain`` pick only pairs in the focus of
        the router fitted after the previous round (:func:`routeplan.acquisition.router_focus`
        with this margin), as ``routeplan round plan`` does with the workspace's kept router;
        None plans without focus.
    focus_two_sided : bool, default=True
        The focus within the margin on either side (the default of ``routeplan round plan``);
        False keeps the cases the router clearly sends to the expert as well (one-sided).
    n_router_fits : int, default=1
        Router seeds averaged at each point of a curve (the last one steers the next round).
    n_folds : int, default=5
        Folds of the cross-fitted classifier.
    n_reference_fits : int, default=3
        Router seeds averaged for the full-information reference.
    random_state : int, default=0
    progress : callable, optional
        Called as ``progress(description)`` after each round (for a progress bar).

    Returns
    -------
    Rehearsal
    """
    unknown = [s for s in strategies if s not in STRATEGIES]
    if unknown:
        raise ValueError(f"unknown strategy {unknown[0]!r}; choose from {', '.join(STRATEGIES)}")
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting must be one of {', '.join(WEIGHTINGS)}, got {weighting!r}")
    if int(n_router_fits) != n_router_fits or n_router_fits < 1:
        raise ValueError("n_router_fits must be a positive integer")
    if focus_margin is not None and not (np.isfinite(focus_margin) and focus_margin >= 0):
        raise ValueError(f"focus_margin must be a number >= 0 or None, got {focus_margin!r}")
    steps = _schedule(budgets, n_rounds, budget_per_round)
    scn = scenario if scenario is not None else make_scenario(n_pool + n_eval, random_state=random_state)
    if steps[-1] < float(np.min(scn.fees)):
        from .errors import InputError

        raise InputError(f"the rounds' whole budget ({steps[-1]:g}) buys no answer: the cheapest fee is "
                         f"{float(np.min(scn.fees)):g}; raise --budget or --rounds")
    n_pool = min(n_pool, scn.X.shape[0] // 2) if scenario is not None else n_pool
    params = dict(ROUTER_SETTINGS if router_params is None else router_params)
    stage, answers_all = _stage(scn, n_pool, params, n_folds, random_state)
    full = float(np.mean([stage.score(answers_all, None, random_state + 7919 * k)
                          for k in range(max(1, int(n_reference_fits)))]))
    region = regions_from_features(stage.X, n_regions=n_regions, random_state=random_state)
    proba = acquisition.class_probabilities(stage.X, stage.y, scn.n_classes, random_state=random_state)
    model_cost = acquisition.model_decision_cost(proba, 1.0)
    strata = proba.argmax(axis=1)  # predicted classes, as routeplan.rounds stratifies
    options = dict(planner_options or {})

    def plan(revealed, strategy, budget, rng, router):
        pool = _planner_input(stage.y, strata, region, revealed, answers_all, model_cost, stage.fees, 1.0,
                              scn.n_experts, n_regions)
        return acquisition.select_assignments(pool, budget=budget, strategy=strategy, audit_share=audit_share,
                                              focus=stage.focus(router, focus_margin, focus_two_sided),
                                              random_state=rng, **options)

    weigh = _weigher(weighting, region, strata)
    rows = []
    for strategy in strategies:
        rows += _play(stage, plan, weigh, strategy, steps, answers_all, random_state, int(n_router_fits), progress)
    known_truth = bool(np.all(scn.proba.max(axis=1) == 1.0))
    bayes = None if known_truth else float(stage.true_costs.min(axis=1).mean())
    return Rehearsal(pd.DataFrame(rows), bayes, full,
                     float(stage.fees.sum() * n_pool),
                     {"n_pool": n_pool, "n_eval": int(stage.true_costs.shape[0]), "budgets": steps,
                      "audit_share": audit_share, "n_regions": n_regions, "seed": random_state,
                      "focus_margin": focus_margin, "focus_two_sided": bool(focus_two_sided),
                      "experts": list(scn.names), "fees": stage.fees.tolist(), "weighting": weighting,
                      "router": {k: list(v) if isinstance(v, tuple) else v for k, v in params.items()},
                      "planner": options})


def _stage(scn: Scenario, n_pool: int, params: dict, n_folds: int, seed: int) -> tuple[_Stage, np.ndarray]:
    """Split the scenario, fix the class probabilities, draw every answer once."""
    K = scn.n_classes
    C = error_cost_matrix(K)
    fees = np.asarray(scn.fees, dtype=float)
    pool, held = np.arange(n_pool), np.arange(n_pool, scn.X.shape[0])
    X, y, X_eval = scn.X[pool], scn.y[pool], scn.X[held]
    true_costs = expected_cost_vectors(scn.proba[held], scn.correct_proba[held], cost_matrix=C, fees=fees)
    P, P_eval = _crossfit_proba(X, y, X_eval, K, n_folds, seed, params)
    stage = _Stage(X, y, X_eval, P, P_eval, true_costs, fees, C, params)
    return stage, scn.answers(seed)[pool]
