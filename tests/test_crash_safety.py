"""Crash safety: an import killed with SIGKILL leaves the workspace whole.

A child process imports 200,000 cases x 8 features and is killed at seeded random moments,
20 times. Afterwards SQLite's own ``PRAGMA integrity_check`` must answer ``ok`` (the reference
check of the file format) and the import must be wholly in or wholly out: 0 or 200,000 cases,
and a journal entry exactly when the cases are in. Half of the kills fall anywhere in the
run; the other half wait until the child has begun writing (its write-ahead log grows), so
some kills land inside the write transaction whatever the machine's speed.
"""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from conftest import copy_workspace

N_CASES = 200_000
N_KILLS = 20


def _start(ws: Path, csv_path: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "routeplan", "--workspace", str(ws), "--quiet", "cases", "import", str(csv_path)],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )


def _wal_size(ws: Path) -> int:
    try:
        return (ws / "routeplan.sqlite-wal").stat().st_size
    except FileNotFoundError:
        return 0


def _state(ws: Path) -> tuple[str, int, int]:
    """(integrity_check answer, number of cases, number of 'cases import' journal entries)."""
    conn = sqlite3.connect(ws / "routeplan.sqlite")
    try:
        integrity = conn.execute("PRAGMA integrity_check").fetchone()[0]
        n_cases = conn.execute("SELECT COUNT(*) FROM cases").fetchone()[0]
        n_logged = conn.execute("SELECT COUNT(*) FROM journal WHERE command = 'cases import'").fetchone()[0]
    finally:
        conn.close()
    return integrity, n_cases, n_logged


def _timed_full_import(ws: Path, csv_path: Path) -> tuple[float, float]:
    """Run one import to the end; return (total seconds, seconds from the first WAL write to the end)."""
    start = time.perf_counter()
    proc = _start(ws, csv_path)
    base = _wal_size(ws)
    writing_since = None
    while proc.poll() is None:
        if writing_since is None and _wal_size(ws) > base:
            writing_since = time.perf_counter()
        time.sleep(0.005)
    end = time.perf_counter()
    assert proc.returncode == 0, proc.stderr.read().decode()
    return end - start, end - (writing_since or start)


@pytest.mark.slow
def test_sigkill_during_import_leaves_all_or_nothing(large_cases_csv, template_dirs, tmp_path):
    full_s, write_s = _timed_full_import(copy_workspace(template_dirs["empty"], tmp_path / "full"), large_cases_csv)
    assert _state(tmp_path / "full") == ("ok", N_CASES, 1)

    rng = np.random.default_rng(20240612)
    ws = copy_workspace(template_dirs["empty"], tmp_path / "killed")
    outcomes = []
    mid_write = 0  # kills that hit a child with uncommitted pages in the write-ahead log
    for k in range(N_KILLS):
        base = _wal_size(ws)
        proc = _start(ws, large_cases_csv)
        if k % 2 == 0:  # anywhere in the run
            time.sleep(rng.uniform(0.0, 1.0) * full_s)
        else:  # once the child writes
            deadline = time.perf_counter() + 3 * full_s
            while proc.poll() is None and _wal_size(ws) <= base and time.perf_counter() < deadline:
                time.sleep(0.002)
            time.sleep(rng.uniform(0.0, 1.0) * write_s)
        alive, wal_at_kill = proc.poll() is None, _wal_size(ws)
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        integrity, n_cases, n_logged = _state(ws)  # reading also recovers the WAL, and removes it on close
        assert integrity == "ok", (k, integrity)
        assert n_cases in (0, N_CASES), (k, n_cases)
        assert n_logged == (1 if n_cases == N_CASES else 0), (k, n_cases, n_logged)
        outcomes.append(n_cases)
        mid_write += alive and wal_at_kill > 0 and n_cases == 0
        if n_cases == N_CASES:  # wholly in: carry on with a fresh workspace
            ws = copy_workspace(template_dirs["empty"], tmp_path / f"killed_{k}")
    print(f"kills: {N_KILLS}; wholly in: {outcomes.count(N_CASES)}; wholly out: {outcomes.count(0)} "
          f"({mid_write} inside the write); full import {full_s:.2f} s (writing {write_s:.2f} s)")
    assert mid_write >= 1, "no kill landed inside the write transaction"

    # the workspace that took the last kill still works: the import goes through
    done = subprocess.run(
        [sys.executable, "-m", "routeplan", "--workspace", str(ws), "--quiet", "cases", "import", str(large_cases_csv)],
        capture_output=True, text=True, timeout=300,
    )
    assert done.returncode == 0, done.stderr
    assert _state(ws) == ("ok", N_CASES, 1)
