"""Small, pure statistical helpers shared by the competence tables and the evaluation.

Every function here is vectorised with numpy, validates its inputs, and returns plain
floats or arrays. Nothing here knows about experts, cases or workspaces.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.stats import norm

__all__ = [
    "wilson_interval",
    "paired_difference_interval",
    "mean_interval",
    "confusion_matrix",
    "cohen_kappa",
    "kappa_from_confusion",
    "fleiss_kappa",
    "effective_sample_size",
]


def _z_value(confidence: float) -> float:
    """Two-sided standard-normal quantile for a confidence level in (0, 1)."""
    if not 0.0 < float(confidence) < 1.0:
        raise ValueError(f"confidence must be strictly between 0 and 1, got {confidence!r}")
    return float(norm.ppf(0.5 + float(confidence) / 2.0))


def _scalar_or_array(x: NDArray[np.float64]) -> Any:
    """Return a Python float for 0-d arrays, the array otherwise."""
    return float(x) if x.ndim == 0 else x


def wilson_interval(
    successes: ArrayLike, trials: ArrayLike, confidence: float = 0.95
) -> tuple[Any, Any]:
    """Wilson score interval for a binomial proportion.

    Wilson, E. B. (1927), "Probable inference, the law of succession, and statistical
    inference", Journal of the American Statistical Association 22(158):209-212.

    Parameters
    ----------
    successes : array-like of float
        Number of successes. Non-integer values are allowed, so that a weighted
        proportion ``p`` with Kish effective size ``n_eff`` can be passed as
        ``(p * n_eff, n_eff)``.
    trials : array-like of float
        Number of trials, broadcast against ``successes``. Where it is 0 the interval
        is ``(nan, nan)``.
    confidence : float, default=0.95
        Two-sided confidence level.

    Returns
    -------
    low, high : float or ndarray
        Interval bounds, clipped to [0, 1]; floats for scalar input, arrays otherwise.
        The lower bound is exactly 0 when there are no successes and the upper bound
        exactly 1 when every trial succeeded.

    Examples
    --------
    >>> low, high = wilson_interval(18, 20)
    >>> round(low, 4), round(high, 4)
    (0.699, 0.9721)
    """
    z = _z_value(confidence)
    k, n = np.broadcast_arrays(
        np.asarray(successes, dtype=float), np.asarray(trials, dtype=float)
    )
    if np.any(n < 0) or np.any(k < 0) or np.any(k > n * (1 + 1e-12)):
        raise ValueError("need 0 <= successes <= trials for a Wilson interval")
    with np.errstate(divide="ignore", invalid="ignore"):
        p = k / n
        z2n = z * z / n
        centre = (p + z2n / 2.0) / (1.0 + z2n)
        half = z / (1.0 + z2n) * np.sqrt(p * (1.0 - p) / n + z2n / (4.0 * n))
    low = np.where(k <= 0, 0.0, np.clip(centre - half, 0.0, 1.0))
    high = np.where(k >= n, 1.0, np.clip(centre + half, 0.0, 1.0))
    empty = ~(n > 0)
    low = np.where(empty, np.nan, low)
    high = np.where(empty, np.nan, high)
    return _scalar_or_array(low), _scalar_or_array(high)


def paired_difference_interval(
    only_first: ArrayLike, only_second: ArrayLike, pairs: ArrayLike, confidence: float = 0.95
) -> tuple[Any, Any]:
    """Adjusted Wald interval for the difference of two paired (matched) proportions.

    Agresti, A. and Min, Y. (2005), "Simple improved confidence intervals for comparing
    matched proportions", Statistics in Medicine 24(5):729-740: add 1/2 to each of the
    four cells of the paired 2x2 table (the interval they call Wald+2) and form the Wald
    interval on the adjusted table. With ``b`` pairs where only the first outcome is 1,
    ``c`` where only the second is, and ``n`` pairs, ``b~ = b + 1/2``, ``c~ = c + 1/2``,
    ``n~ = n + 2``, the interval is

    ``(b~ - c~) / n~  +/-  z * sqrt((b~ + c~) - (b~ - c~)**2 / n~) / n~``,

    truncated to [-1, 1] (as in the R package PropCIs, ``diffpropci.mp``). Unlike the
    plain Wald interval, whose variance is 0 when every pair agrees or every pair
    differs the same way, its width is always positive for ``n > 0``: the adjusted
    concordant cells hold at least 1, so ``(b~ - c~)**2 / n~ < b~ + c~``.

    Parameters
    ----------
    only_first : array-like of float
        Pairs whose first outcome is 1 and second 0 (``b``). Non-integer values are
        allowed, so that weighted shares ``p_b`` with Kish effective size ``n_eff`` can
        be passed as ``p_b * n_eff`` (a large-sample approximation, as for
        :func:`wilson_interval`).
    only_second : array-like of float
        Pairs whose first outcome is 0 and second 1 (``c``).
    pairs : array-like of float
        Number of pairs ``n``; where it is 0 the interval is ``(nan, nan)``.
    confidence : float, default=0.95
        Two-sided confidence level.

    Returns
    -------
    low, high : float or ndarray
        Bounds for ``P(first = 1) - P(second = 1)``, whose plain estimate is
        ``(b - c) / n``; floats for scalar input, arrays otherwise.

    Examples
    --------
    The example of PropCIs' ``diffpropci.mp(b = 40, c = 20, n = 160)``, which reports
    the difference the other way round, ``(-0.2160, -0.0309)``:

    >>> low, high = paired_difference_interval(20, 40, 160)
    >>> round(low, 4), round(high, 4)
    (-0.216, -0.0309)
    """
    z = _z_value(confidence)
    b, c, n = np.broadcast_arrays(
        np.asarray(only_first, dtype=float), np.asarray(only_second, dtype=float),
        np.asarray(pairs, dtype=float),
    )
    if (
        not (np.all(np.isfinite(b)) and np.all(np.isfinite(c)) and np.all(np.isfinite(n)))
        or np.any(b < 0) or np.any(c < 0) or np.any(b + c > n * (1 + 1e-12) + 1e-12)
    ):
        raise ValueError("need finite counts with 0 <= only_first, 0 <= only_second and "
                         "only_first + only_second <= pairs")
    b_adj, c_adj, n_adj = b + 0.5, c + 0.5, n + 2.0
    centre = (b_adj - c_adj) / n_adj
    spread = np.maximum((b_adj + c_adj) - (b_adj - c_adj) ** 2 / n_adj, 0.0)
    half = z * np.sqrt(spread) / n_adj
    empty = ~(n > 0)
    low = np.where(empty, np.nan, np.clip(centre - half, -1.0, 1.0))
    high = np.where(empty, np.nan, np.clip(centre + half, -1.0, 1.0))
    return _scalar_or_array(low), _scalar_or_array(high)


def _normal_interval(
    mean: NDArray[np.float64], var: NDArray[np.float64], n_eff: NDArray[np.float64], z: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Normal-approximation bounds from a mean, a (ddof=0) variance and an effective size."""
    with np.errstate(divide="ignore", invalid="ignore"):
        sample_var = np.where(n_eff > 1, var * n_eff / (n_eff - 1.0), np.nan)
        half = z * np.sqrt(sample_var / n_eff)
    return mean - half, mean + half


