"""Seed-paired comparison of two planner versions from the curves ``bench_rounds.py`` saved.

``bench_rounds.py --curves FILE`` writes every seed's curve. Two such files, from two
versions of the planner (or two settings) on the same seeds and scenario, are compared here
budget by budget: for one strategy, the difference of its gap to the full-information cost
(``after - before``, negative when the second version is better), averaged over the seeds
both files hold, with its standard error and the number of seeds on which the second was
worse. The medians and budgets to reach that ``bench_rounds.py`` prints move in steps of the
schedule and jump between seed sets; the paired difference uses every seed's whole curve, so
a change can be told from chance at each budget (the paired comparison, e.g. Wasserman,
*All of Statistics*, 2004, ch. 10).

Run: ``.venv/bin/python benchmarks/compare_rounds.py BEFORE.csv AFTER.csv [--strategy value]
[--kind synthetic]``.
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import pandas as pd

COLUMNS = ("kind", "seed", "strategy", "budget", "system_cost", "full")


def read_curves(path: str | Path) -> pd.DataFrame:
    """Curves written by ``bench_rounds.py --curves``, checked for the columns used here."""
    curves = pd.read_csv(path)
    missing = [c for c in COLUMNS if c not in curves.columns]
    if missing:
        raise ValueError(f"{path}: not a curves file of bench_rounds.py (no column {missing[0]!r})")
    return curves


def paired_summary(d: np.ndarray) -> tuple[float, float, int]:
    """Mean of per-seed differences, its standard error (NaN with one seed), seeds above 0."""
    d = np.asarray(d, dtype=float)
    se = float(d.std(ddof=1) / np.sqrt(d.size)) if d.size > 1 else float("nan")
    return float(d.mean()), se, int((d > 0).sum())


def paired_differences(before: pd.DataFrame, after: pd.DataFrame, strategy: str = "value") -> pd.DataFrame:
    """Per budget, the seed-paired difference of a strategy's gap to the full-information cost.

    Parameters
    ----------
    before, after : DataFrame
        Curves with the columns of :data:`COLUMNS`, for one scenario.
    strategy : str, default="value"

    Returns
    -------
    DataFrame indexed by budget
        ``before`` and ``after`` (mean gap over the paired seeds), ``difference`` (their mean
        per-seed difference, after - before), ``se`` (its standard error, NaN with one seed),
        ``worse`` (seeds on which ``after`` was worse) and ``seeds``.
    """
    def gaps(curves: pd.DataFrame) -> pd.Series:
        rows = curves[curves["strategy"] == strategy]
        if rows.empty:
            raise ValueError(f"no curve of strategy {strategy!r}")
        if rows.duplicated(["seed", "budget"]).any():
            raise ValueError("one curve per seed and budget expected: give one scenario (--kind)")
        return (rows["system_cost"] - rows["full"]).set_axis(pd.MultiIndex.from_frame(rows[["seed", "budget"]]))

    joined = pd.concat({"before": gaps(before), "after": gaps(after)}, axis=1, join="inner")
    if joined.empty:
        raise ValueError("the two files share no (seed, budget): run both on the same seeds and schedule")
    rows = []
    for budget, group in joined.groupby(level="budget"):
        mean, se, worse = paired_summary((group["after"] - group["before"]).to_numpy())
        rows.append({"budget": budget, "before": group["before"].mean(), "after": group["after"].mean(),
                     "difference": mean, "se": se, "worse": worse, "seeds": len(group)})
    return pd.DataFrame(rows).set_index("budget")


def main() -> None:
    """Command-line entry point."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("before", help="Curves of the first version (bench_rounds.py --curves).")
    parser.add_argument("after", help="Curves of the second version, same seeds and schedule.")
    parser.add_argument("--strategy", default="value", help="Strategy to compare (default value).")
    parser.add_argument("--kind", default=None, help="Scenario, when the files hold both.")
    args = parser.parse_args()
    try:
        before, after = read_curves(args.before), read_curves(args.after)
        if args.kind is not None:
            before, after = before[before["kind"] == args.kind], after[after["kind"] == args.kind]
        table = paired_differences(before, after, args.strategy)
    except (OSError, ValueError) as exc:
        parser.error(str(exc))
    print(f"{args.strategy}: gap to the full-information cost, after - before, paired over seeds")
    print(f"{'budget':>8} {'before':>9} {'after':>9} {'after-before':>13} {'SE':>7} {'worse':>7}")
    for budget, row in table.iterrows():
        print(f"{budget:8.3g} {row['before']:+9.4f} {row['after']:+9.4f} {row['difference']:+13.4f} "
              f"{row['se']:7.4f} {int(row['worse']):>3}/{int(row['seeds'])}")
    mean = table["difference"].mean()
    print(f"mean over the schedule of the paired difference: {mean:+.4f}")


if __name__ == "__main__":
    main()
