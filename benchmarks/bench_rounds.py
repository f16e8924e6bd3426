"""Label efficiency of the planner's strategies, measured side by side in one run.

Goal (issue "labelling rounds"): the budget, in fee units, that the default strategy
(``value``) needs to bring the exact held-out system cost within 0.01 of the full-information
cost is at most a third of what ``random`` needs (aim: a fifth), as medians over at least 5
seeds, and ``value`` is never worse than ``random`` at any budget of the median curve.

Two scenarios, each played by :func:`routeplan.rehearse.rehearse` (same planner as
``routeplan round plan``, a two-stage plug-in router fitted after each round on cross-fitted
class probabilities, whose focus steers the next round of ``value`` and ``uncertain`` unless
``--no-focus``; exact costs on held-out cases from known probabilities):

* synthetic: :func:`routeplan.simulate.make_scenario` with three experts of fees 0.05, 0.125
  and 0.2 and different regional strengths; 3,000 pool cases, 5,000 held out; seed ``s``
  seeds the scenario, the answers, the planner and the routers.
* digits: scikit-learn's bundled digits with three simulated experts in the protocol of
  Mozannar & Sontag (ICML 2020, section 7): each always right on its classes (0-3, 3-6,
  6-9), uniformly random elsewhere, fees 0.02, 0.05 and 0.1
  (:func:`routeplan.rehearse.digits_experts_scenario`, images pooled to 4x4); 898 pool
  cases, 899 held out; seed ``s`` orders the cases and seeds the rest.

For each seed the target is that seed's full-information cost + 0.01. "Reach" is the first
budget of the schedule at which the cost is at or below the target; "sustained" also needs
every larger budget to stay there. Budgets are cumulative, on a geometric schedule, so a
ratio is resolved to one step of the schedule (a factor ``2 ** (1/2)``); the script also
reads the crossing between scheduled budgets (log-linear interpolation), which the goal's
verdict does not use but which is not rounded up to the next budget. Beside the medians
the script prints a bootstrap interval of their ratio over seeds and, where ``value``'s median
curve is above ``random``'s, the seed-paired difference there.

Each point of a curve is the mean exact cost of two router fits (``--fits``), and the
medians are over 8 seeds (``--seeds``): with one fit and 5 seeds the budget a seed needs
jumped by a factor of 2 or 4 between runs that differed in nothing that mattered.

Run: ``.venv/bin/python benchmarks/bench_rounds.py [--seeds 8] [--first-seed 0] [--jobs 2] [--fits 2]
[--planner spread=pairs] [--router n_members=3] [--no-focus | --one-sided-focus]
[--strategies value,random] [--curves FILE]`` (about 8 minutes on a 2-core machine). Two ``--curves`` files of two versions
on the same seeds are compared seed by seed with ``benchmarks/compare_rounds.py``;
``--from-curves FILE [FILE ...]`` plays nothing and reports saved curves, pooling the seeds of
several files (runs of one environment on different seeds).
"""

from __future__ import annotations

import argparse
import math
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd

STRATEGIES = ("value", "uncertain", "random")
TOLERANCE = 0.01
GOAL_RATIO, AIM_RATIO = 1 / 3, 1 / 5
SCENARIOS = {
    "synthetic": {"first": 10.0, "last": 640.0, "n_rounds": 13, "n_regions": 6},
    "digits": {"first": 0.25, "last": 64.0, "n_rounds": 17, "n_regions": 10},
}


def play(kind: str, seed: int, n_fits: int, weighting: str, planner: dict | None = None,
         focus_margin: float | None = 0.1, router: dict | None = None,
         strategies: tuple[str, ...] = STRATEGIES, two_sided: bool = True) -> dict:
    """One rehearsal of every strategy on one scenario and seed (runs in a worker process)."""
    import torch

    from routeplan.rehearse import ROUTER_SETTINGS, budget_schedule, digits_experts_scenario, rehearse

    torch.set_num_threads(1)
    router_params = {**ROUTER_SETTINGS, **(router or {})}
    spec = SCENARIOS[kind]
    budgets = budget_schedule(spec["first"], spec["last"], spec["n_rounds"])
    start = time.perf_counter()
    if kind == "synthetic":
        result = rehearse(n_pool=3000, n_eval=5000, budgets=budgets, n_regions=spec["n_regions"],
                          strategies=strategies, n_router_fits=n_fits, weighting=weighting,
                          planner_options=planner, focus_margin=focus_margin, focus_two_sided=two_sided,
                          router_params=router_params, random_state=seed)
    else:
        result = rehearse(digits_experts_scenario(random_state=seed), n_pool=900, budgets=budgets,
                          n_regions=spec["n_regions"], strategies=strategies, n_router_fits=n_fits,
                          weighting=weighting, planner_options=planner, focus_margin=focus_margin,
                          focus_two_sided=two_sided, router_params=router_params, random_state=seed)
    curves = result.curves.assign(budget=np.tile(budgets, len(strategies)), seed=seed)
    return {"kind": kind, "seed": seed, "curves": curves, "full": result.full_information_cost,
            "bayes": result.bayes_cost, "seconds": time.perf_counter() - start}


