"""Synthetic cases and experts, for rehearsing a budget and for benchmarks.

Two sources of cases:

- :func:`make_scenario`: a seeded synthetic scenario whose truth model ``P(y | x)`` and
  experts' competence ``P(expert j right | x)`` are known exactly, so that the
  Bayes-optimal system cost (:func:`bayes_optimal_cost`) is available as a yardstick.
  The feature space is cut into regions; each expert is strong in some regions and weak
  in others, and the model's own certainty varies by region too.
- :func:`digits_scenario`: scikit-learn's bundled digits with the simulated expert of
  Mozannar & Sontag ("Consistent Estimators for Learning to Defer to an Expert",
  ICML 2020, section 7): right on the first ``k`` classes, random otherwise.

Expert answers follow one rule everywhere: expert ``j`` is right on case ``i`` with
probability ``correct_proba[i, j]``, independently of everything else given the case;
a wrong answer is a uniformly random *other* class. :func:`routeplan.costs.expected_cost_vectors`
with ``expert_correct_proba`` assumes the same rule, so it gives exact expected costs here.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike

from routeplan.costs import error_cost_matrix, expected_cost_vectors

__all__ = [
    "DigitsData",
    "Scenario",
    "bayes_optimal_cost",
    "bayes_optimal_routes",
    "digits_scenario",
    "make_scenario",
    "sample_answers",
]

RandomState = int | np.random.Generator | None

_STRONG = (0.88, 0.98)  # accuracy range of an expert in a region where it is strong
_WEAK = (0.25, 0.55)  # accuracy range where it is weak


@dataclass(frozen=True)
class Scenario:
    """A synthetic pool of cases with known truth model and expert competence.

    Attributes
    ----------
    X : ndarray of shape (n, d), float32
        Feature vectors.
    proba : ndarray of shape (n, K)
        True ``P(y | x)`` of each case.
    y : ndarray of shape (n,), int
        Truth drawn from ``proba``.
    regions : ndarray of shape (n,), int
        Region of each case (``0 .. n_regions - 1``).
    correct_proba : ndarray of shape (n, M)
        ``P(expert j right | x)``; it depends on the case's region only.
    region_accuracy : ndarray of shape (M, n_regions)
        Each expert's accuracy per region (``correct_proba[i] = region_accuracy[:, regions[i]]``).
    fees : ndarray of shape (M,)
        Fee per case of each expert, in units of one error.
    names : tuple of str
        Expert names.
    """

    X: np.ndarray
    proba: np.ndarray
    y: np.ndarray
    regions: np.ndarray
    correct_proba: np.ndarray
    region_accuracy: np.ndarray
    fees: np.ndarray
    names: tuple[str, ...] = field(default=())

    @property
    def n_classes(self) -> int:
        """Number of classes K."""
        return self.proba.shape[1]

    @property
    def n_experts(self) -> int:
        """Number of experts M."""
        return self.correct_proba.shape[1]

    def answers(self, random_state: RandomState = None) -> np.ndarray:
        """Draw every expert's answer on every case.

        Parameters
        ----------
        random_state : int, numpy Generator or None

        Returns
        -------
        ndarray of shape (n, M), int
            Right with probability ``correct_proba``, else a uniformly random other class.
        """
        rng = np.random.default_rng(random_state)
        n, m = self.correct_proba.shape
        flat = _draw_answers(np.repeat(self.y, m), self.correct_proba.ravel(), self.n_classes, rng)
        return flat.reshape(n, m)


def make_scenario(
    n_cases: int,
    *,
    n_features: int = 8,
    n_classes: int = 5,
    n_experts: int = 3,
    fees: ArrayLike | None = None,
    n_regions: int = 4,
    region_accuracy: ArrayLike | None = None,
    random_state: RandomState = None,
) -> Scenario:
    """Build a seeded synthetic scenario with region-dependent expert competence.

    Features are standard normal. ``P(y | x)`` is the softmax of a fixed random
    one-hidden-layer network of ``x``, sharpened or flattened by a per-region factor,
    so the model is sure of itself in some regions and unsure in others. Regions are
    the cells ``argmax_r v_r . x`` of ``n_regions`` random directions. Unless given,
    each expert is strong (accuracy 0.88 to 0.98) in about half the regions, at least
    one, and weak (0.25 to 0.55) in the rest, at least one when there are two or more
    regions.

    Parameters
    ----------
    n_cases : int
        Number of cases n.
    n_features : int, default=8
    n_classes : int, default=5
    n_experts : int, default=3
    fees : array-like of shape (M,), optional
        Defaults to fees spread evenly from 0.05 to 0.20 (the first expert cheapest).
    n_regions : int, default=4
    region_accuracy : array-like of shape (M, n_regions), optional
        Each expert's accuracy per region ("expert profiles"), in [0, 1].
    random_state : int, numpy Generator or None
        Seeds the whole scenario (network, regions, competence, truth).

    Returns
    -------
    Scenario
    """
    _check_positive(n_cases=n_cases, n_features=n_features, n_regions=n_regions)
    if n_classes < 2 or n_experts < 0:
        raise ValueError("n_classes must be >= 2 and n_experts >= 0")
    rng = np.random.default_rng(random_state)
    fees = _default_fees(n_experts) if fees is None else np.asarray(fees, dtype=np.float64)
    if fees.shape != (n_experts,) or np.any(fees < 0):
        raise ValueError(f"fees must be {n_experts} non-negative numbers")
    X = rng.standard_normal((n_cases, n_features))
    regions = np.argmax(X @ rng.standard_normal((n_features, n_regions)), axis=1)
    proba = _truth_model(X, regions, n_classes, n_regions, rng)
    y = _sample_classes(proba, rng)
    if region_accuracy is None:
        accuracy = _random_region_accuracy(n_experts, n_regions, rng)
    else:
        accuracy = _check_region_accuracy(region_accuracy, n_experts, n_regions)
    return Scenario(
        X=X.astype(np.float32),
        proba=proba,
        y=y,
        regions=regions,
        correct_proba=accuracy[:, regions].T.copy(),
        region_accuracy=accuracy,
        fees=fees,
        names=tuple(f"expert{j + 1}" for j in range(n_experts)),
    )


def bayes_optimal_routes(scenario: Scenario, cost_matrix: ArrayLike | None = None) -> np.ndarray:
    """The option of least expected cost for each case, under the known truth and experts.

    Parameters
    ----------
    scenario : Scenario
    cost_matrix : array-like of shape (K, K), optional
        Defaults to 0/1 costs.

    Returns
    -------
    ndarray of shape (n,), int
        ``k < K`` for class ``k``, ``K + j`` for expert ``j``.
    """
    return np.argmin(_expected_costs(scenario, cost_matrix), axis=1)


def bayes_optimal_cost(scenario: Scenario, cost_matrix: ArrayLike | None = None) -> float:
    """Exact expected cost per case of the Bayes-optimal router, averaged over cases.

    For each case: ``min( min_k sum_y P(y|x) C[y, k], min_j E[C[y, m_j]] + fee_j )``,
    the expectation of an expert's answer taken under the scenario's answer rule
    (right with ``correct_proba``, otherwise a uniformly random other class). This is
    the Bayes rule of the cost-sensitive deferral problem (Mozannar & Sontag, ICML 2020;
    Verma, Barrejon & Nalisnick, AISTATS 2023), conditional on the cases' features.

    Parameters
    ----------
    scenario : Scenario
    cost_matrix : array-like of shape (K, K), optional
        Defaults to 0/1 costs.

    Returns
    -------
    float
    """
    return float(np.mean(np.min(_expected_costs(scenario, cost_matrix), axis=1)))


def sample_answers(
    scenario: Scenario,
    cases: ArrayLike,
    experts: ArrayLike,
    *,
    random_state: RandomState = None,
) -> np.ndarray:
    """Draw the answers of chosen experts on chosen cases, as one round would bring them.

    This is the hook for rehearsing a labelling budget: a plan yields (case, expert)
    pairs; this function plays the experts on exactly those pairs, by the scenario's
    answer rule. A pair may repeat (each draw is independent).

    Parameters
    ----------
    scenario : Scenario
    cases : array-like of int, shape (p,)
        Case indices (rows of ``scenario.X``).
    experts : array-like of int, shape (p,)
        Expert indices (``0 .. M-1``), one per case index.
    random_state : int, numpy Generator or None

    Returns
    -------
    ndarray of shape (p,), int
        The answer of ``experts[t]`` on ``cases[t]``.
    """
    cases = np.asarray(cases, dtype=np.int64)
    experts = np.asarray(experts, dtype=np.int64)
    if cases.shape != experts.shape or cases.ndim != 1:
        raise ValueError("cases and experts must be 1-d arrays of the same length")
    n, m = scenario.correct_proba.shape
    bad_case = cases.size and (cases.min() < 0 or cases.max() >= n)
    if bad_case or (experts.size and (experts.min() < 0 or experts.max() >= m)):
        raise ValueError(f"case indices must lie in 0..{n - 1} and expert indices in 0..{m - 1}")
    rng = np.random.default_rng(random_state)
    q = scenario.correct_proba[cases, experts]
    return _draw_answers(scenario.y[cases], q, scenario.n_classes, rng)


class DigitsData(NamedTuple):
    """Digits cases with one simulated expert: ``X, y, answers = digits_scenario(...)``."""

    X: np.ndarray
    y: np.ndarray
    answers: np.ndarray


def digits_scenario(k: int, random_state: RandomState = None) -> DigitsData:
    """scikit-learn's bundled digits with the simulated expert of Mozannar & Sontag.

    Mozannar & Sontag (ICML 2020, section 7, on CIFAR-10) simulate an expert that is
    always right on the first ``k`` classes and predicts uniformly at random over all
    classes otherwise (so it is right by chance 1 time in 10 there). Here the cases are
    the 1797 8x8 digits of :func:`sklearn.datasets.load_digits`, pixels scaled to
    [0, 1] by dividing by 16.

    Parameters
    ----------
    k : int
        Number of classes (``0 .. k-1``) the expert always gets right, 0 to 10.
    random_state : int, numpy Generator or None
        Seeds the expert's random answers.

    Returns
    -------
    DigitsData
        ``X`` float32 (1797, 64), ``y`` int (1797,), ``answers`` int (1797, 1).
    """
    from sklearn.datasets import load_digits

    if int(k) != k or not 0 <= k <= 10:
        raise ValueError(f"k must be an integer in 0..10, got {k!r}")
    rng = np.random.default_rng(random_state)
    data = load_digits()
    X = (data.data / 16.0).astype(np.float32)
    y = data.target.astype(np.int64)
    guesses = rng.integers(0, 10, size=len(y))
    answers = np.where(y < k, y, guesses)
    return DigitsData(X=X, y=y, answers=answers[:, None])


def _expected_costs(scenario: Scenario, cost_matrix: ArrayLike | None) -> np.ndarray:
    """Exact expected cost of every option of every case; shape (n, K + M)."""
    C = error_cost_matrix(scenario.n_classes, matrix=cost_matrix)
    return expected_cost_vectors(
        scenario.proba, scenario.correct_proba, cost_matrix=C, fees=scenario.fees
    )


def _draw_answers(
    y: np.ndarray, q: np.ndarray, n_classes: int, rng: np.random.Generator
) -> np.ndarray:
    """Right with probability q, else a uniformly random other class."""
    right = rng.uniform(size=len(y)) < q
    other = (y + rng.integers(1, n_classes, size=len(y))) % n_classes
    return np.where(right, y, other).astype(np.int64)


def _truth_model(
    X: np.ndarray, regions: np.ndarray, n_classes: int, n_regions: int, rng: np.random.Generator
) -> np.ndarray:
    """Softmax of a random one-hidden-layer network, sharpness varying by region."""
    n_hidden = 16
    W1 = rng.standard_normal((X.shape[1], n_hidden)) / np.sqrt(X.shape[1])
    b1 = rng.standard_normal(n_hidden) * 0.5
    W2 = rng.standard_normal((n_hidden, n_classes)) / np.sqrt(n_hidden)
    scores = np.tanh(X @ W1 + b1) @ W2
    scores = (scores - scores.mean(axis=0)) / scores.std(axis=0)
    sharpness = rng.uniform(0.5, 4.0, size=n_regions)
    scores = scores * sharpness[regions][:, None]
    scores -= scores.max(axis=1, keepdims=True)
    e = np.exp(scores)
    return e / e.sum(axis=1, keepdims=True)


def _sample_classes(proba: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One class per row drawn from the row's probabilities."""
    u = rng.uniform(size=(proba.shape[0], 1))
    idx = (np.cumsum(proba, axis=1) < u).sum(axis=1)
    return np.minimum(idx, proba.shape[1] - 1).astype(np.int64)