def mean_interval(
    values: ArrayLike, confidence: float = 0.95, *, weights: ArrayLike | None = None
) -> tuple[float, float, float]:
    """Mean of a sample with a normal-approximation confidence interval.

    The interval is ``mean +/- z * s / sqrt(n)`` with ``s`` the sample standard
    deviation (ddof=1), the large-sample interval of any textbook (common practice).
    With ``weights`` the mean is the weighted (Hajek) mean and ``n`` is Kish's
    effective sample size (:func:`effective_sample_size`).

    Parameters
    ----------
    values : array-like of shape (n,)
        Finite observations.
    confidence : float, default=0.95
        Two-sided confidence level.
    weights : array-like of shape (n,), default=None
        Non-negative weights, e.g. inverse selection probabilities.

    Returns
    -------
    mean, low, high : float
        The mean and the interval bounds; bounds are nan with fewer than two
        observations, and all three are nan for an empty sample.
    """
    z = _z_value(confidence)
    x = np.asarray(values, dtype=float).ravel()
    if not np.all(np.isfinite(x)):
        raise ValueError("values must be finite")
    w = np.ones_like(x) if weights is None else np.asarray(weights, dtype=float).ravel()
    if w.shape != x.shape or np.any(~np.isfinite(w)) or np.any(w < 0):
        raise ValueError("weights must be finite, non-negative and shaped like values")
    total = w.sum()
    if x.size == 0 or total <= 0:
        return np.nan, np.nan, np.nan
    mean = float(np.dot(w, x) / total)
    var = float(np.dot(w, (x - mean) ** 2) / total)
    n_eff = effective_sample_size(w)
    low, high = _normal_interval(np.asarray(mean), np.asarray(var), np.asarray(n_eff), z)
    return mean, float(low), float(high)


