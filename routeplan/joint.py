"""The joint surrogate router: one scorer with ``K + M`` outputs trained end to end."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np
import torch
from numpy.typing import ArrayLike
from scipy.special import logsumexp
from torch import nn

from routeplan import calibration as cal
from routeplan import costs as costs_mod
from routeplan import surrogate as sur
from routeplan._nets import _forward, _load_net, _make_net, _train_loop
from routeplan._routerbase import (
    CALIBRATION_PRIOR,
    _COMMON_PARAMS_DOC,
    _EPS,
    _FIT_DOC,
    _BaseRouter,
    _by_chunks,
    _init_common,
    _Part,
    realised_costs,
)

def _defer_offsets(G: np.ndarray, c: np.ndarray, K: int, n_passes: int = 2) -> np.ndarray:
    """Per-expert offsets on the deferral scores minimising the routed cost c (grid search).

    Coordinate descent over a grid in [-3, 3]; among equal costs the smallest offset wins.
    """
    M = G.shape[1] - K
    b = np.zeros(M)
    grid = np.linspace(-3.0, 3.0, 61)
    grid = grid[np.argsort(np.abs(grid), kind="stable")]  # ties -> the smallest |offset|
    rows = np.arange(G.shape[0])
    for _ in range(n_passes):
        for j in range(M):
            costs = []
            for v in grid:
                H = G.copy()
                H[:, K:] += b
                H[:, K + j] += v - b[j]
                costs.append(c[rows, H.argmax(axis=1)].mean())
            b[j] = grid[int(np.argmin(costs))]
    return b


def _lse_without_max(Z: np.ndarray) -> np.ndarray:
    """log(sum_k exp(z_k) - max_k exp(z_k)) per row, by dropping the arg-max column."""
    masked = Z.copy()
    masked[np.arange(Z.shape[0]), Z.argmax(axis=1)] = -np.inf
    return logsumexp(masked, axis=1)


# --------------------------------------------------------------------------------------
# joint surrogate router
# --------------------------------------------------------------------------------------


class SurrogateRouter(_BaseRouter):
    __doc__ = """One scorer with K + M outputs trained end to end by a learning-to-defer surrogate.

    ``loss="softmax"``: the cost-sensitive softmax cross-entropy of Mozannar & Sontag
    ("Consistent Estimators for Learning to Defer to an Expert", ICML 2020) in the
    multi-expert form of Verma, Barrejon & Nalisnick (AISTATS 2023); the route is
    ``argmax g``. ``loss="ova"``: the one-vs-all logistic surrogate of Verma & Nalisnick
    ("Calibrated Learning to Defer with One-vs-All Classifiers", ICML 2022), generalised
    to costs (:func:`routeplan.surrogate.one_vs_all_surrogate`); its sigmoid outputs
    estimate the expected option costs, Platt-scaled on validation, and the route is the
    least estimated cost. ``loss="asymmetric"``: the asymmetric softmax surrogate of Cao,
    Mozannar, Feng, Wei & An ("In Defense of Softmax Parametrization for Calibrated and
    Consistent Learning to Defer", NeurIPS 2023;
    :func:`routeplan.surrogate.asymmetric_softmax_surrogate`): cross-entropy on the class
    scores plus a binary log-loss per expert on the asymmetric deferral probability, so
    that one network estimates both ``P(y | x)`` and ``P(expert j right | x)``; these are
    temperature- / Platt-scaled on validation and the route is the least expected cost
    (as for the plug-in). Measured (benchmarks/bench_learner.py, seeds 0 and 1): on the
    synthetic scenario (20,000 cases, all answers, 3 x 64 MLP) it came within
    0.012-0.013 of the Bayes cost against 0.017-0.020 for the softmax surrogate and
    0.010-0.011 for the plug-in; on digits (about 1,000 training cases) it trailed both
    (k = 5: 0.043 against 0.033 softmax, 0.025 plug-in).

    Unknown expert answers: a correctness model (as in :class:`PluginRouter`) is fitted
    first on the known answers, weighted by inverse selection probability, and

    - ``missing="impute"`` (default): an unknown option cost is replaced by its expected
      value given the truth, ``fee_j + q_j(x) C[y, y] + (1 - q_j(x)) w[y]`` (asymmetric:
      the unknown 0/1 correctness target is replaced by ``q_j(x)``);
    - ``missing="doubly_robust"`` (softmax only): every expert cost becomes
      ``m + 1[known] * ipw * (c - m)`` with ``m`` the imputed value -- unbiased when either
      the correctness model or the selection probabilities are right (the doubly robust
      estimator of Dudik, Langford & Li, ICML 2011).

    ``predict_costs`` of the softmax router are the calibrated plug-in estimates
    (temperature-scaled softmax over the K class scores, Platt-scaled correctness model):
    the softmax scores themselves are not probabilities of anything (Verma & Nalisnick,
    2022). They can disagree with ``predict_route`` on borderline cases; the share of
    validation cases where they agree is ``calibration_["route_agreement"]``.

    With ``calibrate``, the softmax router's route adds one offset per expert to its
    deferral scores, chosen on the validation split (grid search, coordinate descent) to
    minimise the routed cost: a post-hoc correction of the deferral threshold, in the
    spirit of the post-hoc estimators of Narasimhan, Jitkrittum, Menon, Rawat & Kumar
    (NeurIPS 2022), aimed at the softmax surrogate's over-deferral. Measured: synthetic
    scenario gap 0.0208 -> 0.0201 and 0.0183 -> 0.0170 (seeds 0, 1); digits with the
    Mozannar & Sontag expert, k = 2: 0.057 -> 0.037, k = 5 unchanged, k = 8 0.033 ->
    0.030 (2 x 64 MLP, mean of seeds 0 and 1).

    Parameters
    ----------
    loss : {"softmax", "ova", "asymmetric"}, default="softmax"
    alpha : float, default=1.0
        Weight of the deferral terms of the softmax surrogate (1 keeps consistency; see
        :func:`routeplan.surrogate.softmax_cost_surrogate`).
    missing : {"impute", "doubly_robust"}, default="impute"
