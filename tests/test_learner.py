"""Tests of the routers (routeplan.learner) and their calibration (routeplan.calibration).

Data: scikit-learn's bundled digits (with the simulated expert of Mozannar & Sontag, ICML
2020) and the project's synthetic scenario, whose exact Bayes-optimal cost is known
(routeplan.simulate). References: scikit-learn's estimator contract, scikit-learn's
LogisticRegression, torch's LBFGS, statsmodels' DescrStatsW, and published definitions.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
import torch
from sklearn.base import clone
from sklearn.datasets import load_digits
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split
from statsmodels.stats.weightstats import DescrStatsW

from routeplan import calibration as cal
from routeplan import costs, simulate
from routeplan.learner import (
    EnsembleRouter,
    PluginRouter,
    SurrogateRouter,
    fit_candidates,
    router_from_arrays,
    select_router,
)

FAST = {"max_epochs": 3, "hidden": (16,)}
ROUTERS = [
    ("plugin", PluginRouter),
    ("softmax", lambda **kw: SurrogateRouter(loss="softmax", **kw)),
    ("ova", lambda **kw: SurrogateRouter(loss="ova", **kw)),
    ("asymmetric", lambda **kw: SurrogateRouter(loss="asymmetric", **kw)),
    ("ensemble", lambda **kw: EnsembleRouter(n_members=2, **kw)),
]


@pytest.fixture(scope="module")
def small(digits_two_experts):
    """500 digits, the k=5 simulated expert and a half-missing copy of it (conftest)."""
    return digits_two_experts


# --- scikit-learn estimator contract: developer guide, "Rolling your own estimator", and
# --- sklearn.utils.estimator_checks (check_no_attributes_set_in_init,
# --- check_dont_overwrite_parameters)


@pytest.mark.parametrize("name,make", ROUTERS)
def test_estimator_contract(name, make, small):
    X, y, A, fees = small
    router = make(random_state=0, **FAST)
    params = router.get_params()
    # __init__ only stores its arguments; nothing fitted yet
    assert not [k for k in vars(router) if k.endswith("_")]
    with pytest.raises(NotFittedError):  # check_is_fitted before fit
        router.predict_costs(X)
    twin = clone(router)
    assert twin is not router and twin.get_params() == params
    assert router.set_params(**params).get_params() == params
    assert router.fit(X, y, A, fees=fees) is router  # fit returns self
    # fit adds only attributes ending in "_" and leaves the parameters alone
    added = set(vars(router)) - set(params)
    assert added and all(k.endswith("_") for k in added)
    assert router.get_params() == params
    n = len(y)
    assert router.predict_costs(X).shape == (n, 12)
    assert router.predict_route(X).shape == (n,)
    assert np.allclose(router.predict_proba(X).sum(axis=1), 1.0)
    q = router.predict_expert_correct(X)
    assert q.shape == (n, 2) and np.all((q >= 0) & (q <= 1))


@pytest.mark.parametrize("name,make", ROUTERS)
def test_arrays_round_trip(name, make, small):
    # storage as plain arrays + JSON, no pickle (project design): identical predictions
    X, y, A, fees = small
    router = make(random_state=1, **FAST).fit(X, y, A, fees=fees)
    arrays, meta = router.get_arrays()
    assert all(isinstance(v, np.ndarray) and v.dtype != object for v in arrays.values())
    meta = json.loads(json.dumps(meta))  # JSON-able
    again = router_from_arrays({k: v.copy() for k, v in arrays.items()}, meta)
    assert type(again) is type(router)
    np.testing.assert_array_equal(again.predict_costs(X), router.predict_costs(X))
    np.testing.assert_array_equal(again.predict_route(X), router.predict_route(X))
    assert type(router).from_arrays(arrays, meta).get_params() == again.get_params()


def test_same_seed_same_predictions(small):
    # reproducibility from random_state (common practice)
    X, y, A, fees = small
    a = PluginRouter(random_state=7, **FAST).fit(X, y, A, fees=fees).predict_costs(X)
    b = PluginRouter(random_state=7, **FAST).fit(X, y, A, fees=fees).predict_costs(X)
    c = PluginRouter(random_state=8, **FAST).fit(X, y, A, fees=fees).predict_costs(X)
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, c)
    s1 = SurrogateRouter(random_state=7, **FAST).fit(X, y, A, fees=fees).predict_route(X)
    s2 = SurrogateRouter(random_state=7, **FAST).fit(X, y, A, fees=fees).predict_route(X)
    np.testing.assert_array_equal(s1, s2)


def test_fit_restores_torch_threads(small):
    # fit sets torch's thread count inside fit only (project design)
    X, y, A, fees = small
    before = torch.get_num_threads()
    PluginRouter(random_state=0, **FAST).fit(X, y, A, fees=fees)
    assert torch.get_num_threads() == before


def test_scoring_in_parallel_chunks_matches_one_chunk_at_a_time(small, monkeypatch):
    # chunks scored side by side by two threads (routeplan._routerbase._by_chunks) give the
    # same numbers as scoring each chunk alone, and torch's thread count is restored (common
    # practice: a parallel map must not change results; float32 rounding bounds the tolerance)
    from routeplan import _routerbase
    from routeplan._nets import _CHUNK

    monkeypatch.setattr(_routerbase, "_SCORE_WORKERS", 2)  # threads even on a one-core machine
    X, y, A, fees = small
    router = EnsembleRouter(n_members=2, random_state=0, **FAST).fit(X, y, A, fees=fees)
    big = np.resize(X, (2 * _CHUNK + 17, X.shape[1]))
    before = torch.get_num_threads()
    whole = router.predict_costs(big)
    assert torch.get_num_threads() == before
    alone = np.vstack([router.predict_costs(big[s:s + _CHUNK]) for s in range(0, len(big), _CHUNK)])
    np.testing.assert_allclose(whole, alone, rtol=1e-6, atol=1e-7)
    np.testing.assert_array_equal(router.predict_route(big), whole.argmin(axis=1))


@pytest.mark.parametrize("answers", ["full", "half_missing"])
def test_side_by_side_fit_matches_one_network_after_the_other(small, monkeypatch, answers):
    # the plug-in's classifier and correctness model train in two threads
    # (PluginRouter._fit_both); each draws its weights before and shuffles with its own
    # generator, so the fit equals the one-after-the-other fit bit for bit (common practice:
    # parallel training must not change a seeded result), and torch's threads are restored
    from routeplan import plugin

    X, y, A, fees = small
    if answers == "half_missing":
        A = np.where(np.random.default_rng(1).random(A.shape) < 0.5, -1, A)
    kw = {"random_state": 3, "max_epochs": 4, "hidden": (16,), "patience": 2}
    before = torch.get_num_threads()
    monkeypatch.setattr(plugin, "_FIT_WORKERS", 2)
    together = PluginRouter(verbose=True, **kw).fit(X, y, A, fees=fees)  # one shared progress
    assert torch.get_num_threads() == before
    monkeypatch.setattr(plugin, "_FIT_WORKERS", 1)
    apart = PluginRouter(**kw).fit(X, y, A, fees=fees)
    a, b = together.get_arrays()[0], apart.get_arrays()[0]
    assert a.keys() == b.keys()
    for key in a:
        np.testing.assert_array_equal(a[key], b[key], err_msg=key)
    assert together.history_ == apart.history_
    np.testing.assert_array_equal(together.predict_costs(X), apart.predict_costs(X))


@pytest.mark.parametrize("failing,other", [("classifier", "correctness"),
                                            ("correctness", "classifier")])
def test_side_by_side_fit_stops_the_other_network_when_one_fails(small, monkeypatch, failing,
                                                                 other):
    # if one network's training fails, fit raises and the other network stops after the
    # epoch it is in, instead of training on to max_epochs (common practice: a failed
    # command must not keep working in the background)
    from routeplan import plugin
    from routeplan._routerbase import _BaseRouter

    def broken(self, *args, **kwargs):
        raise RuntimeError(f"{failing} failed")

    monkeypatch.setattr(plugin, "_FIT_WORKERS", 2)
    if failing == "classifier":
        monkeypatch.setattr(PluginRouter, "_train_classifier", broken)
    else:
        monkeypatch.setattr(_BaseRouter, "_fit_correctness", broken)
    X, y, A, fees = small
    router = PluginRouter(random_state=0, max_epochs=500, patience=10**6, hidden=(16,))
    with pytest.raises(RuntimeError, match=f"{failing} failed"):
        router.fit(X, y, A, fees=fees)
    assert 1 <= len(router.history_[other]) <= 3


def test_ctrl_c_while_waiting_for_the_correctness_fit_stops_it(small, monkeypatch):
    # Ctrl-C (SIGINT) while fit waits for the other network: the interrupt reaches the
    # caller and the correctness network stops after its epoch instead of running to
    # max_epochs (common practice: an interrupted command stops its work)
    import os
    import signal
    import threading

    from routeplan import plugin

    monkeypatch.setattr(plugin, "_FIT_WORKERS", 2)
    monkeypatch.setattr(PluginRouter, "_train_classifier", lambda self, *a, **k: None)
    # Python's own Ctrl-C handler, whatever the suite inherited: a shell starts background
    # jobs with SIGINT ignored, and Python then installs no handler (Python docs, signal module)
    previous = signal.signal(signal.SIGINT, signal.default_int_handler)
    X, y, A, fees = small
    router = PluginRouter(random_state=0, max_epochs=20_000, patience=10**9, hidden=(16,))
    timer = threading.Timer(1.0, os.kill, (os.getpid(), signal.SIGINT))
    timer.start()
    try:
        with pytest.raises(KeyboardInterrupt):
            router.fit(X, y, A, fees=fees)
    finally:
        timer.cancel()
        signal.signal(signal.SIGINT, previous)
    assert 1 <= len(router.history_["correctness"]) < 20_000


def test_side_by_side_fit_warns_from_the_callers_thread(small, monkeypatch):
    # the data warnings come from the fit, not from the worker thread, so that filters by
    # module keep working (Python's warnings module attributes a warning to a frame)
    from routeplan import plugin

    monkeypatch.setattr(plugin, "_FIT_WORKERS", 2)
    X, y, A, fees = small
    A = A.copy()
    A[:, 0] = -1  # expert 0 never answered
    with pytest.warns(UserWarning, match="no known answer in the training split") as caught:
        PluginRouter(random_state=0, **FAST).fit(X, y, A, fees=fees)
    assert all("concurrent" not in w.filename for w in caught)


def test_plugin_stopped_on_cost_scores_epochs_by_the_routed_cost(small):
    # early_stopping="cost": the classifier's epoch is chosen by the validation cost of the
    # routing, which needs the fitted correctness model (project design); the score per
    # epoch is (cost, log-loss), and the cost is a mean of costs in [0, 1 + max fee]
    X, y, A, fees = small
    router = PluginRouter(early_stopping="cost", random_state=0, **FAST).fit(X, y, A, fees=fees)
    primary = np.array([h[0] for h in router.history_["classifier"]])
    tie = np.array([h[1] for h in router.history_["classifier"]])
    assert np.all((primary >= 0) & (primary <= 1 + max(fees)))
    assert np.all(tie > 0)  # a log-loss, not the 0.0 of the "loss" mode
    loss_mode = PluginRouter(random_state=0, **FAST).fit(X, y, A, fees=fees)
    assert all(h[1] == 0.0 for h in loss_mode.history_["classifier"])


def test_overlapping_scorers_restore_torch_threads():
    # torch's thread count is process-wide: overlapping one-thread blocks (two scorers at once)
    # must restore it when the last one leaves, whatever order they leave in (common practice)
    from routeplan._routerbase import _one_torch_thread

    before = torch.get_num_threads()
    first, second = _one_torch_thread(), _one_torch_thread()
    first.__enter__()
    second.__enter__()
    assert torch.get_num_threads() == 1
    first.__exit__(None, None, None)
    assert torch.get_num_threads() == 1
    second.__exit__(None, None, None)
    assert torch.get_num_threads() == before


@pytest.mark.parametrize("make", [PluginRouter, lambda **kw: EnsembleRouter(n_members=2, **kw)])
def test_two_stage_keeps_imported_model(small, make):
    # two-stage mode (Mao, Mohri & Zhong, NeurIPS 2023): the imported classifier is kept;
    # temperature scaling never changes the arg-max class (Guo et al., ICML 2017), nor does
    # averaging temperature-scaled copies of one distribution (the averaged router)
    X, y, A, fees = small
    lr = LogisticRegression(max_iter=500).fit(X[:300], y[:300])
    P = lr.predict_proba(X)
    router = make(random_state=0, **FAST).fit(X, y, A, fees=fees, class_proba=P)
    assert router.two_stage_
    assert all(m.classifier_net_ is None for m in getattr(router, "members_", [router]))
    np.testing.assert_array_equal(router.predict_proba(X, class_proba=P).argmax(1),
                                  lr.predict(X))
    with pytest.raises(ValueError, match="two-stage"):
        router.predict_costs(X)
    arrays, meta = router.get_arrays()
    again = router_from_arrays(arrays, json.loads(json.dumps(meta)))
    np.testing.assert_array_equal(again.predict_costs(X, class_proba=P),
                                  router.predict_costs(X, class_proba=P))


def test_doubly_robust_reduces_to_observed_costs(small):
    # doubly robust costs m + (1[known] / p)(c - m) (Dudik, Langford & Li, ICML 2011) equal
    # the realised costs when every answer is known with probability 1: same fit as "impute"
    X, y, A, fees = small
    full = A[:, [0, 0]]
    kw = dict(random_state=0, **FAST)
    a = SurrogateRouter(missing="impute", **kw).fit(X, y, full, fees=fees)
    b = SurrogateRouter(missing="doubly_robust", **kw).fit(X, y, full, fees=fees,
                                                           sample_weight=np.ones(full.shape))
    np.testing.assert_array_equal(a.predict_route(X), b.predict_route(X))


def test_extreme_inputs_give_finite_costs_without_warnings(small):
    # numerical safety (common practice): huge but finite features must not overflow into
    # inf - inf = NaN or raise numpy's overflow warnings
    X, y, A, fees = small
    huge = np.vstack([X[:3] * 1e30, np.full((2, X.shape[1]), 3e38, np.float32)])
    for _, make in ROUTERS:
        router = make(random_state=0, **FAST).fit(X, y, A, fees=fees)
        with warnings.catch_warnings():
            warnings.simplefilter("error", RuntimeWarning)
            ec = router.predict_costs(huge)
            routes = router.predict_route(huge)
        assert np.isfinite(ec).all() and routes.min() >= 0 and routes.max() < 12


def test_softmax_deferral_offsets_never_raise_validation_cost(small):
    # the post-hoc offsets are a grid search that includes 0 (no change), so the routed
    # validation cost with them is at most the cost of plain argmax g (definition)
    X, y, A, fees = small
    A = A[:, [0, 0]]  # all answers known: no imputation, same validation costs both ways
    Xf, yf, Af = X[:400], y[:400], A[:400]
    val = np.arange(400, 500)
    kw = dict(random_state=0, **FAST)
    on = SurrogateRouter(**kw).fit(Xf, yf, Af, fees=fees, X_val=X[val], y_val=y[val],
                                   answers_val=A[val])
    off = SurrogateRouter(calibrate=False, **kw).fit(Xf, yf, Af, fees=fees, X_val=X[val],
                                                     y_val=y[val], answers_val=A[val])
    np.testing.assert_array_equal(off.option_platt_[1:, 1], 0.0)
    np.testing.assert_array_equal(on.scorer_net_[0].weight.detach().numpy(),
                                  off.scorer_net_[0].weight.detach().numpy())
    assert on.validation_cost_ <= off.validation_cost_ + 1e-12


def test_bad_input_is_refused(small):
    X, y, A, fees = small
    with pytest.raises(ValueError, match="fees"):
        PluginRouter(**FAST).fit(X, y, A, fees=[0.1])
    with pytest.raises(ValueError, match="answers"):
        PluginRouter(**FAST).fit(X, y, A[:10], fees=fees)
    with pytest.raises(ValueError, match="head"):
        PluginRouter(head="tree").fit(X, y, A, fees=fees)
    with pytest.raises(ValueError, match="doubly_robust"):
        SurrogateRouter(loss="ova", missing="doubly_robust").fit(X, y, A, fees=fees)


# --- calibration


def test_ece_definition():
    # Guo, Pleiss, Sun & Weinberger (ICML 2017), eq. 3: sum_b |B_b|/n |acc - conf|.
    P = np.tile([0.8, 0.2], (10, 1))
    y_calibrated = np.array([0] * 8 + [1] * 2)  # accuracy 0.8 at confidence 0.8
    assert cal.expected_calibration_error(P, y_calibrated) == pytest.approx(0.0)
    assert cal.expected_calibration_error(P, np.ones(10, int)) == pytest.approx(0.8)
    # two bins: conf 0.9 with acc 0.6 (5 cases), conf 0.6 with acc 0.6 (5 cases):
    # 0.5 * |0.6 - 0.9| + 0.5 * 0 = 0.15
    P2 = np.array([[0.9, 0.1]] * 5 + [[0.6, 0.4]] * 5)
    y2 = np.array([0, 0, 1, 0, 1] + [0, 0, 0, 1, 1])
    assert cal.expected_calibration_error(P2, y2) == pytest.approx(0.15)


@pytest.fixture(scope="module")
def digits_scores():
    """Held-out logistic-regression scores on scikit-learn's digits."""
    X, y = load_digits(return_X_y=True)
    Xa, Xb, ya, yb = train_test_split(X / 16, y, test_size=0.5, random_state=0, stratify=y)
    lr = LogisticRegression(C=100.0, max_iter=2000).fit(Xa, ya)
    return lr.decision_function(Xb), yb


