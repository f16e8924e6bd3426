"""Probe: would the planner gain from knowing exactly where each expert's answers matter?

An experiment, not a goal: it gives the ``value`` and ``uncertain`` strategies an oracle that
the real planner cannot have, and measures the result with the same rehearsal as
``bench_rounds.py`` (synthetic scenario, 8 seeds, 2 router fits per point). After the audit,
their picks for expert ``j`` are restricted to the pool cases where, by the scenario's true
expected costs, asking ``j`` is

* ``--mode contested``: within ``--tau`` of the best other option (either side), or
* ``--mode below``: better than every other option, or worse by less than ``--tau``,

that is, the cases where learning the expert's correctness could change a decision. The audit
and the ``random`` strategy are left alone. If such focusing reached the full-information cost
on a fraction of random's budget, the planner's job would be to approximate the oracle; if it
does worse than random, the router needs answers beyond the cases that matter.

``--explain`` instead fits one rehearsal router (seed 0) on 300 answers per expert drawn inside
the oracle's set, plus 30 uniform audit answers, and on the same numbers drawn uniformly, and
prints per expert the estimated and true mean ``P(right)`` inside and outside the set and how
often the router defers to the expert outside it, where it is never the right choice.

Run: ``.venv/bin/python benchmarks/probe_focus.py [--mode contested] [--tau 0.1] [--explain]``
(about 6 minutes on a 2-core machine; ``--explain`` a few seconds).
"""

from __future__ import annotations

import argparse
import time
from concurrent.futures import ProcessPoolExecutor

import numpy as np

import bench_rounds


def _decisive(true_costs: np.ndarray, n_classes: int, mode: str, tau: float) -> np.ndarray:
    """(n, M): where an answer of expert j could change the decision, by the true costs."""
    M = true_costs.shape[1] - n_classes
    mask = np.zeros((true_costs.shape[0], M), dtype=bool)
    for j in range(M):
        col = n_classes + j
        margin = true_costs[:, col] - np.delete(true_costs, col, axis=1).min(axis=1)
        mask[:, j] = np.abs(margin) < tau if mode == "contested" else margin < tau
    return mask


def _scenario(seed: int, n_pool: int = 3000, n_eval: int = 5000):
    """The rehearsal's synthetic scenario (as rehearse() builds it) and every case's true costs."""
    from routeplan.costs import error_cost_matrix, expected_cost_vectors
    from routeplan.simulate import make_scenario

    scn = make_scenario(n_pool + n_eval, random_state=seed)
    tc = expected_cost_vectors(scn.proba, scn.correct_proba,
                               cost_matrix=error_cost_matrix(scn.n_classes), fees=scn.fees)
    return scn, tc


def _oracle_mask(seed: int, mode: str, tau: float, n_pool: int = 3000) -> np.ndarray:
    """(n_pool, M) pool cases where an answer of expert j could change the true decision."""
    scn, tc = _scenario(seed, n_pool)
    return _decisive(tc[:n_pool], scn.n_classes, mode, tau)


def play_focused(seed: int, mode: str, tau: float) -> dict:
    """bench_rounds.play on the synthetic scenario with the oracle restriction patched in.

    It patches the planner's cell counting and drawing instead of passing the mask as
    ``select_assignments(focus=...)``: that keyword also spends what the focus leaves on the
    other pairs, and the probe measures the restriction alone (as its figures were taken).
    """
    from routeplan import acquisition

    mask = _oracle_mask(seed, mode, tau)
    cell_counts, draw_cells = acquisition._cell_counts, acquisition._draw_cells

    def restrict(eligible: np.ndarray) -> np.ndarray:
        if eligible.shape == mask.shape:
            eligible &= mask  # in place: select_assignments reads it again for the design
        return eligible

    def counts(pool, costs, eligible, *args, **kwargs):
        return cell_counts(pool, costs, restrict(eligible), *args, **kwargs)

    def draw(pool, eligible, k, rng):
        return draw_cells(pool, restrict(eligible), k, rng)

    acquisition._cell_counts, acquisition._draw_cells = counts, draw
    out = bench_rounds.play("synthetic", seed, 2, "stabilized", focus_margin=None)  # the oracle alone
    out["mask_share"] = mask.mean(axis=0).round(3).tolist()
    return out


def explain(mode: str, tau: float, per_expert: int = 300, audit: int = 30) -> None:
    """Where a router trained on oracle-focused answers goes wrong (seed 0)."""
    from routeplan.learner import PluginRouter
    from routeplan.rehearse import ROUTER_SETTINGS

    n_pool, seed = 3000, 0
    scn, tc_all = _scenario(seed, n_pool)
    K, M = scn.n_classes, scn.n_experts
    held = np.arange(n_pool, scn.X.shape[0])
    tc = tc_all[held]
    inside = _decisive(tc, K, mode, tau)
    mask = _decisive(tc_all[:n_pool], K, mode, tau)
    every = scn.answers(seed)[:n_pool]
    rng = np.random.default_rng(seed)
    for design in ("focused", "uniform"):
        A = np.full((n_pool, M), -1)
        for j in range(M):
            cand = np.flatnonzero(mask[:, j]) if design == "focused" else np.arange(n_pool)
            for rows in (rng.choice(cand, min(per_expert, cand.size), replace=False),
                         rng.choice(n_pool, audit, replace=False)):
                A[rows, j] = every[rows, j]
        router = PluginRouter(random_state=seed, **ROUTER_SETTINGS).fit(
            scn.X[:n_pool], scn.y[:n_pool], A, fees=scn.fees)
        routes = router.predict_route(scn.X[held])
        q = router.predict_expert_correct(scn.X[held])
        gap = tc[np.arange(held.size), routes].mean() - tc.min(axis=1).mean()
        print(f"{design} answers: held-out gap to the Bayes cost {gap:+.4f}")
        for j in range(M):
            out = ~inside[:, j]
            print(f"  expert {j + 1}: P(right) outside the set estimated {q[out, j].mean():.2f}, "
                  f"true {scn.correct_proba[held][out, j].mean():.2f}; inside {q[~out, j].mean():.2f}, "
                  f"true {scn.correct_proba[held][~out, j].mean():.2f}; deferred to on "
                  f"{np.mean(routes[out] == K + j):.1%} of the cases outside")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--mode", choices=("contested", "below"), default="below")
    parser.add_argument("--tau", type=float, default=0.1)
    parser.add_argument("--seeds", type=int, default=8)
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--explain", action="store_true",
                        help="show where a router fitted on oracle-focused answers goes wrong")
    args = parser.parse_args()
    if args.explain:
        explain(args.mode, args.tau)
        return
    start = time.perf_counter()
    with ProcessPoolExecutor(max_workers=max(1, args.jobs)) as pool:
        runs = list(pool.map(play_focused, range(args.seeds), [args.mode] * args.seeds,
                             [args.tau] * args.seeds))
    print(f"oracle focus, mode {args.mode}, tau {args.tau}; {args.seeds} seeds in "
          f"{time.perf_counter() - start:.0f} s; share of pool cases kept per expert, seed 0: "
          f"{runs[0]['mask_share']}")
    bench_rounds.report("synthetic", runs)


if __name__ == "__main__":
    main()
