"""Does averaging several plug-in routers close the gap to the Bayes-optimal cost?

The setting of ``bench_learner.py`` [3] and ``probe_gap.py`` (synthetic scenario, 20,000
training cases, every answer known, exact expected cost on 10,000 held-out cases). For each
seed ``s`` the script fits ``--members`` plug-in routers with router seeds ``100 s + i``
(the same data and split rule, different initialisation, shuffling and split), prints each
one's gap, then the gap of routing on their averaged calibrated class probabilities and
averaged ``P(right | x)``: a deep ensemble (Lakshminarayanan, Pritzel & Blundell, "Simple
and Scalable Predictive Uncertainty Estimation using Deep Ensembles", NeurIPS 2017). As in
``probe_gap.py``, the ensemble's gap is split by swapping in the true ``P(y | x)`` (what is
left is the correctness model's share) or the true ``P(right | x)`` (the classifier's).

This is a probe, not a router: nothing in ``routeplan`` averages routers yet.

Run: ``.venv/bin/python benchmarks/probe_ensemble.py [--members 3] [--seeds 0 1 2]``
(about 30 s per router fit on a 2-core machine).
"""

from __future__ import annotations

import argparse

import numpy as np

from probe_gap import gap_setting  # the same setting (run from benchmarks/, which is on the path)
from routeplan import costs
from routeplan.learner import PluginRouter


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=3, help="Routers averaged per seed.")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--n-train", type=int, default=20_000)
    args = parser.parse_args()

    n = args.n_train
    sc, A, tr, te, bayes, gap = gap_setting(n)
    C = costs.error_cost_matrix(sc.n_classes)
    print(f"synthetic scenario, {n:,} training cases, all answers; Bayes-optimal {bayes:.4f}; "
          f"{args.members} routers per seed")
    singles, ensembles = [], []
    for s in args.seeds:
        Ps, Qs = [], []
        for i in range(args.members):
            r = PluginRouter(random_state=100 * s + i).fit(sc.X[tr], sc.y[tr], A[tr], fees=sc.fees,
                                                           cost_matrix=C)
            Ps.append(r.predict_proba(sc.X[te]))
            Qs.append(r.predict_expert_correct(sc.X[te]))
            singles.append(gap(Ps[-1], Qs[-1]))
            print(f"seed {s} router {i}: gap {singles[-1]:+.4f}", flush=True)
        P, Q = np.mean(Ps, axis=0), np.mean(Qs, axis=0)
        ensembles.append(gap(P, Q))
        print(f"seed {s} average of {args.members}: gap {ensembles[-1]:+.4f} (true P(y|x): "
              f"{gap(sc.proba[te], Q):+.4f}, true P(right|x): {gap(P, sc.correct_proba[te]):+.4f})",
              flush=True)
    print(f"mean gap: single routers {np.mean(singles):+.4f} ({len(singles)}), "
          f"averages {np.mean(ensembles):+.4f} ({len(ensembles)}); goal 0.01")


if __name__ == "__main__":
    main()
