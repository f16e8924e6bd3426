"""The logistic regression blended into the correctness network (routeplan.blend)."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.optimize import minimize_scalar
from scipy.special import expit
from sklearn.datasets import load_breast_cancer
from sklearn.preprocessing import StandardScaler
from statsmodels.discrete.discrete_model import Logit

from routeplan import blend
from routeplan.learner import PluginRouter, router_from_arrays


@pytest.fixture(scope="module")
def cancer():
    """scikit-learn's bundled breast-cancer data, five standardised features."""
    X, y = load_breast_cancer(return_X_y=True)
    return StandardScaler().fit_transform(X[:, :5]), y.astype(bool)


def test_fit_logistic_is_the_maximum_likelihood_fit_when_the_penalty_vanishes(cancer, monkeypatch):
    # reference: statsmodels' Logit maximum likelihood (Newton), on scikit-learn's data
    X, t = cancer
    monkeypatch.setattr(blend, "_C", 1e8)
    coef, icpt = blend.fit_logistic(X, t, np.ones(t.size))
    ref = Logit(t.astype(float), np.column_stack([np.ones(t.size), X])).fit(disp=0).params
    np.testing.assert_allclose(np.r_[icpt, coef], ref, rtol=2e-3, atol=2e-3)


def test_fit_logistic_weights_count_as_repeated_answers(cancer):
    # a weight of 2 is the same answer seen twice (scikit-learn's sample_weight semantics)
    X, t = cancer
    w = np.where(np.arange(t.size) % 3 == 0, 2.0, 1.0)
    twice = np.r_[np.arange(t.size), np.flatnonzero(w == 2.0)]
    a = blend.fit_logistic(X, t, w)
    b = blend.fit_logistic(X[twice], t[twice], np.ones(twice.size))
    np.testing.assert_allclose(np.r_[a[1], a[0]], np.r_[b[1], b[0]], rtol=1e-3, atol=1e-4)


def test_fit_logistic_with_one_outcome_is_the_rule_of_succession():
    # Laplace's rule of succession: (right + 1) / (n + 2)
    X = np.random.default_rng(0).normal(size=(8, 3))
    coef, icpt = blend.fit_logistic(X, np.ones(8, bool), np.ones(8))
    assert not coef.any() and icpt == pytest.approx(np.log(9 / 1))
    coef, icpt = blend.fit_logistic(X, np.zeros(8, bool), np.ones(8))
    assert not coef.any() and icpt == pytest.approx(np.log(1 / 9))


def test_choose_mix_finds_the_better_score_and_the_continuous_optimum():
    rng = np.random.default_rng(3)
    z_true = rng.normal(scale=2.0, size=400)
    t = rng.random(400) < expit(z_true)
    noise = rng.normal(scale=2.0, size=400)
    w = np.ones(400)
    assert blend.choose_mix(noise, z_true, t, w) <= 0.1  # the network is noise: the regression wins
    assert blend.choose_mix(z_true, noise, t, w) >= 0.9
    assert blend.choose_mix(np.zeros(0), np.zeros(0), np.zeros(0, bool), np.zeros(0)) == 1.0
    # the log-loss of sigmoid(a z1 + (1 - a) z2) is convex in a: the grid's choice lies within
    # one grid step of scipy's bounded minimum
    z1, z2 = z_true + rng.normal(scale=1.5, size=400), z_true + rng.normal(scale=1.0, size=400)

    def loss(a):
        p = expit(a * z1 + (1 - a) * z2)
        return -np.mean(t * np.log(p) + (~t) * np.log1p(-p))

    best = minimize_scalar(loss, bounds=(0, 1), method="bounded").x
    assert abs(blend.choose_mix(z1, z2, t, w) - best) <= blend.MIX_GRID[1] / 2 + 1e-9


def _linear_expert(n: int, seed: int):
    """Cases whose expert is right with probability sigmoid(2 x0 - x1): a linear competence."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(n, 4)).astype(np.float32)
    y = (X[:, 2] + 0.5 * rng.normal(size=n) > 0).astype(int)
    q = expit(2.0 * X[:, 0] - X[:, 1])
    right = rng.random(n) < q
    A = np.where(right, y, 1 - y)[:, None]
    return X, y, A, q


def test_router_blends_where_answers_are_few_and_gains_on_held_out_cases():
    # with 150 answers and a competence that is linear in x, the blend leans on the regression
    # and its P(right) is closer to the truth (expected log-loss against the known q, held out;
    # common practice: a correctly specified model wins with few data)
    X, y, A, _ = _linear_expert(1500, 0)
    A = A.copy()
    A[150:] = -1  # 150 answers
    Xt, _, _, q_true = _linear_expert(4000, 1)
    losses = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        for flag in (True, False):
            r = PluginRouter(logistic_blend=flag, max_epochs=60, random_state=0).fit(X, y, A, fees=[0.1])
            p = np.clip(r.predict_expert_correct(Xt)[:, 0], 1e-9, 1 - 1e-9)
            losses[flag] = -np.mean(q_true * np.log(p) + (1 - q_true) * np.log1p(-p))
            if flag:
                assert r.correctness_mix_[0] < 1.0 and r.correctness_linear_coef_[0, 0] > 0
            else:
                assert r.correctness_mix_[0] == 1.0 and not r.correctness_linear_coef_.any()
    assert losses[True] < losses[False]


def test_blend_is_off_by_default():
    # the documented default (measured in routeplan.blend: not a gain in rehearsal)
    X, y, A, _ = _linear_expert(300, 4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        r = PluginRouter(max_epochs=5, random_state=0).fit(X, y, A, fees=[0.1])
    assert r.logistic_blend is False and np.all(r.correctness_mix_ == 1.0)


def test_blend_skips_experts_with_many_answers_and_old_arrays_load(monkeypatch):
    # documented behaviour (BLEND_BELOW; arrays format 1 still read), common practice for
    # stored models: old versions keep loading, unknown ones are refused
    X, y, A, _ = _linear_expert(600, 2)
    A = np.column_stack([A[:, 0], np.where(np.arange(600) < 100, A[:, 0], -1)])
    monkeypatch.setattr(blend, "BLEND_BELOW", 200)  # expert 0 has about 480 training answers
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        r = PluginRouter(logistic_blend=True, max_epochs=20, random_state=0).fit(X, y, A, fees=[0.1, 0.2])
    assert r.correctness_mix_[0] == 1.0 and not r.correctness_linear_coef_[0].any()
    assert r.correctness_linear_coef_[1].any()
    # a router stored before the blend (arrays format 1) loads as the network alone
    arrays, meta = r.get_arrays()
    old = {k: v for k, v in arrays.items() if not k.startswith(("correctness_linear", "correctness_mix"))}
    again = router_from_arrays(old, {**meta, "format_version": 1})
    assert np.all(again.correctness_mix_ == 1.0)
    assert again.predict_costs(X).shape == r.predict_costs(X).shape
    with pytest.raises(ValueError, match="unknown router format"):
        router_from_arrays(arrays, {**meta, "format_version": 3})
