"""Run the Marrowdene Tileworks demo end to end through the ``routeplan`` command line.

Usage::

    python demo_project/run_demo.py [--rounds 4] [--budget 25] [--seed 7] [--n 4000] [--max-epochs 40]

The script deletes and recreates ``demo_project/work/``, writes the invented data there,
and drives routeplan as a user would, printing every command before it runs it (as
``$ routeplan ...``, run from inside ``demo_project/work/``).

It fits a router on the historical answers alone ("round 0") and again after every
labelling round. After each fit it freezes a routing policy, routes the new tiles with
it, and grades the routed tiles against their hidden grades: the true cost per tile
(wrong grades plus fees), which only invented data can give. It prints that beside the
fit's own held-out estimate, round by round, and ends with a short summary. Routine steps
print one line each; the full fit, competence, freeze and route output is shown in the
last round only. If a command fails, the demo stops with that command's exit code.
"""

from __future__ import annotations

import argparse
import json
import os
import shlex
import shutil
import subprocess
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import tileworks  # noqa: E402  (the demo's own helper module, beside this script)

WORK = HERE / "work"
WORKSPACE = "workspace"  # relative to WORK, like every path the demo prints
DATA = "data"


class DemoStopped(Exception):
    """A step failed; carries the exit code the demo ends with."""

    def __init__(self, message: str, code: int = 1) -> None:
        super().__init__(message)
        self.code = code


def _width() -> int:
    """Columns for tables: the terminal's, but at least 110 so piped output stays unwrapped."""
    return max(110, shutil.get_terminal_size(fallback=(110, 24)).columns)


def _routeplan(args: list[str], *, quiet: bool = False) -> str:
    """Run ``routeplan --workspace workspace ARGS`` in WORK; stop the demo if it fails.

    With ``quiet`` the output is captured (and returned) instead of shown.
    """
    full = ["--workspace", WORKSPACE, *args]
    print(f"\n$ routeplan {shlex.join(full)}", flush=True)
    proc = subprocess.run(
        [sys.executable, "-m", "routeplan", *full],
        cwd=WORK, text=True, capture_output=quiet, env={**os.environ, "COLUMNS": str(_width())},
    )
    if proc.returncode != 0:
        if quiet:
            sys.stdout.write(proc.stdout)
            sys.stderr.write(proc.stderr)
        raise DemoStopped(f"`routeplan {shlex.join(args)}` failed with exit code {proc.returncode}.", max(proc.returncode, 1))
    return proc.stdout or ""


def _routeplan_json(args: list[str]) -> Any:
    """Run a routeplan command with ``--json`` and return what it printed, parsed."""
    return json.loads(_routeplan([*args, "--json"], quiet=True))


def _python(script: str, args: list[str]) -> None:
    """Run one of the demo's own scripts (printed as ``$ python ...``); stop if it fails."""
    print(f"\n$ python {shlex.join([f'../{script}', *args])}", flush=True)
    proc = subprocess.run([sys.executable, str(HERE / script), *args], cwd=WORK, text=True)
    if proc.returncode != 0:
        raise DemoStopped(f"`{script}` failed with exit code {proc.returncode}.", max(proc.returncode, 1))


def _say(line: str) -> None:
    """Print the one-line result of a quiet step."""
    print(f"  -> {line}", flush=True)


def _setup() -> None:
    """Initialise the workspace and bring in tiles, truth, experts and history."""
    _routeplan(["init", "--labels", ",".join(tileworks.LABELS), "--error-cost", "1"])
    _routeplan(["cases", "import", f"{DATA}/tiles.csv", "--id-column", "case_id", "--group-column", "kiln"])
    _routeplan(["truth", "import", f"{DATA}/truth.csv"])
    _routeplan(["experts", "import", f"{DATA}/experts.csv"])
    _routeplan(["answers", "import", f"{DATA}/history.csv"])
    _routeplan(["status"])


