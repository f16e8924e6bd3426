"""How well the rounds' router learns from a few hundred answers drawn at random.

The router that ``rehearse`` (and ``bench_rounds.py``) fits after each round, on answers
bought uniformly at random: the same number per expert, no planner. The figure is the exact
held-out system cost minus the seed's full-information cost (every answer known, default
settings, mean of 2 router fits), averaged over 2 router fits and over scenario seeds. It
isolates a learner change from the planner: a router that needs fewer answers here moves
every strategy's curve.

Run: ``.venv/bin/python benchmarks/probe_few_answers.py [--scenario synthetic|digits]
[--per-expert 150] [--seeds 6] [--router KEY=VALUE ...] [--calibration-prior P]`` (each
``--router`` adds one variant beside the defaults; values are read as JSON, e.g.
``--router calibrate=false``; ``--calibration-prior`` sets the routers'
``calibration_prior`` (default :data:`routeplan.learner.CALIBRATION_PRIOR`) for the whole
run, the full-information reference included).
"""

from __future__ import annotations

import argparse
import warnings

import numpy as np

from probe_gap import parse_option  # benchmarks/ is the script's folder, first on sys.path
from routeplan import learner, simulate
from routeplan.rehearse import ROUTER_SETTINGS, _stage, digits_experts_scenario


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenario", choices=("synthetic", "digits"), default="synthetic")
    parser.add_argument("--per-expert", type=int, default=150, help="Answers drawn per expert.")
    parser.add_argument("--seeds", type=int, default=6, help="Scenario seeds 0..N-1.")
    parser.add_argument("--calibration-prior", type=float, default=None,
                        help="The routers' calibration_prior for the whole run.")
    parser.add_argument("--router", action="append", default=[], metavar="KEY=VALUE",
                        help="A variant: one PluginRouter keyword over the rounds' settings.")
    args = parser.parse_args()
    settings = dict(ROUTER_SETTINGS)
    if args.calibration_prior is not None:
        settings["calibration_prior"] = args.calibration_prior
    prior = settings.get("calibration_prior", learner.CALIBRATION_PRIOR)
    variants = {"defaults": {}, **{text: dict([parse_option(text)]) for text in args.router}}
    gaps: dict[str, list[float]] = {name: [] for name in variants}
    print(f"{args.scenario}, {args.per_expert} answers per expert drawn at random; gap to the "
          "full-information cost (exact, held out), mean of 2 router fits; calibration prior "
          f"{prior:g}")
    for seed in range(args.seeds):
        if args.scenario == "digits":  # as bench_rounds.py: 898 pool cases, 899 held out
            stage, answers = _stage(digits_experts_scenario(random_state=seed), 898,
                                    dict(settings), 5, seed)
        else:  # as bench_rounds.py: 3,000 pool cases, 5,000 held out
            stage, answers = _stage(simulate.make_scenario(8000, random_state=seed), 3000,
                                    dict(settings), 5, seed)
        rng = np.random.default_rng(seed)
        shown = np.full_like(answers, -1)
        for j in range(answers.shape[1]):
            rows = rng.choice(answers.shape[0], min(args.per_expert, answers.shape[0]), replace=False)
            shown[rows, j] = answers[rows, j]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            full = np.mean([stage.score(answers, None, seed + 7919 * k) for k in range(2)])
            for name, params in variants.items():
                stage.router_params = {**settings, **params}
                gaps[name].append(np.mean([stage.score(shown, None, seed + 7919 * k)
                                           for k in range(2)]) - full)
        print(f"  seed {seed}: " + "  ".join(f"{n} {g[-1]:+.4f}" for n, g in gaps.items()),
              flush=True)
    base = np.asarray(gaps["defaults"])
    for name, g in gaps.items():
        g = np.asarray(g)
        better = "" if name == "defaults" else f"; better than defaults on {int((g < base).sum())} of {g.size}"
        print(f"mean gap {name}: {g.mean():+.4f}{better}")


if __name__ == "__main__":
    main()
