"""Where a rehearsal's router sends the held-out cases, round by round.

For one scenario and seed, plays the rounds of ``benchmarks/bench_rounds.py`` (same
schedule, regions, router settings and one router fit per point) and prints, after each
round and for each strategy, the spend, the answers bought, the gap to the
full-information cost and the share of held-out cases the router sends to the model and
to each expert, beside the same shares of the full-information routers. On the synthetic
scenario, whose true option costs are known, it also splits the router's regret (its
cost minus the Bayes-optimal cost) by the option it chose. Each row ends with the experts
whose correctness model uses the class offset in that fit (``offset 0 1 0``; for an
average of routers, in any member) and the answers with truth each expert had given by then
(``per expert 120 45 30``). A router that keeps nearly every case on the model
while the full-information router defers a fifth of them has not yet learned where the
experts are right; that is how the class offset of
:class:`routeplan.learner.PluginRouter` was found (see DEVELOPERS.md).

Run: ``.venv/bin/python benchmarks/probe_routes.py [--scenario digits] [--seed 0]
[--strategies value,random] [--router KEY=VALUE ...]`` (about a minute on digits, a few on
the synthetic scenario).
"""

from __future__ import annotations

import argparse

import numpy as np

from bench_rounds import SCENARIOS  # benchmarks/ is the script's folder, first on sys.path
from probe_gap import parse_option
from routeplan import rehearse as rh
from routeplan.rehearse import ROUTER_SETTINGS, budget_schedule, digits_experts_scenario


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", choices=sorted(SCENARIOS), default="digits")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--strategies", default="value,random")
    parser.add_argument("--router", action="append", default=[], metavar="KEY=VALUE",
                        help="A PluginRouter keyword over the rounds' settings (value read as JSON).")
    args = parser.parse_args()
    strategies = tuple(args.strategies.split(","))
    router = {**ROUTER_SETTINGS, **dict(parse_option(text) for text in args.router)}
    spec = SCENARIOS[args.scenario]
    budgets = budget_schedule(spec["first"], spec["last"], spec["n_rounds"])
    fitted: list[tuple[np.ndarray, ...]] = []  # route shares, regret, offset experts, answers per expert
    measured_cost, measured_fit = rh._Stage.cost, rh._Stage.fit
    answers_seen: dict[int, np.ndarray] = {}  # id of a fitted router -> answers per expert it saw

    def fit(stage: rh._Stage, answers: np.ndarray, weights, seed: int):
        """The stage's fit, noting how many answers per expert the router was given."""
        fitted_router = measured_fit(stage, answers, weights, seed)
        answers_seen[id(fitted_router)] = (answers >= 0).sum(axis=0)
        return fitted_router

    def cost(stage: rh._Stage, fitted_router) -> float:
        """The stage's exact cost, recording where the router sends each held-out case."""
        routes = fitted_router.predict_route(stage.X_eval, class_proba=stage.P_eval)
        K, n = stage.C.shape[0], routes.size
        kind = np.where(routes < K, 0, routes - K + 1)  # 0 the model, j + 1 expert j
        true = stage.true_costs
        regret = true[np.arange(n), routes] - true.min(axis=1)
        n_kinds = true.shape[1] - K + 1
        members = getattr(fitted_router, "members_", [fitted_router])
        offset = np.any([getattr(m, "offset_experts_", np.zeros(n_kinds - 1, dtype=bool)) for m in members], axis=0)
        fitted.append((np.bincount(kind, minlength=n_kinds) / n,
                       np.bincount(kind, weights=regret, minlength=n_kinds) / n, offset.astype(int),
                       answers_seen.pop(id(fitted_router))))
        return measured_cost(stage, fitted_router)

    rh._Stage.cost, rh._Stage.fit = cost, fit  # this script only: record each fit's answers and routes
    try:
        common = {"budgets": budgets, "n_regions": spec["n_regions"], "strategies": strategies,
                  "router_params": router, "random_state": args.seed}
        if args.scenario == "synthetic":
            result = rh.rehearse(n_pool=3000, n_eval=5000, **common)
        else:
            result = rh.rehearse(digits_experts_scenario(random_state=args.seed), n_pool=900, **common)
    finally:
        rh._Stage.cost, rh._Stage.fit = measured_cost, measured_fit
    known_truth = result.bayes_cost is None  # digits: the truth is one-hot, every regret is the model's
    n_ref = len(fitted) - len(result.curves)
    names = ["model"] + [f"expert {j + 1}" for j in range(len(fitted[0][0]) - 1)]
    print(f"{args.scenario}, seed {args.seed}; full-information cost {result.full_information_cost:.4f}"
          + ("" if known_truth else f", Bayes {result.bayes_cost:.4f}"))
    print("share of held-out cases sent to " + ", ".join(names))
    for share, regret, offset, _ in fitted[:n_ref]:
        print(f"  full information: {_row(share)}" + ("" if known_truth else f"; regret by chosen {_row(regret)}")
              + f"; offset {' '.join(map(str, offset))}")
    for (share, regret, offset, seen), (_, row) in zip(fitted[n_ref:], result.curves.iterrows()):
        print(f"  {row.strategy:>9} spend {row.spend:7.2f} answers {int(row.answers):5d} "
              f"gap {row.system_cost - result.full_information_cost:+.4f}: {_row(share)}"
              + ("" if known_truth else f"; regret by chosen {_row(regret)}")
              + f"; offset {' '.join(map(str, offset))}; per expert {' '.join(map(str, seen))}")
    used = np.array([offset for _, _, offset, _ in fitted[n_ref:]])
    print("fits whose correctness model uses the class offset, per expert: "
          + " ".join(f"{int(c)}/{len(used)}" for c in used.sum(axis=0)))


def _row(values: np.ndarray) -> str:
    return " ".join(f"{v:.3f}" for v in values)


if __name__ == "__main__":
    main()
