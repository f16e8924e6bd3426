"""The plug-in router: a classifier plus per-expert correctness models, routed by expected cost."""

from __future__ import annotations

import contextlib
import math
import threading
from collections.abc import Mapping
from concurrent.futures import ThreadPoolExecutor, wait
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from numpy.typing import ArrayLike
from scipy.special import expit
from torch import nn

from routeplan import calibration as cal
from routeplan import costs as costs_mod
from routeplan._nets import (
    _child_generator,
    _forward,
    _load_net,
    _LoopSettings,
    _make_net,
    _progress,
    _train_loop,
)
from routeplan._routerbase import (
    _FIT_WORKERS,
    CALIBRATION_PRIOR,
    _COMMON_PARAMS_DOC,
    _EPS,
    _FIT_DOC,
    _BaseRouter,
    _by_chunks,
    _check_class_proba,
    _init_common,
    _logit,
    _onehot,
    _one_torch_thread,
    _Part,
    realised_costs,
)

# --------------------------------------------------------------------------------------
# plug-in router
# --------------------------------------------------------------------------------------


#: Values of ``class_offset``: per expert by validation, for every expert, or not at all.
CLASS_OFFSET_CHOICES = ("auto", "always", "never")

CLASS_OFFSET_DOC = """    class_offset : {"auto", "always", "never"}, default="auto"
        Two-stage mode only: also train a correctness network with the class route as an
        offset, and use it for each expert whose validation log-loss it clearly lowers
        (``"auto"``: by more than one standard error, and only for an expert whose
        accuracy differs across true classes on its training answers, a chi-square test at
        5%), for every expert, or not at all.
        Chosen: ``offset_experts_``.
"""


def _weighted_log_loss(Z: np.ndarray, part: _Part) -> np.ndarray:
    """Each answer's weighted log-loss under correctness logits ``Z``, (n, M); 0 where unknown."""
    right = (part.answers == part.y[:, None]).astype(np.float64)
    w = np.where(part.known, part.weights, 0.0)
    return w * (np.logaddexp(0.0, Z) - right * Z)


def _clearly_lower(loss: np.ndarray, other: np.ndarray, known: np.ndarray) -> np.ndarray:
    """Per expert (column): is the mean of ``loss`` below ``other``'s by more than one standard
    error of the paired difference over the known rows? The one-standard-error rule (Breiman,
    Friedman, Olshen & Stone, *Classification and Regression Trees*, 1984, sec. 3.4.3): keep
    the simpler model unless the data clearly favour the other."""
    out = np.zeros(loss.shape[1], dtype=bool)
    diff = loss - other
    for j in range(loss.shape[1]):
        d = diff[known[:, j], j]
        if d.size >= 2:
            out[j] = d.mean() + d.std(ddof=1) / np.sqrt(d.size) < 0
    return out


def _class_heterogeneous(part: _Part, n_classes: int, alpha: float = 0.05) -> np.ndarray:
    """Per expert: does its accuracy differ across true classes on these answers?

    Pearson's chi-square test of homogeneity (Pearson, "On the criterion that a given system
    of deviations...", Philosophical Magazine 50(302), 1900) on the table of right and wrong
    answers per true class (classes without answers left out; counts, not weights), via
    :func:`scipy.stats.chi2_contingency`, at level ``alpha``. An expert whose accuracy is the
    same for every class gains nothing from the class route that the network's intercept
    lacks, so its offset would only add noise. False where the test cannot be made (fewer
    than two classes answered, or every answer right, or every one wrong).
    """
    from scipy.stats import chi2_contingency

    Y = _onehot(part.y, n_classes)
    right = ((part.answers == part.y[:, None]) & part.known).T @ Y  # (M, K) right answers per class
    wrong = part.known.T @ Y - right
    out = np.zeros(right.shape[0], dtype=bool)
    for j in range(right.shape[0]):
        table = np.stack([right[j], wrong[j]])
        table = table[:, table.sum(axis=0) > 0]
        if table.shape[1] < 2 or (table.sum(axis=1) == 0).any():
            continue
        out[j] = chi2_contingency(table).pvalue < alpha
    return out


