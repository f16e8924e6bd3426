"""Benchmarks of the routers (routeplan.learner).

Run:  .venv/bin/python benchmarks/bench_learner.py [--quick] [--parts 1 2 3 4]

1. Fit time on 100,000 x 32 (K = 10 classes, M = 5 experts, all answers known, 10 epochs)
   against scikit-learn's LogisticRegression (lbfgs) on the same matrix (goal: at most 3x)
   and MLPClassifier with the same hidden sizes and epochs (goal: faster). The linear
   plug-in is fitted to convergence by full-batch L-BFGS (no epochs), like LogisticRegression.
2. Scoring 1,000,000 cases in a fresh subprocess (goal: < 5 s, peak memory < 1.5 GB,
   measured with resource.getrusage ru_maxrss).
3. Gap to the Bayes-optimal cost on the synthetic scenario with all answers (20,000 cases;
   goal: within 0.01), per router, seeds 0 and 1.
4. Plug-in (MLP and linear), the average of three plug-ins, and the softmax, one-vs-all
   and asymmetric softmax surrogates on digits (Mozannar & Sontag's expert), mean over
   seeds 0 and 1 (``--routers`` picks some of them for [3] and [4]).

Wall-clock figures depend on the machine's load; CPU seconds are printed beside them,
and fit times are the least of a few runs.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import textwrap
import time
import warnings

import numpy as np

from routeplan import costs, simulate
from routeplan.learner import EnsembleRouter, PluginRouter, SurrogateRouter


def _timed(fn, repeats: int = 1):
    """Run fn() repeats times; return (last result, least wall s, least CPU s).

    The least of several runs is the usual way to read a timing on a shared machine
    (as timeit does): other processes only ever add time.
    """
    walls, cpus = [], []
    for _ in range(repeats):
        w, c = time.perf_counter(), time.process_time()
        out = fn()
        walls.append(time.perf_counter() - w)
        cpus.append(time.process_time() - c)
    return out, min(walls), min(cpus)


def bench_fit(n: int) -> None:
    """Fit time against scikit-learn on the same matrix."""
    from sklearn.exceptions import ConvergenceWarning
    from sklearn.linear_model import LogisticRegression
    from sklearn.neural_network import MLPClassifier

    sc = simulate.make_scenario(n, n_features=32, n_classes=10, n_experts=5, random_state=0)
    X, y, A = sc.X, sc.y, sc.answers(1)
    print(f"\n[1] fit on {n:,} x 32, K=10, M=5, 10 epochs (all answers known); least of "
          "3 runs (LogisticRegression), 2 (routers), 1 (MLPClassifier)")
    epochs = {"max_epochs": 10, "patience": 10**6, "random_state": 0}
    rows = []
    candidates = [
        ("PluginRouter (classifier + correctness nets)", lambda: PluginRouter(**epochs)),
        ("SurrogateRouter softmax (correctness + scorer)", lambda: SurrogateRouter(**epochs)),
        ("PluginRouter linear (L-BFGS to convergence)",
         lambda: PluginRouter(head="linear", **epochs)),
        ("EnsembleRouter (3 plug-in routers)", lambda: EnsembleRouter(**epochs)),
    ]
    for name, make in candidates:
        _, wall, cpu = _timed(lambda: make().fit(X, y, A, fees=sc.fees), repeats=2)
        rows.append((name, wall, cpu))
    _, bare_wall, bare_cpu = _timed(lambda: _bare_torch_fit(X, y, A, (64, 64, 64)), repeats=2)
    floor, floor_setting = _one_net_floor(X, y, (64, 64, 64))
    threads = min(2, os.cpu_count() or 1)
    lr = LogisticRegression(solver="lbfgs", max_iter=1000)
    _, lr_wall, lr_cpu = _timed(lambda: lr.fit(X, y), repeats=3)
    mlp = MLPClassifier(hidden_layer_sizes=(64, 64, 64), max_iter=10, batch_size=256,
                        early_stopping=False, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        _, mlp_wall, mlp_cpu = _timed(lambda: mlp.fit(X, y))
    print(f"  {'LogisticRegression(lbfgs)':48s} wall {lr_wall:6.2f} s  cpu {lr_cpu:6.2f} s "
          f"({lr.n_iter_[0]} iterations, up to {threads} BLAS threads)")
    print(f"  {'MLPClassifier(64, 64, 64), 10 epochs, batch 256':48s} wall {mlp_wall:6.2f} s  "
          f"cpu {mlp_cpu:6.2f} s")
    print(f"  {'bare torch loop, same two networks, one by one':48s} wall {bare_wall:6.2f} s  "
          f"cpu {bare_cpu:6.2f} s  (ratio to LogReg: wall {bare_wall / lr_wall:4.2f}; no checks; "
          "the plug-in trains its two side by side)")
    print(f"  {'one such network alone, fastest setting':48s} wall {floor:6.2f} s  ({floor_setting}; "
          f"ratio to LogReg {floor / lr_wall:4.2f}: no fit of this network can come under it)")
    for name, wall, cpu in rows:
        print(f"  {name:48s} wall {wall:6.2f} s  cpu {cpu:6.2f} s\n"
              f"  {'':48s} ratio to LogReg: wall {wall / lr_wall:4.2f}, cpu {cpu / lr_cpu:4.2f} "
              f"(goal <= 3); to MLPClassifier: wall {wall / mlp_wall:4.2f}, "
              f"cpu {cpu / mlp_cpu:4.2f} (goal < 1)")


def _bare_torch_fit(X: np.ndarray, y: np.ndarray, A: np.ndarray, hidden: tuple[int, ...],
                    epochs: int = 10, batch_size: int = 512) -> None:
    """The plug-in's two networks trained one after the other by plain Adam with nothing
    else (no validation, early stopping, calibration or progress), on torch's threads."""
    import torch
    import torch.nn.functional as F

    from routeplan._nets import _make_net

    torch.manual_seed(0)
    Xt = torch.from_numpy(((X - X.mean(0)) / X.std(0)).astype(np.float32))
    yt = torch.from_numpy(y.astype(np.int64))
    right = torch.from_numpy((A == y[:, None]).astype(np.float32))
    nets = [_make_net(X.shape[1], int(y.max()) + 1, "mlp", hidden), _make_net(X.shape[1], A.shape[1], "mlp", hidden)]
    losses = [lambda m, i: F.cross_entropy(m(Xt[i]), yt[i]),
              lambda m, i: F.binary_cross_entropy_with_logits(m(Xt[i]), right[i])]
    for net, loss_fn in zip(nets, losses):
        opt = torch.optim.Adam(net.parameters(), lr=1e-3)
        for _ in range(epochs):
            perm = torch.randperm(Xt.shape[0])
            for s in range(0, Xt.shape[0], batch_size):
                opt.zero_grad(set_to_none=True)
                loss_fn(net, perm[s:s + batch_size]).backward()
                opt.step()