def test_temperature_matches_torch_lbfgs(digits_scores):
    # temperature scaling (Guo et al., 2017) = one-parameter NLL minimisation; reference: torch
    Z, y = digits_scores
    T = cal.fit_temperature(Z, y)
    log_t = torch.zeros(1, dtype=torch.float64, requires_grad=True)
    opt = torch.optim.LBFGS([log_t], lr=0.5, max_iter=200, tolerance_grad=1e-12,
                            tolerance_change=1e-14, line_search_fn="strong_wolfe")
    Zt, yt = torch.tensor(Z), torch.tensor(y)

    def closure():
        opt.zero_grad()
        loss = torch.nn.functional.cross_entropy(Zt / log_t.exp(), yt)
        loss.backward()
        return loss

    opt.step(closure)
    assert T == pytest.approx(float(log_t.detach().exp()), rel=2e-3)
    # the fitted temperature lowers the held-out ECE of these over-confident scores
    before = cal.expected_calibration_error(cal.apply_temperature(Z, 1.0), y)
    after = cal.expected_calibration_error(cal.apply_temperature(Z, T), y)
    assert after < before


def test_platt_matches_sklearn_logistic_regression(digits_scores):
    # Platt scaling (Platt, 1999) is a 1-d logistic regression on the score; reference: sklearn
    Z, y = digits_scores
    z = Z[:, 3] - np.delete(Z, 3, axis=1).max(axis=1)
    t = (y == 3).astype(float)
    a, b = cal.fit_platt(z, t)
    ref = LogisticRegression(C=np.inf, tol=1e-10, max_iter=10_000).fit(z[:, None], t)
    assert a == pytest.approx(ref.coef_[0, 0], rel=1e-3)
    assert b == pytest.approx(ref.intercept_[0], rel=1e-3, abs=1e-3)
    w = np.where(t == 1, 3.0, 1.0)  # weighted fit = sklearn's sample_weight
    a_w, b_w = cal.fit_platt(z, t, w)
    ref_w = LogisticRegression(C=np.inf, tol=1e-10, max_iter=10_000).fit(
        z[:, None], t, sample_weight=w)
    assert a_w == pytest.approx(ref_w.coef_[0, 0], rel=1e-3)
    assert b_w == pytest.approx(ref_w.intercept_[0], rel=1e-3, abs=1e-3)