def _class_accuracy(part: _Part, n_classes: int, strength: float = 2.0) -> np.ndarray:
    """Each expert's accuracy per true class, (M, K), IPS-weighted and shrunk.

    Shrunk toward the expert's overall accuracy with a Beta prior of ``strength``
    pseudo-answers (common practice); overall accuracy uses the rule of succession.
    """
    known = part.known
    right = (part.answers == part.y[:, None]) & known
    w = part.weights  # 0 where unknown
    overall = ((w * right).sum(0) + 1.0) / (w.sum(0) + 2.0)  # (M,)
    Y = _onehot(part.y, n_classes)  # (n, K)
    num = (w * right).T @ Y  # (M, K)
    den = w.T @ Y
    return (num + strength * overall[:, None]) / (den + strength)


class ExpectedCostRouting:
    """Routing by least expected cost from calibrated ``P(y | x)`` and ``P(right | x)``.

    Shared by :class:`PluginRouter` and :class:`routeplan.ensemble.EnsembleRouter`, which
    provide ``_check_X``, ``_proba_and_correct``, ``cost_matrix_`` and ``fees_``.
    """

    def predict_costs(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Estimated expected cost of each option, shape (n, K + M).

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode.
        """
        return _by_chunks(self._costs_chunk, self._check_X(X), class_proba)

    def _costs_chunk(self, X: np.ndarray, class_proba: np.ndarray | None) -> np.ndarray:
        """Expected option costs of a chunk of validated rows."""
        P, q = self._proba_and_correct(X, class_proba)
        return costs_mod.expected_cost_vectors(P, q, cost_matrix=self.cost_matrix_,
                                               fees=self.fees_)

    def predict_route(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Option of least expected cost per case (``K + j`` = expert j), shape (n,)."""
        def routes(xs: np.ndarray, ps: np.ndarray | None) -> np.ndarray:
            return np.argmin(self._costs_chunk(xs, ps), axis=1).astype(np.int64)

        return _by_chunks(routes, self._check_X(X), class_proba)


class PluginRouter(ExpectedCostRouting, _BaseRouter):
    __doc__ = """Classifier plus per-expert correctness models; route to the least expected cost.

    The classifier is trained by cross-entropy, the correctness model (one output per
    expert) by binary log-loss on the known answers only, each weighted by the inverse
    of its selection probability. A case goes to ``argmin_r E[c_r | x]`` with the
    expected costs of :func:`routeplan.costs.expected_cost_vectors`: post-hoc deferral
    (Narasimhan, Jitkrittum, Menon, Rawat & Kumar, "Post-hoc estimators for learning to
    defer to an expert", NeurIPS 2022). Given ``class_proba`` (a model the team already
    has), only the routing is learned: two-stage learning to defer (Mao, Mohri & Zhong,
    "Two-Stage Learning to Defer with Multiple Experts", NeurIPS 2023).

    The classifier is early-stopped on its validation log-loss (after temperature
    scaling, refitted each epoch when ``calibrate``); it then does not depend on the
    correctness model, and the two train at the same time in two threads. With
    ``early_stopping="cost"`` it is stopped on the validation
    system cost of the full routing instead (correctness model fitted first and fixed),
    ties broken by the log-loss. Class probabilities are temperature-scaled and
    correctness probabilities Platt-scaled on the validation split
    (:mod:`routeplan.calibration`).

    In two-stage mode the class route (each expert's accuracy per true class, weighted by
    ``P(y | x)``: the diagonal of the class-conditional confusion model of Dawid & Skene,
    "Maximum likelihood estimation of observer error-rates using the EM algorithm",
    JRSS C 28(1), 1979) also enters the correctness model as an offset: a second network
    learns only where each expert departs from it, and ``class_offset="auto"`` uses it for
    an expert when its validation log-loss is lower than the plain network's by more than
    one standard error of the paired difference and its accuracy differs across true
    classes on the training answers (Pearson's chi-square test of homogeneity at 5%: without
    that, the one-standard-error rule alone took the offset in about a tenth of the fits on
    experts reliable by region, and each such fit steered later rounds; measured with
    ``benchmarks/bench_rounds.py``, see DEVELOPERS.md). For experts whose reliability follows the
    true class, the offset does most of the work from a few dozen answers; for experts
    whose reliability follows the features, the network alone is kept. The imported probabilities are out of sample for the answers (unlike the
    classifier's own on its training cases), which is why the offset is two-stage only.

    Parameters
    ----------""" + _COMMON_PARAMS_DOC + CLASS_OFFSET_DOC + """
    Attributes
    ----------
    n_features_in_, n_classes_, n_experts_ : int
    hidden_ : tuple of int
        Hidden layer widths used (``hidden`` resolved).
    fees_ : ndarray of shape (M,)
    cost_matrix_ : ndarray of shape (K, K)
    classifier_net_ : torch.nn.Module or None
        None in two-stage mode.
    correctness_net_ : torch.nn.Module
    correctness_mix_ : ndarray of shape (M,)
        The network's weight in each expert's correctness logit (1 unless ``logistic_blend``).
    correctness_linear_coef_, correctness_linear_intercept_ : ndarray of shape (M, d), (M,)
        The blended logistic regressions (zeros unless ``logistic_blend``).
    class_temperature_ : float
    expert_platt_ : ndarray of shape (M, 2)
        Platt ``(a, b)`` per expert.
    class_accuracy_ : ndarray of shape (M, K)
        Each expert's shrunk accuracy per true class (the class route).
    correctness_offset_net_ : torch.nn.Module or None
        The correctness network trained with the class route as an offset (two-stage, and
        kept only when some expert uses it).
    offset_experts_ : ndarray of bool, shape (M,)
        The experts whose correctness logit is that network's plus the offset.
    expert_stack_ : ndarray of shape (M, 3)
        Stacking coefficients per expert: network logit, class route, intercept.
    calibration_ : dict
        ECE before/after calibration on the validation split (optimistic: fitted there).
    validation_cost_ : float
        Validation system cost of the fitted router (unknown answers imputed).
    history_ : dict
        Validation scores per epoch of each network.
    """

    _net_names = ("classifier", "correctness", "correctness_offset")

    def __init__(self, *, n_classes: int | None = None, head: str = "mlp",
                 hidden: tuple[int, ...] | None = None, correctness_head: str | None = None,
                 logistic_blend: bool = False, class_offset: str = "auto",
                 max_epochs: int = 200, batch_size: int = 512,
                 learning_rate: float = 1e-3,
                 weight_decay: float = 1e-4, patience: int = 15,
                 early_stopping: str = "loss", validation_fraction: float = 0.2,
                 calibrate: bool = True, calibration_prior: float = CALIBRATION_PRIOR,
                 standardize: bool = True, random_state: Any = None, verbose: bool = False,
                 console: Any = None) -> None:
        _init_common(self, locals())

    def fit(self, X: ArrayLike, y: ArrayLike, answers: ArrayLike, *, fees: ArrayLike,
            cost_matrix: ArrayLike | None = None, sample_weight: ArrayLike | None = None,
            X_val: ArrayLike | None = None, y_val: ArrayLike | None = None,
            answers_val: ArrayLike | None = None, sample_weight_val: ArrayLike | None = None,
            class_proba: ArrayLike | None = None, class_proba_val: ArrayLike | None = None
            ) -> PluginRouter:
        return self._fit(X, y, answers, fees=fees, cost_matrix=cost_matrix,
                         sample_weight=sample_weight, X_val=X_val, y_val=y_val,
                         answers_val=answers_val, sample_weight_val=sample_weight_val,
                         class_proba=class_proba, class_proba_val=class_proba_val)

    fit.__doc__ = """Fit the correctness model and the classifier (unless two-stage); calibrate.
""" + _FIT_DOC.replace("        Returns", """\
        class_proba, class_proba_val : array-like of shape (n, K), optional
            Two-stage mode: probabilities of the team's own model; only routing is learned
            and prediction then needs ``class_proba`` too.

        Returns""")

    def _check_params(self) -> None:
        super()._check_params()
        if self.class_offset not in CLASS_OFFSET_CHOICES:
            raise ValueError(f"class_offset must be one of {', '.join(map(repr, CLASS_OFFSET_CHOICES))}, "
                             f"got {self.class_offset!r}")

    def _fit_parts(self, train: _Part, val: _Part, gen: torch.Generator) -> None:
        """Correctness model and classifier (side by side, see below); then calibration."""
        self.calibration_ = {}
        self.class_accuracy_ = _class_accuracy(train, self.n_classes_)
        self.offset_experts_ = np.zeros(self.n_experts_, dtype=bool)
        self.correctness_offset_net_ = None
        if self.two_stage_:
            Z = np.log(np.clip(val.class_proba, _EPS, 1.0))
            self.class_temperature_ = cal.fit_temperature(Z, val.y) if self.calibrate else 1.0
            self._fit_correctness(train, val, gen)
            self._fit_class_offset(train, val, gen)
            self.classifier_net_ = None
        else:
            self.classifier_net_ = self._fit_both(train, val, gen)
            Z = _forward(self.classifier_net_, val.X, self.x_mean_, self.x_scale_)
            self.class_temperature_ = cal.fit_temperature(Z, val.y) if self.calibrate else 1.0
        P_val = cal.apply_temperature(Z, self.class_temperature_)
        self.calibration_["classes"] = {
            "temperature": self.class_temperature_,
            "ece_before": cal.expected_calibration_error(cal.apply_temperature(Z, 1.0), val.y),
            "ece_after": cal.expected_calibration_error(P_val, val.y)}
        self._fit_class_route(train, val, P_val)

    def _fit_class_offset(self, train: _Part, val: _Part, gen: torch.Generator) -> None:
        """Two-stage: the correctness network with the class route as an offset; per expert,
        keep it where its accuracy differs by class and its validation log-loss is clearly below
        the plain network's (``"auto"``). Not trained when no expert passes the class test."""
        M = self.n_experts_
        if self.class_offset == "never" or M == 0 or not train.known.any():
            return
        auto = self.class_offset == "auto"
        chosen = _class_heterogeneous(train, self.n_classes_) if auto else np.ones(M, dtype=bool)
        if not chosen.any():  # no expert could take the offset: no network to train
            return
        P_val = self._two_stage_proba(val.class_proba)
        off_train = self._class_offset_logits(self._two_stage_proba(train.class_proba))
        off_val = self._class_offset_logits(P_val)
        net = self._correctness_net()
        self.history_["correctness_offset"] = self._train_correctness(
            net, train, val, gen, offsets=(off_train, off_val), name="expert correctness (class offset)")
        if auto:
            plain = self._correctness_logits(val.X)
            offset = _forward(net, val.X, self.x_mean_, self.x_scale_).astype(np.float64) + off_val
            chosen &= _clearly_lower(_weighted_log_loss(offset, val), _weighted_log_loss(plain, val), val.known)
            if not chosen.any():
                return
        self.offset_experts_, self.correctness_offset_net_ = chosen, net
        if self.calibrate:  # Platt again, on the logits now in use
            self._calibrate_correctness(val, self._correctness_logits(val.X, P_val))

    def _two_stage_proba(self, class_proba: np.ndarray) -> np.ndarray:
        """A split's imported class probabilities (checked when fit began), temperature-scaled."""
        return cal.apply_temperature(np.log(np.clip(class_proba, _EPS, 1.0)), self.class_temperature_)

    def _class_offset_logits(self, P: np.ndarray) -> np.ndarray:
        """The class route's logit per expert, ``logit(P @ class_accuracy_.T)``, (n, M)."""
        return _logit(P @ self.class_accuracy_.T)

    def _correctness_logits(self, X: np.ndarray, P: np.ndarray | None = None) -> np.ndarray:
        """The plain network's logits (blended, see the base class); for the experts in
        ``offset_experts_``, the offset network's plus the class route of ``P``."""
        Z = super()._correctness_logits(X)
        mask = getattr(self, "offset_experts_", None)
        if mask is None or not mask.any():
            return Z
        if P is None:
            raise ValueError("this router's correctness model needs the class probabilities")
        Z_off = _forward(self.correctness_offset_net_, X, self.x_mean_, self.x_scale_).astype(np.float64)
        Z[:, mask] = Z_off[:, mask] + self._class_offset_logits(P)[:, mask]
        return Z

    def _fit_class_route(self, train: _Part, val: _Part, P_val: np.ndarray) -> None:
        """Per-class expert accuracy, and its stacking with the feature-based model."""
        M = self.n_experts_
        self.expert_stack_ = np.tile([1.0, 0.0, 0.0], (M, 1))
        self.expert_stack_[:, 0] = self.expert_platt_[:, 0]
        self.expert_stack_[:, 2] = self.expert_platt_[:, 1]
        if M == 0 or not self.calibrate:
            return
        z_x = self._correctness_logits(val.X, P_val)
        z_c = self._class_offset_logits(P_val)
        reports = self.calibration_.get("experts", [{} for _ in range(M)])
        for j, rep in enumerate(reports):
            k = val.known[:, j]
            t = (val.answers[k, j] == val.y[k]).astype(np.float64)
            feats = np.column_stack([z_x[k, j], z_c[k, j]])
            coef = cal.fit_stack(feats, t, val.weights[k, j], prior_strength=self.calibration_prior)
            if coef[0] == 1.0 and not np.any(coef[1:]):
                continue  # too few answers: keep the Platt-scaled feature model
            self.expert_stack_[j] = coef
            rep.update({"stack": coef.tolist(), "ece_stacked": cal.expected_calibration_error(
                cal.apply_stack(feats, coef), t)})

    def _fit_both(self, train: _Part, val: _Part, gen: torch.Generator) -> nn.Module:
        """Fit the correctness model and the classifier; return the classifier.

        Stopped on its log-loss (``early_stopping="loss"``, the default), the classifier
        does not depend on the correctness model, so the two train side by side in two
        threads with torch on one thread each where two CPUs are usable. The weights are
        drawn first and each network shuffles with its own generator, so the result is
        the same either way (tested). If either training fails or is interrupted, the
        other stops after its current epoch and ``fit`` raises. Stopped on the routed
        cost, the classifier needs the fitted correctness model and trains after it.
        """
        by_cost = self.early_stopping == "cost"
        # with no expert there is no second network: the classifier keeps the batch order
        # it had before networks trained side by side (rehearsals' cross-fitted classifiers)
        clf_gen = _child_generator(gen) if self.n_experts_ > 0 else gen
        corr_net = self._correctness_net()
        clf_net = _make_net(self.n_features_in_, self.n_classes_, self.head, self.hidden_)
        settings = self._settings()
        settings.convex = True  # cross-entropy: a linear classifier goes to L-BFGS
        self.history_.update(correctness=[], classifier=[])  # the same key order either way
        independent = not by_cost and self.n_experts_ > 0
        with contextlib.ExitStack() as stack:
            settings.progress = stack.enter_context(_progress(settings))
            if independent:  # one torch thread per network whether or not they overlap
                stack.enter_context(_one_torch_thread())
            if not independent or _FIT_WORKERS < 2:
                self._fit_correctness(train, val, gen, net=corr_net, progress=settings.progress)
                q_val = self._correct_proba(val.X) if by_cost else None
                self._train_classifier(clf_net, train, val, q_val, settings, clf_gen)
                return clf_net
            self._correctness_warnings(train, val)  # from this thread, not the worker
            pool = stack.enter_context(ThreadPoolExecutor(1))
            stop_correctness, settings.cancel = threading.Event(), threading.Event()
            done = pool.submit(self._fit_correctness, train, val, gen, net=corr_net,
                               progress=settings.progress, cancel=stop_correctness, warn=False)
            # a failing correctness fit stops the classifier after its current epoch
            done.add_done_callback(lambda f: f.exception() is not None and settings.cancel.set())
            try:
                self._train_classifier(clf_net, train, val, None, settings, clf_gen)
                while not done.done():  # timed waits: a Ctrl-C that the system delivered to the
                    wait([done], timeout=0.1)  # other thread is raised here within 0.1 s
                done.result()
            except BaseException:  # including Ctrl-C while waiting for the other network
                stop_correctness.set()
                raise
        return clf_net

    def _train_classifier(self, net: nn.Module, train: _Part, val: _Part,
                          q_val: np.ndarray | None, settings: _LoopSettings,
                          gen: torch.Generator) -> None:
        """Cross-entropy classifier, early-stopped on its validation log-loss, or on the
        plug-in routing's validation cost given ``q_val`` (the fitted P(expert right))."""
        tensors = (self._std(train.X), torch.from_numpy(train.y))
        Xv, rows = self._std(val.X), np.arange(val.y.shape[0])
        if q_val is not None:
            c_val = (val.costs if not np.isnan(val.costs).any() else
                     costs_mod.impute_missing_costs(val.costs, self._imputed(val, q_val)))

        def loss_fn(m: nn.Module, xb: torch.Tensor, yb: torch.Tensor) -> torch.Tensor:
            return F.cross_entropy(m(xb), yb)

        def val_score(m: nn.Module) -> tuple[float, float]:
            Z = m(Xv).numpy().astype(np.float64)
            if not np.isfinite(Z).all():  # diverged: never the epoch to keep
                return (math.inf, math.inf)
            T = cal.fit_temperature(Z, val.y) if self.calibrate else 1.0
            P = cal.apply_temperature(Z, T)
            nll = float(-np.log(P[rows, val.y] + _EPS).mean())
            if q_val is None:
                return (nll, 0.0)
            ec = costs_mod.expected_cost_vectors(P, q_val, cost_matrix=self.cost_matrix_,
                                                 fees=self.fees_)
            return (float(realised_costs(c_val, ec.argmin(axis=1)).mean()), nll)

        self.history_["classifier"] = _train_loop(net, loss_fn, tensors, val_score, settings,
                                                  gen, "classifier")

    def _proba_kw(self, part: _Part) -> dict[str, Any]:
        """Pass the imported probabilities in two-stage mode."""
        return {"class_proba": part.class_proba} if self.two_stage_ else {}

    def _correct_for(self, part: _Part) -> np.ndarray:
        """P(expert right) for a split, with the imported probabilities if two-stage."""
        if not hasattr(self, "expert_stack_"):
            return self._correct_proba(part.X)
        P = self._calibrated_proba(part.X, part.class_proba)
        return self._stacked_correct(part.X, P)

    def _stacked_correct(self, X: np.ndarray, P: np.ndarray) -> np.ndarray:
        """P(expert right | x) from the feature model and the class route, stacked."""
        M = self.n_experts_
        if M == 0:
            return np.zeros((X.shape[0], 0))
        z_x = self._correctness_logits(X, P)
        z_c = self._class_offset_logits(P)
        S = self.expert_stack_
        return expit(S[:, 0] * z_x + S[:, 1] * z_c + S[:, 2])

    def _proba_and_correct(self, X: np.ndarray, class_proba: ArrayLike | None
                           ) -> tuple[np.ndarray, np.ndarray]:
        """Calibrated class probabilities and P(expert right), both (n, .)."""
        P = self._calibrated_proba(X, class_proba)
        return P, self._stacked_correct(X, P)

    def _calibrated_proba(self, X: np.ndarray, class_proba: ArrayLike | None) -> np.ndarray:
        """Temperature-scaled class probabilities of validated rows, (n, K)."""
        return cal.apply_temperature(self._class_logits(X, class_proba), self.class_temperature_)

    def _class_logits(self, X: np.ndarray, class_proba: ArrayLike | None) -> np.ndarray:
        """Class scores from the classifier, or log of the imported probabilities."""
        if self.two_stage_:
            if class_proba is None:
                raise ValueError("this router was fitted in two-stage mode: pass class_proba")
            P = _check_class_proba(class_proba, X.shape[0], self.n_classes_)
            return np.log(np.clip(P, _EPS, 1.0))
        if class_proba is not None:
            raise ValueError("class_proba is only for routers fitted with class_proba")
        return _forward(self.classifier_net_, X, self.x_mean_, self.x_scale_)

    def predict_proba(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Calibrated class probabilities ``P(y = k | x)``, shape (n, K).

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode (the imported model's probabilities).
        """
        X = self._check_X(X)
        return self._calibrated_proba(X, class_proba)

    def predict_expert_correct(self, X: ArrayLike, *, class_proba: ArrayLike | None = None
                               ) -> np.ndarray:
        """Calibrated ``P(expert j right | x)``, shape (n, M).

        A logistic stack, fitted on the validation answers, of the feature-based
        correctness model and of ``sum_y P(y | x) A[j, y]`` with ``A`` each expert's
        accuracy per true class on the training answers.

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode.
        """
        return self._proba_and_correct(self._check_X(X), class_proba)[1]

    def _extra_arrays(self) -> dict[str, np.ndarray]:
        """The class temperature, per-class accuracies and stacking weights."""
        return {"class_temperature": np.array([self.class_temperature_]),
                "class_accuracy": self.class_accuracy_, "expert_stack": self.expert_stack_,
                "offset_experts": self.offset_experts_.astype(np.int64)}

    def _restore(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> None:
        """Rebuild the networks and calibration."""
        super()._restore(arrays, meta)
        self.class_temperature_ = float(np.asarray(arrays["class_temperature"]).reshape(-1)[0])
        M, K = self.n_experts_, self.n_classes_
        self.class_accuracy_ = np.asarray(arrays["class_accuracy"], np.float64).reshape(M, K)
        self.expert_stack_ = np.asarray(arrays["expert_stack"], np.float64).reshape(M, 3)
        # arrays written before the class offset existed have no such entry: no expert uses it
        self.offset_experts_ = np.asarray(arrays.get("offset_experts", np.zeros(M)), np.int64).reshape(M) != 0
        self.correctness_offset_net_ = _load_net(self._correctness_net(), "correctness_offset", arrays) \
            if self.offset_experts_.any() else None
        self.classifier_net_ = None if self.two_stage_ else _load_net(
            _make_net(self.n_features_in_, self.n_classes_, self.head, self.hidden_),
            "classifier", arrays)
