"""Competence tables: how good each expert (and the model) is, with honest uncertainty.

Data model
----------
Label codes are ints ``0..K-1``; their names are passed separately as ``labels``.

``answers`` is a long-form DataFrame, one row per answer:

=========  ==================================================================
column     meaning
=========  ==================================================================
case       int position into ``truth`` (or an id from ``truth.index`` when
           ``truth`` is a Series with its own index)
expert     expert name (str); ``"model"`` is reserved
answer     int label code
audit      bool, True where the assignment was drawn uniformly at random
           (optional; missing means False)
weight     optional float, inverse selection probability (NaN for
           historical answers)
=========  ==================================================================

The same (case, expert) pair may occur more than once (an expert who rated a case
several times): accuracy tables count every answer, the latent-truth model uses the
counts, and the agreement tables use an expert's first answer on each case.

``truth`` is an int array (or Series) over cases, -1 where unknown. ``model_pred``,
``group`` and ``region`` are per-case arrays aligned with ``truth``.

Bases
-----
Every figure states the answers it rests on:

* ``truth`` (columns without prefix): every answer on a case whose truth is known.
  This describes the answers as they were gathered; when the cases were chosen by
  the acquisition it can be biased for the whole pool.
* ``audit`` (columns prefixed ``audit_``): only answers flagged ``audit=True`` with
  known truth. Audit assignments are drawn uniformly at random, so these are unbiased
  for the pool. Where every such answer of an expert carries a finite positive
  ``weight`` the rates are weighted (Hajek estimator) and intervals use Kish's
  effective sample size; ``audit_weighted`` says so.
* ``latent``: Dawid-Skene estimates, resting on every answer, truth or not.

The model's rows use one pseudo-answer per case with a prediction; its audit basis is
the cases that carry at least one audit answer, unweighted.

Counts and rates
----------------
Counts (``n_answered``, ``n_scored``, ``n_correct``, ``support``, ``n_predicted``) are
always plain numbers of answers, weighted or not, so that ``n_correct`` sits beside
``n_scored`` on the same scale. Rates (accuracy, recall, precision, kappa, cost saved)
are weighted where ``audit_weighted``, so on that basis ``audit_accuracy`` is the Hajek
estimate, not ``audit_n_correct / audit_n_scored``; ``audit_n_effective`` is Kish's
effective sample size ``(sum w)^2 / sum w^2``, the number of unweighted answers the
weighted ones are worth, on which the intervals rest.

Interval rule
-------------
Accuracies carry 95% Wilson score intervals (configurable). The cost saved against the
model (a difference of two error rates on the same cases) carries the Agresti-Min
adjusted Wald interval for paired proportions (Agresti and Min, Statistics in Medicine
2005); neither has zero width from a few answers, and both are nan only where there is
no answer to rest on. The model's own row has no cost saved (it would be the model
against itself). An interval wider than
``max_width`` (default 0.2, i.e. the accuracy is known no better than about +/-0.1)
is flagged ``too_wide``: too coarse to rank experts whose accuracies usually differ by
a few points, so gather more audit answers before acting on it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray

from routeplan._answerframe import _case_positions, _check_answers, _check_range, _int_column
from routeplan.agreement import agreement_table, fleiss_for_shared
from routeplan.errors import InputError
from routeplan.latent import DawidSkeneResult, dawid_skene, latent_accuracy_table
from routeplan.regions import region_summary, regions_from_features
from routeplan.stats import (
    _z_value,
    kappa_from_confusion,
    paired_difference_interval,
    wilson_interval,
)

__all__ = [
    "MODEL",
    "BASES",
    "CompetenceReport",
    "DawidSkeneResult",
    "agreement_table",
    "competence_report",
    "confusion_matrices",
    "dawid_skene",
    "expert_accuracy_table",
    "fleiss_for_shared",
    "latent_accuracy_table",
    "per_class_table",
    "region_summary",
    "regions_from_features",
    "workspace_competence",
]

MODEL = "model"
"""Reserved name of the model's row in every table."""

BASES = {
    "truth": "every answer on a case with known truth (describes the answers gathered)",
    "audit": "audit answers only (assignment drawn uniformly at random): unbiased for the pool",
    "latent": "Dawid-Skene latent-truth estimate from every answer, with or without truth",
}
"""What each basis named in the tables rests on."""

_BY_CHOICES = ("class", "group", "region")
_SAVING_COLUMNS = ("cost_saved_per_case", "cost_saved_low", "cost_saved_high",
                   "value_per_fee", "value_low", "value_high")


# --------------------------------------------------------------------------- preparation


@dataclass(frozen=True)
class _Prepared:
    """Validated long-form answers, the model appended as a pseudo-expert."""

    names: list[str]
    labels: list[str]
    code: NDArray[np.int64]
    case: NDArray[np.int64]
    answer: NDArray[np.int64]
    audit: NDArray[np.bool_]
    audit_weight: NDArray[np.float64]
    audit_weighted: NDArray[np.bool_]
    truth: NDArray[np.int64]
    model_pred: NDArray[np.int64] | None
    fees: NDArray[np.float64]

    @property
    def n_classes(self) -> int:
        """Number of classes K."""
        return len(self.labels)

    @property
    def truth_of(self) -> NDArray[np.int64]:
        """Truth of each answer's case (-1 where unknown)."""
        return self.truth[self.case]


