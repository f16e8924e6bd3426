"""The workspace as arrays: cases, truth, answers and fees, ready for the learners.

This is the "workspace -> arrays" step of the data flow: it reads through
:class:`~routeplan.workspace.Workspace` and returns plain numpy arrays, so the learners,
the acquisition and the competence tables never touch SQL.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from .workspace import Workspace

__all__ = ["Pool", "load_pool"]


@dataclass
class Pool:
    """Every case of a workspace as arrays.

    Attributes
    ----------
    case_ids : ndarray of str, shape (n_cases,)
    X : ndarray of float64, shape (n_cases, n_features)
        Raw feature values (not standardised).
    y : ndarray of int, shape (n_cases,)
        Truth as label codes, -1 where unknown.
    group : ndarray of object, shape (n_cases,)
        Group per case (None where not given).
    answers : ndarray of int, shape (n_cases, n_experts)
        Each expert's answer as a label code, -1 where not answered.
    selection_prob : ndarray of float, shape (n_cases, n_experts)
        Probability with which the answered assignment was chosen; NaN for historical answers
        and where there is no answer.
    audit : ndarray of bool, shape (n_cases, n_experts)
        True where the answer comes from the uniformly random audit share.
    answer_round : ndarray of int, shape (n_cases, n_experts)
        Round whose assignment the answer answered; -1 for historical answers and where
        there is no answer.
    labels : list of str
    experts : list of str
    fees : ndarray of float, shape (n_experts,)
    capacities : ndarray of float, shape (n_experts,)
    feature_names : list of str
    error_cost : float
    class_proba : ndarray of float, shape (n_cases, n_labels), or None
        The team's own model's class probabilities (``routeplan scores import``), NaN rows
        for cases without them; None when none were imported.
    """

    case_ids: np.ndarray
    X: np.ndarray
    y: np.ndarray
    group: np.ndarray
    answers: np.ndarray
    selection_prob: np.ndarray
    audit: np.ndarray
    answer_round: np.ndarray
    labels: list[str]
    experts: list[str]
    fees: np.ndarray
    capacities: np.ndarray
    feature_names: list[str]
    error_cost: float
    class_proba: np.ndarray | None = None

    @property
    def n_classes(self) -> int:
        """Number of labels K."""
        return len(self.labels)

    @property
    def has_truth(self) -> np.ndarray:
        """Boolean mask of cases with known truth."""
        return self.y >= 0

    @property
    def has_scores(self) -> np.ndarray:
        """Boolean mask of cases with imported class probabilities."""
        if self.class_proba is None:
            return np.zeros(len(self.case_ids), dtype=bool)
        return ~np.isnan(self.class_proba).any(axis=1)

    def answer_counts(self) -> dict[str, int]:
        """Answers per expert."""
        return {name: int((self.answers[:, j] >= 0).sum()) for j, name in enumerate(self.experts)}

    def long_answers(self) -> pd.DataFrame:
        """Answers in long form: case (position), expert, answer (code), audit, weight (1/selection_prob)."""
        rows, cols = np.nonzero(self.answers >= 0)
        return pd.DataFrame({
            "case": rows,
            "expert": np.asarray(self.experts, dtype=object)[cols] if len(self.experts) else np.array([], dtype=object),
            "answer": self.answers[rows, cols],
            "audit": self.audit[rows, cols],
            "weight": 1.0 / self.selection_prob[rows, cols],
        })

    def cost_matrix(self) -> np.ndarray:
        """The (K, K) error-cost matrix: ``error_cost`` off the diagonal."""
        K = self.n_classes
        return self.error_cost * (1.0 - np.eye(K))


def load_pool(ws: Workspace) -> Pool:
    """Read a workspace into a :class:`Pool`.

    Parameters
    ----------
    ws : Workspace

    Returns
    -------
    Pool
    """
    labels = ws.labels
    code = {name: i for i, name in enumerate(labels)}
    frame, X = ws.case_frame()
    experts = ws.experts()
    names = [e["name"] for e in experts]
    n, M = len(frame), len(names)
    position = pd.Series(np.arange(n), index=frame["case_id"].to_numpy())
    y = frame["truth"].map(code).fillna(-1).to_numpy(dtype=np.int64)
    answers = np.full((n, M), -1, dtype=np.int64)
    prob = np.full((n, M), np.nan)
    audit = np.zeros((n, M), dtype=bool)
    answer_round = np.full((n, M), -1, dtype=np.int64)
    found = ws.answer_frame()
    if len(found):
        rows = position.reindex(found["case_id"].to_numpy()).to_numpy()
        cols = pd.Series(np.arange(M), index=names).reindex(found["expert"].to_numpy()).to_numpy()
        keep = ~(pd.isna(rows) | pd.isna(cols))
        rows, cols = rows[keep].astype(np.int64), cols[keep].astype(np.int64)
        answers[rows, cols] = found["answer"].map(code).to_numpy()[keep]
        prob[rows, cols] = found["selection_prob"].to_numpy()[keep]
        audit[rows, cols] = found["audit"].to_numpy()[keep]
        answer_round[rows, cols] = found["round_id"].fillna(-1).to_numpy(dtype=np.int64)[keep]
    return Pool(
        case_ids=frame["case_id"].to_numpy(dtype=object),
        X=X,
        y=y,
        group=frame["group"].to_numpy(dtype=object),
        answers=answers,
        selection_prob=prob,
        audit=audit,
        answer_round=answer_round,
        labels=labels,
        experts=names,
        fees=np.array([e["fee"] for e in experts], dtype=float),
        capacities=np.array([e["capacity"] for e in experts], dtype=float),
        feature_names=ws.feature_columns,
        error_cost=ws.error_cost,
        class_proba=_scores(ws, frame["case_id"].tolist()),
    )


def _scores(ws: Workspace, case_ids: list[str]) -> np.ndarray | None:
    """Imported class probabilities in pool order, or None when there are none."""
    scores = ws.score_matrix(case_ids)
    return None if np.isnan(scores).all() else scores