def reach(curve: pd.DataFrame, target: float, sustained: bool) -> float:
    """First scheduled budget at which the cost is within target (and stays, if sustained)."""
    rows = curve.sort_values("budget")
    ok = rows["system_cost"].to_numpy() <= target
    if sustained:
        ok = np.logical_and.accumulate(ok[::-1])[::-1]
    hit = rows["budget"].to_numpy()[ok]
    return float(hit.min()) if hit.size else math.inf


def reach_interpolated(curve: pd.DataFrame, target: float) -> float:
    """Budget at which the cost first comes within target, read between scheduled budgets.

    Linear interpolation of the cost in log budget between the last budget above the target
    and the first at or below it (the schedule is geometric, so the log is its natural
    axis). This reads the same crossing as :func:`reach` without rounding it up to the next
    step of the schedule; a curve already within target at the first budget reads as that
    budget (an upper bound).
    """
    rows = curve.sort_values("budget")
    budget, cost = rows["budget"].to_numpy(dtype=float), rows["system_cost"].to_numpy(dtype=float)
    hit = np.flatnonzero(cost <= target)
    if not hit.size:
        return math.inf
    i = int(hit[0])
    if i == 0:
        return float(budget[0])
    share = (cost[i - 1] - target) / (cost[i - 1] - cost[i])
    return float(np.exp(np.log(budget[i - 1]) + share * (np.log(budget[i]) - np.log(budget[i - 1]))))


def bootstrap_ratio(value: list[float], random: list[float], n_boot: int = 2000,
                    seed: int = 0) -> tuple[float, float]:
    """95% percentile bootstrap interval of median(value) / median(random) over seeds.

    Seeds are resampled with replacement, keeping each seed's pair together (Efron &
    Tibshirani, *An Introduction to the Bootstrap*, 1993, ch. 13). With 8 seeds the
    interval is wide: it says how far the goal's verdict could move on other seeds.
    """
    v, r = np.asarray(value, dtype=float), np.asarray(random, dtype=float)
    idx = np.random.default_rng(seed).integers(0, v.size, size=(n_boot, v.size))
    with np.errstate(invalid="ignore", divide="ignore"):
        ratios = np.median(v[idx], axis=1) / np.median(r[idx], axis=1)
    ratios = ratios[~np.isnan(ratios)]
    if not ratios.size:
        return math.nan, math.nan
    low, high = np.percentile(ratios, [2.5, 97.5])
    return float(low), float(high)


def _fmt(value: float) -> str:
    return "never" if math.isinf(value) else f"{value:.3g}"


def _ratio(a: float, b: float) -> str:
    if math.isinf(a) and math.isinf(b):
        return "n/a (neither reached)"
    if math.isinf(b):
        return "0 (random never reached)"
    return "inf (value never reached)" if math.isinf(a) else f"{a / b:.2f}"