def _infer_labels(
    labels: Any, n_classes: int | None, *codes: NDArray[np.int64]
) -> list[str]:
    """Resolve label names and K from the arguments or, failing that, from the codes."""
    if labels is not None:
        names = [str(x) for x in labels]
        if n_classes is not None and n_classes != len(names):
            raise ValueError("labels and n_classes disagree")
        return names
    if n_classes is None:
        highest = max((int(c.max()) for c in codes if c.size), default=0)
        n_classes = highest + 1
    if int(n_classes) != n_classes or n_classes < 1:
        raise ValueError(f"n_classes must be a positive integer, got {n_classes!r}")
    return [str(k) for k in range(int(n_classes))]


def _fee_array(fees: Any, names: list[str]) -> NDArray[np.float64]:
    """Fee of each name (nan where unknown and for the model)."""
    out = np.full(len(names), np.nan)
    if fees is None:
        return out
    if not isinstance(fees, (Mapping, pd.Series)):
        raise TypeError("fees must map expert names to fees")
    for i, name in enumerate(names):
        if name != MODEL and name in fees:
            fee = float(fees[name])
            if not np.isfinite(fee) or fee < 0:
                raise ValueError(f"fee of {name!r} must be finite and >= 0, got {fee!r}")
            out[i] = fee
    return out


