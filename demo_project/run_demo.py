"""Run the Marrowdene Tileworks demo end to end through the ``routeplan`` command line.

Usage::

    python demo_project/run_demo.py [--rounds 4] [--budget 25] [--seed 7] [--n 4000]

The script deletes and recreates ``demo_project/work/``, writes the invented data
there, and then drives routeplan exactly as a user would, printing every command
before it runs it (as ``$ routeplan ...``, run from inside ``demo_project/work/``).
Steps whose command this routeplan does not have yet are skipped with a note.
If a command fails the demo stops with its exit code and a message saying which
step failed. At the end it prints a short summary: what happened, where the files
are, and what to try next.
"""

from __future__ import annotations

import argparse
import json
import os
import re
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


def _child_env() -> dict[str, str]:
    """The environment for routeplan: ours, with room for wide tables when piped."""
    env = dict(os.environ)
    env.setdefault("COLUMNS", str(max(110, shutil.get_terminal_size(fallback=(110, 24)).columns)))
    return env


def _routeplan(args: list[str], *, capture: bool = False, show: bool = True) -> subprocess.CompletedProcess:
    """Run ``routeplan --workspace workspace ARGS`` in WORK; stop the demo if it fails."""
    full = ["--workspace", WORKSPACE, *args]
    if show:
        print(f"\n$ routeplan {shlex.join(full)}", flush=True)
    proc = subprocess.run(
        [sys.executable, "-m", "routeplan", *full],
        cwd=WORK,
        text=True,
        capture_output=capture,
        env=_child_env(),
    )
    if proc.returncode != 0:
        if capture:
            sys.stdout.write(proc.stdout or "")
            sys.stderr.write(proc.stderr or "")
        raise DemoStopped(f"`routeplan {shlex.join(args)}` failed with exit code {proc.returncode}.", proc.returncode or 1)
    return proc


def _python(script: str, args: list[str]) -> None:
    """Run one of the demo's own scripts (printed as ``$ python ...``); stop if it fails."""
    print(f"\n$ python {shlex.join([f'../{script}', *args])}", flush=True)
    proc = subprocess.run([sys.executable, str(HERE / script), *args], cwd=WORK, text=True)
    if proc.returncode != 0:
        raise DemoStopped(f"`{script}` failed with exit code {proc.returncode}.", proc.returncode or 1)


class Commands:
    """Which routeplan commands (and options) exist, read from their ``--help`` text."""

    def __init__(self) -> None:
        self._names: dict[tuple[str, ...], set[str] | None] = {}
        self._help: dict[tuple[str, ...], str] = {}
        self.skipped: list[str] = []

    def skip(self, what: str) -> None:
        """Say (and remember) that a step is skipped because this routeplan lacks its command."""
        print(f"\n(skipped: this routeplan has no `{what}` command yet)")
        if what not in self.skipped:
            self.skipped.append(what)

    def help_text(self, path: tuple[str, ...]) -> str:
        """The ``--help`` output of a command (empty if it has none)."""
        if path not in self._help:
            proc = subprocess.run(
                [sys.executable, "-m", "routeplan", *path, "--help"],
                cwd=WORK, text=True, capture_output=True,
            )
            self._help[path] = proc.stdout if proc.returncode == 0 else ""
        return self._help[path]

    def has(self, *path: str) -> bool:
        """True if ``routeplan PATH...`` is a command or group."""
        for depth in range(len(path)):
            parent, name = path[:depth], path[depth]
            if name not in self._subcommands(parent):
                return False
        return True

    def has_option(self, path: tuple[str, ...], option: str) -> bool:
        """True if the command's help mentions ``option``."""
        return re.search(rf"(?<![\w-]){re.escape(option)}(?![\w-])", self.help_text(path)) is not None

    def _subcommands(self, parent: tuple[str, ...]) -> set[str]:
        """Names listed under ``Commands:`` in a group's help."""
        if parent not in self._names:
            names: set[str] = set()
            in_block = False
            for line in self.help_text(parent).splitlines():
                if re.match(r"^\S.*:\s*$", line):
                    in_block = line.strip().lower() == "commands:"
                    continue
                match = re.match(r"^\s{1,8}([a-z][\w-]*)(\s|$)", line)
                if in_block and match:
                    names.add(match.group(1))
            self._names[parent] = names
        return self._names[parent] or set()




