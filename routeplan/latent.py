"""Latent truth from the experts' answers alone: the Dawid-Skene model.

Dawid & Skene, "Maximum likelihood estimation of observer error-rates using the EM
algorithm", Applied Statistics 28(1), 1979. Known truth, where given, is held fixed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import ArrayLike, NDArray
from scipy import sparse
from scipy.special import logsumexp

from routeplan._answerframe import _case_positions, _check_answers, _check_range, _int_column

__all__ = ["DawidSkeneResult", "dawid_skene", "latent_accuracy_table"]


@dataclass(frozen=True)
class DawidSkeneResult:
    """Latent-truth estimates of the Dawid-Skene model.

    Attributes
    ----------
    experts : list of str
        Expert names, in the order of ``confusion``.
    cases : ndarray of shape (n_cases,)
        Case ids (sorted unique ``answers['case']``), in the order of ``posterior``.
    class_prior : ndarray of shape (K,)
        Estimated class proportions.
    confusion : ndarray of shape (M, K, K)
        ``confusion[j, k, l]``: probability that expert j answers l when the truth is k.
    posterior : ndarray of shape (n_cases, K)
        Probability of each class for each case given all answers.
    most_likely : ndarray of shape (n_cases,)
        Most probable class of each case.
    n_answers : ndarray of shape (M,)
        Answers each expert gave.
    fixed : ndarray of bool of shape (n_cases,)
        Cases whose class was fixed by known truth.
    n_iter : int
        EM iterations run.
    converged : bool
        Whether the largest parameter change fell below ``tol``.
    log_likelihood : float
        Log-likelihood of the answers (and of the known truth) at the estimates.
    """

    experts: list[str]
    cases: NDArray[Any]
    class_prior: NDArray[np.float64]
    confusion: NDArray[np.float64]
    posterior: NDArray[np.float64]
    most_likely: NDArray[np.int64]
    n_answers: NDArray[np.int64]
    fixed: NDArray[np.bool_]
    n_iter: int
    converged: bool
    log_likelihood: float

    def expert_accuracy(self) -> NDArray[np.float64]:
        """Estimated accuracy of each expert on the pool: ``sum_k prior_k * confusion[j, k, k]``."""
        diag = np.diagonal(self.confusion, axis1=1, axis2=2)
        return diag @ self.class_prior


def _ds_counts(
    answers: pd.DataFrame, n_classes: int
) -> tuple[sparse.csr_matrix, NDArray[Any], list[str], NDArray[np.int64]]:
    """Sparse (n_cases, M*K) answer counts, case ids, expert names and answers per expert."""
    answers = _check_answers(answers)
    answer = _int_column(answers["answer"].to_numpy(), "answers['answer']")
    _check_range(answer, n_classes, "answers['answer']", allow_missing=False)
    case, case_ids = pd.factorize(answers["case"], sort=True)
    expert, names = pd.factorize(answers["expert"].astype(str), sort=True)
    counts = sparse.csr_matrix(
        (np.ones(answer.size), (case, expert * n_classes + answer)),
        shape=(len(case_ids), len(names) * n_classes),
    )
    counts.sum_duplicates()
    n_answers = np.bincount(expert, minlength=len(names))
    return counts, np.asarray(case_ids), [str(n) for n in names], n_answers


def _ds_m_step(
    counts: sparse.csr_matrix, post: NDArray[np.float64], n_experts: int, k: int,
    smoothing: float,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Class prior and confusion matrices from posteriors (with additive smoothing)."""
    prior = (post.sum(axis=0) + smoothing) / (post.shape[0] + k * smoothing)
    joint = np.asarray(counts.T @ post).reshape(n_experts, k, k).transpose(0, 2, 1) + smoothing
    totals = joint.sum(axis=2, keepdims=True)
    # a class an expert never saw (possible without smoothing) gets a uniform row
    return prior, np.where(totals > 0, joint / np.where(totals > 0, totals, 1.0), 1.0 / k)


def _ds_log_joint(
    counts: sparse.csr_matrix, prior: NDArray[np.float64], conf: NDArray[np.float64]
) -> NDArray[np.float64]:
    """log p(class) + log p(answers | class), shape (n_cases, K)."""
    m, k, _ = conf.shape
    with np.errstate(divide="ignore"):  # zero rates (smoothing=0) give -inf, as they should
        log_conf = np.log(conf).transpose(0, 2, 1).reshape(m * k, k)
        return np.log(prior)[None, :] + np.asarray(counts @ log_conf)


def _normalise_log(log_joint: NDArray[np.float64]) -> NDArray[np.float64]:
    """Row-wise softmax of log weights (uniform where every weight is zero)."""
    top = log_joint.max(axis=1, keepdims=True)
    post = np.exp(log_joint - np.where(np.isfinite(top), top, 0.0))
    total = post.sum(axis=1, keepdims=True)
    return np.where(total > 0, post / np.where(total > 0, total, 1.0), 1.0 / post.shape[1])