def _audit_weights(
    code: NDArray[np.int64], audit: NDArray[np.bool_], has_truth: NDArray[np.bool_],
    weight: NDArray[np.float64], n_names: int,
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Per-answer audit weights, used for a name only when all its scored audit answers have one."""
    scored = audit & has_truth
    usable = np.isfinite(weight) & (weight > 0)
    n_bad = np.bincount(code[scored & ~usable], minlength=n_names)
    n_scored = np.bincount(code[scored], minlength=n_names)
    weighted = (n_bad == 0) & (n_scored > 0)
    w = np.where(weighted[code] & usable, weight, 1.0)
    return w, weighted


def _prepare(
    answers: pd.DataFrame,
    truth: Any,
    *,
    model_pred: Any = None,
    labels: Any = None,
    n_classes: int | None = None,
    fees: Any = None,
) -> _Prepared:
    """Validate the public inputs and build the long arrays every table uses."""
    answers = _check_answers(answers)
    t = _int_column(truth, "truth").ravel()
    case = _case_positions(answers["case"].to_numpy(), truth, t.size)
    answer = _int_column(answers["answer"].to_numpy(), "answers['answer']")
    pred = None if model_pred is None else _int_column(model_pred, "model_pred").ravel()
    if pred is not None and pred.size != t.size:
        raise ValueError("model_pred must have one entry per case, aligned with truth")
    names_list = _infer_labels(labels, n_classes, t, answer, *(() if pred is None else (pred,)))
    k = len(names_list)
    _check_range(answer, k, "answers['answer']", allow_missing=False)
    _check_range(t, k, "truth", allow_missing=True)
    if pred is not None:
        _check_range(pred, k, "model_pred", allow_missing=True)
    code, experts = pd.factorize(answers["expert"].astype(str), sort=True)
    names = [str(e) for e in experts]
    if MODEL in names and pred is not None:
        raise ValueError(f"{MODEL!r} is reserved for the model; rename that expert")
    audit = (
        answers["audit"].fillna(False).to_numpy(dtype=bool)
        if "audit" in answers.columns else np.zeros(len(answers), dtype=bool)
    )
    weight = (
        pd.to_numeric(answers["weight"], errors="coerce").to_numpy(dtype=float)
        if "weight" in answers.columns else np.full(len(answers), np.nan)
    )
    code = code.astype(np.int64)
    if pred is not None:
        code, case, answer, audit, weight, names = _append_model(
            code, case, answer, audit, weight, names, pred
        )
    w, weighted = _audit_weights(code, audit, t[case] >= 0, weight, len(names))
    return _Prepared(
        names=names, labels=names_list, code=code, case=case, answer=answer, audit=audit,
        audit_weight=w, audit_weighted=weighted, truth=t, model_pred=pred,
        fees=_fee_array(fees, names),
    )


def _append_model(
    code: NDArray[np.int64], case: NDArray[np.int64], answer: NDArray[np.int64],
    audit: NDArray[np.bool_], weight: NDArray[np.float64], names: list[str],
    pred: NDArray[np.int64],
) -> tuple[Any, ...]:
    """Append one pseudo-answer per predicted case under the name 'model'."""
    audit_case = np.zeros(pred.size, dtype=bool)
    audit_case[case[audit]] = True
    m_case = np.flatnonzero(pred >= 0)
    return (
        np.concatenate([code, np.full(m_case.size, len(names), dtype=np.int64)]),
        np.concatenate([case, m_case]),
        np.concatenate([answer, pred[m_case]]),
        np.concatenate([audit, audit_case[m_case]]),
        np.concatenate([weight, np.full(m_case.size, np.nan)]),
        [*names, MODEL],
    )


# --------------------------------------------------------------------------- core counting


def _confusions(
    row: NDArray[np.int64], t: NDArray[np.int64], a: NDArray[np.int64],
    w: NDArray[np.float64], n_rows: int, k: int,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Weighted and squared-weight confusion tensors of shape (n_rows, K, K)."""
    key = (row * k + t) * k + a
    size = n_rows * k * k
    c = np.bincount(key, weights=w, minlength=size).reshape(n_rows, k, k)
    c2 = np.bincount(key, weights=w * w, minlength=size).reshape(n_rows, k, k)
    return c, c2


def _effective_n(total: NDArray[np.float64], total_sq: NDArray[np.float64]) -> NDArray[np.float64]:
    """Kish effective sample size (sum w)^2 / sum w^2 (0 where empty)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(total_sq > 0, total**2 / total_sq, 0.0)


def _rate_interval(
    hits: NDArray[np.float64], total: NDArray[np.float64], n_eff: NDArray[np.float64],
    confidence: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """(Weighted) proportion with a Wilson interval on the effective sample size."""
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = np.where(total > 0, hits / total, np.nan)
    low, high = wilson_interval(np.nan_to_num(rate) * n_eff, n_eff, confidence)
    return rate, np.atleast_1d(low), np.atleast_1d(high)


def _paired_saving(
    row: NDArray[np.int64], expert_wrong: NDArray[np.float64],
    model_wrong: NDArray[np.float64], w: NDArray[np.float64], n_rows: int, confidence: float,
) -> dict[str, NDArray[np.float64]]:
    """Per row: model accuracy and mean (model wrong - expert wrong) with an interval.

    The mean is the plain (weighted) difference of the two error rates on the same
    cases. Its interval is the Agresti-Min adjusted Wald interval for paired
    proportions (:func:`routeplan.stats.paired_difference_interval`), on the weighted
    shares of the two discordant cells scaled to Kish's effective sample size; it
    never has zero width, unlike a normal interval whose sample variance is 0 when
    the few answers all agree with the model or all differ the same way.
    """
    ok = ~np.isnan(model_wrong)
    r, wp = row[ok], w[ok]
    d = model_wrong[ok] - expert_wrong[ok]
    s_w = np.bincount(r, weights=wp, minlength=n_rows)
    s_w2 = np.bincount(r, weights=wp * wp, minlength=n_rows)
    s_b = np.bincount(r, weights=wp * (d > 0), minlength=n_rows)  # model wrong, expert right
    s_c = np.bincount(r, weights=wp * (d < 0), minlength=n_rows)  # model right, expert wrong
    s_m = np.bincount(r, weights=wp * model_wrong[ok], minlength=n_rows)
    n_eff = _effective_n(s_w, s_w2)
    with np.errstate(divide="ignore", invalid="ignore"):
        share_b = np.where(s_w > 0, s_b / s_w, 0.0)
        share_c = np.where(s_w > 0, s_c / s_w, 0.0)
        mean = np.where(s_w > 0, share_b - share_c, np.nan)
        model_acc = np.where(s_w > 0, 1.0 - s_m / s_w, np.nan)
    low, high = paired_difference_interval(share_b * n_eff, share_c * n_eff, n_eff, confidence)
    return {"model_accuracy": model_acc, "saving": mean,
            "saving_low": np.atleast_1d(low), "saving_high": np.atleast_1d(high)}


def _model_wrong(prep: _Prepared) -> NDArray[np.float64]:
    """Whether the model is wrong on each answer's case (nan where unknown)."""
    t = prep.truth_of
    if prep.model_pred is None:
        return np.full(t.size, np.nan)
    p = prep.model_pred[prep.case]
    return np.where((p >= 0) & (t >= 0), (p != t).astype(float), np.nan)


def _basis_columns(
    prep: _Prepared, row: NDArray[np.int64], mask: NDArray[np.bool_],
    w: NDArray[np.float64], fee: NDArray[np.float64], n_rows: int, *,
    error_cost: float, confidence: float, max_width: float,
) -> dict[str, NDArray[Any]]:
    """Every figure of the accuracy table for one basis (answers in ``mask``)."""
    r, t, a, wm = row[mask], prep.truth_of[mask], prep.answer[mask], w[mask]
    c, c2 = _confusions(r, t, a, wm, n_rows, prep.n_classes)
    total, total_sq = c.sum(axis=(1, 2)), c2.sum(axis=(1, 2))
    correct = np.trace(c, axis1=1, axis2=2)
    n_eff = _effective_n(total, total_sq)
    acc, low, high = _rate_interval(correct, total, n_eff, confidence)
    pair = _paired_saving(
        r, (t != a).astype(float), _model_wrong(prep)[mask], wm, n_rows, confidence
    )
    saving = {k: pair[k] * error_cost for k in ("saving", "saving_low", "saving_high")}
    with np.errstate(divide="ignore", invalid="ignore"):
        per_fee = {k: np.where(fee > 0, v / fee, np.nan) for k, v in saving.items()}
    return {
        "n_scored": np.bincount(r, minlength=n_rows),
        "n_effective": n_eff,
        "n_correct": np.bincount(r, weights=(t == a).astype(float), minlength=n_rows)
        .round().astype(np.int64),
        "accuracy": acc,
        "accuracy_low": low,
        "accuracy_high": high,
        "too_wide": ~(high - low <= max_width),
        "kappa": np.atleast_1d(kappa_from_confusion(c)),
        "model_accuracy": pair["model_accuracy"],
        "cost_saved_per_case": saving["saving"],
        "cost_saved_low": saving["saving_low"],
        "cost_saved_high": saving["saving_high"],
        "value_per_fee": per_fee["saving"],
        "value_low": per_fee["saving_low"],
        "value_high": per_fee["saving_high"],
    }


# --------------------------------------------------------------------------- levels


def _levels(
    prep: _Prepared, by: str | None, group: Any, region: Any
) -> tuple[NDArray[np.int64], list[Any], str | None]:
    """Level code of each answer (-1: left out), the level names and the level column."""
    n = prep.code.size
    if by is None:
        return np.zeros(n, dtype=np.int64), [None], None
    if by not in _BY_CHOICES:
        raise ValueError(f"by must be one of {_BY_CHOICES} or None, got {by!r}")
    if by == "class":
        return prep.truth_of, list(prep.labels), "class"
    values = group if by == "group" else region
    if values is None:
        raise ValueError(f"by={by!r} needs the per-case {by} array")
    per_case = pd.Series(np.asarray(values).ravel())
    if per_case.size != prep.truth.size:
        raise ValueError(f"{by} must have one entry per case, aligned with truth")
    if by == "region":
        per_case = pd.Series(_int_column(per_case.to_numpy(), "region"))
    codes, uniques = pd.factorize(per_case, sort=True, use_na_sentinel=True)
    return codes.astype(np.int64)[prep.case], list(uniques), by


def _validate_options(error_cost: float, confidence: float, max_width: float) -> None:
    """Check the numeric options shared by the tables."""
    if not np.isfinite(error_cost) or error_cost <= 0:
        raise ValueError(f"error_cost must be a positive number, got {error_cost!r}")
    _z_value(confidence)
    if not 0 < max_width <= 1:
        raise ValueError(f"max_width must be in (0, 1], got {max_width!r}")


def _accuracy_from_prepared(
    prep: _Prepared, *, by: str | None, group: Any, region: Any, error_cost: float,
    confidence: float, max_width: float,
) -> pd.DataFrame:
    """Build the accuracy table from prepared arrays."""
    _validate_options(error_cost, confidence, max_width)
    level, level_names, level_col = _levels(prep, by, group, region)
    n_levels = len(level_names)
    keep = level >= 0
    row = np.where(keep, prep.code * n_levels + level, 0)
    n_rows = len(prep.names) * n_levels
    name_of_row = np.repeat(np.arange(len(prep.names)), n_levels)
    fee = prep.fees[name_of_row]
    scored = keep & (prep.truth_of >= 0)
    opts = {"error_cost": error_cost, "confidence": confidence, "max_width": max_width}
    ones = np.ones(prep.code.size)
    main = _basis_columns(prep, row, scored, ones, fee, n_rows, **opts)
    audit = _basis_columns(prep, row, scored & prep.audit, prep.audit_weight, fee, n_rows, **opts)
    if prep.model_pred is not None:  # the model against itself: nothing to estimate
        is_model = name_of_row == len(prep.names) - 1
        for columns in (main, audit):
            for key in _SAVING_COLUMNS:
                columns[key] = np.where(is_model, np.nan, columns[key])
    frame: dict[str, Any] = {"expert": [prep.names[i] for i in name_of_row]}
    if level_col is not None:
        frame[level_col] = [level_names[j] for j in np.tile(np.arange(n_levels), len(prep.names))]
    frame["n_answered"] = np.bincount(row[keep], minlength=n_rows)
    frame["fee"] = fee
    frame.update(main)
    frame["audit_weighted"] = prep.audit_weighted[name_of_row]
    frame.update({f"audit_{k}": v for k, v in audit.items()})
    table = pd.DataFrame(frame)
    table = table[table["n_answered"] > 0].reset_index(drop=True)
    table.attrs["basis"] = {"": BASES["truth"], "audit_": BASES["audit"]}
    return table


def expert_accuracy_table(
    answers: pd.DataFrame,
    truth: ArrayLike,
    *,
    fees: Mapping[str, float] | pd.Series | None = None,
    model_pred: ArrayLike | None = None,
    error_cost: float = 1.0,
    by: str | None = None,
    labels: list[str] | None = None,
    n_classes: int | None = None,
    group: ArrayLike | None = None,
    region: ArrayLike | None = None,
    confidence: float = 0.95,
    max_width: float = 0.2,
) -> pd.DataFrame:
    """Accuracy of each expert and of the model, with intervals and fee-adjusted value.

    Accuracy carries a Wilson score interval (Wilson, JASA 1927); agreement with truth
    is Cohen's kappa (Cohen, Educ. Psychol. Meas. 1960). The fee-adjusted value is the
    expected error cost saved per unit of fee by asking the expert instead of letting
    the model decide, on the same answers:
    ``(model error rate - expert error rate) * error_cost / fee``, with the
    Agresti-Min adjusted Wald interval for a difference of paired proportions (Agresti
    and Min, "Simple improved confidence intervals for comparing matched proportions",
    Statistics in Medicine 24(5):729-740, 2005; see
    `routeplan.stats.paired_difference_interval`), on Kish's effective sample size
    where the audit answers are weighted. The figure itself is the plain difference;
    it lies inside that interval for every table of up to 200 answers at confidence
    levels 0.9 to 0.99 (checked by enumeration in ``tests/test_stats.py``).

    Parameters
    ----------
    answers : DataFrame
        Long-form answers (see the module docstring): case, expert, answer[, audit, weight].
    truth : array-like of int of shape (n_cases,)
        True label code of each case, -1 where unknown.
    fees : mapping of str to float, default=None
        Fee per answer of each expert, in the unit of ``error_cost``.
    model_pred : array-like of int of shape (n_cases,), default=None
        The model's label code per case (-1 where none); adds the ``"model"`` row and
        the model comparison columns.
    error_cost : float, default=1.0
        Cost of one wrong decision.
    by : {"class", "group", "region"}, default=None
        Split each row by true class, by ``group`` or by ``region``.
    labels : list of str, default=None
        Label names; their number fixes K.
    n_classes : int, default=None
        K when ``labels`` is not given; inferred from the codes otherwise.
    group, region : array-like of shape (n_cases,), default=None
        Per-case group (e.g. site or shift) and region (see `regions_from_features`).
    confidence : float, default=0.95
        Confidence level of every interval.
    max_width : float, default=0.2
        Accuracy intervals wider than this are flagged ``too_wide``.

    Returns
    -------
    DataFrame
        One row per expert and the model (per (expert, level) with ``by``), rows
        with no answers dropped. Columns: ``expert``, the level column (named after
        ``by``), ``n_answered`` (answers given, known truth or not), ``fee``, then for
        the truth basis ``n_scored, n_effective, n_correct, accuracy, accuracy_low,
        accuracy_high, too_wide, kappa, model_accuracy, cost_saved_per_case,
        cost_saved_low, cost_saved_high, value_per_fee, value_low, value_high``, then
        ``audit_weighted`` and the same figures on the audit basis prefixed
        ``audit_``. ``n_correct`` is the plain number of right answers; ``accuracy``
        is weighted where ``audit_weighted`` (then ``n_effective`` is Kish's effective
        sample size, on which the interval rests). ``value_*`` is nan where the fee is
        zero or unknown; ``cost_saved_*`` and ``value_*`` are nan on the model's own
        row; the model columns are nan without ``model_pred``. ``attrs["basis"]``
        describes the prefixes.
    """
    prep = _prepare(
        answers, truth, model_pred=model_pred, labels=labels, n_classes=n_classes, fees=fees
    )
    return _accuracy_from_prepared(
        prep, by=by, group=group, region=region, error_cost=error_cost,
        confidence=confidence, max_width=max_width,
    )


# --------------------------------------------------------------------------- per class, confusion


def _basis_mask_weights(
    prep: _Prepared, basis: str
) -> tuple[NDArray[np.bool_], NDArray[np.float64]]:
    """Answers and weights a basis rests on."""
    scored = prep.truth_of >= 0
    if basis == "truth":
        return scored, np.ones(prep.code.size)
    if basis == "audit":
        return scored & prep.audit, prep.audit_weight
    raise ValueError(f"basis must be 'truth' or 'audit', got {basis!r}")


def _per_class_from_prepared(prep: _Prepared, basis: str, confidence: float) -> pd.DataFrame:
    """Build the per-class table from prepared arrays."""
    mask, w = _basis_mask_weights(prep, basis)
    k, n_names = prep.n_classes, len(prep.names)
    c, c2 = _confusions(
        prep.code[mask], prep.truth_of[mask], prep.answer[mask], w[mask], n_names, k
    )
    n, _ = _confusions(
        prep.code[mask], prep.truth_of[mask], prep.answer[mask], np.ones(mask.sum()), n_names, k
    )
    diag = np.diagonal(c, axis1=1, axis2=2)
    rows, cols = c.sum(axis=2), c.sum(axis=1)
    recall = _rate_interval(diag, rows, _effective_n(rows, c2.sum(axis=2)), confidence)
    precision = _rate_interval(diag, cols, _effective_n(cols, c2.sum(axis=1)), confidence)
    with np.errstate(divide="ignore", invalid="ignore"):
        f1 = 2 * recall[0] * precision[0] / (recall[0] + precision[0])
    flat = {
        "support": np.rint(n.sum(axis=2)).astype(np.int64), "recall": recall[0],
        "recall_low": recall[1], "recall_high": recall[2],
        "n_predicted": np.rint(n.sum(axis=1)).astype(np.int64), "precision": precision[0],
        "precision_low": precision[1], "precision_high": precision[2], "f1": f1,
    }
    table = pd.DataFrame({
        "expert": np.repeat(prep.names, k),
        "class": np.tile(prep.labels, n_names),
        **{key: np.asarray(v).reshape(-1) for key, v in flat.items()},
    })
    table.insert(2, "basis", basis)
    keep = np.repeat(n.sum(axis=(1, 2)) > 0, k)
    return table[keep].reset_index(drop=True)


def per_class_table(
    answers: pd.DataFrame,
    truth: ArrayLike,
    *,
    model_pred: ArrayLike | None = None,
    labels: list[str] | None = None,
    n_classes: int | None = None,
    basis: str = "truth",
    confidence: float = 0.95,
) -> pd.DataFrame:
    """Recall and precision of each expert and the model per class, with Wilson intervals.

    Parameters
    ----------
    answers, truth, model_pred, labels, n_classes
        As in `expert_accuracy_table`.
    basis : {"truth", "audit"}, default="truth"
        Which answers the figures rest on (see the module docstring).
    confidence : float, default=0.95
        Confidence level of the Wilson intervals (Wilson, JASA 1927).

    Returns
    -------
    DataFrame
        One row per (expert, class) for experts with scored answers: ``expert, class,
        basis, support`` (answers whose truth is the class), ``recall, recall_low,
        recall_high, n_predicted`` (answers giving the class), ``precision,
        precision_low, precision_high, f1``. Rates are nan where undefined.
    """
    _z_value(confidence)
    prep = _prepare(answers, truth, model_pred=model_pred, labels=labels, n_classes=n_classes)
    return _per_class_from_prepared(prep, basis, confidence)


def _confusions_from_prepared(prep: _Prepared, basis: str) -> dict[str, NDArray[Any]]:
    """Confusion matrix per name from prepared arrays."""
    mask, w = _basis_mask_weights(prep, basis)
    k, n_names = prep.n_classes, len(prep.names)
    c, _ = _confusions(prep.code[mask], prep.truth_of[mask], prep.answer[mask], w[mask], n_names, k)
    unweighted = basis == "truth" or not prep.audit_weighted.any()
    if unweighted:
        c = np.rint(c).astype(np.int64)
    return {name: c[i] for i, name in enumerate(prep.names) if c[i].sum() > 0}


def confusion_matrices(
    answers: pd.DataFrame,
    truth: ArrayLike,
    *,
    model_pred: ArrayLike | None = None,
    labels: list[str] | None = None,
    n_classes: int | None = None,
    basis: str = "truth",
) -> dict[str, NDArray[Any]]:
    """Confusion matrix of each expert and of the model against truth.

    Parameters
    ----------
    answers, truth, model_pred, labels, n_classes
        As in `expert_accuracy_table`.
    basis : {"truth", "audit"}, default="truth"
        Which answers the counts rest on.

    Returns
    -------
    dict of str to ndarray of shape (K, K)
        Keyed by expert name (and ``"model"``), true classes on rows and answers on
        columns, for every name with scored answers. Counts are int64; on the audit
        basis with weights they are weighted float counts.
    """
    prep = _prepare(answers, truth, model_pred=model_pred, labels=labels, n_classes=n_classes)
    return _confusions_from_prepared(prep, basis)


# --------------------------------------------------------------------------- the report


def _jsonable(value: Any) -> Any:
    """Convert numpy / pandas values to plain JSON types (nan -> None)."""
    if isinstance(value, pd.DataFrame):
        return [
            {str(c): _jsonable(v) for c, v in zip(value.columns, row)}
            for row in value.itertuples(index=False, name=None)
        ]
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_jsonable(v) for v in value]
    if isinstance(value, (np.bool_, bool)):
        return bool(value)
    if isinstance(value, (np.integer, int)):
        return int(value)
    if isinstance(value, (np.floating, float)):
        return float(value) if np.isfinite(value) else None
    if value is None or isinstance(value, str):
        return value
    return str(value)