def test_linear_plugin_is_sklearn_logistic_regression(small):
    # A linear classifier under cross-entropy is multinomial logistic regression, and each
    # linear correctness output a binary one; fitted to convergence they must reach
    # scikit-learn's LogisticRegression (lbfgs) optimum. Reference: scikit-learn, whose
    # objective is C * sum of losses + ||W||^2 / 2 (intercept not penalised), so our mean
    # loss + weight_decay / 2 * ||W||^2 is C = 1 / (n * weight_decay), with n the number of
    # (case, expert) answers for the correctness outputs, which share one mean. Digits has
    # near-constant pixels (standardised to large values), so the optimum is flat in some
    # directions: the objective values must agree closely, the probabilities loosely.
    X, y, A, fees = small
    n_tr, wd = 400, 1e-2
    router = PluginRouter(head="linear", weight_decay=wd, calibrate=False, random_state=0).fit(
        X[:n_tr], y[:n_tr], A[:n_tr], fees=fees, X_val=X[n_tr:], y_val=y[n_tr:],
        answers_val=A[n_tr:])
    assert len(router.history_["classifier"]) == 1  # no epochs: one converged fit
    Xs = ((X - router.x_mean_) / router.x_scale_).astype(np.float64)
    Xt, yt = Xs[:n_tr], y[:n_tr]

    def penalised(W, b, X_, t, n):  # sum of log-losses / n + wd / 2 * ||W||^2
        S = X_ @ W.T + b
        if W.shape[0] == 1:  # binary
            s = S[:, 0]
            loss = (t * np.logaddexp(0, -s) + (1 - t) * np.logaddexp(0, s)).sum()
        else:
            loss = -(S[np.arange(len(t)), t] - np.logaddexp.reduce(S, axis=1)).sum()
        return loss / n + wd / 2 * (W ** 2).sum()

    ref = LogisticRegression(C=1 / (n_tr * wd), tol=1e-10, max_iter=10_000).fit(Xt, yt)
    net = router.classifier_net_[0]
    ours = penalised(net.weight.detach().double().numpy(), net.bias.detach().double().numpy(),
                     Xt, yt, n_tr)
    assert ours <= penalised(ref.coef_, ref.intercept_, Xt, yt, n_tr) * (1 + 1e-6)
    np.testing.assert_allclose(router.predict_proba(X), ref.predict_proba(Xs), atol=2e-3)
    n_answers = int((A[:n_tr] >= 0).sum())
    q = router.predict_expert_correct(X)
    corr = router.correctness_net_[0]
    for j in range(A.shape[1]):
        k = A[:n_tr, j] >= 0
        right = (A[:n_tr, j][k] == yt[k]).astype(np.float64)
        ref_j = LogisticRegression(C=1 / (n_answers * wd), tol=1e-10, max_iter=10_000).fit(
            Xt[k], right)
        ours_j = penalised(corr.weight.detach().double().numpy()[j:j + 1],
                           corr.bias.detach().double().numpy()[j:j + 1], Xt[k], right, n_answers)
        assert ours_j <= penalised(ref_j.coef_, ref_j.intercept_, Xt[k], right,
                                   n_answers) * (1 + 1e-6)
        np.testing.assert_allclose(q[:, j], ref_j.predict_proba(Xs)[:, 1], atol=5e-3)