def _random_region_accuracy(
    n_experts: int, n_regions: int, rng: np.random.Generator
) -> np.ndarray:
    """Each expert strong in about half the regions (at least one), weak elsewhere."""
    acc = rng.uniform(*_WEAK, size=(n_experts, n_regions))
    n_strong = max(1, n_regions // 2)
    for j in range(n_experts):
        strong = rng.choice(n_regions, size=n_strong, replace=False)
        acc[j, strong] = rng.uniform(*_STRONG, size=n_strong)
    return acc


def _check_region_accuracy(
    region_accuracy: ArrayLike, n_experts: int, n_regions: int
) -> np.ndarray:
    """Validate an (M, n_regions) accuracy table."""
    acc = np.asarray(region_accuracy, dtype=np.float64)
    if acc.shape != (n_experts, n_regions):
        raise ValueError(
            f"region_accuracy must have shape {(n_experts, n_regions)}, got {acc.shape}"
        )
    if not np.all(np.isfinite(acc)) or np.any(acc < 0) or np.any(acc > 1):
        raise ValueError("region_accuracy must lie in [0, 1]")
    return acc


def _default_fees(n_experts: int) -> np.ndarray:
    """Fees spread evenly from 0.05 to 0.20."""
    if n_experts == 1:
        return np.array([0.1])
    return np.linspace(0.05, 0.20, n_experts)


def _check_positive(**values: int) -> None:
    """Check that each named count is a positive integer."""
    for name, value in values.items():
        if int(value) != value or value < 1:
            raise ValueError(f"{name} must be a positive integer, got {value!r}")