def _one_net_floor(X: np.ndarray, y: np.ndarray, hidden: tuple[int, ...], epochs: int = 10
                   ) -> tuple[float, str]:
    """Least wall time of one classifier network trained by plain fused Adam for ``epochs``
    over the 80% of rows a router trains on, over batch sizes 512 / 2048 and 1 / 2 threads:
    what any fit of one network of this size costs here, whatever the code around it."""
    import torch
    import torch.nn.functional as F

    from routeplan._nets import _make_net

    n = int(0.8 * X.shape[0])
    Xt = torch.from_numpy(((X[:n] - X[:n].mean(0)) / X[:n].std(0)).astype(np.float32))
    yt = torch.from_numpy(y[:n].astype(np.int64))
    old_threads, best = torch.get_num_threads(), (np.inf, "")
    try:
        for threads in (1, 2):
            torch.set_num_threads(threads)
            for batch in (512, 2048):
                torch.manual_seed(0)
                net = _make_net(X.shape[1], int(y.max()) + 1, "mlp", hidden)
                opt = torch.optim.Adam(net.parameters(), lr=1e-3, fused=True)
                start = time.perf_counter()
                for _ in range(epochs):
                    for s in range(0, n, batch):
                        opt.zero_grad(set_to_none=True)
                        F.cross_entropy(net(Xt[s:s + batch]), yt[s:s + batch]).backward()
                        opt.step()
                wall = time.perf_counter() - start
                best = min(best, (wall, f"batch {batch}, {threads} thread(s)"))
    finally:
        torch.set_num_threads(old_threads)
    return best


_SCORER = textwrap.dedent("""
    import resource, sys, time, json
    import numpy as np
    from routeplan.learner import router_from_arrays
    data = np.load(sys.argv[1], allow_pickle=False)
    meta = json.loads(open(sys.argv[2]).read())
    router = router_from_arrays({k: data[k] for k in data.files}, meta)
    rng = np.random.default_rng(0)
    X = rng.standard_normal((1_000_000, 32), dtype=np.float32)
    before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    t0 = time.perf_counter(); c0 = time.process_time()
    ec = router.predict_costs(X)
    routes = np.argmin(ec, axis=1)
    wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    t1 = time.perf_counter(); r2 = router.predict_route(X); wall_route = time.perf_counter() - t1
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(json.dumps({"wall": wall, "cpu": cpu, "wall_route": wall_route,
                      "rss_before_mb": before / 1024, "peak_mb": peak / 1024,
                      "same": bool((routes == r2).all())}))
""")