def _round_id(payload: Any) -> str | None:
    """Find the round's identifier in the JSON that ``round plan --json`` prints."""
    if isinstance(payload, dict):
        for key in ("round", "round_id", "id", "number", "name"):
            value = payload.get(key)
            if isinstance(value, (int, str)) and not isinstance(value, bool):
                return str(value)
            if isinstance(value, dict):
                found = _round_id(value)
                if found is not None:
                    return found
    return None


def _describe_plan(payload: Any) -> None:
    """Print the plain numbers of a round plan's JSON, one per line."""
    if not isinstance(payload, dict):
        return
    for key, value in payload.items():
        if isinstance(value, (int, float, str)) and not isinstance(value, bool):
            print(f"  {key}: {value}")
        elif isinstance(value, dict) and all(isinstance(v, (int, float, str)) for v in value.values()) and len(value) <= 10:
            print(f"  {key}: " + ", ".join(f"{k}={v}" for k, v in value.items()))
        elif isinstance(value, list) and value and all(isinstance(v, str) for v in value):
            for line in value:
                print(f"  {key}: {line}")
        elif isinstance(value, list) and all(isinstance(v, dict) and "expert" in v for v in value):
            for row in value:
                plain = {k: v for k, v in row.items() if k != "expert" and isinstance(v, (int, float, str))}
                print(f"  {row['expert']}: " + ", ".join(f"{k}={v:.3g}" if isinstance(v, float) else f"{k}={v}" for k, v in plain.items()))


def _setup(cmds: Commands, summary: dict[str, Any]) -> None:
    """Initialise the workspace and bring in tiles, truth, experts and history."""
    if not cmds.has("init"):
        raise DemoStopped("this routeplan has no `init` command; is the package installed in this environment?", 1)
    _routeplan(["init", "--labels", ",".join(tileworks.LABELS), "--error-cost", "1"])
    if cmds.has("cases", "import"):
        extra = ["--id-column", "case_id"]
        if cmds.has_option(("cases", "import"), "--group-column"):
            extra += ["--group-column", "kiln"]
        else:
            print("\n(note: `cases import` has no --group-column yet, so the kiln is not used as a group)")
        _routeplan(["cases", "import", f"{DATA}/tiles.csv", *extra])
    else:
        cmds.skip("cases import")
    if cmds.has("truth", "import"):
        _routeplan(["truth", "import", f"{DATA}/truth.csv"])
    else:
        cmds.skip("truth import")
    _add_experts(cmds)
    if cmds.has("answers", "import"):
        _routeplan(["answers", "import", f"{DATA}/history.csv"])
    else:
        cmds.skip("answers import")
    if cmds.has("status"):
        _routeplan(["status"])
    summary["setup"] = True


def _add_experts(cmds: Commands) -> None:
    """Register the experts: all at once if `experts import` exists, else one by one."""
    if cmds.has("experts", "import"):
        _routeplan(["experts", "import", f"{DATA}/experts.csv"])
    elif cmds.has("experts", "add"):
        for row in pd.read_csv(WORK / DATA / "experts.csv").itertuples(index=False):
            _routeplan(["experts", "add", str(row.name), "--fee", str(row.fee), "--capacity", str(row.capacity)])
    else:
        cmds.skip("experts import")


