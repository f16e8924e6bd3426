"""Turning case columns into the float32 matrix the learners use.

The parameters (column names, means, scales) are plain data, stored in the workspace and in the
policy file as JSON, never pickled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["FeatureSpec", "fit_features"]


@dataclass(frozen=True)
class FeatureSpec:
    """How raw feature columns become model inputs: ``(x - mean) / scale``, as float32.

    Attributes
    ----------
    names : tuple of str
        Feature column names, in order.
    means : tuple of float
    scales : tuple of float
        Standard deviations (1.0 where a column is constant).
    lows, highs : tuple of float
        The range seen in training; :meth:`outside_range` counts cases beyond it.
    """

    names: tuple[str, ...]
    means: tuple[float, ...]
    scales: tuple[float, ...]
    lows: tuple[float, ...]
    highs: tuple[float, ...]

    def transform(self, X: np.ndarray) -> np.ndarray:
        """Standardise an (n, d) float matrix to float32."""
        X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2 or X.shape[1] != len(self.names):
            raise InputError(f"expected {len(self.names)} feature columns ({', '.join(self.names)}), got {X.shape[-1]}")
        return ((X - np.asarray(self.means)) / np.asarray(self.scales)).astype(np.float32)

    def outside_range(self, X: np.ndarray, *, margin: float = 0.0) -> np.ndarray:
        """Boolean mask of cases with any feature outside the training range (widened by ``margin`` scales)."""
        X = np.asarray(X, dtype=np.float64)
        pad = margin * np.asarray(self.scales)
        return ((X < np.asarray(self.lows) - pad) | (X > np.asarray(self.highs) + pad)).any(axis=1)

    def to_dict(self) -> dict:
        """Plain data for JSON."""
        return {k: list(getattr(self, k)) for k in ("names", "means", "scales", "lows", "highs")}

    @classmethod
    def from_dict(cls, data: dict) -> "FeatureSpec":
        """Rebuild from :meth:`to_dict` output."""
        return cls(*(tuple(data[k]) for k in ("names", "means", "scales", "lows", "highs")))


def fit_features(X: np.ndarray, names: list[str] | tuple[str, ...]) -> FeatureSpec:
    """Learn standardisation parameters from the training pool.

    Parameters
    ----------
    X : ndarray of shape (n_cases, n_features)
    names : sequence of str

    Returns
    -------
    FeatureSpec
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or X.shape[0] == 0:
        raise InputError("no cases to learn feature parameters from")
    scale = X.std(axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    return FeatureSpec(tuple(names), tuple(map(float, X.mean(axis=0))), tuple(map(float, scale)),
                       tuple(map(float, X.min(axis=0))), tuple(map(float, X.max(axis=0))))