def _buy_round(r: int, budget: float, seed: int) -> dict[str, Any]:
    """Plan a round, export its sheets, let the simulated experts answer, import, close."""
    plan = _routeplan_json(["round", "plan", "--budget", f"{budget:g}", "--seed", str(seed + r)])
    per_expert = ", ".join(f"{e['expert']} {e['cases']}" for e in plan["experts"])
    focus = plan.get("focus")
    steer = (f"; asked where model #{focus['model_id']}'s routing is open "
             f"({focus['pairs_in_focus']:.0%} of the pairs)" if focus else "")
    _say(f"round {plan['round']}: {plan['assignments']} assignments ({per_expert}), fees {plan['spend']:.2f}{steer}")
    round_id = str(plan["round"])
    sheets, answers = f"sheets/{round_id}", f"answers/{round_id}"
    _routeplan(["round", "export", round_id, "--out", sheets])
    _python("play_experts.py", [sheets, "--out", answers, "--data", DATA, "--seed", str(seed)])
    files = sorted(str(p.relative_to(WORK)) for p in (WORK / answers).glob("*.csv"))
    if files:
        _routeplan(["answers", "import", *files])
    _routeplan(["round", "close", round_id])
    return {"assignments": int(plan["assignments"]), "spend": float(plan["spend"])}


def _fit(seed: int, max_epochs: int | None, full: bool) -> dict[str, Any]:
    """Fit the routers; return the kept router's held-out system cost with its 95% interval."""
    cap = ["--max-epochs", str(max_epochs)] if max_epochs else []
    report = _routeplan_json(["fit", "--seed", str(seed), *cap])
    table = pd.DataFrame(report["table"]).set_index("router")
    kept = table.loc[report["chosen"]]
    model_alone = table.loc[[name for name in table.index if name.startswith("model alone")]]
    estimate = {"router": report["chosen"], "cost": kept["system_cost"], "low": kept["ci_low"], "high": kept["ci_high"]}
    _say(f"kept {report['chosen']}: estimated cost {kept['system_cost']:.3f} [{kept['ci_low']:.3f}, {kept['ci_high']:.3f}]"
         f" per tile on {report['n_selection']} held-out tiles"
         + (f" (model alone {model_alone['system_cost'].iloc[0]:.3f})" if len(model_alone) else ""))
    if full:
        _show_fit_table(report)
    return estimate


def _show_fit_table(report: dict[str, Any]) -> None:
    """Show the fit's full table, rendered by routeplan from the JSON the command printed."""
    from rich.console import Console

    from routeplan.fitting import FitReport
    from routeplan.report import render_fit

    print("  (the table `fit` prints without --json, rendered from that JSON:)")
    fit_report = FitReport(
        chosen=report["chosen"], model_ids=report["model_ids"], table=pd.DataFrame(report["table"]),
        notes=report["notes"], answers_per_expert=report["answers_per_expert"], n_train=report["n_train"],
        n_selection=report["n_selection"], calibration=report.get("calibration") or {},
        effective_answers=report.get("effective_answers") or {},
    )
    Console(width=_width(), soft_wrap=False).print(render_fit(fit_report))


def _freeze_and_route(r: int, seed: int, full: bool) -> dict[str, Any]:
    """Freeze the kept router, route the new tiles with it, and grade them against the hidden truth."""
    policy, routed = f"policies/round-{r}.json", f"routed/round-{r}.csv"
    for folder in ("policies", "routed"):
        (WORK / folder).mkdir(exist_ok=True)
    if full:
        _routeplan(["freeze", "--out", policy])
        _routeplan(["route", "--policy", policy, f"{DATA}/new_tiles.csv", "--out", routed])
    else:
        frozen = _routeplan_json(["freeze", "--out", policy])
        _say(f"policy #{frozen['policy_id']} ({frozen['router']}, model #{frozen['model_id']}) -> {policy}")
        result = _routeplan_json(["route", "--policy", policy, f"{DATA}/new_tiles.csv", "--out", routed])
        shares = ", ".join(f"{w['route']} {w['cases']}" for w in result["workload"])
        _say(f"routed {result['n_cases']} new tiles -> {routed}: {shares}")
    check = check_routed(pd.read_csv(WORK / routed, dtype=str, keep_default_na=False), WORK / DATA, seed)
    print(f"  (demo only) graded against the hidden grades: {check['n_wrong']} wrong + fees {check['fees']:.2f}"
          f" = true cost {check['cost_per_tile']:.3f} per tile")
    return check


