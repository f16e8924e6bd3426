"""Where a rehearsal's router loses against the full-information router, on the synthetic scenario.

Plays the rounds of ``benchmarks/bench_rounds.py`` for one strategy and seed (the same
:func:`routeplan.rehearse.rehearse`: schedule, regions, router settings and focus; two router
fits per round, the last steering the next round) up to a budget, then routes the held-out
cases with the last router and with the rehearsal's full-information router (fitted on every
answer of the pool). It prints

* the answers each expert gave and both routers' exact held-out costs;
* the pairs (router's route, full-information route) that carry the excess cost, largest
  first, as a share of the held-out cases;
* per expert, the median distance (standardised features) from a held-out case to the
  nearest pool case that expert answered, for the cases the router sends to the expert
  against the full router's advice and for those it sends there rightly: equal distances say
  that the misroutes are not extrapolation far from the answers;
* per expert, its answers and its misroutes by the scenario's true region, beside the true
  accuracy table.

Run: ``.venv/bin/python benchmarks/probe_misroutes.py [--seed 92] [--budget 80]
[--strategy value]`` (under half a minute).
"""

from __future__ import annotations

import argparse
from collections import defaultdict

import numpy as np
from sklearn.neighbors import NearestNeighbors

from bench_rounds import SCENARIOS  # benchmarks/ is the script's folder, first on sys.path
from routeplan import acquisition
from routeplan import rehearse as rh
from routeplan.simulate import make_scenario

N_POOL, N_EVAL, N_FITS = 3000, 5000, 2


def play(seed: int, budget: float, strategy: str):
    """The rehearsal of ``bench_rounds.py`` up to ``budget`` (one strategy): the scenario, the
    stage, the full-information router, the answers revealed, the last router and the spend.

    The rounds are :func:`routeplan.rehearse.rehearse`'s own; its stage's ``fit`` is wrapped
    for this call only, to keep the routers it fits (the first is the full-information
    reference on every answer, the last the strategy's router after the last round).
    """
    spec = SCENARIOS["synthetic"]
    steps = [b for b in rh.budget_schedule(spec["first"], spec["last"], spec["n_rounds"]) if b <= budget * (1 + 1e-9)]
    if not steps:
        raise SystemExit(f"--budget must be at least the schedule's first budget, {spec['first']:g}")
    scn = make_scenario(N_POOL + N_EVAL, random_state=seed)
    fits: list[tuple] = []  # (stage, answers shown, router) of every fit, in order
    measured_fit = rh._Stage.fit

    def fit(stage: rh._Stage, answers, weights, fit_seed: int):
        router = measured_fit(stage, answers, weights, fit_seed)
        fits.append((stage, answers, router))
        return router

    rh._Stage.fit = fit  # this call only: keep the fitted routers
    try:
        result = rh.rehearse(scn, n_pool=N_POOL, budgets=steps, n_regions=spec["n_regions"], strategies=(strategy,),
                             n_router_fits=N_FITS, router_params=dict(rh.ROUTER_SETTINGS), random_state=seed)
    finally:
        rh._Stage.fit = measured_fit
    stage, _, full = fits[0]
    _, shown, router = fits[-1]
    return scn, stage, full, shown >= 0, router, float(result.curves["spend"].iloc[-1])


def main() -> None:
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=92)
    parser.add_argument("--budget", type=float, default=80.0, help="Cumulative fee units to play up to.")
    parser.add_argument("--strategy", choices=acquisition.STRATEGIES, default="value")
    args = parser.parse_args()
    scn, stage, full, revealed, router, spend = play(args.seed, args.budget, args.strategy)
    K = scn.n_classes
    mine = router.predict_route(stage.X_eval, class_proba=stage.P_eval)
    best = full.predict_route(stage.X_eval, class_proba=stage.P_eval)
    rows = np.arange(mine.size)
    excess = stage.true_costs[rows, mine] - stage.true_costs[rows, best]
    print(f"seed {args.seed}, {args.strategy}, spend {spend:.1f}; answers per expert "
          f"{' '.join(map(str, revealed.sum(axis=0)))}; held-out cost {stage.true_costs[rows, mine].mean():.4f}, "
          f"full-information {stage.true_costs[rows, best].mean():.4f}")

    def name(route: int) -> str:
        return "model" if route < K else f"e{route - K}"

    share, count = defaultdict(float), defaultdict(int)
    for a, b, e in zip(mine, best, excess):
        share[name(a), name(b)] += e / mine.size
        count[name(a), name(b)] += 1
    print("excess cost by (router's route, full-information route), largest first:")
    for key in sorted(share, key=lambda k: -share[k])[:8]:
        print(f"  {key[0]:>5} instead of {key[1]:>5}: {count[key]:5d} cases, {share[key]:+.4f}")
    true_region = scn.regions[N_POOL:]
    print("true accuracy per expert (rows) and true region (columns):")
    print(np.array2string(scn.region_accuracy, precision=2))
    for j in range(scn.n_experts):
        answered = stage.X[revealed[:, j]]
        if not len(answered):
            print(f"  e{j}: no answers")
            continue
        dist = NearestNeighbors(n_neighbors=1).fit(answered).kneighbors(stage.X_eval)[0][:, 0]
        sent = mine == K + j
        wrong, right = sent & (excess > 0), sent & (excess <= 0)
        med = (lambda m: f"{np.median(dist[m]):.2f}" if m.any() else "-")
        print(f"  e{j}: nearest-answer distance, sent against the full router {med(wrong)} ({wrong.sum()} cases), "
              f"sent rightly {med(right)} ({right.sum()}), all held-out {np.median(dist):.2f}; answers by true "
              f"region {np.bincount(scn.regions[:N_POOL][revealed[:, j]], minlength=scn.region_accuracy.shape[1])}, "
              f"misroutes by true region {np.bincount(true_region[wrong], minlength=scn.region_accuracy.shape[1])}")


if __name__ == "__main__":
    main()