def _check_codes(x: ArrayLike, n_classes: int, name: str) -> NDArray[np.int64]:
    """Return ``x`` as a 1-D int64 array after checking every code is in [0, n_classes)."""
    arr = np.asarray(x)
    if arr.ndim != 1:
        raise ValueError(f"{name} must be one-dimensional")
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        if not np.all(np.isfinite(arr)) or np.any(arr != np.round(arr)):
            raise ValueError(f"{name} must hold integer label codes")
    arr = arr.astype(np.int64, copy=False)
    if arr.size and (arr.min() < 0 or arr.max() >= n_classes):
        raise ValueError(f"{name} holds codes outside 0..{n_classes - 1}")
    return arr


def _check_n_classes(n_classes: int) -> int:
    """Validate a class count."""
    if int(n_classes) != n_classes or n_classes < 1:
        raise ValueError(f"n_classes must be a positive integer, got {n_classes!r}")
    return int(n_classes)


def confusion_matrix(
    truth: ArrayLike,
    pred: ArrayLike,
    n_classes: int,
    *,
    weights: ArrayLike | None = None,
) -> NDArray[Any]:
    """Confusion matrix with true classes on rows and predicted classes on columns.

    Parameters
    ----------
    truth, pred : array-like of int of shape (n,)
        Label codes in ``0..n_classes-1``.
    n_classes : int
        Number of classes K.
    weights : array-like of shape (n,), default=None
        Optional weight of each pair; the matrix then holds weighted counts.

    Returns
    -------
    ndarray of shape (K, K)
        Counts (int64), or weighted counts (float64) when ``weights`` is given.
    """
    k = _check_n_classes(n_classes)
    t = _check_codes(truth, k, "truth")
    p = _check_codes(pred, k, "pred")
    if t.shape != p.shape:
        raise ValueError("truth and pred must have the same length")
    w = None if weights is None else np.asarray(weights, dtype=float).ravel()
    if w is not None and w.shape != t.shape:
        raise ValueError("weights must have the same length as truth")
    counts = np.bincount(t * k + p, weights=w, minlength=k * k).reshape(k, k)
    return counts if w is not None else counts.astype(np.int64)