def report(kind: str, runs: list[dict], strategies: tuple[str, ...] = STRATEGIES) -> dict:
    """Print per-seed and median figures for one scenario; return the medians."""
    runs = sorted(runs, key=lambda r: r["seed"])
    print(f"\n== {kind}: {len(runs)} seeds ==")
    print(f"{'seed':>4} {'full':>7} {'bayes':>7} " + " ".join(f"{s:>10}" for s in strategies)
          + f" {'value/random':>13}   (first budget within full + {TOLERANCE}; sustained in brackets)")
    table = {s: [] for s in strategies}
    table_sus = {s: [] for s in strategies}
    table_int = {s: [] for s in strategies}
    for run in runs:
        target = run["full"] + TOLERANCE
        cells = []
        for s in strategies:
            curve = run["curves"][run["curves"]["strategy"] == s]
            first, kept = reach(curve, target, False), reach(curve, target, True)
            table[s].append(first)
            table_sus[s].append(kept)
            table_int[s].append(reach_interpolated(curve, target))
            cells.append(f"{_fmt(first):>5} ({_fmt(kept):>5})".rjust(10))
        bayes = "-" if run["bayes"] is None else f"{run['bayes']:.4f}"
        print(f"{run['seed']:>4} {run['full']:7.4f} {bayes:>7} " + " ".join(cells)
              + f" {_ratio(table['value'][-1], table['random'][-1]):>13}")
    med = {s: float(np.median(table[s])) for s in strategies}
    med_sus = {s: float(np.median(table_sus[s])) for s in strategies}
    print("median budget to reach: " + ", ".join(f"{s} {_fmt(med[s])}" for s in strategies)
          + f"; value/random = {_ratio(med['value'], med['random'])} (goal <= {GOAL_RATIO:.2f}, aim {AIM_RATIO:.2f})")
    print("median budget, sustained: " + ", ".join(f"{s} {_fmt(med_sus[s])}" for s in strategies)
          + f"; value/random = {_ratio(med_sus['value'], med_sus['random'])}")
    low, high = bootstrap_ratio(table["value"], table["random"])
    print(f"95% bootstrap interval of the ratio of medians (seeds resampled): {low:.2f} to {high:.2f}")
    med_int = {s: float(np.median(table_int[s])) for s in strategies}
    low_i, high_i = bootstrap_ratio(table_int["value"], table_int["random"])
    print("median budget to reach, read between scheduled budgets (log-linear): "
          + ", ".join(f"{s} {_fmt(med_int[s])}" for s in strategies)
          + f"; value/random = {_ratio(med_int['value'], med_int['random'])} "
          f"(95% bootstrap interval {low_i:.2f} to {high_i:.2f})")
    curves = pd.concat([r["curves"].assign(gap=r["curves"]["system_cost"] - r["full"]) for r in runs])
    median_curve = curves.pivot_table(index="budget", columns="strategy", values="gap", aggfunc="median")
    spend = curves.pivot_table(index="budget", columns="strategy", values="spend", aggfunc="median")
    print("median gap to the full-information cost (system cost - full), by cumulative budget:")
    print(f"{'budget':>8} " + " ".join(f"{s:>10}" for s in strategies) + f" {'spent (value)':>14}")
    for budget, row in median_curve.iterrows():
        print(f"{budget:8.3g} " + " ".join(f"{row[s]:+10.4f}" for s in strategies) + f" {spend.loc[budget, 'value']:14.3g}")
    worse = median_curve.index[median_curve["value"] > median_curve["random"]].tolist()
    print("value <= random at every point of the median curve: "
          + ("yes" if not worse else f"NO (worse at budgets {', '.join(f'{b:.3g}' for b in worse)})"))
    if worse:
        _print_paired(curves, worse)
    mean_gap = median_curve.mean()
    print("mean over the schedule of the median gap: " + ", ".join(f"{s} {mean_gap[s]:+.4f}" for s in strategies))
    return {"median": med, "sustained": med_sus, "worse_at": worse}


def runs_from_curves(paths: list[Path]) -> list[dict]:
    """The runs of earlier ``--curves`` files, one per (scenario, seed), for :func:`report`.

    Several files pool their seeds, so that sets of seeds measured in separate runs of one
    environment are summarised together; a seed of a scenario in two files is refused, as
    is a seed whose rows disagree on the full-information cost. The Bayes cost is not in the
    files and prints as "-".
    """
    from compare_rounds import read_curves  # benchmarks/ is the script's folder, first on sys.path

    frames = [read_curves(path).assign(source=i) for i, path in enumerate(paths)]
    curves = pd.concat(frames, ignore_index=True)
    runs = []
    for (kind, seed), rows in curves.groupby(["kind", "seed"], sort=True):
        if rows["source"].nunique() > 1 or rows.duplicated(["strategy", "budget"]).any():
            files = ", ".join(str(paths[i]) for i in rows["source"].unique())
            raise ValueError(f"{kind} seed {seed} appears twice ({files})")
        full = rows["full"].unique()
        if full.size != 1:
            raise ValueError(f"{kind} seed {seed}: rows disagree on the full-information cost")
        runs.append({"kind": str(kind), "seed": int(seed), "full": float(full[0]), "bayes": None,
                     "curves": rows.drop(columns=["source", "kind", "full"])})
    return runs


