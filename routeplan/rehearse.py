"""Rehearsing a labelling budget on a synthetic scenario before any money is spent.

A rehearsal plays several rounds for each strategy on a scenario of :mod:`routeplan.simulate`
(known ``P(y | x)`` and known per-region competence), with the same planner as
``routeplan round plan`` (:func:`routeplan.acquisition.select_assignments`). After each round a
plug-in router is fitted on the answers revealed so far, and its system cost is computed
*exactly* on held-out cases from the known probabilities, so the curves carry no evaluation
noise. Two references frame them: the Bayes-optimal cost, and the cost of the same router
fitted with every expert's answer on every pool case ("full information").
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np
import pandas as pd

from . import acquisition
from .competence import regions_from_features
from .costs import error_cost_matrix, expected_cost_vectors
from .simulate import Scenario, make_scenario

__all__ = ["Rehearsal", "rehearse", "budget_to_reach", "system_cost_exact"]

STRATEGIES = ("value", "uncertain", "random")


@dataclass
class Rehearsal:
    """Curves of system cost against spend, per strategy.

    Attributes
    ----------
    curves : pandas.DataFrame
        One row per (strategy, round): ``strategy``, ``round``, ``spend`` (cumulative fees),
        ``answers`` (cumulative), ``system_cost`` (exact expected cost per case on held-out
        cases of the router fitted after that round).
    bayes_cost : float
        Bayes-optimal expected cost on the held-out cases.
    full_information_cost : float
        Cost of the same router fitted with all answers of all pool cases.
    full_information_spend : float
        What those answers would cost.
    settings : dict
    """

    curves: pd.DataFrame
    bayes_cost: float
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


def budget_to_reach(curves: pd.DataFrame, target: float) -> dict[str, float]:
    """Smallest cumulative spend at which each strategy's cost is at most ``target`` (inf if never).

    Parameters
    ----------
    curves : pandas.DataFrame
        :attr:`Rehearsal.curves`.
    target : float

    Returns
    -------
    dict of str to float
    """
    out = {}
    for strategy, rows in curves.groupby("strategy", sort=False):
        hit = rows.loc[rows["system_cost"] <= target, "spend"]
        out[str(strategy)] = float(hit.min()) if len(hit) else float("inf")
    return out


def _fit_and_score(X, y, answers, weights, fees, C, X_eval, true_costs, seed, max_epochs) -> float:
    from .learner import PluginRouter

    router = PluginRouter(random_state=seed, max_epochs=max_epochs, hidden=(32, 32))
    router.fit(X, y, answers, fees=fees, cost_matrix=C, sample_weight=weights)
    return system_cost_exact(true_costs, router.predict_route(X_eval))


def _planner_input(scn_X, y, region, revealed, answers_all, proba, fees, capacities, error_cost, M, n_regions):
    right = (answers_all == y[:, None]) & revealed
    correct = np.zeros((M, n_regions))
    answered = np.zeros((M, n_regions))
    for j in range(M):
        correct[j] = np.bincount(region, weights=right[:, j], minlength=n_regions)
        answered[j] = np.bincount(region, weights=revealed[:, j], minlength=n_regions)
    return acquisition.Pool(
        eligible=~revealed, region=region, stratum=y, fees=fees, capacities=capacities,
        correct=correct, answered=answered, pending=np.zeros((M, n_regions)),
        model_cost=acquisition.model_decision_cost(proba, error_cost), population_region=region,
        error_cost=error_cost,
    )


def rehearse(
    scenario: Scenario | None = None,
    *,
    n_pool: int = 3000,
    n_eval: int = 5000,
    strategies: Sequence[str] = STRATEGIES,
    n_rounds: int = 6,
    budget_per_round: float = 10.0,
    audit_share: float = 0.1,
    n_regions: int = 6,
    max_epochs: int = 40,
    random_state: int = 0,
    progress: Any = None,
) -> Rehearsal:
    """Play ``n_rounds`` rounds per strategy and measure the system cost after each.

    Parameters
    ----------
    scenario : Scenario, optional
        Default: ``make_scenario(n_pool + n_eval, random_state=random_state)``. Its first
        ``n_pool`` cases form the pool (with truth), the rest the held-out cases.
    n_pool, n_eval : int
    strategies : sequence of str, default=("value", "uncertain", "random")
    n_rounds : int, default=6
    budget_per_round : float, default=10.0
        In fee units.
    audit_share : float, default=0.1
    n_regions : int, default=6
    max_epochs : int, default=40
        Training epochs of each fitted router.
    random_state : int, default=0
    progress : callable, optional
        Called as ``progress(description)`` after each fit (for a progress bar).

    Returns
    -------
    Rehearsal
    """
    scn = scenario if scenario is not None else make_scenario(n_pool + n_eval, random_state=random_state)
    n_pool = min(n_pool, scn.X.shape[0] // 2) if scenario is not None else n_pool
    K, M = scn.n_classes, scn.n_experts
    C = error_cost_matrix(K)
    fees = np.asarray(scn.fees, dtype=float)
    pool, held = np.arange(n_pool), np.arange(n_pool, scn.X.shape[0])
    X, y = scn.X[pool], scn.y[pool]
    X_eval = scn.X[held]
    true_costs = expected_cost_vectors(scn.proba[held], scn.correct_proba[held], cost_matrix=C, fees=fees)
    bayes = float(true_costs.min(axis=1).mean())
    answers_all = scn.answers(random_state)[pool]
    full = _fit_and_score(X, y, answers_all, None, fees, C, X_eval, true_costs, random_state, max_epochs)
    region = regions_from_features(X, n_regions=n_regions, random_state=random_state)
    proba = acquisition.class_probabilities(X, y, K, random_state=random_state)
    rows = []
    for strategy in strategies:
        revealed = np.zeros((n_pool, M), dtype=bool)
        prob = np.full((n_pool, M), np.nan)
        spend = 0.0
        rng = np.random.default_rng([random_state, STRATEGIES.index(strategy) if strategy in STRATEGIES else 99])
        for round_no in range(1, n_rounds + 1):
            planner = _planner_input(X, y, region, revealed, answers_all, proba, fees, np.ones(M), 1.0, M, n_regions)
            sel = acquisition.select_assignments(planner, budget=budget_per_round, strategy=strategy,
                                                 audit_share=audit_share, random_state=rng)
            revealed[sel.case, sel.expert] = True
            prob[sel.case, sel.expert] = sel.selection_prob
            spend += float(sel.spend.sum())
            shown = np.where(revealed, answers_all, -1)
            from .fitting import answer_weights

            cost = _fit_and_score(X, y, shown, answer_weights(prob, shown), fees, C, X_eval, true_costs,
                                  random_state, max_epochs)
            rows.append({"strategy": strategy, "round": round_no, "spend": spend,
                         "answers": int(revealed.sum()), "system_cost": cost})
            if progress is not None:
                progress(f"{strategy} round {round_no}")
    return Rehearsal(pd.DataFrame(rows), bayes, full, float(fees.sum() * n_pool),
                     {"n_pool": n_pool, "n_eval": len(held), "n_rounds": n_rounds,
                      "budget_per_round": budget_per_round, "audit_share": audit_share,
                      "n_regions": n_regions, "seed": random_state, "experts": list(scn.names),
                      "fees": fees.tolist()})
