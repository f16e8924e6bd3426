"""Tests of the averaged router (routeplan.ensemble.EnsembleRouter).

Data: scikit-learn's bundled digits with the simulated expert of Mozannar & Sontag (ICML
2020); the check against the exact Bayes-optimal cost is in test_learner.py, beside the
other routers'. References: the deep-ensemble average of predictive distributions
(Lakshminarayanan, Pritzel & Blundell, NeurIPS 2017), the plug-in deferral rule with 0/1
costs (Mozannar & Sontag, ICML 2020; Narasimhan et al., NeurIPS 2022), scikit-learn's
LogisticRegression.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from routeplan.learner import EnsembleRouter, PluginRouter, fit_candidates, router_from_arrays

FAST = {"max_epochs": 3, "hidden": (16,)}


@pytest.fixture(scope="module")
def small(digits_two_experts):
    """500 digits, the k=5 simulated expert and a half-missing copy of it (conftest)."""
    return digits_two_experts


@pytest.fixture(scope="module")
def fitted(small):
    X, y, A, fees = small
    return EnsembleRouter(n_members=3, random_state=4, **FAST).fit(X, y, A, fees=fees)


def test_averages_the_members_and_routes_by_the_plugin_rule(small, fitted):
    # Deep ensemble: the predictive distribution is the mean of the members' (Lakshminarayanan
    # et al., NeurIPS 2017, section 2.4). With 0/1 costs the plug-in rule's expected costs
    # are 1 - P(y = k | x) for class k and 1 - P(expert j right | x) + fee_j for expert j
    # (Mozannar & Sontag, ICML 2020, section 4; Narasimhan et al., NeurIPS 2022).
    X, _, _, fees = small
    P = np.mean([m.predict_proba(X) for m in fitted.members_], axis=0)
    q = np.mean([m.predict_expert_correct(X) for m in fitted.members_], axis=0)
    np.testing.assert_allclose(fitted.predict_proba(X), P, rtol=1e-12)
    np.testing.assert_allclose(fitted.predict_expert_correct(X), q, rtol=1e-12)
    expected = np.hstack([1.0 - P, 1.0 - q + fees])
    np.testing.assert_allclose(fitted.predict_costs(X), expected, atol=1e-12)
    np.testing.assert_array_equal(fitted.predict_route(X), expected.argmin(axis=1))
    # the members differ (own seeds), so the average is not any one of them
    assert not np.allclose(fitted.members_[0].predict_proba(X), fitted.members_[1].predict_proba(X))


def test_first_member_is_the_plugin_router_of_its_seed(small, fitted):
    # what fit_candidates relies on to reuse it as the "plugin" candidate
    X, y, A, fees = small
    first = fitted.members_[0]
    alone = PluginRouter(random_state=first.random_state, **FAST).fit(X, y, A, fees=fees)
    np.testing.assert_array_equal(alone.predict_costs(X), first.predict_costs(X))
    assert fitted.validation_cost_ == pytest.approx(
        np.mean([m.validation_cost_ for m in fitted.members_]))
    assert set(fitted.calibration_["classes"]) == {"ece_before", "ece_after"}


def test_one_member_is_the_plugin_router(small):
    # a degenerate average (definition): n_members=1 routes exactly as its one member
    X, y, A, fees = small
    one = EnsembleRouter(n_members=1, random_state=2, **FAST).fit(X, y, A, fees=fees)
    np.testing.assert_allclose(one.predict_costs(X), one.members_[0].predict_costs(X), rtol=1e-12)


@pytest.mark.parametrize("bad", [0, -1, 1.5, True])
def test_bad_member_count_is_refused(small, bad):
    X, y, A, fees = small
    with pytest.raises(ValueError, match="n_members"):
        EnsembleRouter(n_members=bad, **FAST).fit(X, y, A, fees=fees)


def test_damaged_description_is_refused(fitted):
    # a stored router whose description lists fewer members than n_members cannot be rebuilt
    arrays, meta = fitted.get_arrays()
    meta = json.loads(json.dumps(meta))
    meta["members"] = meta["members"][:2]
    with pytest.raises(ValueError, match="members"):
        router_from_arrays(arrays, meta)
    meta = json.loads(json.dumps(fitted.get_arrays()[1]))
    meta["members"][1]["router"] = "SurrogateRouter"
    with pytest.raises(ValueError, match="plug-in"):
        router_from_arrays(arrays, meta)


def test_fit_candidates_takes_the_plugin_from_the_ensemble(small):
    X, y, A, fees = small
    best, fitted, table = fit_candidates(X, y, A, fees=fees, random_state=0,
                                         names=("plugin-ensemble", "plugin", "softmax-mlp"),
                                         router_params=FAST)
    assert fitted["plugin"] is fitted["plugin-ensemble"].members_[0]
    assert list(fitted) == ["plugin-ensemble", "plugin", "softmax-mlp"]  # order of preference
    assert list(table["router"])[:3] == ["plugin-ensemble", "plugin", "softmax-mlp"]
    # the "significant" rule keeps the first unless another is clearly cheaper
    routers = table.loc[table["kind"] == "router"].set_index("router")
    assert best in routers.index
    if best != "plugin-ensemble":
        assert routers.loc[best, "system_cost"] < routers.loc["plugin-ensemble", "system_cost"]
    # two-stage mode takes both plug-in candidates by default, nothing else
    P = LogisticRegression(max_iter=300).fit(X, y).predict_proba(X)
    _, two, _ = fit_candidates(X, y, A, fees=fees, random_state=0, class_proba=P,
                               router_params=FAST)
    assert list(two) == ["plugin-ensemble", "plugin"]
    with pytest.raises(ValueError, match="two-stage"):
        fit_candidates(X, y, A, fees=fees, class_proba=P, names=("softmax-mlp",))


def test_significant_rule_keeps_the_first_unless_another_is_clearly_cheaper():
    # selection._choose: a candidate displaces the first only when the 95% normal interval of
    # the per-case paired difference lies below 0 (paired comparison, common practice)
    from routeplan.selection import _choose

    rng = np.random.default_rng(0)
    base = rng.uniform(0, 1, 400)
    slightly = base - 0.001 + rng.normal(0, 0.05, 400)  # cheaper on average, not clearly
    clearly = base - 0.05 + rng.normal(0, 0.05, 400)
    assert slightly.mean() < base.mean()
    assert _choose({"first": base, "other": slightly}, "significant", 1.96) == "first"
    assert _choose({"first": base, "other": slightly}, "min", 1.96) == "other"
    assert _choose({"first": base, "other": slightly, "third": clearly}, "significant", 1.96) == "third"
    with pytest.raises(ValueError, match="rule"):
        _choose({"first": base}, "best", 1.96)
