"""Run every benchmark in this folder, one after the other, and keep their output.

Each ``bench_*.py`` script measures one goal of the project and prints its figures and the
ratio to the goal. This runner only starts them (in a fresh interpreter each, so that one's
memory does not count against the next) and writes everything they print to
``benchmarks/out/<name>.txt`` as well as to the terminal.

Run: ``make bench`` or ``.venv/bin/python benchmarks/run_all.py [NAME ...]``
"""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(names: list[str]) -> int:
    """Run the named benchmarks (default: all); return the number that failed."""
    scripts = sorted(HERE.glob("bench_*.py"))
    if names:
        scripts = [s for s in scripts if s.stem in names or s.stem.removeprefix("bench_") in names]
    out = HERE / "out"
    out.mkdir(exist_ok=True)
    failed = 0
    for script in scripts:
        print(f"=== {script.stem} ===", flush=True)
        start = time.perf_counter()
        proc = subprocess.run([sys.executable, str(script)], capture_output=True, text=True)
        text = proc.stdout + (f"\n[stderr]\n{proc.stderr}" if proc.returncode else "")
        (out / f"{script.stem}.txt").write_text(text, encoding="utf-8")
        print(text, flush=True)
        print(f"--- {script.stem}: exit {proc.returncode}, {time.perf_counter() - start:.0f} s wall\n", flush=True)
        failed += proc.returncode != 0
    return failed


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
