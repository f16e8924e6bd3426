"""Choosing between fitted routers: validation system cost with intervals.

:func:`fit_candidates` splits the cases, fits the named candidate routers
(:data:`routeplan.learner.CANDIDATES`) and hands them to :func:`select_router`, which
compares them by held-out system cost, beside the model alone and each expert alone, and
keeps one (:class:`SelectionResult`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike
from sklearn.utils.validation import check_array, check_is_fitted

from routeplan import costs as costs_mod
from routeplan._routerbase import _as_generator, _check_answers_weights, _check_y, _onehot, _split_indices
from routeplan.learner import (
    CANDIDATES,
    DEFAULT_CANDIDATES,
    TWO_STAGE_CANDIDATES,
    EnsembleRouter,
    PluginRouter,
)

__all__ = ["SelectionResult", "fit_candidates", "select_router"]

#: The averaged plug-in candidate; when ``"plugin"`` is fitted beside it, its first member
#: is that candidate (same cases, same kind of seed), which saves one plug-in fit.
_ENSEMBLE = "plugin-ensemble"


@dataclass
class SelectionResult:
    """Outcome of :func:`select_router`.

    Attributes
    ----------
    best_name : str
        Name of the candidate with the least validation system cost.
    best : PluginRouter or SurrogateRouter
    table : pandas.DataFrame
        One row per candidate, then the baselines (``kind`` column): ``system_cost`` with
        a normal-approximation interval (``ci_low``, ``ci_high``), ``accuracy`` of the
        final decisions, ``coverage`` (share the model decides), ``share_<expert>``,
        ``imputed_share`` (share of cases whose realised cost was imputed), and the paired
        difference to the best candidate with its interval.
    notes : list of str
        Caveats, e.g. that unknown answers were imputed.
    """

    best_name: str
    best: Any
    table: pd.DataFrame
    notes: list[str] = field(default_factory=list)


def _mean_ci(values: np.ndarray, z: float) -> tuple[float, float, float]:
    """Mean and normal-approximation interval of per-case values."""
    n = values.shape[0]
    mean = float(values.mean())
    if n < 2:
        return mean, float("nan"), float("nan")
    half = z * float(values.std(ddof=1)) / math.sqrt(n)
    return mean, mean - half, mean + half


def _z(confidence: float) -> float:
    """Two-sided standard-normal quantile."""
    from scipy.stats import norm

    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence!r}")
    return float(norm.ppf(0.5 + confidence / 2))


@dataclass
class _ValCases:
    """Validation cases with realised costs (imputed where unknown) and correctness."""

    X: np.ndarray
    y: np.ndarray
    answers: np.ndarray
    costs: np.ndarray  # filled
    was_missing: np.ndarray  # (n, K + M) bool
    right: np.ndarray  # (n, K + M) P(final decision right) per option
    class_proba: np.ndarray | None


def _val_cases(X, y, answers, imputer, fees, C, class_proba) -> _ValCases:
    """Validate the selection split and fill unknown costs from the imputer."""
    X = check_array(X, dtype=np.float32)
    K = C.shape[0]
    y = _check_y(y, K, "y_val")
    A, _ = _check_answers_weights(answers, None, X.shape[0])
    raw = costs_mod.cost_vectors(y, A, cost_matrix=C, fees=fees)
    missing = np.isnan(raw)
    known = A != costs_mod.MISSING_ANSWER
    q = np.zeros(A.shape)
    if missing.any():
        two_stage = getattr(imputer, "two_stage_", False)
        if two_stage and class_proba is None:
            raise ValueError("a two-stage imputer needs class_proba_val")
        q = imputer.predict_expert_correct(X, **({"class_proba": class_proba} if two_stage else {}))
    filled = raw
    if missing.any():
        exp = costs_mod.expected_cost_vectors(_onehot(y, K), q, cost_matrix=C, fees=fees)
        filled = costs_mod.impute_missing_costs(raw, exp)
    right = np.hstack([_onehot(y, K), np.where(known, A == y[:, None], q)])
    return _ValCases(X, y, A, filled, missing, right, class_proba)


def _routes_of(router: Any, cases: _ValCases) -> np.ndarray:
    """Routes of a fitted router, passing imported probabilities to two-stage routers."""
    if getattr(router, "two_stage_", False):
        if cases.class_proba is None:
            raise ValueError("a two-stage router needs class_proba_val for selection")
        return router.predict_route(cases.X, class_proba=cases.class_proba)
    return router.predict_route(cases.X)


def _selection_row(name: str, kind: str, routes: np.ndarray, cases: _ValCases, K: int,
                   expert_names: list[str], z: float) -> tuple[dict[str, Any], np.ndarray]:
    """One table row and the per-case realised costs of a routing."""
    from routeplan import baselines

    rows = np.arange(routes.shape[0])
    per_case = cases.costs[rows, routes]
    _, lo, hi = _mean_ci(per_case, z)
    row: dict[str, Any] = {
        "router": name, "kind": kind,
        "system_cost": baselines.system_cost(cases.costs, routes), "ci_low": lo, "ci_high": hi,
        "accuracy": float(cases.right[rows, routes].mean()),
        "coverage": baselines.coverage(routes, K)}
    shares = baselines.workload(routes, K, len(expert_names))
    row.update({f"share_{e}": float(s) for e, s in zip(expert_names, shares)})
    row["imputed_share"] = float(cases.was_missing[rows, routes].mean())
    return row, per_case


def select_router(
    candidates: Mapping[str, Any],
    X_val: ArrayLike,
    y_val: ArrayLike,
    answers_val: ArrayLike,
    *,
    fees: ArrayLike | None = None,
    cost_matrix: ArrayLike | None = None,
    imputer: Any = None,
    expert_names: list[str] | None = None,
    class_proba_val: ArrayLike | None = None,
    include_baselines: bool = True,
    confidence: float = 0.95,
    rule: str = "significant",
) -> SelectionResult:
    """Compare fitted routers by validation system cost and keep the least.

    The system cost of a routing is the mean over cases of the realised cost of the
    chosen option. Where the chosen expert's answer is unknown, its expected cost given
    the truth (from ``imputer``'s correctness model) stands in, and the result says so.
    Intervals are normal approximations of the mean of the per-case costs (common
    practice); the paired difference to the best candidate gets its own interval. The
    best candidate's cost is slightly optimistic (it won on this split).

    Parameters
    ----------
    candidates : mapping of str to fitted router
    X_val, y_val, answers_val : array-like
        Held-out cases (not used to fit the candidates), their truth and answers
        (``-1`` where unknown).
    fees, cost_matrix : array-like, optional
        Default: those the first candidate was fitted with.
    imputer : fitted router, optional
        Its ``predict_expert_correct`` fills unknown answers; default the ``"plugin"``
        candidate if present, else the first candidate.
    expert_names : list of str, optional
        Used in the ``share_<expert>`` columns; default ``expert0, expert1, ...``.
    class_proba_val : array-like of shape (n, K), optional
        Imported probabilities for two-stage routers.
    include_baselines : bool, default=True
        Add the rows "model alone" (the plug-in's classifier, else the best router's
        class scores) and "<expert> alone" for every expert.
    confidence : float, default=0.95
    rule : {"significant", "min"}, default="significant"
        ``"min"`` keeps the least validation cost. ``"significant"`` keeps the first
        candidate (the preferred one, in the given order) unless some other candidate
        beats it clearly: the paired interval (at ``confidence``) of its cost minus the
        first one's lies below zero; among those, the least cost wins. This is in the
        spirit of the one-standard-error rule (Breiman, Friedman, Olshen & Stone,
        "Classification and Regression Trees", 1984; Hastie, Tibshirani & Friedman, "The
        Elements of Statistical Learning", 2009, section 7.10): on small validation
        splits most gaps between routers are noise (on digits we saw a gap of 0.013
        resting on 8 discordant cases out of 314 reverse on the test split).

    Returns
    -------
    SelectionResult
    """
    if not candidates:
        raise ValueError("give at least one fitted candidate router")
    first = next(iter(candidates.values()))
    for r in candidates.values():
        check_is_fitted(r)
    C = np.asarray(first.cost_matrix_ if cost_matrix is None else cost_matrix, np.float64)
    fees_arr = np.asarray(first.fees_ if fees is None else fees, np.float64).reshape(-1)
    K, M = C.shape[0], fees_arr.shape[0]
    names = list(expert_names) if expert_names is not None else [f"expert{j}" for j in range(M)]
    if len(names) != M:
        raise ValueError(f"expert_names must have {M} names")
    imputer = imputer if imputer is not None else candidates.get("plugin", first)
    cases = _val_cases(X_val, y_val, answers_val, imputer, fees_arr, C,
                       None if class_proba_val is None else np.asarray(class_proba_val))
    z = _z(confidence)
    rows, per_case = [], {}
    for name, router in candidates.items():
        row, per_case[name] = _selection_row(name, "router", _routes_of(router, cases), cases,
                                             K, names, z)
        rows.append(row)
    best_name = _choose(per_case, rule, z)
    if include_baselines:
        rows += _baseline_rows(candidates, best_name, cases, K, M, names, z, per_case)
    for row in rows:
        d = per_case[row["router"]] - per_case[best_name]
        row["delta_vs_best"], row["delta_ci_low"], row["delta_ci_high"] = _mean_ci(d, z)
    notes = []
    if cases.was_missing.any():
        notes.append("some expert answers are unknown on the validation cases: where a case "
                     "is routed to such an expert, its expected cost given the truth (from "
                     "the correctness model of " + _imputer_name(candidates, imputer) +
                     ") stands in for the realised cost; see imputed_share. These costs "
                     "lean optimistic, most for the router whose model did the imputing "
                     "(and for an average of routers that counts it as a member)")
    notes.append(f"{len(cases.y)} validation cases; intervals are {confidence:.0%} normal "
                 "approximations; the winner's cost is slightly optimistic")
    if rule == "significant":
        notes.append(f"kept {best_name!r}: candidates other than the first win only when "
                     f"their paired {confidence:.0%} interval of the cost difference lies "
                     "below zero")
    table = pd.DataFrame(rows)
    table.attrs["notes"] = notes
    return SelectionResult(best_name, candidates[best_name], table, notes)


def _imputer_name(candidates: Mapping[str, Any], imputer: Any) -> str:
    """Name of the imputing router among the candidates, else 'the given imputer'."""
    for name, router in candidates.items():
        if router is imputer:
            return repr(name)
    return "the given imputer"


def _choose(per_case: Mapping[str, np.ndarray], rule: str, z: float) -> str:
    """The selected candidate under the "min" or "significant" rule."""
    if rule not in ("significant", "min"):
        raise ValueError(f"rule must be 'significant' or 'min', got {rule!r}")
    if rule == "min":
        return min(per_case, key=lambda k: per_case[k].mean())
    first = next(iter(per_case))
    better = []
    for name, values in per_case.items():
        _, _, high = _mean_ci(values - per_case[first], z)
        if name != first and high < 0:
            better.append(name)
    return min(better, key=lambda k: per_case[k].mean()) if better else first


def _baseline_rows(candidates, best_name, cases, K, M, names, z, per_case) -> list[dict]:
    """Rows for the model alone and each expert alone."""
    from routeplan import baselines

    source = "plugin" if "plugin" in candidates else best_name
    router = candidates[source]
    if getattr(router, "two_stage_", False):
        ec = router.predict_costs(cases.X, class_proba=cases.class_proba)
    else:
        ec = router.predict_costs(cases.X)
    out = []
    model_routes = np.argmin(ec[:, :K], axis=1)
    # two-stage: the model is the team's own, whose probabilities were imported
    label = "model alone (yours, imported)" if getattr(router, "two_stage_", False) else f"model alone ({source})"
    row, per_case[label] = _selection_row(label, "baseline", model_routes, cases, K, names, z)
    row["system_cost"] = baselines.model_alone_cost(cases.costs, model_routes, n_classes=K)
    out.append(row)
    for j in range(M):
        label = f"{names[j]} alone"
        routes = np.full(cases.y.shape[0], K + j)
        row, per_case[label] = _selection_row(label, "baseline", routes, cases, K, names, z)
        out.append(row)
    return out


def fit_candidates(
    X: ArrayLike,
    y: ArrayLike,
    answers: ArrayLike,
    *,
    fees: ArrayLike,
    cost_matrix: ArrayLike | None = None,
    sample_weight: ArrayLike | None = None,
    random_state: Any = None,
    names: tuple[str, ...] | list[str] | None = None,
    selection_fraction: float = 0.25,
    expert_names: list[str] | None = None,
    class_proba: ArrayLike | None = None,
    router_params: Mapping[str, Any] | None = None,
    rule: str = "significant",
    verbose: bool = False,
    console: Any = None,
) -> tuple[str, dict[str, Any], pd.DataFrame]:
    """Fit several routers and keep the one with the least validation system cost.

    The cases are split (stratified by label, seeded) into a fitting part and a
    selection part of share ``selection_fraction``. Each candidate is fitted on the
    fitting part (which it splits again for early stopping and calibration) and all are
    compared on the selection part by :func:`select_router`, with the baselines. A
    candidate whose training diverges is left out (a note says so).

    Parameters
    ----------
    X, y, answers, fees, cost_matrix, sample_weight :
        As for the routers' ``fit``.
    random_state : int, numpy Generator or None
        Seeds the split and every candidate.
    names : sequence of str, optional
        Candidates among :data:`routeplan.learner.CANDIDATES`, in order of preference;
        default :data:`routeplan.learner.DEFAULT_CANDIDATES` (``"plugin-ensemble"``,
        ``"plugin"``, ``"asym-mlp"``, ``"softmax-mlp"``, ``"ova-mlp"``), or
        :data:`routeplan.learner.TWO_STAGE_CANDIDATES` in two-stage mode. With both
        ``"plugin-ensemble"`` and ``"plugin"``, the plug-in candidate is the ensemble's
        first member rather than a fit of its own.
    selection_fraction : float, default=0.25
    expert_names : list of str, optional
    class_proba : array-like of shape (n, K), optional
        Two-stage mode: the team's own model's probabilities (plug-in candidates only).
    router_params : mapping, optional
        Extra constructor arguments for every candidate (e.g. ``max_epochs``).
    rule : {"significant", "min"}, default="significant"
        Selection rule of :func:`select_router` (candidates in the order of ``names``).
    verbose : bool, default=False
    console : rich.console.Console, optional

    Returns
    -------
    best_name : str
    fitted : dict of str to fitted router
    table : pandas.DataFrame
        See :class:`SelectionResult`; ``table.attrs["notes"]`` holds the caveats and
        ``table.attrs["selection_index"]`` the rows of ``X`` used for selection.

    Raises
    ------
    FloatingPointError
        If every candidate diverged.
    """
    names = tuple(names) if names is not None else (
        TWO_STAGE_CANDIDATES if class_proba is not None else DEFAULT_CANDIDATES)
    unknown = [n for n in names if n not in CANDIDATES]
    if unknown or not names:
        raise ValueError(f"unknown candidate(s) {unknown}; choose from {sorted(CANDIDATES)}")
    if class_proba is not None and any(CANDIDATES[n][0] not in (PluginRouter, EnsembleRouter)
                                       for n in names):
        raise ValueError("with class_proba (two-stage mode) only plug-in candidates apply")
    if not 0 < selection_fraction < 1:
        raise ValueError(f"selection_fraction must be in (0, 1), got {selection_fraction!r}")
    X = check_array(X, dtype=np.float32)
    y = _check_y(y, None, "y")
    if y.shape[0] != X.shape[0]:
        raise ValueError(f"y has {y.shape[0]} cases, X has {X.shape[0]}")
    A, W = _check_answers_weights(answers, sample_weight, X.shape[0])
    W = np.where(A != costs_mod.MISSING_ANSWER, W, np.nan)
    P = None if class_proba is None else np.asarray(class_proba, dtype=np.float64)
    rng = _as_generator(random_state)
    fit_idx, sel_idx = _split_indices(y, selection_fraction, int(rng.integers(0, 2**31 - 1)))
    fitted: dict[str, Any] = {}
    diverged: list[str] = []
    share_member = _ENSEMBLE in names and "plugin" in names
    for name in names:
        cls, kw = CANDIDATES[name]
        params = {**dict(router_params or {}), **kw, "verbose": verbose, "console": console,
                  "random_state": int(rng.integers(0, 2**31 - 1))}
        if share_member and name == "plugin":
            continue  # the ensemble's first member (below)
        extra = {} if P is None else {"class_proba": P[fit_idx]}
        try:
            fitted[name] = cls(**params).fit(X[fit_idx], y[fit_idx], A[fit_idx], fees=fees,
                                             cost_matrix=cost_matrix, sample_weight=W[fit_idx],
                                             **extra)
        except FloatingPointError:  # one unstable candidate does not sink the others
            diverged.append(name)
    if share_member and _ENSEMBLE in fitted:
        fitted["plugin"] = fitted[_ENSEMBLE].members_[0]
    elif share_member:
        diverged.append("plugin")
    names = [name for name in names if name in fitted]  # the order of preference
    if not names:
        raise FloatingPointError("every candidate router diverged in training (no epoch gave a "
                                 "finite validation score); check the features for extreme values")
    fitted = {name: fitted[name] for name in names}
    result = select_router(fitted, X[sel_idx], y[sel_idx], A[sel_idx], fees=fees,
                           cost_matrix=fitted[names[0]].cost_matrix_,
                           expert_names=expert_names,
                           class_proba_val=None if P is None else P[sel_idx], rule=rule)
    result.table.attrs["selection_index"] = sel_idx
    if diverged:
        result.table.attrs["notes"] = list(result.table.attrs.get("notes", [])) + [
            f"left out, because training diverged (no epoch gave a finite validation score): "
            f"{', '.join(diverged)}"]
    return result.best_name, fitted, result.table