@dataclass(frozen=True)
class CompetenceReport:
    """Every competence table for one set of answers.

    Attributes
    ----------
    labels : list of str
        Label names, indexed by code.
    accuracy : DataFrame
        `expert_accuracy_table` without ``by``.
    by_class, by_group, by_region : DataFrame or None
        The same table split by true class, group and region (None when not asked for).
    per_class : DataFrame
        `per_class_table` on the truth basis.
    confusion : dict of str to ndarray
        `confusion_matrices` on the truth basis.
    agreement : DataFrame
        `agreement_table` between experts.
    fleiss : DataFrame
        `fleiss_for_shared` over rater sets of three or more.
    latent : DawidSkeneResult or None
        Dawid-Skene estimates (known truth fixed), when run.
    latent_accuracy : DataFrame or None
        `latent_accuracy_table` of ``latent``.
    settings : dict
        confidence, max_width, error_cost and the basis descriptions.
    """

    labels: list[str]
    accuracy: pd.DataFrame
    by_class: pd.DataFrame | None
    by_group: pd.DataFrame | None
    by_region: pd.DataFrame | None
    per_class: pd.DataFrame
    confusion: dict[str, NDArray[Any]]
    agreement: pd.DataFrame
    fleiss: pd.DataFrame
    latent: DawidSkeneResult | None
    latent_accuracy: pd.DataFrame | None
    settings: dict[str, Any] = field(default_factory=dict)

    def to_dict(self, *, include_cases: bool = True) -> dict[str, Any]:
        """Plain-JSON form of the report (tables as lists of records, nan as null).

        Parameters
        ----------
        include_cases : bool, default=True
            Include the latent estimate of every case without known truth
            (``case, most_likely, probability``); set False to keep the output small.

        Returns
        -------
        dict
            Serialisable by ``json.dumps``.
        """
        tables = ("accuracy", "by_class", "by_group", "by_region", "per_class",
                  "agreement", "fleiss", "latent_accuracy")
        out: dict[str, Any] = {"labels": list(self.labels), "settings": _jsonable(self.settings)}
        out.update({name: _jsonable(getattr(self, name)) for name in tables})
        out["confusion"] = _jsonable(self.confusion)
        out["latent"] = None if self.latent is None else self._latent_dict(include_cases)
        return out

    def _latent_dict(self, include_cases: bool) -> dict[str, Any]:
        """JSON form of the Dawid-Skene result."""
        res = self.latent
        assert res is not None
        out = {
            "class_prior": _jsonable(res.class_prior),
            "confusion": {e: _jsonable(res.confusion[j]) for j, e in enumerate(res.experts)},
            "n_iter": res.n_iter, "converged": res.converged,
            "log_likelihood": _jsonable(res.log_likelihood),
        }
        if include_cases:
            unknown = ~res.fixed
            out["cases"] = [
                {"case": _jsonable(c), "most_likely": int(m), "probability": float(p)}
                for c, m, p in zip(res.cases[unknown], res.most_likely[unknown],
                                   res.posterior[unknown].max(axis=1))
            ]
        return out