def test_calibration_prior_reaches_the_expert_maps(small):
    # The router's calibration_prior is the prior_strength of its Platt maps (Platt, 1999; the
    # prior itself is checked against statsmodels below): with prior 0 the map is fitted freely
    # and moves off the identity here, with a huge prior it stays at (1, 0); negative is refused.
    X, y, A, fees = small
    plain = PluginRouter(calibration_prior=0.0, random_state=0, **FAST).fit(X, y, A, fees=fees)
    held = PluginRouter(calibration_prior=1e9, random_state=0, **FAST).fit(X, y, A, fees=fees)
    rep = plain.calibration_["experts"][0]
    assert rep["platt_a"] != pytest.approx(1.0, abs=1e-3)
    np.testing.assert_allclose(held.expert_platt_, np.tile([1.0, 0.0], (2, 1)), atol=1e-4)
    with pytest.raises(ValueError, match="calibration_prior"):
        PluginRouter(calibration_prior=-1.0, **FAST).fit(X, y, A, fees=fees)


def test_platt_prior_is_statsmodels_ridge_glm_around_the_identity():
    # MAP Platt scaling under a Gaussian prior centred on (a, b) = (1, 0) is a ridge-penalised
    # logistic GLM with the score as offset; reference: statsmodels GLM.fit_regularized with
    # L1_wt=0 (objective -loglike/n + alpha/2 |params|^2, so alpha = prior / n)
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(0)
    z = 2.0 * rng.normal(size=60)
    t = (rng.uniform(size=60) < 1.0 / (1.0 + np.exp(-(1.8 * z + 0.5)))).astype(float)
    for prior in (5.0, 30.0):
        a, b = cal.fit_platt(z, t, prior_strength=prior)
        ref = sm.GLM(t, np.column_stack([z, np.ones_like(z)]), family=sm.families.Binomial(),
                     offset=z).fit_regularized(alpha=prior / z.size, L1_wt=0.0)
        assert a == pytest.approx(1.0 + ref.params[0], abs=1e-4)
        assert b == pytest.approx(ref.params[1], abs=1e-4)
    a0, _ = cal.fit_platt(z, t)
    assert abs(cal.fit_platt(z, t, prior_strength=30.0)[0] - 1.0) < abs(a0 - 1.0)
    # an overwhelming prior keeps a stack at "the first column alone"
    coef = cal.fit_stack(np.column_stack([z, rng.normal(size=60)]), t, prior_strength=1e7)
    np.testing.assert_allclose(coef, [1.0, 0.0, 0.0], atol=1e-3)
    with pytest.raises(ValueError, match="prior_strength"):
        cal.fit_platt(z, t, prior_strength=-1.0)


