"""Time and measure the memory of planning one round over a large pool.

Goal: ``routeplan round plan`` over a pool of 1,000,000 cases (all with truth, so all are
candidates) and 5 experts in under 30 s and under 2 GB peak resident memory, on a 2-core
machine.

The cases file is invented here from a seeded generator (timing only; it checks nothing),
written with ``pyarrow.csv.write_csv`` into a temporary folder and imported with
``routeplan cases import``. The plan then runs in a child process,
``python -m routeplan round plan``, exactly as a user would run it; the peak resident set size
of that child alone is read from ``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss`` inside a
small wrapper process that starts nothing else (kilobytes on Linux). A second child times the
phases of the plan in-process (reading the workspace, regions, class probabilities, the
planner itself), so that a slow phase can be named.

Run: ``.venv/bin/python benchmarks/bench_plan.py [--rows N] [--features D] [--budget B] [--seed S]``
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GOAL_SECONDS = 30.0
GOAL_PEAK_BYTES = 2 * 1024**3
EXPERTS = (("ana", 0.05, 1.0), ("ben", 0.08, 0.5), ("chloe", 0.12, 0.3), ("dev", 0.2, 0.2), ("eli", 0.3, 0.1))
LABELS = ("accept", "reject", "refer")


def write_cases_csv(path: Path, n_rows: int, n_features: int, seed: int) -> None:
    """Write ``n_rows`` cases with seeded normal features and a truth column (every case)."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pacsv

    rng = np.random.default_rng(seed)
    columns = {"case_id": pa.array(np.char.add("case", np.arange(n_rows).astype(str)))}
    X = rng.normal(size=(n_rows, n_features))
    for j in range(n_features):
        columns[f"x{j:02d}"] = pa.array(X[:, j])
    score = X[:, 0] + 0.5 * X[:, 1] + rng.normal(scale=0.8, size=n_rows)
    truth = np.array(LABELS)[np.digitize(score, [-0.5, 0.7])]
    columns["truth"] = pa.array(truth.astype(object), type=pa.string())
    pacsv.write_csv(pa.table(columns), path)


def _routeplan(ws: Path, *args: str) -> subprocess.CompletedProcess:
    """Run one routeplan command on the workspace; stop with its message if it fails."""
    done = subprocess.run([sys.executable, "-m", "routeplan", "--workspace", str(ws), "--quiet", *args],
                          capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"routeplan {' '.join(args)} failed ({done.returncode}): {done.stderr.strip()}")
    return done


def _measure(argv: list[str]) -> None:
    """Wrapper mode: run argv as the only child, print its wall time and peak RSS as JSON."""
    t0 = time.perf_counter()
    done = subprocess.run(argv, capture_output=True, text=True)
    seconds = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024  # Linux reports kilobytes
    print(json.dumps({"seconds": seconds, "peak_rss_bytes": peak, "returncode": done.returncode,
                      "stdout": done.stdout[-4000:], "stderr": done.stderr[-4000:]}))


def _phases(ws: str, budget: float, seed: int) -> None:
    """Phase mode: time the steps of plan_round in-process (dry run), print JSON."""
    import numpy as np

    from routeplan import rounds
    from routeplan.acquisition import select_assignments
    from routeplan.workspace import Workspace

    times = {}
    w = Workspace.open(ws)
    t = time.perf_counter()
    frame, X = w.case_frame()
    times["read cases"] = time.perf_counter() - t
    del frame, X
    t = time.perf_counter()
    pool, _, _ = rounds._pool(w, False, 6, seed)
    times["read cases + regions + class probabilities + counts (rounds._pool)"] = time.perf_counter() - t
    t = time.perf_counter()
    select_assignments(pool, budget=budget, strategy="value", random_state=np.random.default_rng(seed))
    times["select_assignments (value)"] = time.perf_counter() - t
    t = time.perf_counter()
    select_assignments(pool, budget=budget, strategy="random", random_state=np.random.default_rng(seed))
    times["select_assignments (random)"] = time.perf_counter() - t
    print(json.dumps(times))


def _in_wrapper(argv: list[str]) -> dict:
    """Run argv through the wrapper mode of this script; return its figures."""
    done = subprocess.run([sys.executable, __file__, "--measure", "--", *argv], capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"measurement failed: {done.stderr.strip()}")
    return json.loads(done.stdout)


def run(n_rows: int = 1_000_000, n_features: int = 8, budget: float = 500.0, seed: int = 0) -> dict:
    """Build the workspace, measure one plan, print and return the figures."""
    with tempfile.TemporaryDirectory(prefix="routeplan-bench-plan-") as tmp:
        folder = Path(tmp)
        csv_path, ws = folder / "cases.csv", folder / "ws"
        t0 = time.perf_counter()
        write_cases_csv(csv_path, n_rows, n_features, seed)
        _routeplan(ws, "init", "--labels", ",".join(LABELS))
        _routeplan(ws, "cases", "import", str(csv_path))
        for name, fee, capacity in EXPERTS:
            _routeplan(ws, "experts", "add", name, "--fee", str(fee), "--capacity", str(capacity))
        setup_s = time.perf_counter() - t0
        plan = _in_wrapper([sys.executable, "-m", "routeplan", "--workspace", str(ws), "--quiet", "round", "plan",
                            "--budget", str(budget), "--seed", str(seed), "--json"])
        if plan["returncode"] != 0:
            raise SystemExit(f"round plan failed: {plan['stderr'].strip()}")
        result = json.loads(plan["stdout"])
        phases = subprocess.run([sys.executable, __file__, "--phases", str(ws), str(budget), str(seed)],
                                capture_output=True, text=True)
        phase_times = json.loads(phases.stdout) if phases.returncode == 0 else {"failed": phases.stderr[-500:]}
    secs, peak = plan["seconds"], plan["peak_rss_bytes"]
    print(f"pool: {n_rows:,} cases x {n_features} features, all with truth; {len(EXPERTS)} experts; "
          f"budget {budget:g} (workspace built in {setup_s:.0f} s)")
    print(f"round plan: {result['assignments']} assignments, spend {result['spend']:.4g}")
    print(f"round plan wall time: {secs:.1f} s = {secs / GOAL_SECONDS:.2f} x the {GOAL_SECONDS:.0f} s goal")
    print(f"round plan peak resident memory: {peak / 1024**3:.2f} GiB = "
          f"{peak / GOAL_PEAK_BYTES:.2f} x the {GOAL_PEAK_BYTES / 1024**3:.0f} GiB goal")
    print("phases (in-process dry run, seconds):")
    for name, value in phase_times.items():
        print(f"  {name}: {value if isinstance(value, str) else f'{value:.1f}'}")
    met = secs < GOAL_SECONDS and peak < GOAL_PEAK_BYTES
    print("goals met" if met else "GOAL MISSED")
    return {"seconds": secs, "peak_rss_bytes": peak, "phases": phase_times, "setup_s": setup_s}


def main() -> None:
    """Command-line entry point."""
    if len(sys.argv) > 1 and sys.argv[1] == "--measure":
        _measure(sys.argv[3:] if sys.argv[2] == "--" else sys.argv[2:])
        return
    if len(sys.argv) > 1 and sys.argv[1] == "--phases":
        _phases(sys.argv[2], float(sys.argv[3]), int(sys.argv[4]))
        return
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--features", type=int, default=8)
    parser.add_argument("--budget", type=float, default=500.0)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    run(n_rows=args.rows, n_features=args.features, budget=args.budget, seed=args.seed)


if __name__ == "__main__":
    main()
