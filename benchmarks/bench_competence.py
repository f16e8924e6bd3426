"""Time the competence tables on a large synthetic answer set.

Goal: every competence table for 1,000,000 answers from 10 experts in under 10 s.
The data are invented here (seeded) for timing only; they check nothing.

Run: ``.venv/bin/python benchmarks/bench_competence.py [--answers N] [--seed S]``
"""

from __future__ import annotations

import argparse
import time
from typing import Any

import numpy as np
import pandas as pd

from routeplan.competence import competence_report, regions_from_features

GOAL_SECONDS = 10.0


def make_data(
    n_answers: int = 1_000_000,
    n_experts: int = 10,
    n_classes: int = 4,
    answers_per_case: int = 5,
    seed: int = 0,
) -> dict[str, Any]:
    """Synthetic cases, answers, truth, model predictions, groups and features."""
    rng = np.random.default_rng(seed)
    n_cases = n_answers // answers_per_case
    X = rng.normal(size=(n_cases, 6))
    truth_full = rng.integers(n_classes, size=n_cases)
    # each case goes to `answers_per_case` distinct experts
    order = np.argsort(rng.random((n_cases, n_experts)), axis=1)[:, :answers_per_case]
    case = np.repeat(np.arange(n_cases), answers_per_case)
    expert = order.ravel()
    skill = rng.uniform(0.6, 0.95, size=n_experts)
    right = rng.random(case.size) < skill[expert]
    wrong = (truth_full[case] + rng.integers(1, n_classes, size=case.size)) % n_classes
    answer = np.where(right, truth_full[case], wrong)
    audit = rng.random(case.size) < 0.1
    answers = pd.DataFrame({
        "case": case,
        "expert": np.array([f"expert_{j:02d}" for j in range(n_experts)])[expert],
        "answer": answer,
        "audit": audit,
        "weight": np.where(audit, 10.0, np.nan),
    })
    truth = np.where(rng.random(n_cases) < 0.7, truth_full, -1)
    model_ok = rng.random(n_cases) < 0.8
    model_pred = np.where(model_ok, truth_full, (truth_full + 1) % n_classes)
    return {
        "answers": answers, "truth": truth, "model_pred": model_pred, "X": X,
        "group": rng.choice(np.array(["north", "south", "east", "west"]), size=n_cases),
        "fees": {
            f"expert_{j:02d}": float(f) for j, f in enumerate(rng.uniform(0.05, 0.5, n_experts))
        },
        "labels": [f"class_{k}" for k in range(n_classes)],
    }


def run(n_answers: int = 1_000_000, seed: int = 0) -> dict[str, float]:
    """Build the data, time the regions and the full report, print and return the figures."""
    data = make_data(n_answers=n_answers, seed=seed)
    t0 = time.perf_counter()
    region = regions_from_features(data["X"], n_regions=6, random_state=seed)
    t1 = time.perf_counter()
    report = competence_report(
        data["answers"], data["truth"], labels=data["labels"], fees=data["fees"],
        model_pred=data["model_pred"], group=data["group"], region=region,
    )
    t2 = time.perf_counter()
    assert report.latent is not None
    figures = {
        "n_answers": float(len(data["answers"])),
        "regions_s": t1 - t0,
        "report_s": t2 - t1,
        "total_s": t2 - t0,
        "ds_iterations": float(report.latent.n_iter),
    }
    print(f"answers: {len(data['answers']):,} from {data['answers']['expert'].nunique()} experts")
    print(f"regions (k-means, {len(data['truth']):,} cases): {figures['regions_s']:.2f} s")
    print(f"competence report (all tables + Dawid-Skene, {report.latent.n_iter} EM iterations): "
          f"{figures['report_s']:.2f} s")
    print(f"total: {figures['total_s']:.2f} s = {figures['total_s'] / GOAL_SECONDS:.2f} x the "
          f"{GOAL_SECONDS:.0f} s goal")
    return figures


def main() -> None:
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--answers", type=int, default=1_000_000)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    run(n_answers=args.answers, seed=args.seed)


if __name__ == "__main__":
    main()