def _print_paired(curves: pd.DataFrame, budgets: list[float]) -> None:
    """Seed-paired difference of value and random where value's median is worse.

    The medians are strict, so two strategies equal in expectation differ by chance at a
    budget; the paired mean difference over seeds and its standard error (the usual paired
    comparison, e.g. Wasserman, *All of Statistics*, 2004, ch. 10) say how large that is.
    """
    from compare_rounds import paired_summary  # benchmarks/ is the script's folder, first on sys.path

    by_seed = curves.pivot_table(index=["seed", "budget"], columns="strategy", values="gap")
    for budget in budgets:
        d = (by_seed["value"] - by_seed["random"]).xs(budget, level="budget").to_numpy()
        mean, se, worse = paired_summary(d)
        print(f"  budget {budget:.3g}: value - random per seed, mean {mean:+.4f} "
              f"(standard error {se:.4f}); value worse on {worse} of {d.size} seeds")


def main() -> None:
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=8, help="Seeds per scenario (FIRST..FIRST+N-1).")
    parser.add_argument("--first-seed", type=int, default=0, help="First seed (to extend an earlier run).")
    parser.add_argument("--jobs", type=int, default=2, help="Worker processes.")
    parser.add_argument("--fits", type=int, default=2, help="Router seeds averaged per point.")
    parser.add_argument("--weighting", default="none", help="none (as routeplan fit weighs round answers), "
                        "stabilized or recorded (routeplan.rehearse.WEIGHTINGS).")
    parser.add_argument("--only", choices=sorted(SCENARIOS), default=None)
    parser.add_argument("--focus-margin", type=float, default=0.1,
                        help="Margin of the router's focus (routeplan.acquisition.router_focus).")
    parser.add_argument("--no-focus", action="store_true", help="Plan without the router's focus.")
    parser.add_argument("--one-sided-focus", action="store_true",
                        help="The focus of the versions before 12-05: also the cases the router clearly sends "
                             "to the expert (routeplan.acquisition.router_focus, two_sided=False).")
    parser.add_argument("--planner", action="append", default=[], metavar="KEY=VALUE",
                        help="A keyword of routeplan.acquisition.select_assignments (repeatable), "
                             "e.g. spread=pairs or min_value_per_fee=2.")
    parser.add_argument("--strategies", default=",".join(STRATEGIES),
                        help="Comma-separated strategies to play; value and random are needed for the goal "
                             "(leaving out uncertain saves a third of the time).")
    parser.add_argument("--curves", type=Path, default=None, metavar="FILE",
                        help="Also write every seed's curve to this CSV, for benchmarks/compare_rounds.py.")
    parser.add_argument("--from-curves", type=Path, nargs="+", default=None, metavar="FILE",
                        help="Play nothing: report the curves of earlier runs (--curves files), pooling their "
                             "seeds; --only picks a scenario, the play options are ignored.")
    parser.add_argument("--router", action="append", default=[], metavar="KEY=VALUE",
                        help="A setting of the rehearsal's router over routeplan.rehearse.ROUTER_SETTINGS "
                             "(repeatable), e.g. n_members=3 for the average of three plug-in routers.")
    args = parser.parse_args()
    if args.from_curves is not None:
        _report_saved(parser, args.from_curves, args.only)
        return
    kinds = [args.only] if args.only else list(SCENARIOS)
    strategies = tuple(s.strip() for s in args.strategies.split(",") if s.strip())
    if not {"value", "random"} <= set(strategies) or not set(strategies) <= set(STRATEGIES):
        parser.error(f"--strategies: value and random, and only strategies of {', '.join(STRATEGIES)}")
    strategies = tuple(s for s in STRATEGIES if s in strategies)  # one order, whatever was typed
    if args.curves is not None and not args.curves.parent.is_dir():
        parser.error(f"--curves: no folder {args.curves.parent}")
    router = {}
    from probe_gap import parse_option  # benchmarks/ is the script's folder, first on sys.path

    from routeplan.learner import EnsembleRouter, PluginRouter

    defaults = EnsembleRouter().get_params()  # the plug-in router's settings and n_members
    for item in args.router:
        key, value = parse_option(item)  # JSON: numbers, true / false, lists; a word for a word setting
        if isinstance(value, str) and not isinstance(defaults.get(key), str):
            parser.error(f"--router {item}: not KEY=VALUE with a JSON value")
        router[key] = value
    unknown = sorted(set(router) - set(defaults))
    if unknown:
        parser.error(f"--router {unknown[0]}: not a setting of the plug-in router "
                     f"(one of {', '.join(sorted(defaults))})")
    try:  # a bad value fails here, not in every worker
        PluginRouter(**{k: v for k, v in router.items() if k != "n_members"})._check_params()
    except (TypeError, ValueError) as exc:
        parser.error(f"--router: {exc}")
    tasks = [(k, s) for k in kinds for s in range(args.first_seed, args.first_seed + args.seeds)]
    planner = {}
    for item in args.planner:
        key, _, value = item.partition("=")
        if not key or not value:
            parser.error(f"--planner {item}: not KEY=VALUE")
        try:
            planner[key] = int(value) if value.isdigit() else float(value)
        except ValueError:
            planner[key] = value  # a word, as in spread=pairs
    start = time.perf_counter()
    with ProcessPoolExecutor(max_workers=max(1, args.jobs)) as pool:
        margin = None if args.no_focus else args.focus_margin
        futures = [pool.submit(play, k, s, args.fits, args.weighting, planner, margin, router, strategies,
                               not args.one_sided_focus) for k, s in tasks]
        runs = [f.result() for f in futures]
    if args.curves is not None:
        pd.concat([r["curves"].assign(kind=r["kind"], full=r["full"]) for r in runs]).to_csv(args.curves, index=False)
    sides = "one" if args.one_sided_focus else "two"
    print(f"strategies {', '.join(strategies)}; weighting {args.weighting}; planner {planner or 'defaults'}; "
          f"router {router or 'defaults'}; "
          f"focus {'off' if margin is None else f'margin {margin:g}, {sides}-sided'}; "
          f"{args.fits} router fit(s) per point; "
          f"{len(tasks)} rehearsals in {time.perf_counter() - start:.0f} s wall with {args.jobs} worker(s)")
    _summary({k: report(k, [r for r in runs if r["kind"] == k], strategies) for k in kinds})


