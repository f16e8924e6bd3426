"""Time ``routeplan --help``.

Goal: under 0.3 s wall time (best of 5 runs), with no heavy module imported.

Two figures: the wall time of a child process running ``python -m routeplan --help`` (best of
5, which discounts a busy machine), and the total import time CPython reports with
``-X importtime`` (the sum of the "self" column, in microseconds), with the slowest top-level
packages.

Run: ``.venv/bin/python benchmarks/bench_help.py [--repeat N]``
"""

from __future__ import annotations

import argparse
import re
import subprocess
import sys
import time

GOAL_SECONDS = 0.3
HEAVY = ("torch", "numpy", "pandas", "pyarrow", "scipy", "sklearn", "matplotlib", "sqlite_utils", "rich")


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, *args, "-m", "routeplan", "--help"], capture_output=True, text=True)


def importtime() -> tuple[float, dict[str, float]]:
    """Total self import time (s) and cumulative seconds per top-level package."""
    done = _run("-X", "importtime")
    total = 0.0
    packages: dict[str, float] = {}
    for line in done.stderr.splitlines():
        match = re.match(r"import time:\s+(\d+)\s+\|\s+(\d+)\s+\|(\s*)(\S+)", line)
        if match:
            total += int(match.group(1)) / 1e6
            top = match.group(4).split(".")[0]
            packages[top] = max(packages.get(top, 0.0), int(match.group(2)) / 1e6)
    return total, packages


def run(repeat: int = 5) -> dict[str, float]:
    """Time the help, print and return the figures."""
    walls = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        done = _run()
        walls.append(time.perf_counter() - t0)
        if done.returncode != 0:
            raise SystemExit(f"routeplan --help failed: {done.stderr.strip()}")
    bare = min(_timed([sys.executable, "-c", "pass"]) for _ in range(repeat))
    total, packages = importtime()
    heavy = [name for name in HEAVY if name in packages]
    best = min(walls)
    print(f"routeplan --help: best of {repeat} {best * 1000:.0f} ms (median {sorted(walls)[len(walls) // 2] * 1000:.0f} ms)"
          f" = {best / GOAL_SECONDS:.2f} x the {GOAL_SECONDS * 1000:.0f} ms goal; bare interpreter {bare * 1000:.0f} ms")
    print(f"-X importtime total (self): {total * 1000:.0f} ms over {len(packages)} top-level packages; slowest: "
          + ", ".join(f"{k} {v * 1000:.0f} ms" for k, v in sorted(packages.items(), key=lambda kv: -kv[1])[:5]))
    print(f"heavy modules imported: {', '.join(heavy) if heavy else 'none'}")
    return {"best_s": best, "bare_s": bare, "importtime_s": total, "n_heavy": float(len(heavy))}


def _timed(cmd: list[str]) -> float:
    t0 = time.perf_counter()
    subprocess.run(cmd, capture_output=True)
    return time.perf_counter() - t0


def main() -> None:
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=5)
    run(repeat=parser.parse_args().repeat)


if __name__ == "__main__":
    main()
