"""Tests of routeplan.features: the standardisation parameters and their checks."""

from __future__ import annotations

import math

import numpy as np
import pytest

from routeplan.features import FeatureSpec

F32_MAX = float(np.finfo(np.float32).max)


def _spec(scales=(1.0, 2.0)) -> FeatureSpec:
    return FeatureSpec(("a", "b"), (0.0, 10.0), tuple(scales), (-1.0, 8.0), (1.0, 12.0))


@pytest.mark.parametrize("offset", [0.0, 1e3, 1e37, -1e37, 1e39, -1e39, 1e300, math.inf, -math.inf, math.nan])
def test_unscalable_marks_exactly_the_values_float32_cannot_hold_once_standardised(offset):
    # The reference is numpy itself: a value is unscalable where transform's float32 result
    # (IEEE 754 single precision, numpy's finfo(float32).max) is not finite. Offsets are in
    # scales and kept away from the boundary, where rounding may fall either way.
    spec = _spec()
    X = np.array([[0.0, 10.0], [offset, 10.0 + 2.0 * offset], [0.5, 11.0]])
    with np.errstate(over="ignore", invalid="ignore"):
        expected = ~np.isfinite(spec.transform(X))
    got = spec.unscalable(X)
    assert got.shape == X.shape and got.dtype == bool
    np.testing.assert_array_equal(got, expected)


def test_a_huge_scale_sets_no_bound():
    # np.finfo(float32).max * 1e300 overflows float64 to inf (IEEE 754): every finite value
    # of such a feature standardises to a finite float32, so none is refused.
    spec = _spec(scales=(1.0, 1e300))
    assert spec.reach() == (F32_MAX, math.inf)
    X = np.array([[0.0, 1e308], [0.0, -1e308]])
    assert not spec.unscalable(X).any()
    assert np.isfinite(spec.transform(X)).all()


def test_reach_is_float32_max_in_scales():
    # the bound unscalable applies, given in the refusal message of `route` (deploy.py)
    assert _spec().reach() == (F32_MAX, 2.0 * F32_MAX)


def test_unscalable_reads_integer_columns():
    # common practice: an integer matrix is accepted as it is; a small value is never refused
    spec = _spec()
    X = np.array([[0, 10], [3, 7]], dtype=np.int64)
    assert not spec.unscalable(X).any()