# --- selection


def test_select_router_table_and_intervals(small):
    X, y, A, fees = small
    fitted = {"plugin": PluginRouter(random_state=0, **FAST).fit(X[:350], y[:350], A[:350],
                                                                  fees=fees),
              "softmax-mlp": SurrogateRouter(random_state=0, **FAST).fit(X[:350], y[:350],
                                                                          A[:350], fees=fees)}
    res = select_router(fitted, X[350:], y[350:], A[350:], expert_names=["ann", "bob"],
                        rule="min")
    t = res.table
    for col in ("router", "system_cost", "ci_low", "ci_high", "accuracy", "coverage",
                "share_ann", "share_bob"):
        assert col in t.columns
    routers = t.loc[t["kind"] == "router"].sort_values("system_cost")
    assert res.best_name == routers["router"].iloc[0]
    assert list(t["router"])[2:] == ["model alone (plugin)", "ann alone", "bob alone"]
    np.testing.assert_allclose(t["coverage"] + t["share_ann"] + t["share_bob"], 1.0)
    # bob's answers are half unknown: the table says so, and the notes name the imputation
    assert t.loc[t["router"] == "bob alone", "imputed_share"].iloc[0] > 0.3
    assert any("unknown" in note for note in res.notes)
    # "ann alone" uses only known answers: its interval is the normal interval of the mean
    # of the realised costs; reference: statsmodels DescrStatsW.zconfint_mean
    c = costs.cost_vectors(y[350:], A[350:], cost_matrix=costs.error_cost_matrix(10), fees=fees)
    low, high = DescrStatsW(c[:, 10]).zconfint_mean(alpha=0.05)
    row = t.loc[t["router"] == "ann alone"].iloc[0]
    assert row["system_cost"] == pytest.approx(c[:, 10].mean())
    assert (row["ci_low"], row["ci_high"]) == pytest.approx((low, high), rel=1e-6)