def kappa_from_confusion(confusion: ArrayLike) -> Any:
    """Cohen's kappa from one confusion matrix or a stack of them.

    Cohen, J. (1960), "A coefficient of agreement for nominal scales", Educational and
    Psychological Measurement 20(1):37-46: ``(p_o - p_e) / (1 - p_e)`` with ``p_o`` the
    observed agreement and ``p_e`` the agreement expected from the two margins.

    Parameters
    ----------
    confusion : array-like of shape (..., K, K)
        (Weighted) counts of paired ratings.

    Returns
    -------
    float or ndarray of shape (...)
        Kappa; nan where the matrix is empty or ``p_e == 1`` (kappa undefined).
    """
    c = np.asarray(confusion, dtype=float)
    if c.ndim < 2 or c.shape[-1] != c.shape[-2]:
        raise ValueError("confusion must have shape (..., K, K)")
    total = c.sum(axis=(-2, -1))
    with np.errstate(divide="ignore", invalid="ignore"):
        p_o = np.trace(c, axis1=-2, axis2=-1) / total
        p_e = np.sum(c.sum(axis=-1) * c.sum(axis=-2), axis=-1) / total**2
        kappa = (p_o - p_e) / (1.0 - p_e)
    kappa = np.where(np.isclose(p_e, 1.0) | ~(total > 0), np.nan, kappa)
    return _scalar_or_array(kappa)


def cohen_kappa(
    a: ArrayLike, b: ArrayLike, n_classes: int, *, weights: ArrayLike | None = None
) -> float:
    """Cohen's kappa between two raters (Cohen, Educ. Psychol. Meas., 1960).

    Parameters
    ----------
    a, b : array-like of int of shape (n,)
        The two raters' label codes for the same n items.
    n_classes : int
        Number of classes K.
    weights : array-like of shape (n,), default=None
        Optional item weights.

    Returns
    -------
    float
        Kappa, or nan when it is undefined (no items, or chance agreement of 1).
    """
    return float(kappa_from_confusion(confusion_matrix(a, b, n_classes, weights=weights)))


def fleiss_kappa(counts: ArrayLike) -> float:
    """Fleiss' kappa for many raters.

    Fleiss, J. L. (1971), "Measuring nominal scale agreement among many raters",
    Psychological Bulletin 76(5):378-382.

    Parameters
    ----------
    counts : array-like of int of shape (n_items, K)
        ``counts[i, k]`` is the number of raters who put item i in class k; every item
        must have the same number of ratings, at least two.

    Returns
    -------
    float
        Kappa, or nan when chance agreement is 1 (every rating in one class).
    """
    c = np.asarray(counts, dtype=float)
    if c.ndim != 2 or c.shape[0] == 0:
        raise ValueError("counts must have shape (n_items, n_classes) with n_items >= 1")
    if np.any(c < 0) or np.any(c != np.round(c)):
        raise ValueError("counts must be non-negative integers")
    n_raters = c.sum(axis=1)
    if np.any(n_raters != n_raters[0]) or n_raters[0] < 2:
        raise ValueError("every item needs the same number of ratings, at least two")
    n = n_raters[0]
    p_item = (np.sum(c * c, axis=1) - n) / (n * (n - 1))
    p_class = c.sum(axis=0) / c.sum()
    p_bar, p_e = p_item.mean(), float(np.sum(p_class**2))
    if np.isclose(p_e, 1.0):
        return float("nan")
    return float((p_bar - p_e) / (1.0 - p_e))


def effective_sample_size(weights: ArrayLike) -> float:
    """Kish's effective sample size of weighted observations, ``(sum w)^2 / sum w^2``.

    Kish, *Survey Sampling*, Wiley, 1965, section 11.7 (section cited from memory): a
    weighted mean of ``n`` observations is about as precise as an unweighted mean of this
    many; it equals ``n`` for equal weights and falls toward 1 as one weight dominates.
    NaN entries (no observation) are ignored.

    Parameters
    ----------
    weights : array-like
        Non-negative weights.

    Returns
    -------
    float
        0.0 when there is no positive weight.
    """
    w = np.asarray(weights, dtype=np.float64).ravel()
    w = w[~np.isnan(w)]
    if np.any(w < 0) or not np.all(np.isfinite(w)):
        raise ValueError("weights must be finite and non-negative")
    total = w.sum()
    return float(total**2 / np.square(w).sum()) if total > 0 else 0.0
