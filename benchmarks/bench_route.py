"""Benchmark of ``routeplan route``: 1,000,000 cases, 32 features, K = 5 classes, M = 3 experts.

Targets: under 20 s and under 1.5 GB peak memory (resident set) for the whole route step
(reading the cases file, checking it, scoring, capacity routing, writing the decisions).

What it does:

1. builds a workspace from ``routeplan.simulate.make_scenario`` (4,000 cases with truth,
   three experts with capacities, 40% of expert answers known), fits one router (``--router``,
   default ``plugin-ensemble``, the router ``fit`` prefers; ``plugin`` scores in a third of
   the time) through ``routeplan.fitting.fit_workspace`` (few epochs: the benchmark times routing,
   not learning) and freezes it with ``routeplan.freezing.freeze_workspace``;
2. writes 1,000,000 new cases (standard normal features, as the scenario draws them,
   rounded to 5 decimals) as Parquet and as CSV;
3. routes each file in a fresh child process (``python -c``) and reads the child's own
   wall time and peak resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss``,
   kilobytes on Linux; CPU seconds from the same call), for the priced (default) mode; the
   exact LP mode (``--exact``) runs on the first 100,000 cases only (HiGHS on a million-case
   LP takes minutes; it is meant for batches).

Run: ``.venv/bin/python benchmarks/bench_route.py [--cases 1000000] [--router NAME] [--keep DIR]``.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

TARGET_SECONDS = 20.0
TARGET_MB = 1536.0
N_FEATURES, N_CLASSES, N_EXPERTS = 32, 5, 3
EXACT_CASES = 100_000

CHILD = r"""
import json, resource, sys, time
t0 = time.perf_counter()
from routeplan.deploy import route_file
t1 = time.perf_counter()
result = route_file(sys.argv[1], sys.argv[2], sys.argv[3], exact=sys.argv[4] == "exact")
t2 = time.perf_counter()
usage = resource.getrusage(resource.RUSAGE_SELF)
peak_mb = usage.ru_maxrss / 1024
print(json.dumps({"import_s": t1 - t0, "route_s": t2 - t1, "total_s": t2 - t0, "peak_mb": peak_mb,
                  "cpu_s": usage.ru_utime + usage.ru_stime,
                  "workload": {w["route"]: w["share"] for w in result.workload},
                  "capacity": {w["route"]: w["capacity"] for w in result.workload},
                  "n_cases": result.n_cases}))
