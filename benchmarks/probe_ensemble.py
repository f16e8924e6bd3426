"""How far does averaging plug-in routers close the gap to the Bayes-optimal cost?

The setting of ``bench_learner.py`` [3] and ``probe_gap.py`` (synthetic scenario, 20,000
training cases, every answer known, exact expected cost on 10,000 held-out cases). For each
router seed the script fits :class:`routeplan.learner.EnsembleRouter` (``--members`` plug-in
routers, each with its own initialisation, batch order and validation split; a deep
ensemble, Lakshminarayanan, Pritzel & Blundell, NeurIPS 2017), prints each member's gap,
then the gap of the averaged router. As in ``probe_gap.py``, the averaged router's gap is
split by swapping in the true ``P(y | x)`` (what is left is the correctness model's share)
or the true ``P(right | x)`` (the classifier's).

Run: ``.venv/bin/python benchmarks/probe_ensemble.py [--members 3] [--seeds 0 1 2]``
(about 30 s per member on a 2-core machine).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from probe_gap import gap_setting  # the same setting (run from benchmarks/, which is on the path)
from routeplan.learner import EnsembleRouter


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=3, help="Plug-in routers averaged.")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2], help="Router seeds.")
    parser.add_argument("--n-train", type=int, default=20_000)
    args = parser.parse_args()

    n = args.n_train
    sc, A, tr, te, bayes, gap = gap_setting(n)
    print(f"synthetic scenario, {n:,} training cases, all answers; Bayes-optimal {bayes:.4f}; "
          f"{args.members} members per router")
    singles, averages = [], []
    for s in args.seeds:
        t = time.perf_counter()
        r = EnsembleRouter(n_members=args.members, random_state=s).fit(sc.X[tr], sc.y[tr], A[tr],
                                                                      fees=sc.fees)
        wall = time.perf_counter() - t
        for i, m in enumerate(r.members_):
            singles.append(gap(m.predict_proba(sc.X[te]), m.predict_expert_correct(sc.X[te])))
            print(f"seed {s} member {i}: gap {singles[-1]:+.4f}", flush=True)
        P, Q = r.predict_proba(sc.X[te]), r.predict_expert_correct(sc.X[te])
        averages.append(gap(P, Q))
        print(f"seed {s} averaged router: gap {averages[-1]:+.4f} (true P(y|x): "
              f"{gap(sc.proba[te], Q):+.4f}, true P(right|x): {gap(P, sc.correct_proba[te]):+.4f}; "
              f"fit {wall:.0f} s)", flush=True)
    print(f"mean gap: single members {np.mean(singles):+.4f} ({len(singles)}), averaged routers "
          f"{np.mean(averages):+.4f} ({len(averages)}, from {min(averages):+.4f} to "
          f"{max(averages):+.4f}); goal 0.01")


if __name__ == "__main__":
    main()
