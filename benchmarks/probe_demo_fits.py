"""Probe: how much of the demo's round-to-round change in true cost is the fit's own noise?

An experiment, not a goal. ``make demo`` fits one router per round with one seed and grades
the routed new tiles against their hidden grades. A single seed cannot tell a real change from
the spread between fits, so this script rebuilds the demo's workspace at several points of its
history, from the files the demo left in ``demo_project/work/``:

* ``r1``, ``r2``, ``r4``: the historical answers plus the answers of rounds 1, 1-2 and 1-4;
* ``full``: the historical answers plus every expert's simulated answer on every pool tile
  with truth (the full-information reference, as in the rehearsals of ``bench_rounds.py``),

and at each point fits with several seeds, freezes, routes the new tiles and grades them
exactly as the demo does (``run_demo.check_routed``, expert answers played with the demo's
seed 7). It prints the true cost per tile of every fit and, per point, the mean and the range.

Run ``make demo`` first (it leaves ``demo_project/work/``), then
``.venv/bin/python benchmarks/probe_demo_fits.py [--seeds 7 8 9]`` (about 8 minutes on a
2-core machine with three seeds). Workspaces go to a temporary folder, removed at the end.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

DEMO = Path(__file__).resolve().parents[1] / "demo_project"
sys.path.insert(0, str(DEMO))

import tileworks  # noqa: E402  (the demo's helper module)
from run_demo import check_routed  # noqa: E402

WORK = DEMO / "work"
DATA = WORK / "data"
PLAY_SEED = 7  # run_demo.py's default --seed: the seed the demo plays its experts with


def _routeplan(workspace: Path, *args: str) -> str:
    """Run one routeplan command on ``workspace``; stop with its message if it fails."""
    command = [sys.executable, "-m", "routeplan", "--workspace", str(workspace), *args]
    done = subprocess.run(command, capture_output=True, text=True)
    if done.returncode:
        sys.exit(f"routeplan {' '.join(args)} failed ({done.returncode}):\n{done.stdout}{done.stderr}")
    return done.stdout


def _build(workspace: Path, answer_files: list[Path]) -> None:
    """A workspace as the demo sets it up, with the given answer files imported."""
    _routeplan(workspace, "init", "--labels", ",".join(tileworks.LABELS), "--error-cost", "1")
    _routeplan(workspace, "cases", "import", str(DATA / "tiles.csv"), "--id-column", "case_id",
               "--group-column", "kiln")
    _routeplan(workspace, "truth", "import", str(DATA / "truth.csv"))
    _routeplan(workspace, "experts", "import", str(DATA / "experts.csv"))
    _routeplan(workspace, "answers", "import", str(DATA / "history.csv"), *map(str, answer_files))


def _full_answers(out: Path) -> Path:
    """Every expert's simulated answer on every pool tile with truth (not in the history)."""
    world, profiles = tileworks.load_world(DATA)
    truth = pd.read_csv(DATA / "truth.csv", dtype=str)
    history = pd.read_csv(DATA / "history.csv", dtype=str)
    row_of = pd.Series(np.arange(len(world)), index=world["case_id"].to_numpy())
    frames = []
    for expert in profiles["experts"]:
        asked = history.loc[history["expert"] == expert, "case_id"]
        ids = truth.loc[~truth["case_id"].isin(asked), "case_id"]
        answers = tileworks.play_expert(expert, profiles, world, row_of.loc[ids].to_numpy(dtype=int), PLAY_SEED)
        frames.append(pd.DataFrame({"case_id": ids, "expert": expert, "answer": answers}))
    path = out / "all_answers.csv"
    pd.concat(frames).to_csv(path, index=False)
    return path


def _round_files(last: int) -> list[Path]:
    """The demo's answer files of rounds 1..last."""
    files = [f for r in range(1, last + 1) for f in sorted((WORK / "answers" / str(r)).glob("*.csv"))]
    if not files:
        sys.exit(f"no answers of rounds 1..{last} under {WORK / 'answers'}: run `make demo` first")
    return files


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=[7, 8, 9], help="fit seeds (default 7 8 9)")
    args = parser.parse_args()
    if not (DATA / "new_tiles.csv").exists():
        sys.exit(f"{DATA} holds no demo data: run `make demo` first")
    start = time.perf_counter()
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        points = {"r1": _round_files(1), "r2": _round_files(2), "r4": _round_files(4), "full": [_full_answers(out)]}
        summary = {}
        for name, files in points.items():
            workspace = out / name
            _build(workspace, files)
            costs = []
            for seed in args.seeds:
                report = json.loads(_routeplan(workspace, "fit", "--seed", str(seed), "--json"))
                policy, routed = out / f"{name}-{seed}.json", out / f"{name}-{seed}.csv"
                _routeplan(workspace, "freeze", "--out", str(policy))
                _routeplan(workspace, "route", "--policy", str(policy), str(DATA / "new_tiles.csv"),
                           "--out", str(routed))
                check = check_routed(pd.read_csv(routed, dtype=str, keep_default_na=False), DATA, PLAY_SEED)
                costs.append(check["cost_per_tile"])
                print(f"{name:>4}  fit seed {seed}: kept {report['chosen']}, true cost "
                      f"{check['cost_per_tile']:.4f} (standard error over tiles {check['cost_se']:.4f})", flush=True)
            summary[name] = costs
    print(f"\ntrue cost per tile over fit seeds {', '.join(map(str, args.seeds))} "
          f"(same 1000 new tiles; {time.perf_counter() - start:.0f} s):")
    for name, costs in summary.items():
        print(f"  {name:>4}  mean {np.mean(costs):.4f}  range {min(costs):.4f} to {max(costs):.4f}")


if __name__ == "__main__":
    main()