def check_routed(routed: pd.DataFrame, data_dir: Path, seed: int) -> dict[str, Any]:
    """Score a routing of the new tiles against the hidden grades (only a demo can do this).

    Tiles routed to the model take the model's label; tiles routed to an expert take that
    expert's simulated answer (played from its hidden profile with ``seed``) and its fee.

    Parameters
    ----------
    routed : pandas.DataFrame
        Columns ``case_id, route, label`` as ``routeplan route`` writes them.
    data_dir : Path
        The demo's data folder (with the hidden files).
    seed : int
        Seed for playing the experts the policy chose.

    Returns
    -------
    dict
        ``n``, ``routes`` (count per route), ``n_wrong``, ``accuracy``, ``fees``,
        ``cost_per_tile`` (wrong grades plus fees, per tile), ``cost_se`` (its standard error
        over tiles) and ``tile_cost`` (the cost of each tile, in the order of ``routed``).
    """
    world, profiles = tileworks.load_world(data_dir)
    fees = pd.read_csv(data_dir / "experts.csv").set_index("name")["fee"]
    row_of = pd.Series(range(len(world)), index=world["case_id"].to_numpy())
    case_id, route = routed["case_id"].astype(str), routed["route"].astype(str)
    final = np.where(route == "model", routed["label"].astype(str), None).astype(object)
    fee = np.zeros(len(routed))
    for expert in sorted(set(route) - {"model"}):
        mask = (route == expert).to_numpy()
        if expert in profiles["experts"]:
            final[mask] = tileworks.play_expert(expert, profiles, world, row_of.loc[case_id[mask]].to_numpy(dtype=int), seed)
        fee[mask] = float(fees.get(expert, 0.0))
    truth = world.set_index("case_id").loc[case_id, "truth"].to_numpy()
    cost = (final != truth).astype(float) + fee
    n = len(routed)
    return {
        "n": n,
        "routes": route.value_counts().to_dict(),
        "n_wrong": int((final != truth).sum()),
        "accuracy": float((final == truth).mean()) if n else float("nan"),
        "fees": float(fee.sum()),
        "cost_per_tile": float(cost.mean()) if n else float("nan"),
        "cost_se": float(cost.std(ddof=1) / np.sqrt(n)) if n > 1 else float("nan"),
        "tile_cost": cost,
    }


def _single_expert_costs(data_dir: Path, seed: int) -> dict[str, float]:
    """True cost per new tile if every tile went to one expert (for comparison)."""
    new_ids = pd.read_csv(data_dir / "new_tiles.csv", dtype=str)["case_id"]
    return {
        expert: check_routed(pd.DataFrame({"case_id": new_ids, "route": expert, "label": ""}), data_dir, seed)["cost_per_tile"]
        for expert in tileworks.default_experts()["name"]
    }


def _progress_table(rows: list[dict[str, Any]]) -> str:
    """The per-round table: what was bought so far, the fit's estimate and the true cost."""
    head = f"{'round':>5}  {'answers bought':>14}  {'fees spent':>10}  {'estimated cost [95% CI]':>23}  {'true cost':>9}"
    lines = [head, "-" * len(head)]
    for row in rows:
        estimate = f"{row['cost']:.3f} [{row['low']:.3f}, {row['high']:.3f}]"
        lines.append(f"{row['round']:>5}  {row['bought']:>14}  {row['spent']:>10.2f}  {estimate:>23}  {row['true']:>9.3f}")
    return "\n".join(lines)


def _change_line(rows: list[dict[str, Any]], checks: list[dict[str, Any]]) -> str:
    """Say how the true cost moved from round 0 to the last round, with a paired standard error."""
    diff = checks[-1]["tile_cost"] - checks[0]["tile_cost"]  # same tiles, so the difference is paired
    change, se = float(diff.mean()), float(diff.std(ddof=1) / np.sqrt(len(diff)))
    line = (f"From round 0 to round {rows[-1]['round']} the true cost per tile changed by {change:+.3f}"
            f" (standard error {se:.3f}, paired over the same {len(diff)} tiles)")
    if change < -2 * se:
        tiles = float(f"{rows[-1]['spent'] / -change:.2g}")  # two significant figures: the saving is uncertain
        return line + f";\nat that saving the {rows[-1]['spent']:.0f} fee units spent on answers pay back after about {tiles:,.0f} tiles."
    return line + ": no clear fall in this run."