# --- end-to-end quality


def _expected_digits_cost(routes, y, k):
    """Expected cost per the Mozannar & Sontag expert: right on y < k, else right 1 in 10."""
    expert = np.where(y < k, 0.0, 0.9)
    return np.where(routes < 10, routes != y, expert)


@pytest.mark.slow
@pytest.mark.parametrize("k", [2, 5, 8])
def test_digits_system_beats_model_and_expert(k):
    # Mozannar & Sontag (ICML 2020, section 7) expert protocol on scikit-learn's digits; the
    # expert's random answers are averaged out by taking its expected cost on the held-out
    # split. With k = 2 the expert is right only on 20% of cases, mostly easy ones the
    # model already gets right, so the best possible gain is under one case in 500: there
    # we check "not worse"; for k = 5 and 8 strictly better.
    d = simulate.digits_scenario(k, random_state=0)
    tr, te = train_test_split(np.arange(len(d.y)), test_size=0.3, random_state=0,
                              stratify=d.y)
    best, fitted, table = fit_candidates(d.X[tr], d.y[tr], d.answers[tr], fees=np.zeros(1),
                                         random_state=0,
                                         names=("plugin-ensemble", "plugin", "asym-mlp"))
    system = _expected_digits_cost(fitted[best].predict_route(d.X[te]), d.y[te], k).mean()
    model = float((fitted["plugin"].predict_proba(d.X[te]).argmax(1) != d.y[te]).mean())
    expert = _expected_digits_cost(np.full(len(te), 10), d.y[te], k).mean()
    assert system < expert
    if k == 2:
        assert system <= model
    else:
        assert system < model


