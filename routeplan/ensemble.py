"""The averaged router: several plug-in routers whose calibrated estimates are averaged."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from routeplan._routerbase import (
    ARRAYS_FORMAT,
    CALIBRATION_PRIOR,
    _COMMON_PARAMS_DOC,
    _FIT_DOC,
    _as_generator,
    _BaseRouter,
    _by_chunks,
    _init_common,
    _jsonable,
)
from routeplan.plugin import CLASS_OFFSET_DOC, ExpectedCostRouting, PluginRouter

#: Prefix of member ``i``'s arrays in :meth:`EnsembleRouter.get_arrays`.
_MEMBER = "member{}."


class EnsembleRouter(ExpectedCostRouting, BaseEstimator):
    __doc__ = """Average of ``n_members`` plug-in routers; route to the least averaged expected cost.

    Each member is a :class:`routeplan.plugin.PluginRouter` fitted on the same cases
    with its own seed (its own initial weights, batch order and train/validation split).
    The router averages the members' calibrated class probabilities ``P(y | x)`` and
    their calibrated ``P(expert j right | x)``, then routes every case to the option of
    least expected cost after fees (:func:`routeplan.costs.expected_cost_vectors`): a
    deep ensemble (Lakshminarayanan, Pritzel & Blundell, "Simple and Scalable Predictive
    Uncertainty Estimation using Deep Ensembles", NeurIPS 2017) of post-hoc deferral
    routers (Narasimhan, Jitkrittum, Menon, Rawat & Kumar, NeurIPS 2022).

    Measured (``benchmarks/probe_ensemble.py``, synthetic scenario, 20,000 training
    cases, every answer known, router seeds 0-5, 2026-12-03): gap to the Bayes-optimal
    cost +0.0090 on average for three members (every average between +0.0085 and
    +0.0099, each below its best member) against +0.0108 for the 18 members alone; both
    the classifier's and the correctness model's shares of the gap shrink. It costs
    ``n_members`` fits; five members gave +0.0086 on the same seeds, little more than
    three. On digits with Mozannar & Sontag's simulated expert
    (``benchmarks/bench_learner.py`` [4], k = 2 / 5 / 8, 2026-12-03) three members cost
    0.0219 / 0.0202 / 0.0162 against one plug-in router's 0.0281 / 0.0246 / 0.0209.

    Parameters
    ----------
    n_members : int, default=3
        Plug-in routers averaged.""" + _COMMON_PARAMS_DOC + CLASS_OFFSET_DOC + """
    Attributes
    ----------
    members_ : list of PluginRouter
        The fitted members; member 0 is the plug-in router that ``fit`` would give
        with its seed (:func:`routeplan.selection.fit_candidates` reuses it).
    n_features_in_, n_classes_, n_experts_ : int
    hidden_ : tuple of int
        Hidden layer widths of the members.
    fees_ : ndarray of shape (M,)
    cost_matrix_ : ndarray of shape (K, K)
    two_stage_ : bool
        Fitted with imported class probabilities (then prediction needs them too).
    calibration_ : dict
        The members' calibration reports (``members``) and their mean class ECE
        before and after temperature scaling (``classes``).
    validation_cost_ : float
        Mean of the members' validation system costs, each on its own validation
        split (the averaged router has no split of its own that no member trained on).
    """

    def __init__(self, *, n_members: int = 3, n_classes: int | None = None, head: str = "mlp",
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

    def _member_params(self) -> dict[str, Any]:
        """Constructor arguments shared by every member (all but n_members and the seed)."""
        params = self.get_params()
        for key in ("n_members", "random_state"):
            params.pop(key)
        return params

    def fit(self, X: ArrayLike, y: ArrayLike, answers: ArrayLike, *, fees: ArrayLike,
            cost_matrix: ArrayLike | None = None, sample_weight: ArrayLike | None = None,
            class_proba: ArrayLike | None = None) -> EnsembleRouter:
        n = self.n_members
        if isinstance(n, bool) or int(n) != n or n < 1:
            raise ValueError(f"n_members must be a positive integer, got {n!r}")
        rng = _as_generator(self.random_state)
        seeds = [int(s) for s in rng.integers(0, 2**31 - 1, size=int(n))]
        extra = {} if class_proba is None else {"class_proba": class_proba}
        self.members_ = [
            PluginRouter(random_state=seed, **self._member_params()).fit(
                X, y, answers, fees=fees, cost_matrix=cost_matrix, sample_weight=sample_weight,
                **extra)
            for seed in seeds]
        self._take_shape(self.members_[0])
        self.validation_cost_ = float(np.mean([m.validation_cost_ for m in self.members_]))
        self.calibration_ = self._calibration_report()
        return self

    fit.__doc__ = """Fit every member on the same cases, each with its own seed.
""" + _FIT_DOC.replace("""        X_val, y_val, answers_val, sample_weight_val : optional
            An explicit validation split; otherwise ``validation_fraction`` of the cases.
""", """        class_proba : array-like of shape (n, K), optional
            Two-stage mode (see :class:`routeplan.plugin.PluginRouter`); prediction then
            needs ``class_proba`` too.
""")

    def _take_shape(self, first: PluginRouter) -> None:
        """Sizes, fees and costs from a fitted member (all members share them)."""
        self.n_features_in_ = first.n_features_in_
        self.n_classes_ = first.n_classes_
        self.n_experts_ = first.n_experts_
        self.hidden_ = tuple(first.hidden_)
        self.fees_ = first.fees_
        self.cost_matrix_ = first.cost_matrix_
        self.two_stage_ = first.two_stage_

    def _calibration_report(self) -> dict[str, Any]:
        """The members' reports and their mean class ECE."""
        reports = [m.calibration_ for m in self.members_]
        classes = [r["classes"] for r in reports if "classes" in r]
        out: dict[str, Any] = {"members": reports}
        if classes:
            out["classes"] = {key: float(np.mean([c[key] for c in classes]))
                              for key in ("ece_before", "ece_after")}
        return out

    # ---- prediction ------------------------------------------------------------------

    def _proba_and_correct(self, X: np.ndarray, class_proba: np.ndarray | None
                           ) -> tuple[np.ndarray, np.ndarray]:
        """Averaged calibrated P(y | x) and P(expert right | x) of a chunk."""
        P = np.zeros((X.shape[0], self.n_classes_))
        q = np.zeros((X.shape[0], self.n_experts_))
        for member in self.members_:
            p_m, q_m = member._proba_and_correct(X, class_proba)
            P += p_m
            q += q_m
        return P / len(self.members_), q / len(self.members_)

    def _check_X(self, X: ArrayLike) -> np.ndarray:
        """check_is_fitted, then the members' own check of X."""
        check_is_fitted(self)
        return self.members_[0]._check_X(X)

    def predict_proba(self, X: ArrayLike, *, class_proba: ArrayLike | None = None) -> np.ndarray:
        """Averaged calibrated class probabilities ``P(y = k | x)``, shape (n, K).

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode.
        """
        def proba(xs: np.ndarray, ps: np.ndarray | None) -> np.ndarray:
            # the class probabilities alone: no correctness network to run
            return sum(m._calibrated_proba(xs, ps) for m in self.members_) / len(self.members_)

        return _by_chunks(proba, self._check_X(X), class_proba)

    def predict_expert_correct(self, X: ArrayLike, *, class_proba: ArrayLike | None = None
                               ) -> np.ndarray:
        """Averaged calibrated ``P(expert j right | x)``, shape (n, M).

        Parameters
        ----------
        X : array-like of shape (n, d)
        class_proba : array-like of shape (n, K), optional
            Required in two-stage mode.
        """
        return _by_chunks(lambda xs, ps: self._proba_and_correct(xs, ps)[1], self._check_X(X),
                          class_proba)

    # ---- storage ---------------------------------------------------------------------

    def get_arrays(self) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """The fitted router as plain arrays plus a JSON-able description.

        Member ``i``'s arrays are keyed ``member<i>.<name>``; the description lists the
        members' own descriptions under ``members``.

        Returns
        -------
        arrays : dict of str to ndarray
        meta : dict
            Rebuild with :func:`routeplan.learner.router_from_arrays` ``(arrays, meta)``.
        """
        check_is_fitted(self)
        arrays: dict[str, np.ndarray] = {}
        metas = []
        for i, member in enumerate(self.members_):
            member_arrays, member_meta = member.get_arrays()
            arrays.update({_MEMBER.format(i) + k: v for k, v in member_arrays.items()})
            metas.append(member_meta)
        params = {k: v for k, v in self.get_params().items() if k != "console"}
        params["hidden"] = [int(h) for h in self.hidden_]
        rs = params.get("random_state")
        params["random_state"] = rs if rs is None or isinstance(rs, int) else None
        meta = {"format_version": ARRAYS_FORMAT, "router": type(self).__name__,
                "params": params, "n_features_in": int(self.n_features_in_),
                "n_classes": int(self.n_classes_), "n_experts": int(self.n_experts_),
                "two_stage": bool(self.two_stage_), "members": metas,
                "calibration": _jsonable(self.calibration_),
                "validation_cost": float(self.validation_cost_)}
        return arrays, meta

    #: Rebuild from :meth:`get_arrays` output (the routers' shared class method).
    from_arrays = classmethod(_BaseRouter.from_arrays.__func__)

    def _restore(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> None:
        """Rebuild every member from its prefixed arrays and description."""
        from routeplan.learner import router_from_arrays

        metas = list(meta.get("members", []))
        if len(metas) != int(self.n_members) or not metas:
            raise ValueError(f"the description lists {len(metas)} members, n_members is "
                             f"{self.n_members}")
        members = []
        for i, member_meta in enumerate(metas):
            if member_meta.get("router") != PluginRouter.__name__:
                raise ValueError(f"member {i} is a {member_meta.get('router')!r}, not a plug-in "
                                 "router")
            prefix = _MEMBER.format(i)
            own = {k[len(prefix):]: v for k, v in arrays.items() if k.startswith(prefix)}
            members.append(router_from_arrays(own, member_meta))
        shapes = {(m.n_features_in_, m.n_classes_, m.n_experts_, m.two_stage_) for m in members}
        if len(shapes) != 1:
            raise ValueError("the members disagree in features, classes, experts or mode")
        self.members_ = members
        self._take_shape(members[0])
        self.calibration_ = dict(meta.get("calibration", {}))
        self.validation_cost_ = float(meta.get("validation_cost", float("nan")))