"""


def build_policy(folder: Path, seed: int = 0, router: str = "plugin-ensemble") -> Path:
    """A workspace fitted on simulated cases, frozen to folder/policy.json."""
    import pandas as pd

    from routeplan.fitting import fit_workspace
    from routeplan.freezing import freeze_workspace
    from routeplan.ingest import add_expert, import_answers, import_cases
    from routeplan.simulate import make_scenario
    from routeplan.workspace import Workspace

    sc = make_scenario(4000, n_features=N_FEATURES, n_classes=N_CLASSES, n_experts=N_EXPERTS, random_state=seed)
    labels = [f"class{k}" for k in range(N_CLASSES)]
    ids = [f"t{i:05d}" for i in range(len(sc.y))]
    cases = pd.DataFrame(sc.X, columns=[f"x{j:02d}" for j in range(N_FEATURES)])
    cases.insert(0, "case_id", ids)
    cases["truth"] = [labels[v] for v in sc.y]
    cases.to_csv(folder / "train.csv", index=False)
    answers = sc.answers(random_state=seed + 1)
    known = np.random.default_rng(seed + 2).random(answers.shape) < 0.4
    rows, cols = np.nonzero(known)
    pd.DataFrame({"case_id": np.asarray(ids)[rows], "expert": np.asarray(sc.names)[cols],
                  "answer": np.asarray(labels)[answers[rows, cols]]}).to_csv(folder / "answers.csv", index=False)
    ws = Workspace.create(folder / "ws", labels)
    with ws:
        import_cases(ws, folder / "train.csv")
        for name, fee, cap in zip(sc.names, sc.fees, (0.15, 0.10, 0.05)):
            add_expert(ws, name, fee=float(fee), capacity=cap)
        import_answers(ws, [folder / "answers.csv"])
        fit_workspace(ws, routers=(router,), max_epochs=5, random_state=seed)
        freeze_workspace(ws, folder / "policy.json")
    return folder / "policy.json"


def write_cases(folder: Path, n: int, seed: int = 1) -> tuple[Path, Path, Path]:
    """n new cases as Parquet and CSV, and the first 100,000 as Parquet."""
    import pyarrow as pa
    import pyarrow.csv as pacsv
    import pyarrow.parquet as pq

    rng = np.random.default_rng(seed)
    columns = {"case_id": pa.array([f"n{i:07d}" for i in range(n)])}
    for j in range(N_FEATURES):
        columns[f"x{j:02d}"] = pa.array(np.round(rng.standard_normal(n), 5))
    table = pa.table(columns)
    pq.write_table(table, folder / "cases.parquet")
    pacsv.write_csv(table, folder / "cases.csv")
    pq.write_table(table.slice(0, min(n, EXACT_CASES)), folder / "cases_small.parquet")
    return folder / "cases.parquet", folder / "cases.csv", folder / "cases_small.parquet"


def run_child(policy: Path, cases: Path, out: Path, mode: str) -> dict:
    """Route in a fresh process; its own timing and peak memory."""
    start = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", CHILD, str(policy), str(cases), str(out), mode],
                          capture_output=True, text=True, check=False)
    wall = time.perf_counter() - start
    if proc.returncode != 0:
        raise RuntimeError(f"child failed: {proc.stderr[-2000:]}")
    info = json.loads(proc.stdout.strip().splitlines()[-1])
    info["process_wall_s"] = wall
    return info


def main() -> None:
    """Build, write, route, print."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--cases", type=int, default=1_000_000)
    parser.add_argument("--keep", type=Path, default=None, help="Keep the files in this folder.")
    parser.add_argument("--router", default="plugin-ensemble", help="The router frozen (a fit candidate).")
    args = parser.parse_args()
    folder = Path(tempfile.mkdtemp(prefix="bench_route_")) if args.keep is None else args.keep
    folder.mkdir(parents=True, exist_ok=True)
    print("load average (1, 5, 15 min) at the start: " + ", ".join(f"{v:.2f}" for v in os.getloadavg()))
    try:
        t = time.perf_counter()
        policy = build_policy(folder, router=args.router)
        print(f"policy ({args.router}) built and frozen in {time.perf_counter() - t:.1f} s")
        t = time.perf_counter()
        parquet, csv, small = write_cases(folder, args.cases)
        print(f"{args.cases:,} cases written in {time.perf_counter() - t:.1f} s "
              f"(Parquet {parquet.stat().st_size / 2**20:.0f} MB, CSV {csv.stat().st_size / 2**20:.0f} MB)")
        runs = [("Parquet -> Parquet, priced", parquet, folder / "out.parquet", "priced"),
                ("CSV -> CSV, priced", csv, folder / "out.csv", "priced"),
                (f"Parquet {min(args.cases, EXACT_CASES):,}, exact LP", small, folder / "out_exact.parquet", "exact")]
        print(f"\n{'run':32} {'route s':>8} {'process s':>10} {'cpu s':>6} {'peak MB':>8} {'time/target':>12} "
              f"{'mem/target':>11}")
        for label, cases, out, mode in runs:
            info = run_child(policy, cases, out, mode)
            print(f"{label:32} {info['route_s']:8.2f} {info['process_wall_s']:10.2f} {info['cpu_s']:6.1f} "
                  f"{info['peak_mb']:8.0f} "
                  f"{info['process_wall_s'] / TARGET_SECONDS:12.2f} {info['peak_mb'] / TARGET_MB:11.2f}")
            caps = info["capacity"]
            shares = ", ".join(f"{k} {v:.3f}" + ("" if caps[k] is None else f" (cap {caps[k]:g})")
                               for k, v in info["workload"].items())
            print(f"{'':32} workload: {shares}")
        print(f"\ntargets: {TARGET_SECONDS:g} s, {TARGET_MB:g} MB; ratios below 1 meet them "
              f"(time ratio of the whole child process, imports included)")
        print("load average (1, 5, 15 min) at the end: " + ", ".join(f"{v:.2f}" for v in os.getloadavg())
              + f" on {os.cpu_count()} CPU(s)")
    finally:
        if args.keep is None:
            shutil.rmtree(folder, ignore_errors=True)


if __name__ == "__main__":
    main()
