"""Agreement between experts: pairwise Cohen's kappa and Fleiss' kappa per rater set.

Both rest on each expert's first answer per case, on the long-form answers frame of
:mod:`routeplan.competence`; the statistics themselves are in :mod:`routeplan.stats`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numpy.typing import NDArray

from routeplan._answerframe import _check_answers, _check_range, _int_column
from routeplan.stats import fleiss_kappa, kappa_from_confusion

__all__ = ["agreement_table", "fleiss_for_shared"]


def _first_answer_matrix(
    answers: pd.DataFrame, n_classes: int
) -> tuple[NDArray[np.int64], list[str]]:
    """Dense (n_cases, n_experts) matrix of each expert's first answer per case (-1: none)."""
    answers = _check_answers(answers)
    answer = _int_column(answers["answer"].to_numpy(), "answers['answer']")
    _check_range(answer, n_classes, "answers['answer']", allow_missing=False)
    case, _ = pd.factorize(answers["case"])
    expert, names = pd.factorize(answers["expert"].astype(str), sort=True)
    matrix = np.full((int(case.max(initial=-1)) + 1, len(names)), -1, dtype=np.int64)
    # np.unique returns each key's first occurrence: a repeated pair keeps its first answer
    _, first = np.unique(case.astype(np.int64) * len(names) + expert, return_index=True)
    matrix[case[first], expert[first]] = answer[first]
    return matrix, [str(n) for n in names]


def _kappa_pair(x: NDArray[np.int64], y: NDArray[np.int64], k: int) -> tuple[int, float, float]:
    """Shared count, observed agreement and Cohen's kappa of two answer columns."""
    both = (x >= 0) & (y >= 0)
    c = np.bincount(x[both] * k + y[both], minlength=k * k).reshape(k, k)
    n = int(both.sum())
    agree = float(np.trace(c) / n) if n else float("nan")
    return n, agree, float(kappa_from_confusion(c))


def agreement_table(answers: pd.DataFrame, n_classes: int) -> pd.DataFrame:
    """Pairwise Cohen's kappa between experts on the cases both answered.

    Cohen, J. (1960), "A coefficient of agreement for nominal scales", Educational and
    Psychological Measurement 20(1):37-46. No truth is needed. An expert who answered
    a case several times contributes the first answer.

    Parameters
    ----------
    answers : DataFrame
        Long-form answers with columns case, expert, answer.
    n_classes : int
        Number of classes K.

    Returns
    -------
    DataFrame
        One row per expert pair (``expert_a < expert_b``): ``expert_a, expert_b,
        n_shared, agreement`` (observed share of equal answers), ``kappa``; nan where
        the pair shares no case or kappa is undefined.
    """
    matrix, names = _first_answer_matrix(answers, int(n_classes))
    rows = []
    for i in range(len(names)):
        for j in range(i + 1, len(names)):
            n, agree, kappa = _kappa_pair(matrix[:, i], matrix[:, j], int(n_classes))
            rows.append((names[i], names[j], n, agree, kappa))
    columns = ["expert_a", "expert_b", "n_shared", "agreement", "kappa"]
    return pd.DataFrame(rows, columns=columns)


def _rater_sets(answered: NDArray[np.bool_]) -> tuple[NDArray[np.bool_], NDArray[np.int64]]:
    """Distinct rows of a boolean (n_cases, M) matrix and each case's set code."""
    n_cols = answered.shape[1]
    if n_cols <= 62:
        bits = answered.astype(np.int64) @ (np.int64(1) << np.arange(n_cols, dtype=np.int64))
        keys, code = np.unique(bits, return_inverse=True)
        members = ((keys[:, None] >> np.arange(n_cols)) & 1).astype(bool)
        return members, code.ravel()
    members, code = np.unique(answered, axis=0, return_inverse=True)
    return members, code.ravel()


def fleiss_for_shared(
    answers: pd.DataFrame,
    n_classes: int,
    *,
    experts: list[str] | None = None,
    min_raters: int = 3,
    min_cases: int = 10,
) -> pd.DataFrame:
    """Fleiss' kappa over cases that three or more experts all answered.

    Fleiss, J. L. (1971), "Measuring nominal scale agreement among many raters",
    Psychological Bulletin 76(5):378-382. The statistic needs the same raters' count on
    every case, so cases are grouped by the exact set of experts who answered them;
    with ``experts`` given, one kappa is computed for those experts over every case
    all of them answered (other experts' answers ignored). Each expert's first answer
    per case is used.

    Parameters
    ----------
    answers : DataFrame
        Long-form answers with columns case, expert, answer.
    n_classes : int
        Number of classes K.
    experts : list of str, default=None
        A fixed panel of experts; by default every rater set is considered.
    min_raters : int, default=3
        Smallest rater set reported.
    min_cases : int, default=10
        Smallest number of shared cases reported.

    Returns
    -------
    DataFrame
        One row per rater set, most shared cases first: ``experts`` (comma-joined
        names), ``n_raters, n_cases, kappa``. Empty when no set qualifies.
    """
    k = int(n_classes)
    matrix, names = _first_answer_matrix(answers, k)
    if experts is not None:
        unknown = sorted(set(experts) - set(names))
        if unknown:
            raise ValueError(f"experts {unknown} gave no answers")
        cols = [names.index(e) for e in experts]
        matrix, names = matrix[:, cols], list(experts)
        matrix = matrix[np.all(matrix >= 0, axis=1)]
    answered = matrix >= 0
    n_raters = answered.sum(axis=1)
    mask_ids, set_code = _rater_sets(answered)
    counts = np.zeros((matrix.shape[0], k), dtype=np.int64)
    for j in range(matrix.shape[1]):
        ok = answered[:, j]
        counts[np.flatnonzero(ok), matrix[ok, j]] += 1
    rows = []
    for s, members in enumerate(mask_ids):
        idx = np.flatnonzero(set_code == s)
        if members.sum() < max(min_raters, 2) or idx.size < max(min_cases, 1):
            continue
        joined = ", ".join(n for n, m in zip(names, members) if m)
        rows.append((joined, int(n_raters[idx[0]]), int(idx.size), fleiss_kappa(counts[idx])))
    table = pd.DataFrame(rows, columns=["experts", "n_raters", "n_cases", "kappa"])
    return table.sort_values("n_cases", ascending=False, kind="stable").reset_index(drop=True)