def _run_latent(answers: pd.DataFrame, prep: _Prepared, truth: Any, latent: str | bool) -> Any:
    """Run Dawid-Skene when asked, or ('auto') when some answered case lacks truth."""
    if latent not in ("auto", True, False):
        raise ValueError(f"latent must be 'auto', True or False, got {latent!r}")
    experts_only = prep.code < len(prep.names) - (prep.model_pred is not None)
    needed = bool(np.any(prep.truth_of[experts_only] < 0))
    if latent is False or (latent == "auto" and not needed) or prep.n_classes < 2:
        return None
    return dawid_skene(answers, prep.n_classes, truth=truth)


def competence_report(
    answers: pd.DataFrame,
    truth: ArrayLike,
    *,
    labels: list[str] | None = None,
    n_classes: int | None = None,
    fees: Mapping[str, float] | pd.Series | None = None,
    model_pred: ArrayLike | None = None,
    error_cost: float = 1.0,
    group: ArrayLike | None = None,
    region: ArrayLike | None = None,
    confidence: float = 0.95,
    max_width: float = 0.2,
    latent: str | bool = "auto",
) -> CompetenceReport:
    """Build every competence table at once.

    Parameters
    ----------
    answers, truth, labels, n_classes, fees, model_pred, error_cost, group, region, \
confidence, max_width
        As in `expert_accuracy_table`.
    latent : {"auto", True, False}, default="auto"
        Run the Dawid-Skene latent-truth model (Dawid and Skene, Applied Statistics
        1979) with known truth fixed; "auto" runs it when some answered case has no
        known truth.

    Returns
    -------
    CompetenceReport
    """
    prep = _prepare(
        answers, truth, model_pred=model_pred, labels=labels, n_classes=n_classes, fees=fees
    )
    opts = {"error_cost": error_cost, "confidence": confidence, "max_width": max_width}

    def split(by: str, values: Any) -> pd.DataFrame | None:
        if by != "class" and values is None:
            return None
        return _accuracy_from_prepared(prep, by=by, group=group, region=region, **opts)

    result = _run_latent(answers, prep, truth, latent)
    k = prep.n_classes
    return CompetenceReport(
        labels=list(prep.labels),
        accuracy=_accuracy_from_prepared(prep, by=None, group=None, region=None, **opts),
        by_class=split("class", None), by_group=split("group", group),
        by_region=split("region", region),
        per_class=_per_class_from_prepared(prep, "truth", confidence),
        confusion=_confusions_from_prepared(prep, "truth"),
        agreement=agreement_table(answers, k), fleiss=fleiss_for_shared(answers, k),
        latent=result, latent_accuracy=None if result is None else latent_accuracy_table(result),
        settings={**opts, "bases": dict(BASES)},
    )


