"""Tests of routeplan.regions on scikit-learn's bundled iris data."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_iris
from sklearn.metrics import adjusted_rand_score

from routeplan.regions import region_summary, regions_from_features


def test_regions_from_features_on_iris():
    X, y = load_iris(return_X_y=True)  # scikit-learn's bundled iris data
    region = regions_from_features(X, n_regions=3, random_state=0)
    assert set(region) == {0, 1, 2}
    # common practice: standardised k-means finds the iris species well (ARI well above 0.5)
    assert adjusted_rand_score(y, region) > 0.5
    # standardising makes the regions independent of each feature's unit
    rescaled = regions_from_features(X * [1000.0, 1.0, 0.01, 1.0], n_regions=3, random_state=0)
    assert adjusted_rand_score(region, rescaled) == pytest.approx(1.0)
    # centres fitted on a seeded subset still find the species, reproducibly
    subset = regions_from_features(X, n_regions=3, random_state=0, fit_size=100)
    assert adjusted_rand_score(y, subset) > 0.5
    np.testing.assert_array_equal(
        subset, regions_from_features(X, n_regions=3, random_state=0, fit_size=100)
    )
    summary = region_summary(X, region, ["sl", "sw", "pl", "pw"])
    assert summary["n_cases"].sum() == 150
    first = summary.set_index("region").loc[region[0]]
    assert first["pl"] == pytest.approx(X[region == region[0], 2].mean())  # numpy mean
    with pytest.raises(ValueError):
        regions_from_features(X[:2], n_regions=3)