def _print_summary(rows: list[dict[str, Any]], checks: list[dict[str, Any]], seed: int) -> None:
    """Tell a newcomer what happened, how the cost moved, where the files are, what to try next."""
    last = checks[-1]
    print("\n" + "=" * 78 + "\nSummary\n" + "=" * 78)
    print("The invented Marrowdene Tileworks grades fired roof tiles first / second / reject;")
    print("one wrong grade costs 1 and each expert charges a fee per tile in the same unit.")
    print("Round 0 fits on the historical answers only; each later round first buys answers.\n")
    print(_progress_table(rows))
    print("\nestimated cost: `routeplan fit`'s own held-out estimate for the kept router (pool tiles with truth;")
    print("  where an expert's answer is unknown, the expected cost from its correctness model stands in).")
    print(f"true cost: the policy frozen after that fit routed the same {last['n']} new tiles; each tile was")
    print("  graded against its hidden grade (the model's label or the chosen expert's simulated answer),")
    print(f"  plus the fees. Possible only because the data are invented; standard error about {last['cost_se']:.3f}.")
    if len(checks) > 1:
        print(_change_line(rows, checks))
    routes = ", ".join(f"{k} {v}" for k, v in sorted(last["routes"].items()))
    print(f"Last policy's routes: {routes}. For comparison, every new tile to one expert")
    print("  (ignoring capacity): " + ", ".join(f"{name} {cost:.3f}" for name, cost in _single_expert_costs(WORK / DATA, seed).items()))
    print(f"\nFiles (under {WORK}): data/ (the invented data), workspace/, sheets/ and answers/ (per round),")
    print("  policies/round-N.json (+ .md policy cards), routed/round-N.csv.")
    routeplan = Path(sys.executable).with_name("routeplan")
    print("\nWhat to try next:")
    print(f"  cd {WORK}")
    print(f"  {routeplan} --workspace {WORKSPACE} competence --by region")
    print(f"  {routeplan} --workspace {WORKSPACE} round plan --budget 100 --strategy random --dry-run"
          "   (what would a random plan buy?)")
    print(f"  {routeplan} rehearse --rounds 4 --budget 25   (a simulated rehearsal; needs no workspace)")
    print(f"  {routeplan} --workspace {WORKSPACE} rehearse --profiles {DATA}/assumed_profiles.csv --rounds 4 --budget 25")
    print("     (the same on the works' own tiles, with the team's guess of each expert's accuracy)")
    print("  rerun the demo with --budget 25 or --seed 8 and compare the table;")
    print(f"  peek at {WORK / DATA / tileworks.PROFILES_FILE} to see how good each expert really is.")


def _run(args: argparse.Namespace) -> tuple[list[dict[str, Any]], list[dict[str, Any]]]:
    """Set up, then fit / freeze / route after round 0 and after each bought round."""
    _python("generate_cases.py", ["--out", DATA, "--n", str(args.n), "--n-history", str(args.n_history), "--seed", str(args.seed)])
    _setup()
    rows, checks, bought, spent = [], [], 0, 0.0
    for r in range(args.rounds + 1):
        last = r == args.rounds
        title = "round 0: the historical answers only" if r == 0 else f"round {r} of {args.rounds}"
        print(f"\n=== {title.capitalize()}{' (full output)' if last else ''} ===")
        if r > 0:
            got = _buy_round(r, args.budget, args.seed)
            bought, spent = bought + got["assignments"], spent + got["spend"]
        estimate = _fit(args.seed, args.max_epochs, full=last)
        if last:
            _routeplan(["competence"])  # only once: it takes a while and its tables are long
        checks.append(_freeze_and_route(r, args.seed, full=last))
        rows.append({"round": r, "bought": bought, "spent": spent, **estimate, "true": checks[-1]["cost_per_tile"]})
    if args.rounds > 0:
        _routeplan(["status"])
    return rows, checks


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    parser = argparse.ArgumentParser(description="Run the Marrowdene Tileworks demo through the routeplan CLI.")
    parser.add_argument("--rounds", type=int, default=4, help="labelling rounds after round 0 (default 4)")
    parser.add_argument("--budget", type=float, default=100.0, help="fee budget per round (default 100)")
    parser.add_argument("--seed", type=int, default=7, help="seed for data, planning, fitting and experts (default 7)")
    parser.add_argument("--n", type=int, default=4000, help="pool tiles (default 4000)")
    parser.add_argument("--n-history", type=int, default=60, help="pool tiles with historical answers (default 60)")
    parser.add_argument("--max-epochs", type=int, default=None, help="cap on each fit's training epochs (default: routeplan's own)")
    args = parser.parse_args(argv)
    if args.rounds < 0:
        parser.error("--rounds must be at least 0")
    if WORK.exists():
        shutil.rmtree(WORK)
    WORK.mkdir(parents=True)
    print(f"Demo folder: {WORK} (commands below run from there)")
    try:
        rows, checks = _run(args)
    except DemoStopped as exc:
        print(f"\nDemo stopped: {exc}", file=sys.stderr)
        print(f"Everything written so far is in {WORK}.", file=sys.stderr)
        return exc.code
    _print_summary(rows, checks, args.seed)
    return 0


if __name__ == "__main__":
    sys.exit(main())