def pool_competence(pool: Any, *, model_pred: ArrayLike | None = None, n_regions: int = 6,
                    random_state: int = 0, latent: str | bool = "auto") -> CompetenceReport:
    """Every competence table for a workspace's :class:`routeplan.pool.Pool`.

    Parameters
    ----------
    pool : routeplan.pool.Pool
    model_pred : array-like of shape (n_cases,), optional
        The model's class per case, -1 where it should not be scored (cases it was trained on).
    n_regions : int, default=6
        Regions of the feature space (k-means on standardised features).
    random_state : int, default=0
        Seed of the k-means.
    latent : {"auto", True, False}, default="auto"
        Run Dawid-Skene (see :func:`competence_report`).

    Returns
    -------
    CompetenceReport
    """
    answers = pool.long_answers()
    groups = pool.group
    has_group = _has_group(groups)
    n_regions = max(1, min(int(n_regions), len(pool.y)))
    region = regions_from_features(pool.X, n_regions=n_regions, random_state=random_state) if len(pool.y) else None
    return competence_report(
        answers,
        pool.y,
        labels=list(pool.labels),
        n_classes=pool.n_classes,
        fees=dict(zip(pool.experts, map(float, pool.fees))),
        model_pred=model_pred,
        error_cost=pool.error_cost,
        group=np.array([g if g is not None else "(none)" for g in groups], dtype=object) if has_group else None,
        region=region,
        latent=latent,
    )


