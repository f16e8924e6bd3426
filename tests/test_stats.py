"""Tests of routeplan.stats against reference libraries and published values."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import binom
from sklearn.metrics import cohen_kappa_score
from sklearn.metrics import confusion_matrix as sk_confusion_matrix
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss_kappa
from statsmodels.stats.proportion import proportion_confint
from statsmodels.stats.weightstats import DescrStatsW

from routeplan.stats import (
    cohen_kappa,
    confusion_matrix,
    fleiss_kappa,
    kappa_from_confusion,
    mean_interval,
    paired_difference_interval,
    wilson_interval,
)

DATA = Path(__file__).parent / "data"


# --------------------------------------------------------------------------- Wilson


@pytest.mark.parametrize("confidence", [0.8, 0.95, 0.99])
def test_wilson_matches_statsmodels_over_a_grid(confidence):
    trials = np.repeat(np.arange(1, 61), np.arange(2, 62))
    successes = np.concatenate([np.arange(n + 1) for n in range(1, 61)])
    low, high = wilson_interval(successes, trials, confidence)
    # reference: statsmodels.stats.proportion.proportion_confint(method="wilson")
    ref_low, ref_high = proportion_confint(successes, trials, alpha=1 - confidence, method="wilson")
    np.testing.assert_allclose(low, ref_low, atol=1e-12)
    np.testing.assert_allclose(high, ref_high, atol=1e-12)


def test_wilson_matches_published_values():
    ref = pd.read_csv(DATA / "wilson_interval_reference.csv")
    low, high = wilson_interval(ref["successes"], ref["trials"])
    # each row's source is in the CSV: R binom.confint (via statsmodels' test results) or
    # Newcombe, Stat. Med. 1998 (recomputed; agreement with the paper's table from memory);
    # tolerance: half a unit in the last published decimal
    tol = 0.5 * 10.0 ** (-ref["decimals"].to_numpy()) + 1e-12
    assert np.all(np.abs(low - ref["low"].to_numpy()) <= tol)
    assert np.all(np.abs(high - ref["high"].to_numpy()) <= tol)


def test_wilson_edges_and_shapes():
    low, high = wilson_interval(0, 0)
    assert np.isnan(low) and np.isnan(high)  # no trials: no interval (documented contract)
    assert isinstance(wilson_interval(3, 10)[0], float)
    low, high = wilson_interval(np.array([[0, 5], [5, 0]]), np.array([[5, 5], [5, 0]]))
    assert low.shape == (2, 2) and np.isnan(high[1, 1])
    # common practice: zero successes give lower bound 0, all successes upper bound 1
    assert low[0, 0] == 0.0 and high[0, 1] == 1.0
    with pytest.raises(ValueError):
        wilson_interval(6, 5)
    with pytest.raises(ValueError):
        wilson_interval(1, 5, confidence=1.5)


def test_wilson_coverage_by_simulation():
    # Wilson's coverage oscillates with n and p (Brown, Cai & DasGupta, Statistical Science
    # 2001), so the check uses one (n, p) whose exact coverage, computed from scipy's binomial
    # pmf, is close to 0.95: n=150, p=0.8 (about 0.948). 1,000 seeded draws must land in
    # 93-97% (about +/-2.4 binomial standard errors around 0.95).
    n, p = 150, 0.8
    k = np.arange(n + 1)
    lo, hi = wilson_interval(k, n)
    exact = binom.pmf(k, n, p)[(lo <= p) & (p <= hi)].sum()  # scipy.stats.binom
    assert 0.93 <= exact <= 0.97
    draws = np.random.default_rng(20240601).binomial(n, p, size=1000)
    low, high = wilson_interval(draws, n)
    coverage = np.mean((low <= p) & (p <= high))
    assert 0.93 <= coverage <= 0.97


# --------------------------------------------------------------------------- paired difference


def test_paired_difference_matches_propcis_worked_example():
    # R package PropCIs, diffpropci.mp(b = 40, c = 20, n = 160, conf.level = 0.95), example
    # output on rdrr.io/cran/PropCIs/man/diffpropci.mp.html: -0.21601726 -0.03089632 (estimate
    # -0.1234568 = (20.5 - 40.5) / 162, so PropCIs reports c - b; ours is first minus second)
    low, high = paired_difference_interval(20, 40, 160)
    assert (low, high) == pytest.approx((-0.21601726, -0.03089632), abs=5e-9)
    low, high = paired_difference_interval(40, 20, 160)
    assert (low, high) == pytest.approx((0.03089632, 0.21601726), abs=5e-9)


def test_paired_difference_is_agresti_min_formula_over_a_grid():
    # Agresti & Min, Statistics in Medicine 24(5):729-740, 2005: add 1/2 to each cell of the
    # paired 2x2 table, then the Wald interval; written out here from the paper's recipe
    b, c, n = np.array([(b, c, m) for m in range(1, 31) for b in range(m + 1) for c in range(m - b + 1)]).T
    z = 2.5758293035489004  # scipy.stats.norm.ppf(0.995)
    cells = np.stack([b, c, n - b - c], axis=1) + 0.5
    bt, ct, nt = cells[:, 0], cells[:, 1], n + 2.0
    p_b, p_c = bt / nt, ct / nt
    se = np.sqrt((p_b + p_c - (p_b - p_c) ** 2) / nt)
    low, high = paired_difference_interval(b, c, n, confidence=0.99)
    np.testing.assert_allclose(low, np.clip(p_b - p_c - z * se, -1, 1), atol=1e-12)
    np.testing.assert_allclose(high, np.clip(p_b - p_c + z * se, -1, 1), atol=1e-12)
    # never zero width, even where every pair agrees or every pair differs one way
    assert np.all(high - low > 0)


def test_paired_difference_exact_coverage_beats_the_plain_normal_interval():
    """Exact coverage by enumerating the trinomial (b, c, rest), as Agresti & Min (2005) evaluate.

    Computed here, not copied: averaged over a grid of discordant-cell probabilities, the
    adjusted interval covers the true difference at least at the nominal 95% for n = 10 and 20,
    while the plain normal (Wald) interval, whose variance is 0 when the few pairs all agree,
    falls short, as Agresti & Min report (from memory). The Wald bounds 0.9 (n = 10) and 0.93
    (n = 20) are this test's own margins below 0.95, chosen by us so that "falls short" means
    clearly short; they are not figures from the paper.
    """
    from scipy.special import gammaln

    for n, wald_below in ((10, 0.9), (20, 0.93)):
        b, c = np.meshgrid(np.arange(n + 1), np.arange(n + 1), indexing="ij")
        keep = b + c <= n
        b, c = b[keep], c[keep]
        rest = n - b - c
        low, high = paired_difference_interval(b, c, np.full(b.shape, n))
        d = (b - c) / n
        half = 1.959964 * np.sqrt(((b + c) / n - d**2) / n)
        ours, plain = [], []
        for pb in (0.02, 0.05, 0.1, 0.2, 0.3):
            for pc in (0.02, 0.05, 0.1, 0.2, 0.3):
                prob = np.exp(gammaln(n + 1) - gammaln(b + 1) - gammaln(c + 1) - gammaln(rest + 1)
                              + b * np.log(pb) + c * np.log(pc) + rest * np.log(1 - pb - pc))
                true = pb - pc
                ours.append(prob[(low <= true) & (true <= high)].sum())
                plain.append(prob[(d - half <= true) & (true <= d + half)].sum())
        assert np.mean(ours) >= 0.95
        assert np.mean(plain) < wald_below


def test_paired_difference_holds_the_plain_estimate_up_to_200_pairs():
    # the documented property of the competence table (routeplan.competence): the plain
    # difference (b - c) / n lies inside the Agresti-Min interval for every table of up to
    # 200 pairs at levels 0.9 to 0.99 (computed here by enumeration, not from a source)
    # triu_indices gives every i <= j <= m, so (i, j - i) runs over every table with i + (j - i) <= m
    i, j, n = (np.concatenate(a) for a in zip(*[
        np.broadcast_arrays(*np.triu_indices(m + 1), m) for m in range(1, 201)]))
    b, c = i, j - i
    for first, second in ((b, c), (c, b)):
        for level in (0.9, 0.95, 0.99):
            low, high = paired_difference_interval(first, second, n, confidence=level)
            est = (first - second) / n
            assert np.all((low <= est + 1e-12) & (est <= high + 1e-12)), level


def test_paired_difference_edges():
    low, high = paired_difference_interval(0, 0, 0)
    assert np.isnan(low) and np.isnan(high)  # no pairs: no interval (documented contract)
    assert isinstance(paired_difference_interval(1, 0, 3)[0], float)
    low, high = paired_difference_interval(np.array([0.0, 3.0]), np.array([0.0, 0.0]), 3.0)
    assert low.shape == (2,) and np.all(low < high) and high[1] == 1.0
    with pytest.raises(ValueError):
        paired_difference_interval(3, 2, 4)
    with pytest.raises(ValueError):
        paired_difference_interval(-1, 0, 4)


# --------------------------------------------------------------------------- mean interval


def test_mean_interval_matches_statsmodels():
    x = np.random.default_rng(3).normal(2.0, 1.5, size=80)
    mean, low, high = mean_interval(x, confidence=0.9)
    # reference: statsmodels DescrStatsW.zconfint_mean (normal interval, sample std ddof=1)
    ref_low, ref_high = DescrStatsW(x).zconfint_mean(alpha=0.1)
    assert mean == pytest.approx(x.mean())
    assert (low, high) == pytest.approx((ref_low, ref_high), rel=1e-12)


def test_mean_interval_weights():
    x = np.random.default_rng(4).normal(size=50)
    w = np.random.default_rng(5).uniform(0.5, 3.0, size=50)
    mean, _, _ = mean_interval(x, weights=w)
    assert mean == pytest.approx(np.average(x, weights=w))  # numpy's weighted mean
    # common practice: equal weights change nothing (Kish n_eff equals n)
    assert mean_interval(x, weights=np.full(50, 7.0)) == pytest.approx(mean_interval(x))
    assert np.isnan(mean_interval([1.0])[1])
    with pytest.raises(ValueError):
        mean_interval([1.0, np.nan])


# --------------------------------------------------------------------------- confusion and kappa


def test_confusion_matrix_matches_sklearn():
    rng = np.random.default_rng(7)
    t, p = rng.integers(4, size=300), rng.integers(4, size=300)
    w = rng.uniform(size=300)
    # reference: sklearn.metrics.confusion_matrix (rows truth, columns prediction)
    np.testing.assert_array_equal(
        confusion_matrix(t, p, 4), sk_confusion_matrix(t, p, labels=range(4))
    )
    np.testing.assert_allclose(
        confusion_matrix(t, p, 4, weights=w),
        sk_confusion_matrix(t, p, labels=range(4), sample_weight=w),
    )
    with pytest.raises(ValueError):
        confusion_matrix([0, 4], [0, 1], 4)


def test_cohen_kappa_matches_sklearn():
    rng = np.random.default_rng(11)
    a = rng.integers(3, size=200)
    b = np.where(rng.random(200) < 0.6, a, rng.integers(3, size=200))
    w = rng.uniform(0.1, 2.0, size=200)
    # reference: sklearn.metrics.cohen_kappa_score, unweighted and with sample_weight
    assert cohen_kappa(a, b, 3) == pytest.approx(cohen_kappa_score(a, b))
    assert cohen_kappa(a, b, 3, weights=w) == pytest.approx(
        cohen_kappa_score(a, b, sample_weight=w)
    )
    # a stack of confusion matrices gives each matrix's kappa
    stack = np.stack([confusion_matrix(a, b, 3), confusion_matrix(a, a, 3)])
    np.testing.assert_allclose(kappa_from_confusion(stack), [cohen_kappa_score(a, b), 1.0])


def test_cohen_kappa_published_values():
    # R irr::kappa2(anxiety[, 2:3]) = -0.006289308 (irr's `anxiety` data, raters 2 and 3,
    # as recorded in statsmodels/stats/tests/test_inter_rater.py); ratings 1..6 -> codes 0..5
    rater2 = [3, 6, 4, 6, 2, 4, 2, 4, 3, 3, 2, 3, 3, 3, 2, 2, 1, 3, 3, 4]
    rater3 = [2, 1, 4, 4, 3, 2, 1, 6, 1, 1, 1, 2, 3, 3, 1, 1, 3, 3, 2, 2]
    assert cohen_kappa(np.subtract(rater2, 1), np.subtract(rater3, 1), 6) == pytest.approx(
        -0.006289308, abs=1e-9
    )
    # SAS printout for a 3x3 table, kappa 0.4842 (statsmodels' test_inter_rater.py)
    table = [[0, 4, 1], [0, 8, 0], [0, 1, 5]]
    assert kappa_from_confusion(table) == pytest.approx(0.4842, abs=5e-5)


def test_kappa_undefined_is_nan():
    # Cohen 1960: kappa is undefined when chance agreement is 1 (both raters constant)
    assert np.isnan(cohen_kappa([1, 1, 1], [1, 1, 1], 3))
    assert np.isnan(cohen_kappa([], [], 3))


def test_fleiss_kappa_matches_statsmodels_and_worked_example():
    # worked example of the Wikipedia article "Fleiss' kappa" (10 subjects, 14 raters):
    # kappa 0.210, also used by statsmodels' test_inter_rater.py
    table = np.array([
        [0, 0, 0, 0, 14], [0, 2, 6, 4, 2], [0, 0, 3, 5, 6], [0, 3, 9, 2, 0], [2, 2, 8, 1, 1],
        [7, 7, 0, 0, 0], [3, 2, 6, 3, 0], [2, 5, 3, 2, 2], [6, 5, 2, 1, 0], [0, 2, 2, 3, 7],
    ])
    assert fleiss_kappa(table) == pytest.approx(0.210, abs=5e-4)
    rng = np.random.default_rng(13)
    for _ in range(5):
        counts = rng.multinomial(5, rng.dirichlet(np.ones(4)), size=40)
        # reference: statsmodels.stats.inter_rater.fleiss_kappa(method="fleiss")
        assert fleiss_kappa(counts) == pytest.approx(sm_fleiss_kappa(counts))
    with pytest.raises(ValueError):
        fleiss_kappa([[2, 1], [1, 1]])  # unequal numbers of ratings


def test_effective_sample_size_kish():
    from routeplan.stats import effective_sample_size

    # Kish, Survey Sampling (1965), 11.7 (section from memory): n_eff = n / (1 + cv^2), with cv
    # the coefficient of variation of the weights (population variance); equal weights give n,
    # one dominant weight about 1
    rng = np.random.default_rng(3)
    w = rng.gamma(0.5, size=200)
    assert effective_sample_size(w) == pytest.approx(w.size / (1 + w.var() / w.mean() ** 2))
    assert effective_sample_size(np.full(37, 2.5)) == pytest.approx(37)
    assert effective_sample_size([1e6, 1, 1, 1]) == pytest.approx(1.0, abs=1e-5)
    # hand-worked: weights 1, 1, 1, 1, 4 -> 8^2 / (4 + 16) = 3.2; NaN means "no observation"
    assert effective_sample_size([1, 1, np.nan, 1, 1, 4]) == pytest.approx(3.2)
    assert effective_sample_size([]) == 0.0
    with pytest.raises(ValueError):
        effective_sample_size([1.0, -1.0])