def _rounds(cmds: Commands, n_rounds: int, budget: float, seed: int, summary: dict[str, Any]) -> None:
    """Plan, export, answer, import, fit and inspect, ``n_rounds`` times."""
    if not (cmds.has("round", "plan") and cmds.has("round", "export")):
        cmds.skip("round plan / round export")
        _fit_and_look(cmds, seed)  # still learn from the truth and the history
        return
    fees = pd.read_csv(WORK / DATA / "experts.csv").set_index("name")["fee"]
    bought: dict[str, int] = {}
    for r in range(1, n_rounds + 1):
        print(f"\n=== Round {r} of {n_rounds} ===")
        proc = _routeplan(["round", "plan", "--budget", f"{budget:g}", "--seed", str(seed + r), "--json"], capture=True)
        try:
            payload = json.loads(proc.stdout)
        except json.JSONDecodeError as exc:
            raise DemoStopped(f"`round plan --json` printed no JSON ({exc}); its output began: {proc.stdout[:200]!r}") from exc
        _describe_plan(payload)
        round_id = _round_id(payload)
        if round_id is None:
            raise DemoStopped(f"could not find the round's id in the JSON of `round plan` (keys: {sorted(payload) if isinstance(payload, dict) else type(payload).__name__})")
        sheets, answers = f"sheets/{round_id}", f"answers/{round_id}"
        _routeplan(["round", "export", round_id, "--out", sheets])
        if not any((WORK / sheets).glob("*.csv")):
            print("(the plan chose no tiles; nothing to answer this round)")
            continue
        _python("play_experts.py", [sheets, "--out", answers, "--data", DATA, "--seed", str(seed)])
        files = []
        for path in sorted((WORK / answers).glob("*.csv")):
            n_rows = len(pd.read_csv(path))
            if n_rows:
                files.append(str(path.relative_to(WORK)))
                bought[path.stem] = bought.get(path.stem, 0) + n_rows
        if files and cmds.has("answers", "import"):
            _routeplan(["answers", "import", *files])
        _fit_and_look(cmds, seed)
        summary["rounds"] = r
    summary["bought"] = bought
    summary["fees_spent"] = float(sum(fees.get(name, 0.0) * count for name, count in bought.items()))


def _fit_and_look(cmds: Commands, seed: int) -> None:
    """Fit the router and show the experts' competence, where those commands exist."""
    if cmds.has("fit"):
        _routeplan(["fit", "--seed", str(seed)])
    else:
        cmds.skip("fit")
    if cmds.has("competence"):
        _routeplan(["competence"])
    else:
        cmds.skip("competence")


def _freeze_and_route(cmds: Commands, summary: dict[str, Any]) -> None:
    """Freeze the policy and route the new tiles with it."""
    if not cmds.has("freeze"):
        cmds.skip("freeze")
        return
    _routeplan(["freeze", "--out", "policy.json"])
    summary["policy"] = True
    if not cmds.has("route"):
        cmds.skip("route")
        return
    _routeplan(["route", "--policy", "policy.json", f"{DATA}/new_tiles.csv", "--out", "routed.csv"])
    summary["routed"] = True


def check_routed(routed: pd.DataFrame, data_dir: Path, seed: int) -> dict[str, Any]:
    """Score a routing of the new tiles against the hidden grades (only a demo can do this).

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
        ``n``, ``routes`` (count per route), ``accuracy``, ``fees`` and ``cost_per_tile``
        (wrong grades plus fees, per tile).
    """
    world, profiles = tileworks.load_world(data_dir)
    fees = pd.read_csv(data_dir / "experts.csv").set_index("name")["fee"]
    row_of = pd.Series(range(len(world)), index=world["case_id"].to_numpy())
    routed = routed.assign(case_id=routed["case_id"].astype(str), route=routed["route"].astype(str))
    is_model = (routed["route"] == "model").to_numpy()
    final = np.where(is_model, routed["label"].astype(str).to_numpy(dtype=object), None).astype(object)
    fee_total = 0.0
    for expert in sorted(set(routed["route"]) - {"model"}):
        mask = (routed["route"] == expert).to_numpy()
        if expert in profiles["experts"]:
            positions = row_of.loc[routed["case_id"][mask]].to_numpy(dtype=int)
            final[mask] = tileworks.play_expert(expert, profiles, world, positions, seed)
        fee_total += float(fees.get(expert, 0.0)) * int(mask.sum())
    truth = world.set_index("case_id").loc[routed["case_id"], "truth"].to_numpy()
    n_right = int((final == truth).sum())
    n = len(routed)
    return {
        "n": n,
        "routes": routed["route"].value_counts().to_dict(),
        "accuracy": n_right / n if n else float("nan"),
        "fees": fee_total,
        "cost_per_tile": ((n - n_right) + fee_total) / n if n else float("nan"),
    }


def _baselines(data_dir: Path, seed: int) -> dict[str, float]:
    """Cost per new tile if every tile went to one expert (for comparison)."""
    world, profiles = tileworks.load_world(data_dir)
    new_ids = pd.read_csv(data_dir / "new_tiles.csv")["case_id"].astype(str)
    out = {}
    for expert in tileworks.default_experts()["name"]:
        routed = pd.DataFrame({"case_id": new_ids, "route": expert, "label": ""})
        out[expert] = check_routed(routed, data_dir, seed)["cost_per_tile"]
    return out


