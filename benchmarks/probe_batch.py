"""Does a larger batch make a real fit faster? Time to convergence and gap, by batch size.

The fit-time goal of ``bench_learner.py`` [1] counts a fixed 10 epochs; a real ``fit``
stops early (``patience``), so a larger batch, which makes an epoch cheaper, can still make
the fit slower by needing more epochs. This probe fits the plug-in router with its defaults
but for the batch size and learning rate given, on the fit benchmark's scenario
(:func:`routeplan.simulate.make_scenario` with 32 features, K = 10, M = 5, every answer
known; 100,000 training cases, 20,000 held out), and prints per router seed the wall time,
the epochs each network ran, and the exact held-out gap to the Bayes-optimal cost.

Run: ``.venv/bin/python benchmarks/probe_batch.py [512:0.001 2048:0.001 2048:0.002 ...]``
(BATCH:LEARNING_RATE; about a minute per fit on a 2-core machine).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from routeplan import costs, simulate
from routeplan.learner import PluginRouter


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("settings", nargs="*", default=["512:0.001", "2048:0.001", "2048:0.002"],
                        help="BATCH:LEARNING_RATE pairs.")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1], help="Router seeds.")
    parser.add_argument("--n-train", type=int, default=100_000)
    args = parser.parse_args()
    n = args.n_train
    sc = simulate.make_scenario(n + 20_000, n_features=32, n_classes=10, n_experts=5, random_state=0)
    A = sc.answers(1)
    tr, te = np.arange(n), np.arange(n, n + 20_000)
    ec = costs.expected_cost_vectors(sc.proba[te], sc.correct_proba[te], fees=sc.fees,
                                     cost_matrix=costs.error_cost_matrix(sc.n_classes))
    bayes = ec.min(axis=1).mean()
    print(f"{n:,} x 32, K=10, M=5, all answers; Bayes-optimal cost {bayes:.4f} on 20,000 held out")
    for text in args.settings:
        batch, lr = text.split(":")
        for seed in args.seeds:
            start = time.perf_counter()
            router = PluginRouter(batch_size=int(batch), learning_rate=float(lr),
                                  random_state=seed).fit(sc.X[tr], sc.y[tr], A[tr], fees=sc.fees)
            wall = time.perf_counter() - start
            cost = ec[np.arange(te.size), router.predict_route(sc.X[te])].mean()
            print(f"  batch {batch:>5} lr {lr:>6} seed {seed}: {wall:6.1f} s, epochs classifier "
                  f"{len(router.history_['classifier'])} correctness {len(router.history_['correctness'])}, "
                  f"gap {cost - bayes:+.4f}", flush=True)


if __name__ == "__main__":
    main()