def _clamp(post: NDArray[np.float64], known: NDArray[np.int64]) -> NDArray[np.float64]:
    """Set the posterior of cases with known truth to that class."""
    rows = np.flatnonzero(known >= 0)
    post[rows] = 0.0
    post[rows, known[rows]] = 1.0
    return post


def _ds_known(case_ids: NDArray[Any], truth: Any, k: int) -> NDArray[np.int64]:
    """Known truth of each DS case (-1 where unknown or no truth given)."""
    if truth is None:
        return np.full(case_ids.size, -1, dtype=np.int64)
    t = _int_column(truth, "truth").ravel()
    _check_range(t, k, "truth", allow_missing=True)
    return t[_case_positions(case_ids, truth, t.size)]


def dawid_skene(
    answers: pd.DataFrame,
    n_classes: int,
    *,
    truth: ArrayLike | None = None,
    max_iter: int = 100,
    tol: float = 1e-6,
    smoothing: float = 0.01,
) -> DawidSkeneResult:
    """Latent truth and per-expert confusion matrices by EM.

    Dawid, A. P. and Skene, A. M. (1979), "Maximum likelihood estimation of observer
    error-rates using the EM algorithm", Journal of the Royal Statistical Society,
    Series C (Applied Statistics) 28(1):20-28. Each case has a latent class drawn from
    the class proportions; each expert answers independently given it, through their
    own confusion matrix; repeated answers by one expert on one case enter as counts.
    EM starts, as in the paper, from each case's share of answers per class. Known
    truth, when given, fixes those cases' classes (a semi-supervised variant).

    Parameters
    ----------
    answers : DataFrame
        Long-form answers with columns case, expert, answer; repeated (case, expert)
        rows are allowed.
    n_classes : int
        Number of classes K.
    truth : array-like of int, default=None
        Truth per case as in `expert_accuracy_table` (-1 unknown); cases are then
        positions (or index ids) into it.
    max_iter : int, default=100
        Most EM iterations.
    tol : float, default=1e-6
        Stop when no class proportion or confusion entry moves more than this.
    smoothing : float, default=0.01
        Pseudo-count added to every class and confusion cell in the M-step, so that
        no estimate is exactly 0 (the EM then maximises a smoothed likelihood).

    Returns
    -------
    DawidSkeneResult
    """
    k = int(n_classes)
    if k < 2 or max_iter < 1 or tol <= 0 or smoothing < 0:
        raise ValueError("need n_classes >= 2, max_iter >= 1, tol > 0 and smoothing >= 0")
    counts, case_ids, names, n_answers = _ds_counts(answers, k)
    known = _ds_known(case_ids, truth, k)
    per_case = np.asarray(counts @ np.tile(np.eye(k), (len(names), 1)))
    post = _clamp(per_case / per_case.sum(axis=1, keepdims=True), known)
    prior, conf = _ds_m_step(counts, post, len(names), k, smoothing)
    converged, n_iter = False, 0
    for n_iter in range(1, max_iter + 1):
        log_joint = _ds_log_joint(counts, prior, conf)
        post = _clamp(_normalise_log(log_joint), known)
        new_prior, new_conf = _ds_m_step(counts, post, len(names), k, smoothing)
        change = max(np.abs(new_prior - prior).max(), np.abs(new_conf - conf).max())
        prior, conf = new_prior, new_conf
        if change < tol:
            converged = True
            break
    log_joint = _ds_log_joint(counts, prior, conf)
    post = _clamp(_normalise_log(log_joint), known)
    return DawidSkeneResult(
        experts=names, cases=case_ids, class_prior=prior, confusion=conf, posterior=post,
        most_likely=post.argmax(axis=1).astype(np.int64), n_answers=n_answers,
        fixed=known >= 0, n_iter=n_iter, converged=converged,
        log_likelihood=_ds_log_likelihood(log_joint, known),
    )


def _ds_log_likelihood(log_joint: NDArray[np.float64], known: NDArray[np.int64]) -> float:
    """Marginal log-likelihood over unknown cases plus the joint at known ones."""
    unknown = known < 0
    rows = np.flatnonzero(~unknown)
    return float(logsumexp(log_joint[unknown], axis=1).sum() + log_joint[rows, known[rows]].sum())


def latent_accuracy_table(result: DawidSkeneResult) -> pd.DataFrame:
    """Each expert's accuracy on the pool as estimated by the Dawid-Skene model.

    Parameters
    ----------
    result : DawidSkeneResult
        The output of `dawid_skene`.

    Returns
    -------
    DataFrame
        ``expert, basis`` (always ``"latent"``), ``n_answers, latent_accuracy``
        (``sum_k prior_k * confusion[j, k, k]``; no interval).
    """
    return pd.DataFrame({
        "expert": result.experts,
        "basis": "latent",
        "n_answers": result.n_answers,
        "latent_accuracy": result.expert_accuracy(),
    })