""" + _COMMON_PARAMS_DOC + """
    Attributes
    ----------
    scorer_net_, correctness_net_ : torch.nn.Module
    correctness_mix_ : ndarray of shape (M,)
        The network's weight in each expert's correctness logit (1 unless ``logistic_blend``).
    correctness_linear_coef_, correctness_linear_intercept_ : ndarray of shape (M, d), (M,)
        The blended logistic regressions (zeros unless ``logistic_blend``).
    cost_scale_ : float
        Bound ``B`` on option costs (largest error cost plus largest fee), used by OvA.
    class_temperature_ : float
    option_platt_ : ndarray of shape (1 + M, 2)
        OvA: Platt ``(a, b)`` shared by the class outputs, then one per expert.
        Asymmetric: rows ``1 ..`` hold Platt ``(a, b)`` of each expert's deferral logit.
        Softmax: ``option_platt_[1 + j, 1]`` is the offset added to expert ``j``'s
        deferral score when routing (0 without ``calibrate``).
    expert_platt_ : ndarray of shape (M, 2)
    calibration_, validation_cost_, history_ : as in :class:`PluginRouter`
    """

    _net_names = ("scorer", "correctness")

    def __init__(self, *, loss: str = "softmax", alpha: float = 1.0, missing: str = "impute",
                 n_classes: int | None = None, head: str = "mlp",
                 hidden: tuple[int, ...] | None = None, correctness_head: str | None = None,
                 logistic_blend: bool = False, max_epochs: int = 200, batch_size: int = 512,
                 learning_rate: float = 1e-3,
                 weight_decay: float = 1e-4, patience: int = 15,
                 early_stopping: str | None = None, validation_fraction: float = 0.2,
                 calibrate: bool = True, calibration_prior: float = CALIBRATION_PRIOR,
                 standardize: bool = True, random_state: Any = None, verbose: bool = False,
                 console: Any = None) -> None:
        _init_common(self, locals())

    def _check_params(self) -> None:
        """Also check loss, alpha and missing."""
        super()._check_params()
        if self.loss not in ("softmax", "ova", "asymmetric"):
            raise ValueError(f"loss must be 'softmax', 'ova' or 'asymmetric', got {self.loss!r}")
        if not self.alpha > 0:
            raise ValueError(f"alpha must be > 0, got {self.alpha!r}")
        if self.missing not in ("impute", "doubly_robust"):
            raise ValueError(f"missing must be 'impute' or 'doubly_robust', got {self.missing!r}")
        if self.missing == "doubly_robust" and self.loss != "softmax":
            raise ValueError("missing='doubly_robust' needs loss='softmax' (OvA targets must "
                             "stay in [0, 1])")
        if self.loss != "softmax" and self.alpha != 1.0:
            raise ValueError("alpha applies to the softmax surrogate only")

    def fit(self, X: ArrayLike, y: ArrayLike, answers: ArrayLike, *, fees: ArrayLike,
            cost_matrix: ArrayLike | None = None, sample_weight: ArrayLike | None = None,
            X_val: ArrayLike | None = None, y_val: ArrayLike | None = None,
            answers_val: ArrayLike | None = None, sample_weight_val: ArrayLike | None = None
            ) -> SurrogateRouter:
        return self._fit(X, y, answers, fees=fees, cost_matrix=cost_matrix,
                         sample_weight=sample_weight, X_val=X_val, y_val=y_val,
                         answers_val=answers_val, sample_weight_val=sample_weight_val)

    fit.__doc__ = "Fit the correctness model, then the K + M scorer.\n" + _FIT_DOC

    def _fit_parts(self, train: _Part, val: _Part, gen: torch.Generator) -> None:
        """Correctness model (imputer) first, then the scorer, then calibration."""
        self.calibration_ = {}
        K, M = self.n_classes_, self.n_experts_
        bound = float(self.cost_matrix_.max() + (self.fees_.max() if M else 0.0))
        # float32-exact, so that float32 costs never exceed it after rounding
        self.cost_scale_ = float(np.float32(bound)) if bound > 0 else 1.0
        self._fit_correctness(train, val, gen)
        c_val = self._filled_costs(val)
        net = _make_net(self.n_features_in_, K + M, self.head, self.hidden_)
        tensors = (self._std(train.X), *self._targets(train))
        Xv, v_targets = self._std(val.X), self._targets(val)

        def val_score(m: nn.Module) -> tuple[float, float]:
            G = m(Xv)
            if not torch.isfinite(G).all():  # diverged: never the epoch to keep
                return (math.inf, math.inf)
            cost = realised_costs(c_val, self._raw_routes(G.numpy())).mean()
            loss = float(self._loss(G, *v_targets))
            return (loss, float(cost)) if self._stop_on() == "loss" else (float(cost), loss)

        self.history_["scorer"] = _train_loop(net, lambda m, xb, *tb: self._loss(m(xb), *tb),
                                              tensors, val_score, self._settings(), gen,
                                              f"{self.loss} surrogate")
        self.scorer_net_ = net
        self._calibrate_scorer(val, c_val)

    def _stop_on(self) -> str:
        """The early-stopping score: as given, else "loss" for asymmetric, "cost" otherwise."""
        if self.early_stopping is not None:
            return self.early_stopping
        return "loss" if self.loss == "asymmetric" else "cost"

    def _targets(self, part: _Part) -> tuple[torch.Tensor, ...]:
        """Training targets of a split: option costs, or (truth, P(expert right))."""
        if self.loss != "asymmetric":
            return (torch.from_numpy(self._training_costs(part).astype(np.float32)),)
        right = (part.answers == part.y[:, None]).astype(np.float64)
        if not part.known.all():
            right = np.where(part.known, right, self._correct_proba(part.X))
        return torch.from_numpy(part.y), torch.from_numpy(right.astype(np.float32))

    def _raw_routes(self, G: np.ndarray) -> np.ndarray:
        """Routes from uncalibrated scores (used while training)."""
        if self.loss != "asymmetric":
            return G.argmax(axis=1)
        identity = np.tile([1.0, 0.0], (self.n_experts_, 1))
        P, q = self._asym_proba(G.astype(np.float64), 1.0, identity)
        return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                               fees=self.fees_).argmin(axis=1)

    def _asym_proba(self, G: np.ndarray, T: float, platt: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        """Class probabilities and P(expert right) from asymmetric-softmax scores."""
        K = self.n_classes_
        P = cal.apply_temperature(G[:, :K], T)
        z = G[:, K:] - _lse_without_max(G[:, :K])[:, None]
        return P, cal.apply_platt(z, platt[:, 0], platt[:, 1])

    def _loss(self, logits: torch.Tensor, *targets: torch.Tensor) -> torch.Tensor:
        """The chosen surrogate, mean over the batch."""
        if self.loss == "asymmetric":
            return sur.asymmetric_softmax_surrogate(logits, *targets)
        c = targets[0]
        if self.loss == "softmax":
            return sur.softmax_cost_surrogate(logits, c, alpha=float(self.alpha),
                                              n_classes=self.n_classes_)
        return sur.one_vs_all_surrogate(logits, c, n_classes=self.n_classes_,
                                        cost_scale=self.cost_scale_)

    def _training_costs(self, train: _Part) -> np.ndarray:
        """Option costs with unknown answers imputed (or doubly robust)."""
        if self.missing == "impute":
            return self._filled_costs(train)
        imputed = self._imputed(train, self._correct_proba(train.X))
        K = self.n_classes_
        out = imputed.copy()
        known = train.known
        ce = np.where(known, train.costs[:, K:], 0.0)
        out[:, K:] += np.where(known, train.weights * (ce - imputed[:, K:]), 0.0)
        out[:, :K] = train.costs[:, :K]
        return out

    def _calibrate_scorer(self, val: _Part, c_val: np.ndarray) -> None:
        """Temperature for the class scores; OvA: Platt per option group on validation."""
        K, M = self.n_classes_, self.n_experts_
        G = _forward(self.scorer_net_, val.X, self.x_mean_, self.x_scale_).astype(np.float64)
        self.option_platt_ = np.tile([1.0, 0.0], (1 + M, 1))
        if self.loss == "softmax":
            if self.calibrate and M:
                self.option_platt_[1:, 1] = _defer_offsets(G, c_val, K)
            self._fit_class_temperature(G, val)
            agree = self.predict_route(val.X) == np.argmin(self.predict_costs(val.X), axis=1)
            self.calibration_["route_agreement"] = float(agree.mean())
            return
        if self.loss == "asymmetric":
            self._calibrate_asymmetric(val, G)
            return
        self.class_temperature_ = 1.0
        B = self.cost_scale_
        before = cal.expected_calibration_error(self.predict_proba(val.X), val.y)
        if self.calibrate:
            t = 1.0 - c_val[:, :K] / B
            self.option_platt_[0] = cal.fit_platt(G[:, :K].ravel(), np.clip(t.ravel(), 0, 1))
            for j in range(M):
                k = val.known[:, j]
                tj = np.clip(1.0 - val.costs[k, K + j] / B, 0, 1)
                self.option_platt_[1 + j] = cal.fit_platt(G[k, K + j], tj, val.weights[k, j],
                                                            prior_strength=self.calibration_prior)
        self.calibration_["classes"] = {
            "ece_before": before,
            "ece_after": cal.expected_calibration_error(self.predict_proba(val.X), val.y)}
        self.calibration_["options_platt"] = self.option_platt_.tolist()

    def _fit_class_temperature(self, G: np.ndarray, val: _Part) -> None:
        """Temperature of the K class scores on validation (1 without ``calibrate``), with its ECE report."""
        K = self.n_classes_
        T = cal.fit_temperature(G[:, :K], val.y) if self.calibrate else 1.0
        self.class_temperature_ = T
        P0, P1 = (cal.apply_temperature(G[:, :K], t) for t in (1.0, T))
        self.calibration_["classes"] = {
            "temperature": T, "ece_before": cal.expected_calibration_error(P0, val.y),
            "ece_after": cal.expected_calibration_error(P1, val.y)}

    def _calibrate_asymmetric(self, val: _Part, G: np.ndarray) -> None:
        """Temperature for the class scores, Platt per expert on the deferral logits."""
        K = self.n_classes_
        self._fit_class_temperature(G, val)
        if not self.calibrate:
            return
        z = G[:, K:] - _lse_without_max(G[:, :K])[:, None]
        for j in range(self.n_experts_):
            k = val.known[:, j]
            t = (val.answers[k, j] == val.y[k]).astype(np.float64)
            self.option_platt_[1 + j] = cal.fit_platt(z[k, j], t, val.weights[k, j],
                                                    prior_strength=self.calibration_prior)
        self.calibration_["options_platt"] = self.option_platt_.tolist()

    # ---- prediction ------------------------------------------------------------------

    def _asym_chunk(self, X: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Calibrated class probabilities and P(expert right) of the asymmetric scorer."""
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        return self._asym_proba(G, self.class_temperature_, self.option_platt_[1:])

    def _ova_costs(self, X: np.ndarray) -> np.ndarray:
        """Calibrated OvA cost estimates ``B (1 - sigmoid(a g + b))``."""
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        K = self.n_classes_
        a = np.concatenate([np.full(K, self.option_platt_[0, 0]), self.option_platt_[1:, 0]])
        b = np.concatenate([np.full(K, self.option_platt_[0, 1]), self.option_platt_[1:, 1]])
        return self.cost_scale_ * (1.0 - cal.apply_platt(G, a, b))

    def _ova_proba(self, ec: np.ndarray) -> np.ndarray:
        """Class probabilities solving ``P C = E[c_class]`` (clipped, renormalised)."""
        K = self.n_classes_
        P = np.clip(ec[:, :K] @ np.linalg.pinv(self.cost_matrix_), 0.0, None)
        s = P.sum(axis=1, keepdims=True)
        return np.where(s > _EPS, P / np.where(s > _EPS, s, 1.0), 1.0 / K)

    def _ova_correct(self, ec: np.ndarray, P: np.ndarray) -> np.ndarray:
        """P(expert right) from the expert cost estimates, given class probabilities."""
        K, C = self.n_classes_, self.cost_matrix_
        right = (P @ np.diag(C))[:, None]
        wrong = (P @ costs_mod.wrong_answer_costs(C))[:, None]
        answer = ec[:, K:] - self.fees_[None, :]
        gap = wrong - right
        q = np.where(gap > _EPS, (wrong - answer) / np.where(gap > _EPS, gap, 1.0), 0.5)
        return np.clip(q, 0.0, 1.0)

    def predict_proba(self, X: ArrayLike) -> np.ndarray:
        """Class probabilities ``P(y = k | x)``, shape (n, K).

        Softmax: temperature-scaled softmax over the K class scores. OvA: solved from
        the calibrated class-option cost estimates.
        """
        X = self._check_X(X)
        if self.loss == "asymmetric":
            return self._asym_chunk(X)[0]
        if self.loss == "ova":
            return self._ova_proba(self._ova_costs(X))
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_)[:, :self.n_classes_]
        return cal.apply_temperature(G, self.class_temperature_)

    def predict_expert_correct(self, X: ArrayLike) -> np.ndarray:
        """``P(expert j right | x)``, shape (n, M).

        Softmax: the calibrated correctness model. OvA: read from the scorer's expert
        outputs (Verma & Nalisnick, 2022).
        """
        X = self._check_X(X)
        if self.loss == "asymmetric":
            return self._asym_chunk(X)[1]
        if self.loss == "ova":
            ec = self._ova_costs(X)
            return self._ova_correct(ec, self._ova_proba(ec))
        return self._correct_proba(X)

    def predict_costs(self, X: ArrayLike) -> np.ndarray:
        """Estimated expected cost of each option, shape (n, K + M)."""
        return _by_chunks(lambda xs, _: self._costs_chunk(xs), self._check_X(X))

    def _costs_chunk(self, X: np.ndarray) -> np.ndarray:
        """Expected option costs of a chunk of validated rows."""
        if self.loss == "ova":
            return self._ova_costs(X)
        if self.loss == "asymmetric":
            P, q = self._asym_chunk(X)
            return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                                   fees=self.fees_)
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_)[:, :self.n_classes_]
        P = cal.apply_temperature(G, self.class_temperature_)
        return costs_mod.expected_cost_vectors(P, self._correct_proba(X),
                                               cost_matrix=self.cost_matrix_, fees=self.fees_)

    def predict_route(self, X: ArrayLike) -> np.ndarray:
        """Chosen option per case (``K + j`` = expert j), shape (n,).

        Softmax: ``argmax`` of the scores. OvA: least calibrated cost estimate.
        """
        X = self._check_X(X)
        if self.loss == "asymmetric":
            return np.argmin(self.predict_costs(X), axis=1).astype(np.int64)
        if self.loss == "ova":
            return np.argmin(self._ova_costs(X), axis=1).astype(np.int64)
        G = _forward(self.scorer_net_, X, self.x_mean_, self.x_scale_)
        G[:, self.n_classes_:] += self.option_platt_[1:, 1]
        return np.argmax(G, axis=1).astype(np.int64)

    def _extra_arrays(self) -> dict[str, np.ndarray]:
        """Temperature, OvA Platt parameters and the cost bound."""
        return {"class_temperature": np.array([self.class_temperature_]),
                "option_platt": self.option_platt_, "cost_scale": np.array([self.cost_scale_])}

    def _restore(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> None:
        """Rebuild the scorer and calibration."""
        super()._restore(arrays, meta)
        self.class_temperature_ = float(np.asarray(arrays["class_temperature"]).reshape(-1)[0])
        self.cost_scale_ = float(np.asarray(arrays["cost_scale"]).reshape(-1)[0])
        self.option_platt_ = np.asarray(arrays["option_platt"], np.float64).reshape(-1, 2)
        self.scorer_net_ = _load_net(
            _make_net(self.n_features_in_, self.n_classes_ + self.n_experts_, self.head,
                      self.hidden_), "scorer", arrays)
