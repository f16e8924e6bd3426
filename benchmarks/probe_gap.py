"""Where the plug-in router's gap to the Bayes-optimal cost comes from.

The setting of ``bench_learner.py`` [3] (synthetic scenario, 20,000 training cases, every
answer known, exact expected cost on 10,000 held-out cases). The gap of the fitted router
is split by swapping in the scenario's true quantities one at a time:

* ``both``: the router's class probabilities and expert correctness (its real gap);
* ``true P``: the true ``P(y | x)`` with the router's correctness, so what is left is the
  correctness model's share;
* ``true q``: the router's class probabilities with the true ``P(right | x)``, so what is
  left is the classifier's share.

Run: ``.venv/bin/python benchmarks/probe_gap.py [--router KEY=VALUE ...] [--seeds 0 1]``,
e.g. ``--router validation_fraction=0.1`` or ``--router hidden=[128,128,128]``
(values are read as JSON, else kept as text).
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np

from routeplan import costs, simulate
from routeplan.learner import PluginRouter


def parse_option(text: str) -> tuple[str, object]:
    """KEY=VALUE with VALUE read as JSON when it parses."""
    key, _, value = text.partition("=")
    try:
        return key, json.loads(value)
    except json.JSONDecodeError:
        return key, value


def gap_setting(n: int):
    """The scenario (``n`` training and 10,000 held-out cases), all answers, and a gap function.

    Returns ``(scenario, answers, train_index, test_index, bayes, gap)``, where ``gap(p, q)``
    is the exact expected cost on the held-out cases of routing by class probabilities ``p``
    and correctness ``q``, minus the Bayes-optimal cost ``bayes``.
    """
    sc = simulate.make_scenario(n + 10_000, random_state=0)
    A = sc.answers(1)
    tr, te = np.arange(n), np.arange(n, n + 10_000)
    C = costs.error_cost_matrix(sc.n_classes)
    ec = costs.expected_cost_vectors(sc.proba[te], sc.correct_proba[te], fees=sc.fees, cost_matrix=C)
    bayes = float(ec.min(axis=1).mean())

    def gap(p: np.ndarray, q: np.ndarray) -> float:
        route = costs.expected_cost_vectors(p, q, fees=sc.fees, cost_matrix=C).argmin(axis=1)
        return float(ec[np.arange(te.size), route].mean() - bayes)

    return sc, A, tr, te, bayes, gap


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--router", action="append", default=[], metavar="KEY=VALUE",
                        help="PluginRouter parameter (repeatable).")
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1], help="Router seeds.")
    parser.add_argument("--n-train", type=int, default=20_000)
    args = parser.parse_args()
    params = dict(parse_option(t) for t in args.router)

    n = args.n_train
    sc, A, tr, te, bayes, gap = gap_setting(n)
    print(f"synthetic scenario, {n:,} training cases, all answers; Bayes-optimal {bayes:.4f}; "
          f"router {params or 'defaults'}")
    for seed in args.seeds:
        t = time.perf_counter()
        r = PluginRouter(random_state=seed, **params).fit(sc.X[tr], sc.y[tr], A[tr], fees=sc.fees)
        wall = time.perf_counter() - t
        p, q = r.predict_proba(sc.X[te]), r.predict_expert_correct(sc.X[te])
        print(f"  seed {seed}: both {gap(p, q):+.4f}  true P {gap(sc.proba[te], q):+.4f}  "
              f"true q {gap(p, sc.correct_proba[te]):+.4f}  (fit {wall:.1f} s)")


if __name__ == "__main__":
    main()
