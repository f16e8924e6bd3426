"""Post-hoc calibration of class probabilities and expert-correctness probabilities.

- Temperature scaling (Guo, Pleiss, Sun & Weinberger, "On Calibration of Modern Neural
  Networks", ICML 2017): one scalar ``T > 0`` divides the class logits; it is chosen to
  minimise the negative log-likelihood on a validation split. It never changes the
  arg-max class.
- Platt scaling (Platt, "Probabilistic Outputs for Support Vector Machines and
  Comparisons to Regularized Likelihood Methods", Advances in Large Margin Classifiers,
  1999): ``sigmoid(a z + b)`` per expert on the correctness logit ``z``, fitted by
  (weighted) binary log-loss on the validation answers that are known. We fit the
  plain 0/1 targets, not Platt's smoothed ones.
- Expected calibration error with equal-width confidence bins (Guo et al., 2017,
  section 2; Naeini, Cooper & Hauskrecht, AAAI 2015).

All functions are pure numpy/scipy and validate their inputs.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import minimize, minimize_scalar
from scipy.special import expit

__all__ = [
    "apply_platt",
    "apply_stack",
    "apply_temperature",
    "expected_calibration_error",
    "fit_platt",
    "fit_stack",
    "fit_temperature",
]

#: Search range of ``log T`` for temperature scaling (T in about [0.02, 50]).
_LOG_T_BOUNDS = (-4.0, 4.0)


def expected_calibration_error(proba: ArrayLike, y: ArrayLike, n_bins: int = 15) -> float:
    """Expected calibration error of the top-label confidence.

    ``ECE = sum_b |B_b| / n * |acc(B_b) - conf(B_b)|`` over ``n_bins`` equal-width bins
    of the confidence ``max_k p_k`` (Guo, Pleiss, Sun & Weinberger, ICML 2017, eq. 3).

    Parameters
    ----------
    proba : array-like of shape (n, K) or (n,)
        Class probabilities; a 1-d array is read as ``P(y = 1)`` of a binary outcome.
    y : array-like of int, shape (n,)
        True class (``0 .. K-1``; 0/1 for 1-d ``proba``).
    n_bins : int, default=15
        Number of equal-width bins on [0, 1] (Guo et al. use 15).

    Returns
    -------
    float
        The ECE in [0, 1]; NaN for empty input.
    """
    P = np.asarray(proba, dtype=np.float64)
    if P.ndim == 1:
        P = np.column_stack([1.0 - P, P])
    y = np.asarray(y).astype(np.int64).reshape(-1)
    if P.ndim != 2 or P.shape[0] != y.shape[0]:
        raise ValueError(f"proba and y disagree in shape: {P.shape} and {y.shape}")
    if int(n_bins) != n_bins or n_bins < 1:
        raise ValueError(f"n_bins must be a positive integer, got {n_bins!r}")
    if y.size == 0:
        return float("nan")
    if y.min() < 0 or y.max() >= P.shape[1]:
        raise ValueError(f"y must lie in 0..{P.shape[1] - 1}")
    conf = P.max(axis=1)
    correct = (P.argmax(axis=1) == y).astype(np.float64)
    # bin b holds confidences in (b/n_bins, (b+1)/n_bins]; 0 goes to the first bin
    bins = np.clip(np.ceil(conf * n_bins).astype(np.int64) - 1, 0, n_bins - 1)
    acc = np.bincount(bins, weights=correct, minlength=n_bins)
    cf = np.bincount(bins, weights=conf, minlength=n_bins)
    return float(np.abs(acc - cf).sum() / y.size)


def fit_temperature(logits: ArrayLike, y: ArrayLike) -> float:
    """Temperature ``T`` minimising the NLL of ``softmax(logits / T)`` (Guo et al., 2017).

    Parameters
    ----------
    logits : array-like of shape (n, K)
        Unnormalised class scores (log-probabilities work too).
    y : array-like of int, shape (n,)

    Returns
    -------
    float
        ``T`` in about [0.02, 50]; 1.0 when ``n = 0``.

    Raises
    ------
    ValueError
        If a row holds NaN or +inf, or no finite score.
    """
    Z = np.asarray(logits, dtype=np.float64)
    y = np.asarray(y).astype(np.int64).reshape(-1)
    if Z.ndim != 2 or Z.shape[0] != y.shape[0]:
        raise ValueError(f"logits and y disagree in shape: {Z.shape} and {y.shape}")
    if y.size == 0:
        return 1.0
    if not np.isfinite(Z.max(axis=1)).all():  # NaN, +inf, or a row of -inf only
        raise ValueError("logits must be finite (-inf is allowed beside a finite score)")
    # shift each row by its maximum once (softmax is unchanged by it); then each step
    # is one exp and one log, not a full log_softmax
    Z = Z - Z.max(axis=1, keepdims=True)
    z_true = Z[np.arange(y.size), y].mean()

    def nll(log_t: float) -> float:
        inv_t = np.exp(-log_t)
        return float(np.log(np.exp(Z * inv_t).sum(axis=1)).mean() - z_true * inv_t)

    res = minimize_scalar(nll, bounds=_LOG_T_BOUNDS, method="bounded", options={"xatol": 1e-4})
    return float(np.exp(res.x))


def apply_temperature(logits: ArrayLike, temperature: float) -> np.ndarray:
    """Class probabilities ``softmax(logits / T)``, shape (n, K)."""
    if not temperature > 0:
        raise ValueError(f"temperature must be > 0, got {temperature!r}")
    Z = np.asarray(logits, dtype=np.float64) / float(temperature)  # a new array
    np.clip(Z, -1e300, 1e300, out=Z)  # +-inf would give inf - inf = NaN below
    Z -= Z.max(axis=1, keepdims=True)
    np.exp(Z, out=Z)
    Z /= Z.sum(axis=1, keepdims=True)
    return Z


def fit_platt(
    logits: ArrayLike,
    outcomes: ArrayLike,
    sample_weight: ArrayLike | None = None,
    *,
    min_count: int = 20,
    prior_strength: float = 0.0,
) -> tuple[float, float]:
    """Platt scaling ``P(outcome = 1) = sigmoid(a z + b)`` by weighted log-loss.

    With ``prior_strength`` > 0 the fit is the maximum a posteriori one under a Gaussian
    prior centred on the identity map ``(a, b) = (1, 0)``, of precision ``prior_strength``
    in units of one case's log-loss: with few cases the map stays near the identity, with
    many the data decide (shrinkage toward a reference, common practice).

    Parameters
    ----------
    logits : array-like of shape (n,)
        Scores ``z`` (the logit of an uncalibrated probability).
    outcomes : array-like of shape (n,)
        Binary outcomes 0/1, or soft targets in [0, 1].
    sample_weight : array-like of shape (n,), optional
        E.g. inverse selection probabilities.
    min_count : int, default=20
        With fewer cases, or when every outcome is the same, return the identity
        ``(1.0, 0.0)``: a two-parameter fit would be noise.
    prior_strength : float, default=0.0
        Precision of the prior toward the identity (0: plain maximum likelihood).

    Returns
    -------
    (a, b) : tuple of float
        ``a`` is kept in [0.01, 100] so that the map stays increasing.
    """
    z = np.asarray(logits, dtype=np.float64).reshape(-1)
    t = np.asarray(outcomes, dtype=np.float64).reshape(-1)
    w = np.ones_like(z) if sample_weight is None else np.asarray(sample_weight, np.float64)
    if not (z.shape == t.shape == w.shape):
        raise ValueError("logits, outcomes and sample_weight must have the same length")
    if np.any((t < 0) | (t > 1)) or np.any(~np.isfinite(w)) or np.any(w < 0):
        raise ValueError("outcomes must lie in [0, 1] and weights be finite and >= 0")
    if z.size < min_count or np.ptp(t) == 0 or w.sum() <= 0:
        return 1.0, 0.0
    w = w / w.mean()

    lam = _check_prior(prior_strength) / z.size
    centre = np.array([1.0, 0.0])

    def loss(theta: np.ndarray) -> tuple[float, np.ndarray]:
        a, b = theta
        s = a * z + b
        # log(1 + exp(-s)) and log(1 + exp(s)), stable
        ll = t * np.logaddexp(0.0, -s) + (1.0 - t) * np.logaddexp(0.0, s)
        r = w * (expit(s) - t)
        d = theta - centre
        return (float((w * ll).mean() + 0.5 * lam * (d @ d)),
                np.array([(r * z).mean(), r.mean()]) + lam * d)

    res = minimize(loss, x0=np.array([1.0, 0.0]), jac=True, method="L-BFGS-B",
                   bounds=[(0.01, 100.0), (-50.0, 50.0)])
    return float(res.x[0]), float(res.x[1])


def apply_platt(logits: ArrayLike, a: ArrayLike, b: ArrayLike) -> np.ndarray:
    """Probabilities ``sigmoid(a z + b)``; ``a`` and ``b`` broadcast (e.g. one per column)."""
    a_arr, b_arr = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return expit(a_arr * np.asarray(logits, dtype=np.float64) + b_arr)


def fit_stack(
    logits: ArrayLike,
    outcomes: ArrayLike,
    sample_weight: ArrayLike | None = None,
    *,
    min_count: int = 20,
    l2: float = 1e-3,
    prior_strength: float = 0.0,
) -> np.ndarray:
    """Combine several logits of one probability by a logistic regression on validation.

    ``P(outcome = 1) = sigmoid(sum_p a_p z_p + b)``, fitted by weighted log-loss with
    coefficients ``a_p`` kept in [0, 100] (each input is an estimate of the same
    probability, so none should count against it) and a small ridge ``l2`` on them.
    With one column this is Platt scaling; with several it is stacking (Wolpert,
    "Stacked generalization", Neural Networks 5(2), 1992) with a logistic combiner.

    Parameters
    ----------
    logits : array-like of shape (n, p)
    outcomes : array-like of shape (n,)
        0/1 outcomes (or soft targets in [0, 1]).
    sample_weight : array-like of shape (n,), optional
    min_count : int, default=20
        With fewer cases or a single outcome value, return ``(1, 0, .., 0)``: the first
        column alone, unchanged.
    l2 : float, default=1e-3
    prior_strength : float, default=0.0
        As in :func:`fit_platt`: a Gaussian prior centred on ``(1, 0, .., 0)`` (the first
        column alone) of this precision, in units of one case's log-loss.

    Returns
    -------
    ndarray of shape (p + 1,)
        ``a_1 .. a_p, b``.
    """
    Z = np.asarray(logits, dtype=np.float64)
    if Z.ndim == 1:
        Z = Z[:, None]
    t = np.asarray(outcomes, dtype=np.float64).reshape(-1)
    w = np.ones_like(t) if sample_weight is None else np.asarray(sample_weight, np.float64)
    if Z.shape[0] != t.shape[0] or w.shape != t.shape:
        raise ValueError("logits, outcomes and sample_weight must have the same length")
    if np.any((t < 0) | (t > 1)) or np.any(~np.isfinite(w)) or np.any(w < 0):
        raise ValueError("outcomes must lie in [0, 1] and weights be finite and >= 0")
    p = Z.shape[1]
    identity = np.zeros(p + 1)
    identity[0] = 1.0
    if t.size < min_count or np.ptp(t) == 0 or w.sum() <= 0:
        return identity
    w = w / w.mean()
    X1 = np.hstack([Z, np.ones((Z.shape[0], 1))])

    lam = _check_prior(prior_strength) / t.size

    def loss(theta: np.ndarray) -> tuple[float, np.ndarray]:
        s = X1 @ theta
        ll = t * np.logaddexp(0.0, -s) + (1.0 - t) * np.logaddexp(0.0, s)
        grad = X1.T @ (w * (expit(s) - t)) / t.size
        pen = np.r_[theta[:p], 0.0]
        d = theta - identity
        return (float((w * ll).mean() + l2 * (pen @ pen) + 0.5 * lam * (d @ d)),
                grad + 2 * l2 * pen + lam * d)

    res = minimize(loss, x0=identity, jac=True, method="L-BFGS-B",
                   bounds=[(0.0, 100.0)] * p + [(-50.0, 50.0)])
    return res.x


def _check_prior(prior_strength: float) -> float:
    """A prior precision: a finite number >= 0."""
    value = float(prior_strength)
    if not (np.isfinite(value) and value >= 0):
        raise ValueError(f"prior_strength must be a finite number >= 0, got {prior_strength!r}")
    return value


def apply_stack(logits: ArrayLike, coef: ArrayLike) -> np.ndarray:
    """Probabilities ``sigmoid(logits @ coef[:-1] + coef[-1])``; logits (n, p)."""
    Z = np.asarray(logits, dtype=np.float64)
    c = np.asarray(coef, dtype=np.float64)
    if Z.ndim == 1:
        Z = Z[:, None]
    return expit(Z @ c[:-1] + c[-1])