# --------------------------------------------------------------------------- a workspace's report and files


def workspace_competence(
    ws: Any,
    *,
    by: str | None = None,
    basis: str = "truth",
    n_regions: int = 6,
    random_state: int = 0,
    csv_path: str | Path | None = None,
    plot_path: str | Path | None = None,
    overwrite: bool = False,
) -> CompetenceReport:
    """Every competence table of a workspace, with the CSV table and the heatmap written if asked.

    Every check comes before anything is written: the output paths (not the workspace's
    database, not the same file twice, folder there, no file replaced without
    ``overwrite``, a plot extension matplotlib writes), a group column for ``by="group"``,
    and, for the heatmap, at least one accuracy on the chosen basis to show. The table and
    the heatmap are then written all or none (:func:`routeplan.files.write_csvs`): if one
    cannot be written, neither new file stays and files already there keep their content.

    Parameters
    ----------
    ws : routeplan.workspace.Workspace
    by : {"class", "group", "region"}, optional
        The breakdown written to ``csv_path`` and drawn in the heatmap (class by default).
    basis : {"truth", "audit"}, default="truth"
        The accuracy the heatmap shows.
    n_regions : int, default=6
    random_state : int, default=0
        Seed of the region clustering.
    csv_path, plot_path : str or Path, optional
        Where to write the table and the heatmap.
    overwrite : bool, default=False
        Replace files already there.

    Returns
    -------
    CompetenceReport

    Raises
    ------
    InputError
        A bad output path, ``by="group"`` without an imported group column, or a heatmap
        with nothing to show.
    OutputError
        The table or the heatmap could not be written (no permission, a full disk...).
    """
    from routeplan.figures import check_plot_path, competence_heatmap_writer
    from routeplan.files import check_outputs, write_csvs
    from routeplan.fitting import held_out_predictions
    from routeplan.pool import load_pool

    csv_path = None if csv_path is None else Path(csv_path)
    plot_path = None if plot_path is None else Path(plot_path)
    check_outputs({"--csv": csv_path, "--plot": plot_path}, overwrite=overwrite, workspace=ws.folder)
    if plot_path is not None:
        check_plot_path(plot_path)
    pool = load_pool(ws)
    if by == "group" and not _has_group(pool.group):
        raise InputError("--by group: no group column was imported; name one when importing cases "
                         "('routeplan cases import FILE --group-column COLUMN')")
    report = pool_competence(pool, model_pred=held_out_predictions(ws, pool), n_regions=n_regions,
                             random_state=random_state)
    level = by or "class"
    column = "audit_accuracy" if basis == "audit" else "accuracy"
    if plot_path is not None:
        _check_plottable(getattr(report, f"by_{level}"), column, basis)
    tables, plots = {}, {}
    if csv_path is not None:
        tables[csv_path] = getattr(report, f"by_{by}") if by else report.accuracy
    if plot_path is not None:
        plots[plot_path] = competence_heatmap_writer(getattr(report, f"by_{level}"), level, plot_path,
                                                     accuracy_column=column)
    write_csvs(tables, others=plots)  # the table and the heatmap: both or neither
    return report


def _has_group(groups: Any) -> bool:
    """True if at least one case has a group."""
    return groups is not None and any(g is not None for g in groups)


def _check_plottable(frame: pd.DataFrame | None, column: str, basis: str) -> None:
    """Refuse a heatmap without a single accuracy to show (it would be an empty grid)."""
    values = np.array([], dtype=float) if frame is None else pd.to_numeric(frame[column], errors="coerce").to_numpy()
    if np.isfinite(values).any():
        return
    if basis == "audit":
        raise InputError("--basis audit --plot: no audit answer on a case with known truth yet, so the heatmap "
                         "would be empty; import the answers of a round planned with --audit-share above 0, "
                         "or plot the truth basis")
    raise InputError("--plot: no answer on a case with known truth yet, so the heatmap would be empty; "
                     "import truth and answers first")