def bench_score() -> None:
    """Score 1,000,000 cases in a subprocess, per router; time and peak memory."""
    import json

    sc = simulate.make_scenario(5_000, n_features=32, n_classes=10, n_experts=5, random_state=0)
    print("\n[2] scoring 1,000,000 x 32 (K=10, M=5), fresh process per router")
    for name, make in (("PluginRouter", PluginRouter), ("EnsembleRouter (3 plug-ins)", EnsembleRouter)):
        router = make(max_epochs=3, random_state=0).fit(sc.X, sc.y, sc.answers(1), fees=sc.fees)
        arrays, meta = router.get_arrays()
        with tempfile.TemporaryDirectory() as tmp:
            npz, js = os.path.join(tmp, "w.npz"), os.path.join(tmp, "m.json")
            np.savez(npz, **arrays)
            with open(js, "w") as fh:
                json.dump(meta, fh)
            out = subprocess.run([sys.executable, "-c", _SCORER, npz, js], check=True,
                                 capture_output=True, text=True)
        r = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"  {name}, MLP {router.hidden_}: predict_costs + argmin wall {r['wall']:.2f} s "
              f"(goal < 5), cpu {r['cpu']:.2f} s; predict_route alone {r['wall_route']:.2f} s")
        print(f"  {'':{len(name)}}  peak RSS {r['peak_mb']:.0f} MB (goal < 1536); before scoring "
              f"{r['rss_before_mb']:.0f} MB (interpreter, torch and the 128 MB input)")


def bench_bayes(n_train: int, routers: list) -> None:
    """Gap to the exact Bayes-optimal cost on the synthetic scenario."""
    sc = simulate.make_scenario(n_train + 10_000, random_state=0)
    A = sc.answers(1)
    tr, te = np.arange(n_train), np.arange(n_train, n_train + 10_000)
    ec = costs.expected_cost_vectors(sc.proba[te], sc.correct_proba[te], fees=sc.fees,
                                     cost_matrix=costs.error_cost_matrix(sc.n_classes))
    bayes = ec.min(axis=1).mean()
    print(f"\n[3] synthetic scenario (8 features, K=5, M=3), {n_train:,} training cases, all "
          f"answers;\n    exact expected cost on 10,000 held-out cases; Bayes-optimal {bayes:.4f}")
    for name, make in routers:
        for seed in (0, 1):
            router, wall, cpu = _timed(lambda: make(seed).fit(sc.X[tr], sc.y[tr], A[tr],
                                                              fees=sc.fees))
            cost = ec[np.arange(len(te)), router.predict_route(sc.X[te])].mean()
            print(f"  {name:10s} seed {seed}  cost {cost:.4f}  gap {cost - bayes:+.4f}  "
                  f"(fit wall {wall:.1f} s, cpu {cpu:.1f} s)")


_ROUTERS = [
    ("plugin", lambda s: PluginRouter(random_state=s)),
    ("linear", lambda s: PluginRouter(head="linear", random_state=s)),
    ("ensemble", lambda s: EnsembleRouter(random_state=s)),
    ("asymmetric", lambda s: SurrogateRouter(loss="asymmetric", random_state=s)),
    ("softmax", lambda s: SurrogateRouter(random_state=s)),
    ("ova", lambda s: SurrogateRouter(loss="ova", random_state=s)),
]


def bench_digits(routers: list) -> None:
    """Plug-in vs the two surrogates on digits with the simulated expert."""
    from sklearn.model_selection import train_test_split

    print("\n[4] digits, expert right on classes < k and uniform otherwise (Mozannar & "
          "Sontag 2020);\n    expected cost on a 30% held-out split (the expert's draws "
          "averaged out)")
    for k in (2, 5, 8):
        d = simulate.digits_scenario(k, random_state=0)
        tr, te = train_test_split(np.arange(len(d.y)), test_size=0.3, random_state=0,
                                  stratify=d.y)
        exp_expert = np.where(d.y[te] < k, 0.0, 0.9)
        line = [f"  k={k}:"]
        for name, make in routers:
            cost, defer = [], []
            for seed in (0, 1):
                r = make(seed).fit(d.X[tr], d.y[tr], d.answers[tr], fees=np.zeros(1))
                routes = r.predict_route(d.X[te])
                cost.append(np.where(routes < 10, routes != d.y[te], exp_expert).mean())
                defer.append(np.mean(routes >= 10))
                if name == routers[0][0] and seed == 0:
                    model = float((r.predict_proba(d.X[te]).argmax(1) != d.y[te]).mean())
            line.append(f"{name} {np.mean(cost):.4f} (defers {np.mean(defer):.2f})")
        line.append(f"| model alone {model:.4f}, expert alone {exp_expert.mean():.4f}")
        print(" ".join(line))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help="smaller fit benchmark (20,000 cases)")
    parser.add_argument("--parts", type=int, nargs="+", default=[1, 2, 3, 4],
                        choices=[1, 2, 3, 4], help="which of the four benchmarks to run")
    parser.add_argument("--routers", nargs="+", choices=[name for name, _ in _ROUTERS],
                        default=[name for name, _ in _ROUTERS], help="routers of [3] and [4]")
    args = parser.parse_args()
    routers = [(name, make) for name, make in _ROUTERS if name in args.routers]
    if 1 in args.parts:
        bench_fit(20_000 if args.quick else 100_000)
    if 2 in args.parts:
        bench_score()
    if 3 in args.parts:
        bench_bayes(20_000, routers)
    if 4 in args.parts:
        bench_digits(routers)


if __name__ == "__main__":
    main()