def _exact_cost(scenario, idx, routes):
    """Exact expected cost of routes on cases idx (the scenario's P(y|x), P(right|x))."""
    ec = costs.expected_cost_vectors(scenario.proba[idx], scenario.correct_proba[idx],
                                     cost_matrix=costs.error_cost_matrix(scenario.n_classes),
                                     fees=scenario.fees)
    return ec[np.arange(len(idx)), routes].mean(), ec.min(axis=1).mean(), ec


@pytest.mark.slow
def test_synthetic_all_answers_near_bayes():
    # Bayes-optimal cost of the deferral problem (Mozannar & Sontag, 2020; Verma et al.,
    # AISTATS 2023), exact here (routeplan.simulate). The bound 0.0125 is a regression bound
    # from our own runs, not an outside figure: it sits above what we measured with router
    # seeds 0 and 1 (plug-in 0.0102 and 0.0111; the asymmetric surrogate, 0.0124 and 0.0127,
    # is measured in benchmarks/bench_learner.py). The goal of 0.01 is a benchmark
    # (benchmarks/bench_learner.py [3], benchmarks/probe_ensemble.py); a single plug-in
    # router reaches it only about half the time with 20,000 cases (sharp region boundaries).
    sc = simulate.make_scenario(30_000, random_state=0)
    tr, te = np.arange(20_000), np.arange(20_000, 30_000)
    router = PluginRouter(random_state=0).fit(sc.X[tr], sc.y[tr], sc.answers(1)[tr],
                                              fees=sc.fees)
    assert router.hidden_ == (64, 64, 64)  # the default for 16,000 training cases
    cost, bayes, _ = _exact_cost(sc, te, router.predict_route(sc.X[te]))
    assert cost - bayes < 0.0125


@pytest.mark.slow
def test_synthetic_all_answers_averaged_router_within_goal():
    # As above, for the average of three plug-in routers (routeplan.ensemble; the goal in the
    # README's "Measured figures" is 0.01 with 20,000 training cases). Measured (benchmarks/probe_ensemble.py,
    # router seeds 0-5, 12-03): +0.0099, +0.0085, +0.0087, +0.0090, +0.0087, +0.0094, each below
    # its best member. This is a regression check from our own runs, on the seed we chose for
    # it: seed 1, because seed 0 sits too close to 0.01 for a bound. The goal across seeds is
    # measured by the probe, not here.
    sc = simulate.make_scenario(30_000, random_state=0)
    tr, te = np.arange(20_000), np.arange(20_000, 30_000)
    router = EnsembleRouter(random_state=1).fit(sc.X[tr], sc.y[tr], sc.answers(1)[tr],
                                                fees=sc.fees)
    cost, bayes, _ = _exact_cost(sc, te, router.predict_route(sc.X[te]))
    members = [_exact_cost(sc, te, m.predict_route(sc.X[te]))[0] for m in router.members_]
    assert cost - bayes < 0.01
    assert cost < min(members)


@pytest.mark.slow
def test_synthetic_few_random_answers_beat_model_and_experts():
    # A few hundred (case, expert) answers drawn uniformly at random: the selected system
    # must still beat the classifier alone and the best single expert (exact costs from the
    # scenario's known probabilities). That a deferral system should beat both of its parts
    # is the yardstick of Mozannar & Sontag (ICML 2020, section 7); the few-answers setting
    # and this scenario are ours.
    sc = simulate.make_scenario(8_000, random_state=1)
    tr, te = np.arange(5_000), np.arange(5_000, 8_000)
    A = sc.answers(2)[tr]
    rng = np.random.default_rng(3)
    asked = rng.random(A.shape) < 300 / A.size
    A = np.where(asked, A, -1)
    best, fitted, _ = fit_candidates(sc.X[tr], sc.y[tr], A, fees=sc.fees, random_state=0)
    cost, _, ec = _exact_cost(sc, te, fitted[best].predict_route(sc.X[te]))
    model_routes = fitted["plugin"].predict_proba(sc.X[te]).argmax(1)
    model = ec[np.arange(len(te)), model_routes].mean()
    best_expert = ec[:, sc.n_classes:].mean(axis=0).min()
    assert 200 < asked.sum() < 400
    assert cost < model and cost < best_expert


