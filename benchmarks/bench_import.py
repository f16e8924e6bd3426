"""Time and measure the memory of importing a large cases file.

Goal: ``routeplan cases import`` of 1,000,000 cases x 32 features (CSV) in under 60 s and
under 2 GB peak resident memory, on a 2-core machine.

The file is invented here from a seeded generator (timing only; it checks nothing) and written
with ``pyarrow.csv.write_csv`` into a temporary folder. The import runs in a child process,
``python -m routeplan cases import``, exactly as a user would run it; its peak resident set
size is read from ``resource.getrusage(RUSAGE_CHILDREN).ru_maxrss`` (kilobytes on Linux).

Run: ``.venv/bin/python benchmarks/bench_import.py [--rows N] [--features D] [--seed S]``
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

GOAL_SECONDS = 60.0
GOAL_PEAK_BYTES = 2 * 1024**3


def write_cases_csv(path: Path, n_rows: int, n_features: int, seed: int) -> None:
    """Write ``n_rows`` cases with ``n_features`` seeded normal features and a truth column."""
    import numpy as np
    import pyarrow as pa
    import pyarrow.csv as pacsv

    rng = np.random.default_rng(seed)
    columns = {"case_id": pa.array(np.char.add("case", np.arange(n_rows).astype(str)))}
    for j in range(n_features):
        columns[f"x{j:02d}"] = pa.array(rng.normal(size=n_rows))
    labels = np.array(["accept", "reject", "refer"])
    truth = labels[rng.integers(0, 3, size=n_rows)].astype(object)
    truth[rng.random(n_rows) < 0.5] = None  # half the cases without truth
    columns["truth"] = pa.array(truth, type=pa.string())
    pacsv.write_csv(pa.table(columns), path)


def run(n_rows: int = 1_000_000, n_features: int = 32, seed: int = 0) -> dict[str, float]:
    """Generate the file, import it in a child process, print and return the figures."""
    from routeplan.workspace import Workspace

    with tempfile.TemporaryDirectory(prefix="routeplan-bench-") as tmp:
        folder = Path(tmp)
        csv_path = folder / "cases.csv"
        t0 = time.perf_counter()
        write_cases_csv(csv_path, n_rows, n_features, seed)
        gen_s = time.perf_counter() - t0
        Workspace.create(folder / "ws", ["accept", "reject", "refer"]).close()  # in this process: not a child

        t1 = time.perf_counter()
        done = subprocess.run(
            [sys.executable, "-m", "routeplan", "--workspace", str(folder / "ws"), "--quiet",
             "cases", "import", str(csv_path)],
            capture_output=True, text=True,
        )
        import_s = time.perf_counter() - t1
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024  # Linux reports kilobytes
        if done.returncode != 0:
            raise SystemExit(f"import failed ({done.returncode}): {done.stderr.strip()}")
        figures = {
            "rows": float(n_rows),
            "features": float(n_features),
            "csv_bytes": float(csv_path.stat().st_size),
            "db_bytes": float(sum(p.stat().st_size for p in (folder / "ws").iterdir())),
            "generate_s": gen_s,
            "import_s": import_s,
            "peak_rss_bytes": float(peak),
        }
    print(f"cases file: {n_rows:,} rows x {n_features} features, {figures['csv_bytes'] / 1e6:,.0f} MB "
          f"(written in {gen_s:.1f} s); workspace afterwards {figures['db_bytes'] / 1e6:,.0f} MB")
    print(f"import: {import_s:.1f} s = {import_s / GOAL_SECONDS:.2f} x the {GOAL_SECONDS:.0f} s goal "
          f"({n_rows / import_s:,.0f} rows/s)")
    print(f"peak resident memory of the import: {peak / 1024**3:.2f} GiB = "
          f"{peak / GOAL_PEAK_BYTES:.2f} x the {GOAL_PEAK_BYTES / 1024**3:.0f} GiB goal "
          f"({peak / max(figures['csv_bytes'], 1):.2f} x the file size)")
    met = import_s < GOAL_SECONDS and peak < GOAL_PEAK_BYTES
    print("goals met" if met else "GOAL MISSED")
    return figures


def main() -> None:
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=1_000_000)
    parser.add_argument("--features", type=int, default=32)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    run(n_rows=args.rows, n_features=args.features, seed=args.seed)


if __name__ == "__main__":
    main()
