"""Checks of the long-form answers frame shared by the competence modules (private).

The frame's columns are described in :mod:`routeplan.competence`.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
from numpy.typing import NDArray


def _check_answers(answers: pd.DataFrame) -> pd.DataFrame:
    """Check the answers frame has the required columns and no missing values."""
    if not isinstance(answers, pd.DataFrame):
        raise TypeError("answers must be a pandas DataFrame")
    missing = [c for c in ("case", "expert", "answer") if c not in answers.columns]
    if missing:
        raise ValueError(f"answers lacks column(s) {missing}; need case, expert, answer")
    if answers[["case", "expert", "answer"]].isna().any().any():
        raise ValueError("answers has missing case, expert or answer values")
    return answers


def _int_column(values: Any, name: str) -> NDArray[np.int64]:
    """Return values as int64, refusing non-integral numbers."""
    arr = np.asarray(values)
    if arr.size and not np.issubdtype(arr.dtype, np.integer):
        num = pd.to_numeric(pd.Series(arr), errors="coerce").to_numpy(dtype=float)
        if np.any(~np.isfinite(num)) or np.any(num != np.round(num)):
            raise ValueError(f"{name} must hold integers")
        arr = num
    return arr.astype(np.int64)


def _case_positions(case: Any, truth: Any, n_cases: int) -> NDArray[np.int64]:
    """Map answer case ids to positions in truth (by truth's index when it has its own)."""
    if isinstance(truth, pd.Series) and not truth.index.equals(pd.RangeIndex(n_cases)):
        if not truth.index.is_unique:
            raise ValueError("truth's index must be unique case ids")
        pos = truth.index.get_indexer(pd.Index(np.asarray(case)))
        if np.any(pos < 0):
            bad = np.asarray(case)[pos < 0][0]
            raise ValueError(f"answers name case {bad!r}, which is not in truth's index")
        return pos.astype(np.int64)
    pos = _int_column(case, "answers['case']")
    if pos.size and (pos.min() < 0 or pos.max() >= n_cases):
        raise ValueError(f"answers['case'] must be positions 0..{n_cases - 1} into truth")
    return pos


def _check_range(codes: NDArray[np.int64], k: int, name: str, allow_missing: bool) -> None:
    """Refuse codes outside 0..K-1 (or -1 when missing is allowed)."""
    low = -1 if allow_missing else 0
    if codes.size and (codes.min() < low or codes.max() >= k):
        extra = " or -1" if allow_missing else ""
        raise ValueError(f"{name} holds codes outside 0..{k - 1}{extra}")
