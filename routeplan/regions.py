"""Regions of the feature space: k-means cells, the unit of competence and planning."""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from sklearn.cluster import KMeans
from sklearn.preprocessing import StandardScaler
from sklearn.utils import check_array, check_random_state

from routeplan._answerframe import _int_column

__all__ = ["region_summary", "regions_from_features"]


def regions_from_features(
    X: ArrayLike,
    n_regions: int = 6,
    random_state: int | np.random.RandomState | np.random.Generator | None = 0,
    *,
    fit_size: int = 50_000,
) -> NDArray[np.int64]:
    """Cluster cases into regions of the feature space for the per-region tables.

    k-means (Lloyd, IEEE Trans. Inf. Theory 1982; k-means++ seeding, Arthur and
    Vassilvitskii, SODA 2007, through scikit-learn) on features standardised to zero
    mean and unit variance, so that no feature dominates by its unit. With more than
    ``fit_size`` cases the centres are fitted on a seeded random subset of that size
    and every case goes to its nearest centre (regions are coarse; the subset keeps
    the cost flat).

    Parameters
    ----------
    X : array-like of shape (n_cases, n_features)
        Case features; finite.
    n_regions : int, default=6
        Number of regions; at most n_cases.
    random_state : int, RandomState, Generator or None, default=0
        Seed of the subset and of the k-means initialisation; fixed by default so
        the regions are stable from run to run.
    fit_size : int, default=50_000
        Largest number of cases the centres are fitted on.

    Returns
    -------
    ndarray of int of shape (n_cases,)
        Region code 0..n_regions-1 of each case.
    """
    data = check_array(X, dtype=np.float64)
    n = data.shape[0]
    if int(n_regions) != n_regions or not 1 <= n_regions <= n:
        raise ValueError(f"n_regions must be an integer in 1..{n}, got {n_regions!r}")
    if int(fit_size) != fit_size or fit_size < n_regions:
        raise ValueError(f"fit_size must be an integer >= n_regions, got {fit_size!r}")
    if isinstance(random_state, np.random.Generator):
        random_state = int(random_state.integers(2**31 - 1))
    rng = check_random_state(random_state)
    scaled = StandardScaler().fit_transform(data)
    subset = scaled if n <= fit_size else scaled[rng.choice(n, int(fit_size), replace=False)]
    km = KMeans(n_clusters=int(n_regions), n_init=4, random_state=rng).fit(subset)
    return km.predict(scaled).astype(np.int64)


def region_summary(
    X: ArrayLike, region: ArrayLike, feature_names: list[str] | None = None
) -> pd.DataFrame:
    """Size and mean features of each region, to tell the user where a region lies.

    Parameters
    ----------
    X : array-like of shape (n_cases, n_features)
        Case features in their own units.
    region : array-like of int of shape (n_cases,)
        Region codes, e.g. from `regions_from_features`.
    feature_names : list of str, default=None
        Column names; ``x0, x1, ...`` by default.

    Returns
    -------
    DataFrame
        One row per region: ``region, n_cases`` and the mean of each feature.
    """
    data = check_array(X, dtype=np.float64)
    reg = _int_column(region, "region").ravel()
    if reg.size != data.shape[0]:
        raise ValueError("region must have one entry per row of X")
    names = feature_names or [f"x{j}" for j in range(data.shape[1])]
    if len(names) != data.shape[1]:
        raise ValueError("feature_names must name every column of X")
    frame = pd.DataFrame(data, columns=names).assign(region=reg)
    means = frame.groupby("region", sort=True).mean()
    means.insert(0, "n_cases", frame.groupby("region", sort=True).size())
    return means.reset_index()