def test_temperature_refuses_non_finite_scores(digits_scores):
    # common practice: a NaN or +inf score (a diverged network) has no temperature; -inf
    # beside a finite score is the log of a zero probability and weighs nothing
    Z, y = digits_scores
    for bad in (np.nan, np.inf):
        Zb = Z.copy()
        Zb[3, 1] = bad
        with pytest.raises(ValueError, match="finite"):
            cal.fit_temperature(Zb, y)
    Zb = Z.copy()
    Zb[3, :] = -np.inf
    with pytest.raises(ValueError, match="finite"):
        cal.fit_temperature(Zb, y)
    wrong = (np.arange(y.size), (y + 1) % Z.shape[1])
    Zm, Zi = Z.copy(), Z.copy()
    Zm[wrong], Zi[wrong] = -1e30, -np.inf
    assert cal.fit_temperature(Zi, y) == pytest.approx(cal.fit_temperature(Zm, y), rel=1e-9)


def test_train_loop_never_keeps_a_diverged_epoch():
    # an epoch with a non-finite validation score is never "best" (common practice of early
    # stopping: keep the best finite epoch); the kept weights are those of epoch 2
    from routeplan._nets import _LoopSettings, _make_net, _train_loop

    torch.manual_seed(0)
    net = _make_net(3, 2, "mlp", (4,))
    X = torch.randn(64, 3)
    t = torch.randint(0, 2, (64,))
    # (inf, 0) would beat the starting (inf, inf) and (1, nan) would beat (2, 0) in a plain
    # tuple comparison: both must be refused as not finite
    scores = iter([(float("inf"), 0.0), (2.0, 0.0), (1.0, float("nan")), (float("nan"), 0.0)])
    snapshots = []

    def val_score(m):
        snapshots.append({k: v.clone() for k, v in m.state_dict().items()})
        return next(scores)

    settings = _LoopSettings(4, 16, 1e-2, 0.0, 10, False, None)
    history = _train_loop(net, lambda m, xb, tb: torch.nn.functional.cross_entropy(m(xb), tb),
                          (X, t), val_score, settings, torch.Generator().manual_seed(0), "test")
    assert len(history) == 4
    for k, v in net.state_dict().items():
        assert torch.equal(v, snapshots[1][k])
        assert not torch.equal(v, snapshots[3][k])


@pytest.mark.parametrize("loss", ["softmax", "ova", "asymmetric"])
def test_joint_fit_that_diverges_says_so(loss):
    # as below, for the joint surrogate routers (common practice: fail clearly, never keep NaN)
    sc = simulate.make_scenario(600, random_state=0)
    with pytest.raises(FloatingPointError, match="diverged"):
        SurrogateRouter(loss=loss, learning_rate=1e37, max_epochs=3, random_state=0).fit(
            sc.X, sc.y, sc.answers(0), fees=sc.fees)


def test_fit_candidates_leaves_out_a_diverged_candidate(monkeypatch):
    # one unstable candidate does not sink the others; it is named in a note (common practice)
    from routeplan import selection
    from routeplan.learner import CANDIDATES

    monkeypatch.setitem(CANDIDATES, "unstable", (PluginRouter, {"head": "mlp", "learning_rate": 1e37}))
    sc = simulate.make_scenario(800, random_state=1)
    best, fitted, table = selection.fit_candidates(
        sc.X, sc.y, sc.answers(1), fees=sc.fees, names=("plugin", "unstable"),
        router_params={"max_epochs": 3}, random_state=0)
    assert best == "plugin" and list(fitted) == ["plugin"]
    assert any("unstable" in note and "diverged" in note for note in table.attrs["notes"])
    with pytest.raises(FloatingPointError, match="every candidate"):
        selection.fit_candidates(sc.X, sc.y, sc.answers(1), fees=sc.fees, names=("unstable",),
                                 router_params={"max_epochs": 3}, random_state=0)


def test_fit_that_diverges_says_so():
    # a learning rate far too large drives float32 weights to overflow (common practice:
    # Adam's step is about lr per weight); fit must fail clearly, not route on NaN
    sc = simulate.make_scenario(600, random_state=0)
    with pytest.raises(FloatingPointError, match="diverged"):
        PluginRouter(learning_rate=1e37, max_epochs=3, random_state=0).fit(
            sc.X, sc.y, sc.answers(0), fees=sc.fees)
