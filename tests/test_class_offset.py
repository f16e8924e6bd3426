"""The plug-in router's class offset: the class route as an offset of the correctness model.

Data: scikit-learn's bundled digits, pooled to 4x4, with the simulated experts of Mozannar &
Sontag (ICML 2020, section 7): each always right on its classes and uniformly random
elsewhere (right 1 time in 10), so each expert's true ``P(right | x, y)`` is known. The class
probabilities the routers take in two-stage mode come from scikit-learn's
LogisticRegression, cross-fitted (``cross_val_predict``), an outside reference model.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import cross_val_predict

from routeplan.learner import EnsembleRouter, PluginRouter, router_from_arrays
from routeplan.rehearse import digits_experts_scenario

SETTINGS = {"hidden": (32,), "max_epochs": 60, "patience": 10, "weight_decay": 1e-2}
N_TRAIN = 900
PER_EXPERT = 40


@pytest.fixture(scope="module")
def digits():
    """Training cases with 40 answers per expert, held-out cases, cross-fitted probabilities."""
    scn = digits_experts_scenario(random_state=0)
    P = cross_val_predict(LogisticRegression(max_iter=2000), scn.X, scn.y, cv=5, method="predict_proba")
    answers = scn.answers(random_state=1)
    shown = np.full((N_TRAIN, scn.n_experts), -1)
    rng = np.random.default_rng(2)
    for j in range(scn.n_experts):
        asked = rng.choice(N_TRAIN, PER_EXPERT, replace=False)
        shown[asked, j] = answers[asked, j]
    train, held = slice(0, N_TRAIN), slice(N_TRAIN, None)
    return {"X": scn.X[train], "y": scn.y[train], "A": shown, "P": P[train], "fees": scn.fees,
            "X_eval": scn.X[held], "P_eval": P[held], "truth": scn.correct_proba[held]}


def _fit(d, **kw):
    return PluginRouter(random_state=0, **SETTINGS, **kw).fit(d["X"], d["y"], d["A"], fees=d["fees"],
                                                              class_proba=d["P"])


def _cross_entropy(truth: np.ndarray, q: np.ndarray) -> float:
    """Mean cross-entropy of estimated P(right) against the true P(right) (Bernoulli)."""
    q = np.clip(q, 1e-9, 1 - 1e-9)
    return float(-(truth * np.log(q) + (1 - truth) * np.log(1 - q)).mean())


@pytest.fixture(scope="module")
def fitted(digits):
    return {mode: _fit(digits, class_offset=mode) for mode in ("never", "auto", "always")}


def test_the_offset_learns_class_dependent_experts_from_few_answers(digits, fitted):
    # Dawid & Skene (JRSS C, 1979): an annotator's reliability that follows the true class is
    # the diagonal of a confusion matrix; weighted by P(y | x) it is these experts' exact
    # P(right | x). With 40 answers per expert the offset network must be closer to the truth.
    loss = {mode: _cross_entropy(digits["truth"], r.predict_expert_correct(
        digits["X_eval"], class_proba=digits["P_eval"])) for mode, r in fitted.items()}
    assert fitted["auto"].offset_experts_.any()
    assert loss["auto"] < loss["never"] - 0.05, loss
    assert loss["always"] < loss["never"] - 0.05, loss


def test_the_choice_only_adds_a_network(fitted):
    # the choice only adds a network: the plain one is the same with or without it
    never, auto, always = fitted["never"], fitted["auto"], fitted["always"]
    assert not never.offset_experts_.any() and never.correctness_offset_net_ is None
    assert always.offset_experts_.all()
    for a, b in zip(never.correctness_net_.state_dict().values(), auto.correctness_net_.state_dict().values()):
        assert np.array_equal(a.numpy(), b.numpy())
    assert "correctness_offset" in auto.history_


def test_the_offset_survives_the_arrays_round_trip(digits, fitted):
    router = fitted["auto"]
    arrays, meta = router.get_arrays()
    assert "offset_experts" in arrays and any(k.startswith("correctness_offset.") for k in arrays)
    back = router_from_arrays(arrays, meta)
    assert np.array_equal(back.offset_experts_, router.offset_experts_)
    np.testing.assert_array_equal(back.predict_costs(digits["X_eval"], class_proba=digits["P_eval"]),
                                  router.predict_costs(digits["X_eval"], class_proba=digits["P_eval"]))


def test_arrays_without_the_offset_load_as_no_offset(digits, fitted):
    # arrays written before the class offset existed (no "offset_experts" entry)
    router = fitted["never"]
    arrays, meta = router.get_arrays()
    arrays.pop("offset_experts")
    back = router_from_arrays(arrays, meta)
    assert not back.offset_experts_.any()
    np.testing.assert_array_equal(back.predict_costs(digits["X_eval"], class_proba=digits["P_eval"]),
                                  router.predict_costs(digits["X_eval"], class_proba=digits["P_eval"]))


def test_one_stage_routers_have_no_offset(digits):
    # the classifier's own probabilities on its training cases are in sample: no offset there
    router = PluginRouter(random_state=0, **{**SETTINGS, "max_epochs": 5}).fit(
        digits["X"], digits["y"], digits["A"], fees=digits["fees"])
    assert not router.offset_experts_.any() and router.correctness_offset_net_ is None


def test_the_ensemble_passes_the_choice_to_its_members(digits):
    router = EnsembleRouter(n_members=2, random_state=0, class_offset="always",
                            **{**SETTINGS, "max_epochs": 5}).fit(
        digits["X"], digits["y"], digits["A"], fees=digits["fees"], class_proba=digits["P"])
    assert all(m.offset_experts_.all() for m in router.members_)


def test_an_unknown_class_offset_is_refused(digits):
    with pytest.raises(ValueError, match="class_offset must be one of"):
        _fit(digits, class_offset="sometimes")


def test_auto_keeps_the_plain_network_for_an_expert_whose_reliability_follows_a_feature(digits):
    # Two simulated experts in the style of Mozannar & Sontag's: the first right 95% of the time
    # where one pixel is above its median and 20% elsewhere, whatever the class (the class route
    # carries nothing the features do not); the second their class-dependent expert 1. With 400
    # answers each, "auto" must keep the plain network for the first (one-standard-error rule:
    # Breiman et al., 1984) and take the offset for the second.
    rng = np.random.default_rng(3)
    X, y = digits["X"], digits["y"]
    bright = X[:, 5] > np.median(X[:, 5])
    p_right = np.column_stack([np.where(bright, 0.95, 0.2), np.where(y <= 3, 1.0, 0.1)])
    wrong = (y[:, None] + rng.integers(1, 10, size=p_right.shape)) % 10
    answers = np.where(rng.uniform(size=p_right.shape) < p_right, y[:, None], wrong)
    shown = np.full_like(answers, -1)
    for j in range(2):
        asked = rng.choice(len(y), 400, replace=False)
        shown[asked, j] = answers[asked, j]
    router = PluginRouter(random_state=0, **SETTINGS).fit(X, y, shown, fees=[0.05, 0.05], class_proba=digits["P"])
    assert router.offset_experts_.tolist() == [False, True]


def test_the_one_standard_error_rule_passes_a_null_difference_at_the_t_rate():
    # _clearly_lower says yes when mean(d) + SE < 0, d the paired loss differences. With no
    # true difference that is a one-sided t-test at one standard error: it passes with
    # probability P(T_{n-1} < -1) (scipy.stats.t as the reference; 0.159 for n = 400), and a
    # true difference of 3 standard errors passes with P(T_{n-1} < 2), most of the time.
    from scipy import stats

    from routeplan.plugin import _clearly_lower

    rng = np.random.default_rng(0)
    n, m = 400, 4000
    other = np.zeros((n, m))
    known = np.ones((n, m), dtype=bool)
    null = rng.standard_normal((n, m))
    rate = _clearly_lower(null, other, known).mean()
    expected = stats.t.cdf(-1.0, df=n - 1)
    assert abs(rate - expected) < 3 * np.sqrt(expected * (1 - expected) / m)
    shifted = null - 3.0 / np.sqrt(n)  # a true mean difference of 3 standard errors
    rate = _clearly_lower(shifted, other, known).mean()
    expected = stats.t.cdf(2.0, df=n - 1)
    assert abs(rate - expected) < 3 * np.sqrt(expected * (1 - expected) / m)
    known[:, :2] = False
    known[0, 1] = True  # fewer than two known rows: never clearly lower
    assert not _clearly_lower(null - 10.0, other, known)[:2].any()


def test_the_class_gate_tells_class_dependent_experts_from_constant_ones(digits):
    # Pearson's chi-square test of homogeneity (1900), through scipy.stats.chi2_contingency: an
    # expert right with the same probability in every class passes at about the test's level
    # (at most 5%, plus three binomial standard errors), while Mozannar & Sontag's experts
    # (always right on their classes, 1 time in 10 elsewhere) pass with 40 answers each.
    from routeplan._routerbase import _Part
    from routeplan.plugin import _class_heterogeneous

    n = N_TRAIN
    X, y, A = digits["X"], digits["y"], digits["A"]
    part = _Part(X, y, A, np.where(A >= 0, 1.0, 0.0), np.full((n, 1), np.nan))
    assert _class_heterogeneous(part, 10).all()

    rng = np.random.default_rng(3)
    m, per = 400, 60
    answers = np.full((n, m), -1)
    for j in range(m):
        asked = rng.choice(n, per, replace=False)
        right = rng.random(per) < 0.7
        answers[asked, j] = np.where(right, y[asked], (y[asked] + 1 + rng.integers(0, 9, per)) % 10)
    part = _Part(X, y, answers, np.where(answers >= 0, 1.0, 0.0), np.full((n, 1), np.nan))
    rate = _class_heterogeneous(part, 10).mean()
    assert rate <= 0.05 + 3 * np.sqrt(0.05 * 0.95 / m), rate
    everyone_right = np.where(answers >= 0, y[:, None], -1)
    part = _Part(X, y, everyone_right, np.where(answers >= 0, 1.0, 0.0), np.full((n, 1), np.nan))
    assert not _class_heterogeneous(part, 10).any()  # no wrong answer: no test, no offset
