"""Several processes importing into one workspace at once.

Four processes wait at a barrier, then each imports its own answer file into the same
workspace. SQLite serialises the writers (``BEGIN IMMEDIATE`` with a busy timeout), so every
row must arrive and no process may fail with "database is locked".
"""

from __future__ import annotations

import multiprocessing as mp

import numpy as np

from conftest import copy_workspace, query, run_cli

N_WORKERS = 4
N_CASES = 4000


def _import_after_barrier(barrier, results, ws: str, path: str, rank: int) -> None:
    """Worker: wait for the others, then run ``answers import`` in this process."""
    barrier.wait(timeout=60)
    result = run_cli(ws, "answers", "import", path)
    results.put((rank, result.exit_code, result.stderr, repr(result.exception)))


def test_four_processes_import_answers_at_once(template_dirs, tmp_path):
    ws = copy_workspace(template_dirs["stocked"], tmp_path / "ws")
    ids = [f"m{i:05d}" for i in range(N_CASES)]
    rng = np.random.default_rng(11)
    cases = tmp_path / "cases.csv"
    X = rng.normal(size=(N_CASES, 2))
    cases.write_text("case_id,f1,f2\n" + "".join(f"{c},{float(a)!r},{float(b)!r}\n" for c, (a, b) in zip(ids, X)))
    assert run_cli(ws, "cases", "import", cases).exit_code == 0
    labels = ["accept", "reject", "refer"]
    files = []
    for rank in range(N_WORKERS):
        assert run_cli(ws, "experts", "add", f"worker{rank}", "--fee", "1").exit_code == 0
        answers = rng.choice(labels, size=N_CASES)
        path = tmp_path / f"answers_{rank}.csv"
        path.write_text("case_id,expert,answer\n" + "".join(f"{c},worker{rank},{a}\n" for c, a in zip(ids, answers)))
        files.append(path)
    before = query(ws, "SELECT COUNT(*) FROM answers")[0][0]

    ctx = mp.get_context("fork")
    barrier = ctx.Barrier(N_WORKERS)
    results = ctx.Queue()
    workers = [ctx.Process(target=_import_after_barrier, args=(barrier, results, str(ws), str(f), r))
               for r, f in enumerate(files)]
    for w in workers:
        w.start()
    outcomes = sorted(results.get(timeout=180) for _ in workers)
    for w in workers:
        w.join(timeout=60)
        assert w.exitcode == 0

    for rank, code, stderr, exception in outcomes:
        assert code == 0, (rank, stderr, exception)
        assert "locked" not in stderr.lower() and "busy" not in stderr.lower()
    assert query(ws, "SELECT COUNT(*) FROM answers")[0][0] == before + N_WORKERS * N_CASES
    per_expert = dict(query(ws, "SELECT expert, COUNT(*) FROM answers WHERE expert LIKE 'worker%' GROUP BY expert"))
    assert per_expert == {f"worker{r}": N_CASES for r in range(N_WORKERS)}
    assert query(ws, "SELECT COUNT(*) FROM journal WHERE command = 'answers import'")[0][0] == 1 + N_WORKERS
    assert query(ws, "PRAGMA integrity_check")[0][0] == "ok"
