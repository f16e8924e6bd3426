"""Shared fixtures: workspaces built once per session and copied per test, the CLI runner,
database dumps, and the large cases file of the crash-safety test.

The small workspaces hold invented cases and experts; they exist to exercise the importers,
not to check any number. ``digits_two_experts`` serves the routers' tests (scikit-learn's
bundled digits with the simulated expert of Mozannar & Sontag, ICML 2020).
"""

from __future__ import annotations

import json
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path
from typing import Callable

import pytest
from click.testing import CliRunner, Result

from routeplan.cli import cli
from routeplan.workspace import DB_NAME

LABELS = ("accept", "reject", "refer")

# Invented rows for the importer tests (not correctness data).
CASES_CSV = (
    "case_id,f1,f2,truth\n"
    "c1,0.5,1.5,accept\n"
    "c2,1.0,-2.0,\n"
    "c3,2.5,0.0,reject\n"
    "c4,-1.0,3.25,\n"
    "c5,0.0,0.0,\n"
    "c6,4.0,1.0,refer\n"
)
STORED_ANSWERS_CSV = "case_id,expert,answer\nc1,alice,accept\nc3,bob,refer\n"


def run_cli(folder: Path | str, *args: str) -> Result:
    """Run ``routeplan --workspace FOLDER ARGS...`` in this process (stderr kept apart)."""
    return CliRunner().invoke(cli, ["--workspace", str(folder), *map(str, args)])


def db_dump(folder: Path | str) -> str:
    """The whole database as SQL text (``sqlite3.Connection.iterdump``), to compare before/after."""
    conn = sqlite3.connect(Path(folder) / DB_NAME)
    try:
        return "\n".join(conn.iterdump())
    finally:
        conn.close()


def query(folder: Path | str, sql: str, params: tuple = ()) -> list[tuple]:
    """Rows of a read-only query against a workspace's database."""
    conn = sqlite3.connect(Path(folder) / DB_NAME)
    try:
        return conn.execute(sql, params).fetchall()
    finally:
        conn.close()


def _must(result: Result) -> Result:
    assert result.exit_code == 0, (result.exit_code, result.stderr, result.exception)
    return result


@pytest.fixture(scope="session")
def template_dirs(tmp_path_factory) -> dict[str, Path]:
    """Workspaces built once: ``empty`` (init only) and ``stocked`` (cases, truth, experts, answers)."""
    root = tmp_path_factory.mktemp("templates")
    empty = root / "empty"
    _must(run_cli(empty, "init", "--labels", ",".join(LABELS)))
    stocked = root / "stocked"
    _must(run_cli(stocked, "init", "--labels", ",".join(LABELS)))
    (root / "cases.csv").write_text(CASES_CSV)
    _must(run_cli(stocked, "cases", "import", root / "cases.csv"))
    _must(run_cli(stocked, "experts", "add", "alice", "--fee", "0.5", "--capacity", "0.5"))
    _must(run_cli(stocked, "experts", "add", "bob", "--fee", "0.25"))
    (root / "stored_answers.csv").write_text(STORED_ANSWERS_CSV)
    _must(run_cli(stocked, "answers", "import", root / "stored_answers.csv"))
    return {"empty": empty, "stocked": stocked}


def copy_workspace(template: Path, dest: Path) -> Path:
    """A fresh copy of a template workspace at ``dest``."""
    if dest.exists():
        shutil.rmtree(dest)
    shutil.copytree(template, dest)
    return dest


@pytest.fixture
def empty_ws(template_dirs, tmp_path) -> Path:
    """A workspace with a label set and nothing else."""
    return copy_workspace(template_dirs["empty"], tmp_path / "ws_empty")


@pytest.fixture
def stocked_ws(template_dirs, tmp_path) -> Path:
    """A workspace with 6 cases (3 with truth), experts alice and bob, and 2 stored answers."""
    return copy_workspace(template_dirs["stocked"], tmp_path / "ws_stocked")


@pytest.fixture
def write_file(tmp_path) -> Callable[[str, str | bytes], Path]:
    """Write text (UTF-8) or bytes to ``tmp_path/name`` and return the path."""

    def write(name: str, content: str | bytes) -> Path:
        path = tmp_path / name
        path.write_bytes(content if isinstance(content, bytes) else content.encode("utf-8"))
        return path

    return write


def assert_one_line_error(result: Result, *fragments: str) -> str:
    """Exit code 2, one line on stderr holding every fragment, no traceback; returns the line."""
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr, result.exception)
    text = result.stderr
    assert "Traceback" not in text
    lines = text.strip("\n").split("\n")
    assert len(lines) == 1, text
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])
    return lines[0]


def assert_json_failure(result: Result, *fragments: str) -> dict:
    """Exit code 2 and, on stdout, the JSON failure ``{"error", "exit_code"}`` holding every
    fragment (README, Command reference); returns it."""
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr, result.exception)
    data = json.loads(result.stdout)  # the json module as the reference parser
    assert data["exit_code"] == 2
    for fragment in fragments:
        assert fragment in data["error"], (fragment, data["error"])
    return data


def routeplan_subprocess(*args: str, env: dict | None = None, timeout: float = 120) -> subprocess.CompletedProcess:
    """Run ``python -m routeplan ARGS...`` in a real child process."""
    return subprocess.run(
        [sys.executable, "-m", "routeplan", *map(str, args)],
        capture_output=True,
        text=True,
        env=env,
        timeout=timeout,
    )


@pytest.fixture(scope="session")
def large_cases_csv(tmp_path_factory) -> Path:
    """200,000 cases x 8 features (seeded normal values), written once per session."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pacsv

    n, d = 200_000, 8
    rng = np.random.default_rng(20240611)
    columns = {"case_id": pa.array([f"k{i:06d}" for i in range(n)])}
    X = rng.normal(size=(n, d))
    for j in range(d):
        columns[f"x{j}"] = pa.array(X[:, j])
    path = tmp_path_factory.mktemp("large") / "cases_200k.csv"
    pacsv.write_csv(pa.table(columns), path)
    return path


@pytest.fixture(scope="session")
def digits_two_experts():
    """500 digits, the k=5 simulated expert and a half-missing copy of it as a second, fees."""
    import numpy as np

    from routeplan import simulate

    d = simulate.digits_scenario(5, random_state=0)
    X, y = d.X[:500], d.y[:500]
    rng = np.random.default_rng(0)
    second = np.where(rng.random(500) < 0.5, d.answers[:500, 0], -1)
    return X, y, np.column_stack([d.answers[:500, 0], second]), np.array([0.05, 0.1])
