"""Capacity-aware routing: decisions from expected costs under per-expert workload caps.

Every case has ``K + M`` options: options ``0 .. K-1`` let the model decide that class,
option ``K + j`` defers the case to expert ``j``. Given the expected cost of every option
(for instance :func:`routeplan.costs.expected_cost_vectors`) and each expert's capacity as
the largest *share* of the routed cases it may take, routing is the assignment problem::

    minimise    sum_i sum_o x_io c_io
    subject to  sum_o x_io = 1                      for every case i
                sum_i x_{i,K+j} <= cap_j * n        for every expert j
                x >= 0

The model options carry no cap. This is a linear programme of transportation type (cases
supply one unit each, options absorb them); its Lagrangian dual has one price per capacity
constraint, and routing every case to the option of least ``cost + price`` is optimal
for the relaxed problem (Lagrangian relaxation of the generalised assignment problem,
Fisher, "The Lagrangian relaxation method for solving integer programming problems",
Management Science, 1981). Three entry points:

- :func:`capacity_lp` solves the LP with HiGHS (``scipy.optimize.linprog``) and returns the
  fractional assignment, its cost and the dual prices of the caps.
- :func:`route_with_prices` routes a stream of new cases with prices learned once (on a
  validation batch), optionally holding the caps with a running count.
- :func:`route_exact` routes one batch exactly: the LP solution, made integral.

Routes are integer arrays in the option coding above (``k < K``: class ``k``;
``K + j``: expert ``j``), the same coding as :func:`routeplan.simulate.bayes_optimal_routes`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

__all__ = ["LPResult", "capacity_lp", "route_exact", "route_with_prices"]

#: Default number of cases routed together by :func:`route_with_prices`.
DEFAULT_CHUNK_SIZE = 1024

# HiGHS through scipy. The interior-point solver (with crossover to a vertex, HiGHS's
# default) is ~10x faster than the simplex chosen by method="highs" on these LPs.
_LP_METHOD = "highs-ipm"


@dataclass(frozen=True)
class LPResult:
    """Solution of the capacity-constrained assignment LP.

    Attributes
    ----------
    assignment : ndarray of shape (n, K + M)
        The fractional assignment ``x``; every row sums to 1.
    objective : float
        ``sum_i sum_o x_io c_io``, the least total expected cost under the caps.
    prices : ndarray of shape (M,)
        Dual price of each expert's capacity constraint, ``>= 0``: how much the total cost
        would fall per extra case of capacity for that expert, hence the surcharge to add to
        that expert's option when routing case by case. Zero for a cap that does not bind.
    loads : ndarray of shape (M,)
        Number of cases (fractional) the solution sends to each expert.
    limits : ndarray of shape (M,)
        Right-hand side used for each expert, ``cap_j * n`` (``n`` for an uncapped expert).
    """

    assignment: np.ndarray
    objective: float
    prices: np.ndarray
    loads: np.ndarray
    limits: np.ndarray

    @property
    def mean_cost(self) -> float:
        """Objective per case (the system's expected cost per case under the caps)."""
        n = self.assignment.shape[0]
        return self.objective / n if n else 0.0


def capacity_lp(expected_costs: ArrayLike, capacities: ArrayLike, n_classes: int) -> LPResult:
    """Solve the capacity-constrained assignment LP of one batch of cases.

    The LP is solved in sparse form by HiGHS through ``scipy.optimize.linprog`` (its
    interior-point solver, ``method="highs-ipm"``, whose crossover returns a vertex). It is
    first reduced without changing its optimum or its dual prices: an option that carries no
    cap (a class, or an expert whose share is 1 or more) is free, so each case needs only its
    cheapest free option; and a capped expert whose cost is not below that one can be
    replaced by it at no extra cost (and with capacity to spare), so it is dropped. Cases
    left with no capped candidate go to their cheapest free option without entering the LP.
    The dropped options' dual constraints are implied by the free option's, as prices are
    ``>= 0``, so the dual is the same too.

    Parameters
    ----------
    expected_costs : array-like of shape (n, K + M)
        Expected cost of every option of every case; finite.
    capacities : array-like of shape (M,)
        Largest share of the ``n`` cases each expert may take, in ``[0, inf]``; a share of 1
        or more (or ``inf``) means no cap.
    n_classes : int
        Number of classes K (the first K columns are class options).

    Returns
    -------
    LPResult

    Raises
    ------
    ValueError
        On malformed input, or if the solver fails.
    """
    costs, caps = _check_costs_and_caps(expected_costs, capacities, n_classes)
    n = costs.shape[0]
    limits = np.minimum(caps, 1.0) * n
    return _solve(costs, n_classes, limits)


def route_with_prices(
    expected_costs: ArrayLike,
    prices: ArrayLike,
    n_classes: int,
    capacities: ArrayLike | None = None,
    *,
    stream_caps: bool = True,
    chunk_size: int = DEFAULT_CHUNK_SIZE,
) -> np.ndarray:
    """Route cases to the option of least ``expected cost + price``.

    Each expert's option is surcharged by its dual price (:attr:`LPResult.prices`, learned on
    a validation batch); the class options are not. Ties go to the lowest option index, so
    the model is preferred over an expert of equal priced cost.

    Prices alone can overshoot a cap: where many cases tie (for instance two experts of
    constant competence), every tied case goes to the same option. With ``capacities``
    given and ``stream_caps=True`` the cases are routed in arrival order, ``chunk_size``
    at a time, with a running count per expert. After each chunk an expert may hold at most
    ``floor(cap_j * t)`` of the first ``t`` cases. Inside a chunk, when an expert is
    preferred by more cases than its remaining quota, the cases that lose least by moving
    fall back, each to its next-best option that still has room (a class, or an expert
    under its quota); exact ties lose nothing and move first. A moved case never returns to
    the expert it left, and this repeats until no expert is over quota; the class options
    have no cap, so it always ends. With ``chunk_size=1`` this is the plain per-case rule
    ("an expert's share of the cases routed so far may not exceed its cap"); larger chunks
    are vectorised and let the fallback pick the cheapest cases to move. The caps hold at
    every chunk boundary, so at the end of the stream as well.

    Parameters
    ----------
    expected_costs : array-like of shape (n, K + M)
        Expected cost of every option, cases in arrival order.
    prices : array-like of shape (M,)
        Surcharge per expert, finite.
    n_classes : int
        Number of classes K.
    capacities : array-like of shape (M,), optional
        Largest share of the routed cases each expert may take (see :func:`capacity_lp`).
        Without it the caps are not enforced.
    stream_caps : bool, default=True
        Enforce ``capacities`` with the running count described above.
    chunk_size : int, default=1024
        Number of cases routed together.

    Returns
    -------
    ndarray of shape (n,), int64
        The chosen option of each case.
    """
    costs = _check_costs(expected_costs, n_classes)
    n_experts = costs.shape[1] - n_classes
    price = _check_vector(prices, n_experts, "prices", allow_inf=False)
    adjusted = costs.copy()
    adjusted[:, n_classes:] += price[None, :]
    if capacities is None or not stream_caps:
        return np.argmin(adjusted, axis=1).astype(np.int64)
    caps = np.minimum(_check_vector(capacities, n_experts, "capacities", allow_inf=True), 1.0)
    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise ValueError(f"chunk_size must be a positive integer, got {chunk_size!r}")
    return _route_stream(adjusted, n_classes, caps, int(chunk_size))


def route_exact(expected_costs: ArrayLike, capacities: ArrayLike, n_classes: int) -> np.ndarray:
    """Route one batch at least total expected cost, never exceeding any cap.

    Solves :func:`capacity_lp` with the integral limits ``floor(cap_j * n)`` (an integral
    assignment can hold no more anyway). The constraint matrix is totally unimodular: each
    expert variable sits in one case row and one expert row (a bipartite incidence matrix),
    each class variable in one case row only. So with integral limits every vertex of the
    LP is integral, and HiGHS returns a vertex (simplex, or interior point with crossover):
    the LP solution *is* the optimal routing. Should the solver return a fractional point
    (it may on exact ties), each case takes its option of largest weight and any expert
    then over its limit gives up the cases that lose least by moving to their next-best
    option (greedy); this stays within the caps but is then not guaranteed optimal.

    Parameters
    ----------
    expected_costs : array-like of shape (n, K + M)
    capacities : array-like of shape (M,)
        Largest share of the ``n`` cases each expert may take.
    n_classes : int
        Number of classes K.

    Returns
    -------
    ndarray of shape (n,), int64
        The chosen option of each case.
    """
    costs, caps = _check_costs_and_caps(expected_costs, capacities, n_classes)
    n = costs.shape[0]
    limits = np.floor(np.minimum(caps, 1.0) * n + 1e-9)
    result = _solve(costs, n_classes, limits)
    routes = np.argmax(result.assignment, axis=1).astype(np.int64)
    quota = limits.astype(np.int64)
    allowed = np.ones(costs.shape, dtype=bool)
    return _enforce_quota(costs, routes, allowed, n_classes, quota)


# --------------------------------------------------------------------------- LP


def _solve(costs: np.ndarray, n_classes: int, limits: np.ndarray) -> LPResult:
    """Solve the LP over the options that can matter and map the solution back."""
    n, n_options = costs.shape
    n_experts = n_options - n_classes
    capped = np.flatnonzero(limits < n)
    free_options = np.setdiff1d(np.arange(n_options), n_classes + capped)
    free = free_options[np.argmin(costs[:, free_options], axis=1)]
    free_cost = costs[np.arange(n), free]
    # Only a capped expert cheaper than the case's best uncapped option can carry weight.
    cases, which = np.nonzero(costs[:, n_classes + capped] < free_cost[:, None])
    assignment = np.zeros_like(costs)
    assignment[np.arange(n), free] = 1.0
    prices = np.zeros(n_experts)
    if cases.size:
        x_free, x_pair, marginals = _solve_reduced(costs, free_cost, n_classes, capped,
                                                   limits[capped], cases, which)
        lp_cases = np.unique(cases)
        assignment[lp_cases, free[lp_cases]] = x_free
        assignment[cases, n_classes + capped[which]] = x_pair
        # HiGHS reports d(objective)/d(b_ub) <= 0; the price of one case of capacity is
        # its negative (clipped at 0 against round-off).
        prices[capped] = np.maximum(-marginals, 0.0)
    objective = float(np.sum(assignment * costs))
    loads = assignment[:, n_classes:].sum(axis=0)
    return LPResult(assignment, objective, prices, loads, limits.copy())


def _solve_reduced(costs: np.ndarray, free_cost: np.ndarray, n_classes: int,
                   capped: np.ndarray, limits: np.ndarray, cases: np.ndarray,
                   which: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """HiGHS on the reduced LP: one free variable per case plus the candidate pairs."""
    from scipy import sparse
    from scipy.optimize import linprog

    lp_cases, row = np.unique(cases, return_inverse=True)
    n_lp, n_pairs = lp_cases.size, cases.size
    c = np.concatenate([free_cost[lp_cases], costs[cases, n_classes + capped[which]]])
    eq_rows = np.concatenate([np.arange(n_lp), row])
    A_eq = sparse.csr_matrix((np.ones(n_lp + n_pairs), (eq_rows, np.arange(n_lp + n_pairs))),
                             shape=(n_lp, n_lp + n_pairs))
    A_ub = sparse.csr_matrix((np.ones(n_pairs), (which, n_lp + np.arange(n_pairs))),
                             shape=(capped.size, n_lp + n_pairs))
    res = linprog(c, A_ub=A_ub, b_ub=limits, A_eq=A_eq, b_eq=np.ones(n_lp),
                  bounds=(0, None), method=_LP_METHOD)
    if res.status != 0:
        raise ValueError(f"capacity LP failed: {res.message}")
    x = np.clip(res.x, 0.0, 1.0)
    return x[:n_lp], x[n_lp:], np.asarray(res.ineqlin.marginals, dtype=np.float64)


# --------------------------------------------------------------------------- streaming


def _route_stream(adjusted: np.ndarray, n_classes: int, caps: np.ndarray,
                  chunk_size: int) -> np.ndarray:
    """Route chunk by chunk with a running count per expert (see route_with_prices)."""
    n = adjusted.shape[0]
    routes = np.empty(n, dtype=np.int64)
    counts = np.zeros(caps.size, dtype=np.int64)
    for start in range(0, n, chunk_size):
        stop = min(start + chunk_size, n)
        block = adjusted[start:stop]
        quota = np.floor(caps * stop + 1e-9).astype(np.int64) - counts
        choice = np.argmin(block, axis=1)
        allowed = np.ones(block.shape, dtype=bool)
        choice = _enforce_quota(block, choice, allowed, n_classes, quota)
        routes[start:stop] = choice
        counts += _expert_counts(choice, n_classes, caps.size)
    return routes


def _expert_counts(routes: np.ndarray, n_classes: int, n_experts: int) -> np.ndarray:
    """Number of cases routed to each expert."""
    experts = routes[routes >= n_classes] - n_classes
    return np.bincount(experts, minlength=n_experts).astype(np.int64)


def _enforce_quota(costs: np.ndarray, routes: np.ndarray, allowed: np.ndarray,
                   n_classes: int, quota: np.ndarray) -> np.ndarray:
    """Move the cheapest-to-move cases off experts over quota until none is (greedy)."""
    routes = routes.copy()
    n_experts = quota.size
    while True:
        counts = _expert_counts(routes, n_classes, n_experts)
        over = np.flatnonzero(counts > quota)
        if over.size == 0:
            return routes
        j = over[0]
        members = np.flatnonzero(routes == n_classes + j)
        allowed[members, n_classes + j] = False
        # Fall back to an option with room: a class, or an expert still under its quota.
        open_ = allowed[members].copy()
        open_[:, n_classes:] &= (counts < quota)[None, :]
        sub = np.where(open_, costs[members], np.inf)
        fallback = np.argmin(sub, axis=1)
        regret = sub[np.arange(members.size), fallback] - costs[members, n_classes + j]
        order = np.argsort(regret, kind="stable")
        excess = counts[j] - quota[j]
        keep, move = order[excess:], order[:excess]
        allowed[members[keep], n_classes + j] = True
        routes[members[move]] = fallback[move]


# --------------------------------------------------------------------------- validation


def _check_costs(expected_costs: ArrayLike, n_classes: int) -> np.ndarray:
    """Validate an (n, K + M) matrix of finite costs."""
    costs = np.asarray(expected_costs, dtype=np.float64)
    if costs.ndim != 2:
        raise ValueError(f"expected_costs must be 2-d (n, K + M), got shape {costs.shape}")
    if int(n_classes) != n_classes or not 1 <= n_classes <= costs.shape[1]:
        raise ValueError(
            f"n_classes must be an integer in 1..{costs.shape[1]}, got {n_classes!r}"
        )
    if not np.all(np.isfinite(costs)):
        raise ValueError("expected_costs must be finite (impute missing costs first)")
    return costs


def _check_vector(values: ArrayLike, size: int, name: str, *, allow_inf: bool) -> np.ndarray:
    """Validate a 1-d vector of one number per expert."""
    arr = np.asarray(values, dtype=np.float64)
    if arr.shape != (size,):
        raise ValueError(f"{name} must have shape ({size},), got {arr.shape}")
    ok = ~np.isnan(arr) if allow_inf else np.isfinite(arr)
    if not np.all(ok):
        raise ValueError(f"{name} must be {'numbers' if allow_inf else 'finite'}")
    if allow_inf and np.any(arr < 0):
        raise ValueError(f"{name} must be >= 0")
    return arr


def _check_costs_and_caps(expected_costs: ArrayLike, capacities: ArrayLike,
                          n_classes: int) -> tuple[np.ndarray, np.ndarray]:
    """Validate a cost matrix and its per-expert capacity shares."""
    costs = _check_costs(expected_costs, n_classes)
    n_experts = costs.shape[1] - int(n_classes)
    caps = _check_vector(capacities, n_experts, "capacities", allow_inf=True)
    return costs, caps
