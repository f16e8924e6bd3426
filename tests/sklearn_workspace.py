"""Workspaces built from scikit-learn's bundled datasets, for checks of the main job.

The answers follow published simulated-expert protocols, so the expected behaviour is known
from outside the project.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
from click.testing import CliRunner, Result

from routeplan.cli import cli


def invoke(folder: Path, *args: str) -> Result:
    """Run ``routeplan --workspace FOLDER ARGS`` in-process; fail loudly on a non-zero exit."""
    result = CliRunner().invoke(cli, ["--workspace", str(folder), *map(str, args)])
    assert result.exit_code == 0, (args, result.exit_code, result.stderr, result.exception)
    return result


def digits_workspace(root: Path, *, k: int, n_answers: int | None, seed: int = 0) -> Path:
    """scikit-learn's digits with the simulated expert of Mozannar & Sontag (ICML 2020).

    The expert ``oracle_k`` is always right on classes 0..k-1 and answers uniformly at random
    otherwise; ``n_answers`` of its answers (all if None) are imported as historical answers.
    Returns the workspace folder; the cases file also carries a held-out split column ``part``.
    """
    from sklearn.datasets import load_digits

    X, y = load_digits(return_X_y=True)
    rng = np.random.default_rng(seed)
    answer = np.where(y < k, y, rng.integers(0, 10, size=y.shape[0]))
    ids = [f"d{i:04d}" for i in range(len(y))]
    frame = pd.DataFrame(X / 16.0, columns=[f"px{i}" for i in range(X.shape[1])])
    frame.insert(0, "case_id", ids)
    frame["truth"] = y.astype(str)
    folder = root / f"digits_k{k}"
    invoke(folder, "init", "--labels", ",".join(str(c) for c in range(10)))
    frame.to_csv(root / f"digits_k{k}.csv", index=False)
    invoke(folder, "cases", "import", root / f"digits_k{k}.csv")
    invoke(folder, "experts", "add", "oracle_k", "--fee", "0")
    take = np.arange(len(y)) if n_answers is None else rng.choice(len(y), size=n_answers, replace=False)
    pd.DataFrame({"case_id": np.asarray(ids)[take], "expert": "oracle_k", "answer": answer[take].astype(str)}).to_csv(
        root / f"digits_k{k}_answers.csv", index=False)
    invoke(folder, "answers", "import", root / f"digits_k{k}_answers.csv")
    return folder