def _print_summary(cmds: Commands, summary: dict[str, Any], seed: int) -> None:
    """Tell a newcomer what happened, where the files are and what to try next."""
    print("\n" + "=" * 72 + "\nSummary\n" + "=" * 72)
    print("The invented Marrowdene Tileworks grades fired roof tiles first / second / reject.")
    print(f"Data: {WORK / DATA} (tiles.csv, truth.csv, new_tiles.csv, experts.csv, history.csv).")
    print(f"Workspace: {WORK / WORKSPACE}")
    if summary.get("rounds"):
        bought = ", ".join(f"{k} {v}" for k, v in sorted(summary["bought"].items()))
        print(f"Ran {summary['rounds']} round(s); answers bought: {bought}; fees spent: {summary['fees_spent']:.2f}"
              " (one wrong grade costs 1).")
        print(f"Sheets per round: {WORK / 'sheets'}; simulated answers: {WORK / 'answers'}")
    if summary.get("policy"):
        print(f"Frozen routing policy: {WORK / 'policy.json'}")
    if summary.get("routed"):
        routed = pd.read_csv(WORK / "routed.csv", dtype=str, keep_default_na=False)
        check = check_routed(routed, WORK / DATA, seed)
        routes = ", ".join(f"{k} {v}" for k, v in sorted(check["routes"].items()))
        print(f"Routed {check['n']} new tiles -> {WORK / 'routed.csv'}: {routes}.")
        print("Checked against the hidden grades (possible only because the data are invented):")
        print(f"  accuracy {check['accuracy']:.3f}, fees {check['fees']:.1f}, cost per tile {check['cost_per_tile']:.3f}")
        for expert, cost in _baselines(WORK / DATA, seed).items():
            print(f"  for comparison, every tile to {expert} (ignoring its capacity): cost per tile {cost:.3f}")
    if cmds.skipped:
        print("Not run, because this routeplan lacks the command: " + ", ".join(cmds.skipped) + ".")
    script = Path(sys.executable).with_name("routeplan")
    routeplan = str(script) if script.exists() else f"{sys.executable} -m routeplan"
    print("\nWhat to try next:")
    print(f"  cd {WORK}")
    print(f"  {routeplan} --workspace {WORKSPACE} status")
    if cmds.has("competence"):
        print(f"  {routeplan} --workspace {WORKSPACE} competence")
    if summary.get("rounds"):
        print("  rerun the demo with --budget 10 or --rounds 8 and compare the cost per tile;")
        dry = " --dry-run" if cmds.has_option(("round", "plan"), "--dry-run") else ""
        print(f"  {routeplan} --workspace {WORKSPACE} round plan --budget 25 --strategy random{dry}"
              "   (what does the default strategy gain?)")
    print(f"  peek at {WORK / DATA / tileworks.PROFILES_FILE} to see how good each expert really is.")


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    parser = argparse.ArgumentParser(description="Run the Marrowdene Tileworks demo through the routeplan CLI.")
    parser.add_argument("--rounds", type=int, default=4, help="labelling rounds (default 4)")
    parser.add_argument("--budget", type=float, default=25.0, help="fee budget per round (default 25)")
    parser.add_argument("--seed", type=int, default=7, help="seed for data, planning, fitting and experts (default 7)")
    parser.add_argument("--n", type=int, default=4000, help="pool tiles (default 4000)")
    args = parser.parse_args(argv)
    if WORK.exists():
        shutil.rmtree(WORK)
    WORK.mkdir(parents=True)
    print(f"Demo folder: {WORK} (commands below run from there)")
    summary: dict[str, Any] = {}
    cmds = Commands()
    try:
        _python("generate_cases.py", ["--out", DATA, "--n", str(args.n), "--seed", str(args.seed)])
        _setup(cmds, summary)
        _rounds(cmds, args.rounds, args.budget, args.seed, summary)
        _freeze_and_route(cmds, summary)
    except DemoStopped as exc:
        print(f"\nDemo stopped: {exc}", file=sys.stderr)
        print(f"Everything written so far is in {WORK}.", file=sys.stderr)
        return exc.code
    _print_summary(cmds, summary, args.seed)
    return 0


if __name__ == "__main__":
    sys.exit(main())
