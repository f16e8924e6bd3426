"""A per-expert logistic regression blended into the correctness network (pure functions).

With a few hundred answers per expert, the correctness network (an MLP early-stopped on a
few dozen validation answers) estimates ``P(expert right | x)`` worse than a plain
L2-penalised logistic regression fitted to convergence; with many answers the network is
far better, because competence changes across regions that a linear score cannot follow.
So each expert's correctness logit is the convex combination

    ``z(x) = a_j * z_net(x) + (1 - a_j) * (x_std . beta_j + b_j)``

with ``a_j`` chosen on the validation answers by log-loss: a stacked combination of two
models chosen on held-out data (Wolpert, "Stacked generalization", Neural Networks 5(2),
1992; Breiman, "Stacked regressions", Machine Learning 24(1), 1996), here with one weight
per expert on a grid. Logistic regression: Cox, "The regression analysis of binary
sequences", JRSS B 20(2), 1958; fitted by scikit-learn's lbfgs solver.

The routers use it with ``logistic_blend=True``; it is off by default. Measured on
12-04 while the blend was briefly the default (gap to the full-information cost; the
network alone in brackets; to repeat now, run with ``--router logistic_blend=true``):
``benchmarks/probe_few_answers.py`` on the synthetic scenario, 6 seeds, 150 random answers
per expert +0.0492 (+0.0516, better on 4 of 6), 600 per expert +0.0073 (+0.0070); on
digits, 60 per expert, +0.0189 (+0.0179, worse on 4 of 6). ``benchmarks/bench_rounds.py``
(seeds 0-7): synthetic ``value`` 96.6 fee units against ``random``'s 273 (the network
alone: 80 against 273), mean median gap ``value`` 0.0233 (0.0210); digits 4 against 12
(3.4 against 10.8), ``random``'s mean median gap 0.0152 (0.0112). With 30 or so
validation answers per expert the chosen weight is noisy.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from scipy.special import expit, logit
from sklearn.linear_model import LogisticRegression

__all__ = ["BLEND_BELOW", "MIX_GRID", "choose_mix", "fit_logistic", "linear_logits"]

#: Experts with at least this many known training answers keep the network alone (the
#: network is far better there, and the extra fit would only cost time).
BLEND_BELOW = 5000
#: Weights ``a`` of the network tried on the validation answers.
MIX_GRID = np.linspace(0.0, 1.0, 21)
#: Inverse L2 strength of the logistic regression on standardised features (scikit-learn's
#: ``C``; its default). Not tuned.
_C = 1.0


def fit_logistic(Xs: NDArray[np.floating], right: NDArray[np.bool_],
                 weight: NDArray[np.floating]) -> tuple[NDArray[np.float64], float]:
    """Coefficients and intercept of ``P(right | x)`` by L2-penalised logistic regression.

    Parameters
    ----------
    Xs : ndarray of shape (n, d)
        Standardised features of the cases with a known answer.
    right : ndarray of bool, shape (n,)
        Whether the expert's answer was right.
    weight : ndarray of shape (n,)
        Sample weights (inverse selection probabilities), > 0.

    Returns
    -------
    coef : ndarray of shape (d,)
    intercept : float
        Where every answer is right (or every one wrong), zero coefficients and the
        logit of the smoothed rate ``(right + 1) / (n + 2)`` (rule of succession).
    """
    right = np.asarray(right, dtype=bool)
    n = right.size
    if n == 0 or right.all() or not right.any():
        return np.zeros(Xs.shape[1]), float(logit((right.sum() + 1.0) / (n + 2.0)))
    model = LogisticRegression(C=_C, max_iter=1000).fit(Xs, right, sample_weight=weight)
    return model.coef_[0].astype(np.float64), float(model.intercept_[0])


def choose_mix(z_net: NDArray[np.floating], z_lin: NDArray[np.floating],
               right: NDArray[np.bool_], weight: NDArray[np.floating]) -> float:
    """The network's weight ``a`` in MIX_GRID of least weighted log-loss on held-out answers.

    Ties go to the larger weight (the network); with no answer the network is kept (1).
    """
    if np.asarray(right).size == 0:
        return 1.0
    t = np.asarray(right, dtype=np.float64)
    w = np.asarray(weight, dtype=np.float64)
    best, best_loss = 1.0, np.inf
    for a in MIX_GRID[::-1]:
        p = np.clip(expit(a * z_net + (1.0 - a) * z_lin), 1e-12, 1.0 - 1e-12)
        loss = float(-(w * (t * np.log(p) + (1.0 - t) * np.log1p(-p))).sum() / w.sum())
        if loss < best_loss - 1e-12:
            best, best_loss = float(a), loss
    return best


def linear_logits(Xs: NDArray[np.floating], coef: NDArray[np.floating],
                  intercept: NDArray[np.floating]) -> NDArray[np.float64]:
    """``Xs @ coef.T + intercept``: the logistic regressions' logits, shape (n, M)."""
    return np.asarray(Xs, dtype=np.float64) @ np.asarray(coef, np.float64).T + np.asarray(intercept, np.float64)
