"""Turning case columns into the float32 matrix the learners use.

The parameters (column names, means, scales) are plain data, stored in the workspace and in the
policy file as JSON, never pickled.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import InputError

__all__ = ["FeatureSpec", "fit_features"]

#: The largest value the routers' float32 inputs hold.
_FLOAT32_MAX = float(np.finfo(np.float32).max)


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
        The range seen in training; :meth:`outside_range` counts cases beyond it
        (:meth:`unscalable` marks values too far from the means to standardise at all).
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

    def unscalable(self, X: np.ndarray) -> np.ndarray:
        """Mask of feature values too far from the training mean to standardise.

        A value is unscalable when its standardised value would overflow float32, the
        routers' input type (beyond ``np.finfo(np.float32).max``; see :meth:`reach`), or when
        it is not a number: no router can score such a case. Checked column by column
        against bounds, so that no (n, d) float copy of ``X`` is made.

        Parameters
        ----------
        X : ndarray of shape (n_cases, n_features)
            Raw feature values, in the order of :attr:`names`.

        Returns
        -------
        ndarray of bool, shape (n_cases, n_features)
        """
        X = np.asarray(X)
        out = np.zeros((X.shape[0], len(self.names)), dtype=bool)
        with np.errstate(over="ignore", invalid="ignore"):
            for j, (mean, reach) in enumerate(zip(self.means, self.reach())):
                column = X[:, j]
                out[:, j] = ~((column >= float(mean) - reach) & (column <= float(mean) + reach))
        return out

    def reach(self) -> tuple[float, ...]:
        """How far from its training mean each feature may lie and still standardise to a
        finite float32: ``np.finfo(np.float32).max * scale`` (inf for a huge scale: no bound)."""
        return tuple(_FLOAT32_MAX * float(scale) for scale in self.scales)

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
