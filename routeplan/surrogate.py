"""Surrogate losses for learning to defer, as pure functions of tensors.

Every loss takes the scores ``logits`` of shape (n, K + M) of the ``K`` classes and the
``M`` experts. The cost-form losses (:func:`softmax_cost_surrogate`,
:func:`one_vs_all_surrogate`) take the option costs ``costs`` of the same shape (see
:mod:`routeplan.costs`; impute missing expert costs first, no NaN allowed), and the
decision of a scorer trained by them is ``argmax logits``: a class (the model decides)
or expert ``j`` (column ``K + j``). :func:`asymmetric_softmax_surrogate` takes the truth
and each expert's correctness instead and yields probabilities, to be turned into
decisions with :func:`routeplan.costs.expected_cost_vectors`.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import Tensor

__all__ = [
    "asymmetric_softmax",
    "asymmetric_softmax_surrogate",
    "one_vs_all_surrogate",
    "option_probabilities",
    "ova_expected_costs",
    "softmax_cost_surrogate",
]

_REDUCTIONS = ("mean", "sum", "none")


def softmax_cost_surrogate(
    logits: Tensor,
    costs: Tensor,
    *,
    weights: Tensor | None = None,
    alpha: float = 1.0,
    reduction: str = "mean",
    n_classes: int | None = None,
) -> Tensor:
    """Cost-sensitive softmax cross-entropy surrogate for learning to defer.

    ``L(g, c) = sum_r (max(c) - c_r) * (-log softmax(g)_r)``, the cost-sensitive
    cross-entropy of Mozannar & Sontag ("Consistent Estimators for Learning to Defer to
    an Expert", ICML 2020, section 4), whose multi-expert form is the softmax surrogate
    of Verma, Barrejon & Nalisnick ("Learning to Defer to Multiple Experts: Consistent
    Surrogate Losses, Confidence Calibration, and Conformal Ensembles", AISTATS 2023).
    It is consistent: minimising its expectation over free scores puts the largest
    score on the option of least expected cost. With no experts and 0/1 costs it is the
    ordinary cross-entropy; with one expert, no fee and 0/1 costs it is
    ``-log p_y - 1[m = y] log p_defer`` (Mozannar & Sontag's ``L_CE``).

    Parameters
    ----------
    logits : Tensor of shape (n, K + M)
    costs : Tensor of shape (n, K + M)
        Option costs, finite.
    weights : Tensor of shape (n,), optional
        Per-case weights, e.g. the inverse of the probability with which the case's
        answers were acquired.
    alpha : float, default=1.0
        Multiplies the weights of the deferral terms (columns ``K ..``); needs
        ``n_classes`` unless 1. ``alpha > 1`` pushes toward deferring, ``alpha < 1``
        away from it. This plays the role of the ``alpha`` of Mozannar & Sontag's
        ``L_CE^alpha`` (a knob traded on validation cost) but is not identical: theirs
        scales the classifier term on cases the expert gets right. Any ``alpha != 1``
        gives up consistency.
    reduction : {"mean", "sum", "none"}, default="mean"
        ``"mean"`` divides the weighted sum by ``n`` (not by the sum of weights), so
        inverse-probability weights stay unbiased.
    n_classes : int, optional
        Number of classes K; needed only when ``alpha != 1``.

    Returns
    -------
    Tensor
        Scalar, or shape (n,) for ``reduction="none"``.
    """
    _check_pair(logits, costs)
    costs = costs.to(logits.dtype)
    gaps = costs.max(dim=1, keepdim=True).values - costs
    if alpha != 1.0:
        k = _check_n_classes(n_classes, logits.shape[1])
        scale = torch.ones_like(gaps)
        scale[:, k:] = float(alpha)
        gaps = gaps * scale
    per_case = -(gaps * F.log_softmax(logits, dim=1)).sum(dim=1)
    return _reduce(per_case, weights, reduction)


def one_vs_all_surrogate(
    logits: Tensor,
    costs: Tensor,
    *,
    weights: Tensor | None = None,
    n_classes: int,
    reduction: str = "mean",
    cost_scale: float | None = None,
) -> Tensor:
    """One-vs-all logistic surrogate for learning to defer, generalised to costs.

    Verma & Nalisnick ("Calibrated Learning to Defer with One-vs-All Classifiers",
    ICML 2022) give, for 0/1 costs and one expert with answer ``m``,
    ``phi(g_y) + sum_{k != y} phi(-g_k) + phi(-g_defer) + 1[m = y] (phi(g_defer) -
    phi(-g_defer))`` with ``phi(z) = log(1 + exp(-z))``, that is
    ``-log s(g_y) - sum_{k != y} log(1 - s(g_k)) - 1[m = y] log s(g_defer)
    - 1[m != y] log(1 - s(g_defer))``; Verma, Barrejon & Nalisnick (AISTATS 2023)
    sum the expert terms over several experts.

    Generalisation used here: each option ``r`` gets a binary logistic loss with the
    soft target ``t_r = 1 - c_r / B``, ``B = cost_scale`` a bound on the costs::

        L = sum_r [ -t_r log s(g_r) - (1 - t_r) log(1 - s(g_r)) ]

    For 0/1 costs without fees and ``B = 1`` the targets are ``1[k = y]`` and
    ``1[m_j = y]``: the paper's loss. The pointwise minimiser is
    ``s(g_r) = 1 - E[c_r | x] / B``, so ``argmax g`` is the option of least expected
    cost (consistency) and ``B (1 - s(g_r))`` estimates its expected cost
    (:func:`ova_expected_costs`). Keep ``B`` fixed across batches (e.g. the largest
    error cost plus the largest fee).

    Like :func:`softmax_cost_surrogate`, the loss is linear in the costs, so costs
    corrected by inverse-probability or doubly robust weighting (which may leave
    ``[0, B]``) keep its expectation unbiased; a single case's loss is then unbounded
    below, so use such costs with a bounded scorer or enough cases per batch.

    Parameters
    ----------
    logits : Tensor of shape (n, K + M)
    costs : Tensor of shape (n, K + M)
        Option costs, finite; realised costs lie in ``[0, cost_scale]``.
    weights : Tensor of shape (n,), optional
        Per-case weights.
    n_classes : int
        Number of classes K (kept for a uniform interface and validation).
    reduction : {"mean", "sum", "none"}, default="mean"
    cost_scale : float, optional
        The bound ``B``; defaults to ``max(1, costs.max())`` over this call, which
        varies between batches (pass a fixed value when training in batches).

    Returns
    -------
    Tensor
        Scalar, or shape (n,) for ``reduction="none"``.
    """
    _check_pair(logits, costs)
    _check_n_classes(n_classes, logits.shape[1])
    costs = costs.to(logits.dtype)
    scale = _cost_scale(costs, cost_scale)
    targets = 1.0 - costs / scale
    per_option = F.binary_cross_entropy_with_logits(logits, targets, reduction="none")
    return _reduce(per_option.sum(dim=1), weights, reduction)


def asymmetric_softmax_surrogate(
    logits: Tensor,
    y: Tensor,
    expert_correct: Tensor,
    *,
    weights: Tensor | None = None,
    reduction: str = "mean",
) -> Tensor:
    """Asymmetric softmax surrogate for learning to defer.

    Cao, Mozannar, Feng, Wei & An ("In Defense of Softmax Parametrization for
    Calibrated and Consistent Learning to Defer", NeurIPS 2023) read the scores through
    the asymmetric softmax :func:`asymmetric_softmax`: ``psi_k = softmax(g_{1..K})_k``
    for the classes and, for the deferral score,
    ``psi_defer = exp(g_defer) / (sum_{r <= K+1} exp(g_r) - max_{k <= K} exp(g_k))``,
    which lies in (0, 1). Their loss for one expert with answer ``m`` is::

        -log psi_y - 1[m = y] log psi_defer - 1[m != y] log(1 - psi_defer)

    Its minimiser gives ``psi_k = P(y = k | x)`` and ``psi_defer = P(m = y | x)``:
    valid probabilities, unlike the softmax surrogate's deferral score. (The formulas
    are written from memory of the paper; only its abstract could be checked here. The
    minimiser property is checked numerically in ``tests/test_surrogate.py``.)

    Several experts (our extension; the paper treats one): each expert ``j`` gets its
    own deferral probability, normalised against the classes only,
    ``psi_j = exp(g_j) / (exp(g_j) + sum_{k <= K} exp(g_k) - max_{k <= K} exp(g_k))``,
    and its own binary term. The class scores are shared, and each ``psi_j`` can take
    any value in (0, 1) for fixed class scores, so the minimiser still gives
    ``psi_j = P(expert j right | x)``. Decisions are then made by plugging these
    probabilities (and the fees and error costs) into
    :func:`routeplan.costs.expected_cost_vectors`, not by ``argmax g``.

    Parameters
    ----------
    logits : Tensor of shape (n, K + M)
    y : Tensor of int, shape (n,)
        True class of each case.
    expert_correct : Tensor of shape (n, M)
        ``1`` where expert ``j`` answered right, ``0`` where wrong; values in between
        are soft targets (e.g. an imputed probability for an unknown answer).
    weights : Tensor of shape (n,), optional
        Per-case weights.
    reduction : {"mean", "sum", "none"}, default="mean"

    Returns
    -------
    Tensor
        Scalar, or shape (n,) for ``reduction="none"``.
    """
    if not isinstance(logits, Tensor) or logits.ndim != 2:
        raise ValueError("logits must be a 2-d tensor of shape (n, K + M)")
    targets = torch.as_tensor(expert_correct, dtype=logits.dtype, device=logits.device)
    n, n_experts = logits.shape[0], targets.shape[-1] if targets.ndim == 2 else -1
    n_classes = logits.shape[1] - n_experts
    if targets.shape != (n, n_experts) or n_classes < 2:
        raise ValueError("expert_correct must have shape (n, M) with K = n_options - M >= 2")
    if not torch.isfinite(targets).all() or (targets < 0).any() or (targets > 1).any():
        raise ValueError("expert_correct must lie in [0, 1]; impute unknown answers first")
    y = torch.as_tensor(y, dtype=torch.long, device=logits.device)
    class_logits = logits[:, :n_classes]
    per_case = F.cross_entropy(class_logits, y, reduction="none")
    defer_logits = logits[:, n_classes:] - _logsumexp_without_max(class_logits)[:, None]
    per_case = per_case + F.binary_cross_entropy_with_logits(
        defer_logits, targets, reduction="none"
    ).sum(dim=1)
    return _reduce(per_case, weights, reduction)


def asymmetric_softmax(logits: Tensor, n_classes: int) -> Tensor:
    """The asymmetric softmax of Cao et al. (NeurIPS 2023), one column per expert.

    Columns ``< K`` are the softmax over the class scores; column ``K + j`` is
    ``exp(g_j) / (exp(g_j) + sum_k exp(g_k) - max_k exp(g_k))`` (see
    :func:`asymmetric_softmax_surrogate`).

    Parameters
    ----------
    logits : Tensor of shape (n, K + M)
    n_classes : int
        Number of classes K (at least 2).

    Returns
    -------
    Tensor of shape (n, K + M)
    """
    k = _check_n_classes(n_classes, logits.shape[1])
    if k < 2:
        raise ValueError("the asymmetric softmax needs at least 2 classes")
    class_logits = logits[:, :k]
    rest = _logsumexp_without_max(class_logits)[:, None]
    return torch.cat([torch.softmax(class_logits, dim=1), torch.sigmoid(logits[:, k:] - rest)], 1)


def option_probabilities(logits: Tensor, n_classes: int, kind: str) -> Tensor:
    """Probability-like estimates read from the scores.

    Parameters
    ----------
    logits : Tensor of shape (n, K + M)
    n_classes : int
        Number of classes K.
    kind : {"softmax", "ova", "asymmetric"}
        ``"softmax"``: the softmax over all K + M options (for the cost-sensitive
        softmax surrogate these are not calibrated probabilities of anything: Verma &
        Nalisnick, ICML 2022, show the deferral ones can be unbounded when read as
        P(expert right)). ``"ova"``: ``sigmoid(g)`` per option; for a scorer trained by
        :func:`one_vs_all_surrogate` with 0/1 costs, no fees and ``cost_scale=1``,
        column ``k < K`` estimates ``P(y = k | x)`` and column ``K + j`` estimates
        ``P(expert j right | x)``. ``"asymmetric"``: :func:`asymmetric_softmax`; for a
        scorer trained by :func:`asymmetric_softmax_surrogate`, columns ``< K`` estimate
        ``P(y = k | x)`` and column ``K + j`` estimates ``P(expert j right | x)``.

    Returns
    -------
    Tensor of shape (n, K + M)
    """
    _check_n_classes(n_classes, logits.shape[1])
    if kind == "softmax":
        return torch.softmax(logits, dim=1)
    if kind == "ova":
        return torch.sigmoid(logits)
    if kind == "asymmetric":
        return asymmetric_softmax(logits, n_classes)
    raise ValueError(f"kind must be 'softmax', 'ova' or 'asymmetric', got {kind!r}")


def ova_expected_costs(logits: Tensor, cost_scale: float) -> Tensor:
    """Expected option costs ``B (1 - sigmoid(g))`` from a one-vs-all scorer.

    Inverts the pointwise minimiser of :func:`one_vs_all_surrogate` (trained with the
    same ``cost_scale`` ``B``).

    Parameters
    ----------
    logits : Tensor of shape (n, K + M)
    cost_scale : float

    Returns
    -------
    Tensor of shape (n, K + M)
    """
    if not cost_scale > 0:
        raise ValueError(f"cost_scale must be > 0, got {cost_scale!r}")
    return float(cost_scale) * torch.sigmoid(-logits)


def _check_pair(logits: Tensor, costs: Tensor) -> None:
    """Check that logits and costs are matching finite 2-d tensors."""
    if not isinstance(logits, Tensor) or not isinstance(costs, Tensor):
        raise TypeError("logits and costs must be torch tensors")
    if logits.ndim != 2 or logits.shape != costs.shape:
        raise ValueError(
            f"logits and costs must both have shape (n, K + M); got {tuple(logits.shape)} "
            f"and {tuple(costs.shape)}"
        )
    if not torch.isfinite(costs).all():
        raise ValueError("costs must be finite; impute missing expert costs first")


def _check_n_classes(n_classes: int | None, n_options: int) -> int:
    """Check the class count against the number of options."""
    if n_classes is None or int(n_classes) != n_classes or not 1 <= n_classes <= n_options:
        raise ValueError(f"n_classes must be an integer in 1..{n_options}, got {n_classes!r}")
    return int(n_classes)


def _logsumexp_without_max(class_logits: Tensor) -> Tensor:
    """log(sum_k exp(g_k) - max_k exp(g_k)), computed stably by dropping the argmax."""
    top = class_logits.argmax(dim=1, keepdim=True)
    masked = class_logits.scatter(1, top, float("-inf"))
    return torch.logsumexp(masked, dim=1)


def _cost_scale(costs: Tensor, cost_scale: float | None) -> float:
    """Resolve and check the cost bound B of the one-vs-all targets."""
    if cost_scale is None:
        return max(1.0, float(costs.max())) if costs.numel() else 1.0
    if not cost_scale > 0:
        raise ValueError(f"cost_scale must be > 0, got {cost_scale!r}")
    return float(cost_scale)


def _reduce(per_case: Tensor, weights: Tensor | None, reduction: str) -> Tensor:
    """Apply per-case weights and the reduction."""
    if weights is not None:
        weights = torch.as_tensor(weights, dtype=per_case.dtype, device=per_case.device)
        if weights.shape != per_case.shape:
            raise ValueError(
                f"weights must have shape {tuple(per_case.shape)}, got {tuple(weights.shape)}"
            )
        per_case = per_case * weights
    if reduction == "mean":
        return per_case.mean()
    if reduction == "sum":
        return per_case.sum()
    if reduction == "none":
        return per_case
    raise ValueError(f"reduction must be one of {_REDUCTIONS}, got {reduction!r}")