def _report_saved(parser: argparse.ArgumentParser, paths: list[Path], only: str | None) -> None:
    """``--from-curves``: report saved curves without playing."""
    try:
        runs = runs_from_curves(paths)
    except (OSError, ValueError) as exc:
        parser.error(f"--from-curves: {exc}")
    runs = [r for r in runs if only is None or r["kind"] == only]
    if not runs:
        parser.error("--from-curves: no curve of " + (f"scenario {only}" if only else "any scenario"))
    kinds = sorted({r["kind"] for r in runs})
    summary = {}
    for kind in kinds:
        mine = [r for r in runs if r["kind"] == kind]
        common = set.intersection(*(set(r["curves"]["strategy"]) for r in mine))
        if not {"value", "random"} <= common:
            parser.error(f"--from-curves: every {kind} seed needs curves of value and random")
        strategies = tuple(s for s in STRATEGIES if s in common)
        summary[kind] = report(kind, mine, strategies)
    print(f"\n(reported from {len(paths)} curves file(s); nothing played)")
    _summary(summary)


def _summary(summary: dict) -> None:
    """The closing lines: per scenario, the medians, their ratio and the goal's verdict."""
    print("\nsummary (median budget to reach full-information cost + 0.01):")
    for k, fig in summary.items():
        m = fig["median"]
        ok = (not math.isinf(m["value"])) and (math.isinf(m["random"]) or m["value"] <= GOAL_RATIO * m["random"])
        print(f"  {k}: value {_fmt(m['value'])}, random {_fmt(m['random'])}, ratio {_ratio(m['value'], m['random'])}"
              f" -> goal {'met' if ok and not fig['worse_at'] else 'NOT met'}"
              + ("" if not fig["worse_at"] else " (value worse than random somewhere on the median curve)"))


if __name__ == "__main__":
    main()
