"""Cost vectors of the K + M options of each case.

For a case with truth ``y`` and known expert answers ``m_j`` the options are the
``K`` classes (the model decides) and the ``M`` experts (the case is deferred). Their
costs are::

    c_k     = C[y, k]                 k = 0 .. K-1
    c_{K+j} = C[y, m_j] + fee_j       j = 0 .. M-1

with ``C`` the error-cost matrix (``C[y, k]`` is the cost of deciding ``k`` when the
truth is ``y``) and the fees in the same unit as one error. This is the cost form of
learning to defer used by Mozannar & Sontag ("Consistent Estimators for Learning to
Defer to an Expert", ICML 2020) and, for several experts, by Verma, Barrejon &
Nalisnick ("Learning to Defer to Multiple Experts: Consistent Surrogate Losses,
Confidence Calibration, and Conformal Ensembles", AISTATS 2023).

An expert answer that is unknown (the expert was not asked) is coded ``-1``; its
option cost is ``NaN`` until :func:`impute_missing_costs` fills it.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

__all__ = [
    "MISSING_ANSWER",
    "cost_vectors",
    "error_cost_matrix",
    "expected_cost_vectors",
    "impute_missing_costs",
    "wrong_answer_costs",
]

#: Code of an unknown (not asked, not answered) expert answer.
MISSING_ANSWER = -1


def error_cost_matrix(
    n_classes: int, error_cost: float = 1.0, matrix: ArrayLike | None = None
) -> np.ndarray:
    """Return the error-cost matrix ``C`` of shape (K, K).

    Parameters
    ----------
    n_classes : int
        Number of classes K (at least 2).
    error_cost : float, default=1.0
        Cost of one wrong decision when ``matrix`` is not given; the matrix is then
        ``error_cost * (1 - I)`` (0/1 costs scaled).
    matrix : array-like of shape (K, K), optional
        An explicit matrix; ``matrix[y, k]`` is the cost of deciding ``k`` when the
        truth is ``y``. Entries must be finite and non-negative.

    Returns
    -------
    ndarray of shape (K, K), float64
    """
    n_classes = _check_n_classes(n_classes)
    if matrix is None:
        if not np.isfinite(error_cost) or error_cost < 0:
            raise ValueError(f"error_cost must be finite and >= 0, got {error_cost!r}")
        return float(error_cost) * (1.0 - np.eye(n_classes))
    out = np.array(matrix, dtype=np.float64)
    if out.shape != (n_classes, n_classes):
        raise ValueError(
            f"cost matrix must have shape ({n_classes}, {n_classes}), got {out.shape}"
        )
    if not np.all(np.isfinite(out)) or np.any(out < 0):
        raise ValueError("cost matrix entries must be finite and >= 0")
    return out


def cost_vectors(
    y: ArrayLike,
    answers: ArrayLike,
    *,
    cost_matrix: ArrayLike,
    fees: ArrayLike,
) -> np.ndarray:
    """Realised cost of every option of every case.

    Parameters
    ----------
    y : array-like of int, shape (n,)
        True class of each case, in ``0 .. K-1``.
    answers : array-like of int, shape (n, M)
        Each expert's answer, in ``0 .. K-1``, or ``-1`` where unknown.
    cost_matrix : array-like of shape (K, K)
        Error-cost matrix (see :func:`error_cost_matrix`).
    fees : array-like of shape (M,)
        Fee of each expert per case, in the unit of the cost matrix.

    Returns
    -------
    ndarray of shape (n, K + M), float64
        ``c[:, k] = C[y, k]``; ``c[:, K + j] = C[y, answers[:, j]] + fees[j]``, NaN
        where the answer is unknown.
    """
    C = _check_cost_matrix(cost_matrix)
    n_classes = C.shape[0]
    y = _check_labels(y, n_classes, "y")
    fees = _check_fees(fees)
    answers = _check_answers(answers, len(y), len(fees), n_classes)
    class_costs = C[y]
    known = answers != MISSING_ANSWER
    safe = np.where(known, answers, 0)
    expert_costs = C[y[:, None], safe] + fees[None, :]
    expert_costs = np.where(known, expert_costs, np.nan)
    return np.hstack([class_costs, expert_costs])


def wrong_answer_costs(cost_matrix: ArrayLike) -> np.ndarray:
    """Expected cost of a wrong answer given the truth, per true class.

    A wrong answer is taken to be uniformly random over the other ``K - 1`` classes,
    so the cost is the mean off-diagonal entry of each row: ``mean_{k != y} C[y, k]``.
    For ``C = e (1 - I)`` every entry is ``e``.

    Parameters
    ----------
    cost_matrix : array-like of shape (K, K)

    Returns
    -------
    ndarray of shape (K,)
    """
    C = _check_cost_matrix(cost_matrix)
    n_classes = C.shape[0]
    off = C.sum(axis=1) - np.diag(C)
    return off / (n_classes - 1)


def expected_cost_vectors(
    class_proba: ArrayLike,
    expert_correct_proba: ArrayLike | None = None,
    *,
    cost_matrix: ArrayLike,
    fees: ArrayLike,
    expert_confusion: ArrayLike | None = None,
) -> np.ndarray:
    """Expected cost of every option given estimated probabilities.

    The class options cost ``sum_y P(y|x) C[y, k]``. An expert option costs its fee plus
    the expected cost of its answer, from one of two descriptions of the expert:

    - ``expert_correct_proba`` ``q_j(x) = P(expert j right | x)``. A wrong answer is
      taken as uniformly random over the other classes and independent of ``y`` given
      ``x`` being right or wrong, so the answer costs
      ``sum_y P(y|x) [q_j C[y, y] + (1 - q_j) w[y]]`` with ``w[y] = mean_{k != y} C[y, k]``
      (:func:`wrong_answer_costs`). Under 0/1-type costs ``C = e (1 - I)`` this is
      ``(1 - q_j) e``: the cost of a wrong expert answer is the mean off-diagonal cost.
    - ``expert_confusion`` ``P(answer = a | y)`` per expert, shape (M, K, K), or per case
      (n, M, K, K): the answer costs ``sum_y P(y|x) sum_a P(a|y) C[y, a]``.

    Parameters
    ----------
    class_proba : array-like of shape (n, K)
        ``P(y | x)``; rows must sum to 1.
    expert_correct_proba : array-like of shape (n, M), optional
        Probability that each expert answers right.
    cost_matrix : array-like of shape (K, K)
    fees : array-like of shape (M,)
    expert_confusion : array-like of shape (M, K, K) or (n, M, K, K), optional
        Row-stochastic confusion matrices; give this or ``expert_correct_proba``
        (neither only when ``M = 0``).

    Returns
    -------
    ndarray of shape (n, K + M), float64
    """
    C = _check_cost_matrix(cost_matrix)
    n_classes = C.shape[0]
    P = _check_proba(class_proba, n_classes)
    fees = _check_fees(fees)
    n, n_experts = P.shape[0], len(fees)
    class_costs = P @ C
    if expert_correct_proba is not None and expert_confusion is not None:
        raise ValueError("give expert_correct_proba or expert_confusion, not both")
    if expert_correct_proba is not None:
        answer_costs = _answer_costs_from_correct(P, C, expert_correct_proba, n_experts)
    elif expert_confusion is not None:
        answer_costs = _answer_costs_from_confusion(P, C, expert_confusion, n_experts)
    elif n_experts == 0:
        answer_costs = np.zeros((n, 0))
    else:
        raise ValueError("give expert_correct_proba or expert_confusion for the experts")
    return np.hstack([class_costs, answer_costs + fees[None, :]])


def impute_missing_costs(costs: ArrayLike, imputed: ArrayLike) -> np.ndarray:
    """Fill the NaN entries of ``costs`` from ``imputed``.

    Parameters
    ----------
    costs : array-like of shape (n, K + M)
        Realised costs with NaN where an expert's answer is unknown.
    imputed : array-like of shape (n, K + M)
        An estimate of the same costs (for instance :func:`expected_cost_vectors`);
        only its entries where ``costs`` is NaN are used, and they must be finite.

    Returns
    -------
    ndarray of shape (n, K + M), float64
        A new array; ``costs`` is not modified.
    """
    costs = np.asarray(costs, dtype=np.float64)
    imputed = np.asarray(imputed, dtype=np.float64)
    if costs.shape != imputed.shape:
        raise ValueError(f"shapes differ: costs {costs.shape}, imputed {imputed.shape}")
    missing = np.isnan(costs)
    if not np.all(np.isfinite(imputed[missing])):
        raise ValueError("imputed costs must be finite where costs are missing")
    return np.where(missing, imputed, costs)


def _answer_costs_from_correct(
    P: np.ndarray, C: np.ndarray, correct: ArrayLike, n_experts: int
) -> np.ndarray:
    """Expected answer cost per expert from P(right | x); shape (n, M)."""
    q = np.asarray(correct, dtype=np.float64)
    if q.shape != (P.shape[0], n_experts):
        raise ValueError(
            f"expert_correct_proba must have shape {(P.shape[0], n_experts)}, got {q.shape}"
        )
    if not np.all(np.isfinite(q)) or np.any(q < 0) or np.any(q > 1):
        raise ValueError("expert_correct_proba must lie in [0, 1]")
    right = P @ np.diag(C)
    wrong = P @ wrong_answer_costs(C)
    return q * right[:, None] + (1.0 - q) * wrong[:, None]


def _answer_costs_from_confusion(
    P: np.ndarray, C: np.ndarray, confusion: ArrayLike, n_experts: int
) -> np.ndarray:
    """Expected answer cost per expert from confusion matrices; shape (n, M)."""
    n, n_classes = P.shape
    Q = np.asarray(confusion, dtype=np.float64)
    if Q.shape not in {(n_experts, n_classes, n_classes), (n, n_experts, n_classes, n_classes)}:
        raise ValueError(
            "expert_confusion must have shape (M, K, K) or (n, M, K, K), got " f"{Q.shape}"
        )
    if not np.all(np.isfinite(Q)) or np.any(Q < 0):
        raise ValueError("expert_confusion entries must be finite and >= 0")
    if not np.allclose(Q.sum(axis=-1), 1.0, atol=1e-6):
        raise ValueError("each row of expert_confusion must sum to 1 (P(answer | y))")
    per_truth = np.einsum("...ya,ya->...y", Q, C)  # (M, K) or (n, M, K)
    if per_truth.ndim == 2:
        return P @ per_truth.T
    return np.einsum("ny,nmy->nm", P, per_truth)


def _check_n_classes(n_classes: int) -> int:
    """Validate a class count."""
    if int(n_classes) != n_classes or n_classes < 2:
        raise ValueError(f"n_classes must be an integer >= 2, got {n_classes!r}")
    return int(n_classes)


def _check_cost_matrix(cost_matrix: ArrayLike) -> np.ndarray:
    """Validate a square, finite, non-negative cost matrix."""
    C = np.asarray(cost_matrix, dtype=np.float64)
    if C.ndim != 2 or C.shape[0] != C.shape[1] or C.shape[0] < 2:
        raise ValueError(f"cost matrix must be square (K, K) with K >= 2, got {C.shape}")
    if not np.all(np.isfinite(C)) or np.any(C < 0):
        raise ValueError("cost matrix entries must be finite and >= 0")
    return C


def _check_fees(fees: ArrayLike) -> np.ndarray:
    """Validate a 1-d vector of finite, non-negative fees."""
    f = np.asarray(fees, dtype=np.float64).reshape(-1) if np.ndim(fees) else None
    if f is None:
        raise ValueError("fees must be a 1-d array of shape (M,)")
    if not np.all(np.isfinite(f)) or np.any(f < 0):
        raise ValueError("fees must be finite and >= 0")
    return f


def _check_labels(y: ArrayLike, n_classes: int, name: str) -> np.ndarray:
    """Validate a 1-d integer label vector in 0..K-1."""
    arr = np.asarray(y)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be 1-d, got shape {arr.shape}")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        if not np.all(np.equal(np.mod(arr, 1), 0)):
            raise ValueError(f"{name} must hold integer class indices")
    arr = arr.astype(np.int64)
    if arr.size and (arr.min() < 0 or arr.max() >= n_classes):
        raise ValueError(f"{name} must lie in 0..{n_classes - 1}")
    return arr


def _check_answers(answers: ArrayLike, n: int, n_experts: int, n_classes: int) -> np.ndarray:
    """Validate an (n, M) answer matrix with -1 for unknown."""
    arr = np.asarray(answers)
    if arr.size == 0 and n_experts == 0:
        return np.zeros((n, 0), dtype=np.int64)
    if arr.shape != (n, n_experts):
        raise ValueError(f"answers must have shape {(n, n_experts)}, got {arr.shape}")
    arr = arr.astype(np.int64)
    if arr.size and (arr.min() < MISSING_ANSWER or arr.max() >= n_classes):
        raise ValueError(f"answers must lie in 0..{n_classes - 1}, or be -1 when unknown")
    return arr


def _check_proba(proba: ArrayLike, n_classes: int) -> np.ndarray:
    """Validate an (n, K) matrix of class probabilities."""
    P = np.asarray(proba, dtype=np.float64)
    if P.ndim != 2 or P.shape[1] != n_classes:
        raise ValueError(f"class_proba must have shape (n, {n_classes}), got {P.shape}")
    if not np.all(np.isfinite(P)) or np.any(P < 0):
        raise ValueError("class_proba must be finite and >= 0")
    if not np.allclose(P.sum(axis=1), 1.0, atol=1e-6):
        raise ValueError("each row of class_proba must sum to 1")
    return P
