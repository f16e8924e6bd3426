"""Reference routers and the yardsticks every router is compared with.

All functions are pure functions of a cost matrix ``costs`` of shape (n, K + M)
(see :mod:`routeplan.costs`) and of routes: one option per case, ``k < K`` meaning the
model decides class ``k``, ``K + j`` meaning the case goes to expert ``j``.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "confidence_routes",
    "coverage",
    "expert_alone_cost",
    "model_alone_cost",
    "oracle_cost",
    "system_cost",
    "workload",
]


def system_cost(costs: ArrayLike, routes: ArrayLike) -> float:
    """Mean cost of the chosen option of each case: ``mean_i costs[i, routes[i]]``.

    Parameters
    ----------
    costs : array-like of shape (n, K + M)
        Realised option costs; the chosen entries must be known (not NaN).
    routes : array-like of int, shape (n,)
        Chosen option per case.

    Returns
    -------
    float
    """
    c = _check_costs(costs)
    r = _check_routes(routes, len(c), c.shape[1])
    chosen = c[np.arange(len(c)), r]
    if np.isnan(chosen).any():
        raise ValueError(
            f"{int(np.isnan(chosen).sum())} case(s) are routed to an expert whose answer is "
            "unknown; evaluate on cases with known answers or impute the costs first"
        )
    return float(chosen.mean())


def model_alone_cost(
    costs: ArrayLike, predictions: ArrayLike, *, n_classes: int | None = None
) -> float:
    """Mean cost when the model decides every case.

    Parameters
    ----------
    costs : array-like of shape (n, K + M)
    predictions : array-like of int, shape (n,)
        The model's class for each case.
    n_classes : int, optional
        K; when given, predictions must lie in ``0 .. K-1``.

    Returns
    -------
    float
    """
    c = _check_costs(costs)
    bound = c.shape[1] if n_classes is None else int(n_classes)
    return system_cost(c, _check_routes(predictions, len(c), bound))


def expert_alone_cost(
    costs: ArrayLike, expert: int, *, n_classes: int, missing: str = "raise"
) -> float:
    """Mean cost when expert ``expert`` decides every case (fee included).

    Parameters
    ----------
    costs : array-like of shape (n, K + M)
    expert : int
        Expert index j (column ``K + j``).
    n_classes : int
        K.
    missing : {"raise", "skip"}, default="raise"
        What to do with cases where the expert's answer is unknown: refuse, or average
        over the known ones only (unbiased only when the known ones are a random sample).

    Returns
    -------
    float
    """
    c = _check_costs(costs)
    col = int(n_classes) + int(expert)
    if not 0 <= expert or col >= c.shape[1]:
        raise ValueError(f"expert must lie in 0..{c.shape[1] - n_classes - 1}, got {expert!r}")
    values = c[:, col]
    known = ~np.isnan(values)
    if missing == "raise":
        if not known.all():
            raise ValueError(f"expert {expert} has {int((~known).sum())} unknown answer(s)")
    elif missing != "skip":
        raise ValueError(f"missing must be 'raise' or 'skip', got {missing!r}")
    if not known.any():
        raise ValueError(f"expert {expert} has no known answer")
    return float(values[known].mean())


def oracle_cost(costs: ArrayLike) -> float:
    """Mean cost of the full-information oracle: the cheapest option of each case.

    The oracle sees the realised truth and answers, so no router can do better on the
    same cases (a lower bound; common practice). Unknown (NaN) options are ignored.

    Parameters
    ----------
    costs : array-like of shape (n, K + M)

    Returns
    -------
    float
    """
    c = _check_costs(costs)
    if np.isnan(c).all(axis=1).any():
        raise ValueError("every case needs at least one known option cost")
    return float(np.nanmin(c, axis=1).mean())


def coverage(routes: ArrayLike, n_classes: int) -> float:
    """Share of cases decided by the model (route below ``n_classes``).

    Parameters
    ----------
    routes : array-like of int, shape (n,)
    n_classes : int

    Returns
    -------
    float
    """
    r = np.asarray(routes)
    if r.ndim != 1 or r.size == 0:
        raise ValueError("routes must be a non-empty 1-d array")
    return float(np.mean(r < n_classes))


def workload(routes: ArrayLike, n_classes: int, n_experts: int) -> np.ndarray:
    """Share of all cases sent to each expert.

    Parameters
    ----------
    routes : array-like of int, shape (n,)
    n_classes : int
    n_experts : int

    Returns
    -------
    ndarray of shape (M,)
        ``workload[j]`` is the share of cases routed to expert j; ``coverage`` plus the
        sum of the workloads is 1.
    """
    r = _check_routes(routes, np.asarray(routes).shape[0], n_classes + n_experts)
    if r.size == 0:
        raise ValueError("routes must be non-empty")
    counts = np.bincount(r, minlength=n_classes + n_experts)[n_classes:]
    return counts / r.size


def confidence_routes(
    class_proba: ArrayLike, expert_correct_proba: ArrayLike, *, fees: ArrayLike | None = None
) -> np.ndarray:
    """Confidence comparison: defer when an expert is likelier to be right than the model.

    The baseline of Raghu, Blumer, Corrado, Kleinberg, Obermeyer & Mullainathan ("The
    Algorithmic Automation Problem: Prediction, Triage, and Human Effort", arXiv 2019),
    trained separately: the model's confidence ``max_k P(k|x)`` is compared with each
    expert's ``P(right|x)`` minus its fee, and the larger wins. Under 0/1 costs with
    calibrated inputs this is the Bayes rule.

    Parameters
    ----------
    class_proba : array-like of shape (n, K)
    expert_correct_proba : array-like of shape (n, M)
    fees : array-like of shape (M,), optional
        In units of one error; default 0.

    Returns
    -------
    ndarray of shape (n,), int
        Routes: ``argmax_k P(k|x)`` or ``K + j``.
    """
    P = np.asarray(class_proba, dtype=np.float64)
    Q = np.asarray(expert_correct_proba, dtype=np.float64)
    if P.ndim != 2 or Q.ndim != 2 or len(P) != len(Q):
        raise ValueError("class_proba (n, K) and expert_correct_proba (n, M) must have n rows")
    f = np.zeros(Q.shape[1]) if fees is None else np.asarray(fees, dtype=np.float64)
    if f.shape != (Q.shape[1],):
        raise ValueError(f"fees must have shape ({Q.shape[1]},)")
    scores = np.hstack([P, Q - f])
    best_class = P.argmax(axis=1)
    best = scores.argmax(axis=1)
    return np.where(best < P.shape[1], best_class, best)


def _check_costs(costs: ArrayLike) -> np.ndarray:
    """Validate a 2-d float cost array (NaN allowed for unknown answers)."""
    c = np.asarray(costs, dtype=np.float64)
    if c.ndim != 2 or c.shape[0] == 0:
        raise ValueError(f"costs must be a non-empty (n, K + M) array, got shape {c.shape}")
    if np.isinf(c).any():
        raise ValueError("costs must not be infinite")
    return c


def _check_routes(routes: ArrayLike, n: int, n_options: int) -> np.ndarray:
    """Validate integer routes of length n in 0..n_options-1."""
    r = np.asarray(routes)
    if r.shape != (n,):
        raise ValueError(f"routes must have shape ({n},), got {r.shape}")
    if r.size and not np.issubdtype(r.dtype, np.integer):
        raise ValueError("routes must be integers")
    r = r.astype(np.int64)
    if r.size and (r.min() < 0 or r.max() >= n_options):
        raise ValueError(f"routes must lie in 0..{n_options - 1}")
    return r
