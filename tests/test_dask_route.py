"""``route_frame`` on a partitioned engine: Dask's ``map_partitions`` gives the direct call's decisions.

Dask (``pip install "routeplan[dask]"``) is the reference engine here; the test is skipped
where it is not installed. Caps are a property of a batch, so the comparison is of the
uncapped priced rule, which is row by row. The policy is frozen from a small workspace built
from ``routeplan.simulate`` (seeded, invented values).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

dd = pytest.importorskip("dask.dataframe")
import dask  # noqa: E402

LABELS = ["north", "south", "east"]


def frozen_policy(folder: Path) -> Path:
    """A workspace with a linear plug-in router, stored as ``fit`` does, then frozen."""
    from routeplan.features import fit_features
    from routeplan.freezing import freeze_workspace
    from routeplan.ingest import add_expert, import_answers, import_cases
    from routeplan.learner import PluginRouter
    from routeplan.pool import load_pool
    from routeplan.simulate import make_scenario
    from routeplan.workspace import Workspace

    sc = make_scenario(240, n_features=3, n_classes=3, n_experts=2, random_state=5)
    ids = [f"d{i:03d}" for i in range(240)]
    cases = pd.DataFrame(sc.X.astype(np.float64), columns=["a", "b", "c"]).assign(
        case_id=ids, truth=[LABELS[v] for v in sc.y])
    cases.to_csv(folder / "cases.csv", index=False)
    answers = sc.answers(random_state=6)
    pd.DataFrame({"case_id": ids * 2, "expert": ["ed"] * 240 + ["flo"] * 240,
                  "answer": [LABELS[v] for v in np.concatenate([answers[:, 0], answers[:, 1]])]}).to_csv(
        folder / "answers.csv", index=False)
    with Workspace.create(folder / "ws", LABELS) as ws:
        import_cases(ws, folder / "cases.csv")
        add_expert(ws, "ed", fee=0.05, capacity=0.2)
        add_expert(ws, "flo", fee=0.1, capacity=0.1)
        import_answers(ws, [folder / "answers.csv"])
        pool = load_pool(ws)
        spec = fit_features(pool.X, pool.feature_names)
        X = spec.transform(pool.X)
        router = PluginRouter(head="linear", max_epochs=3, random_state=0).fit(
            X[:180], pool.y[:180], pool.answers[:180], fees=pool.fees)
        arrays, meta = router.get_arrays()
        params = {"meta": meta, "router": "plugin", "features": spec.to_dict(), "labels": LABELS,
                  "experts": [{"name": n, "fee": float(f), "capacity": float(c)}
                              for n, f, c in zip(pool.experts, pool.fees, pool.capacities)],
                  "error_cost": 1.0, "training_case_ids": ids[:180], "validation_case_ids": ids[180:]}
        with ws.transaction():
            ws.add_model("plugin", params, {"chosen": "plugin"}, arrays, chosen=True)
        freeze_workspace(ws, folder / "policy.json")
    return folder / "policy.json"


def test_map_partitions_matches_the_direct_call(tmp_path):
    from routeplan.deploy import decision_columns, route_frame
    from routeplan.policy import read_policy

    manifest, arrays = read_policy(frozen_policy(tmp_path))
    rng = np.random.default_rng(7)
    cases = pd.DataFrame(rng.standard_normal((1000, 3)), columns=["a", "b", "c"])
    cases.insert(0, "case_id", [f"n{i:04d}" for i in range(1000)])
    direct = route_frame(cases, manifest, arrays)
    parts = dd.from_pandas(cases, npartitions=7)
    # the README snippet: Dask's synchronous scheduler as the reference engine
    with dask.config.set(scheduler="synchronous"):
        distributed = parts.map_partitions(route_frame, manifest, arrays, meta=decision_columns(manifest)).compute()
    pd.testing.assert_frame_equal(distributed, direct)
    assert distributed["case_id"].tolist() == cases["case_id"].tolist()
    assert set(distributed["route"]) <= {"model", "ed", "flo"} and distributed["route"].nunique() >= 2
    assert list(distributed.columns) == list(decision_columns(manifest).columns)
    # Dask's documented contract for meta: the same columns and dtypes as the real output
    assert decision_columns(manifest).dtypes.to_dict() == direct.dtypes.to_dict()


def test_the_readme_pipeline_writes_parquet(tmp_path):
    # the README's snippet end to end: map_partitions with the decisions' meta, then Dask's
    # to_parquet; read back with pandas (pyarrow), the rows are the direct call's
    from routeplan.deploy import decision_columns, route_frame
    from routeplan.policy import read_policy

    manifest, arrays = read_policy(frozen_policy(tmp_path))
    rng = np.random.default_rng(8)
    cases = pd.DataFrame(rng.standard_normal((300, 3)), columns=["a", "b", "c"])
    cases.insert(0, "case_id", [f"p{i:04d}" for i in range(300)])
    (tmp_path / "cases").mkdir()
    for k, part in enumerate(np.array_split(np.arange(300), 3)):
        cases.iloc[part].to_parquet(tmp_path / "cases" / f"part{k}.parquet", index=False)
    with dask.config.set(scheduler="synchronous"):
        parts = dd.read_parquet(str(tmp_path / "cases" / "*.parquet"))
        decisions = parts.map_partitions(route_frame, manifest, arrays, meta=decision_columns(manifest))
        decisions.to_parquet(str(tmp_path / "decisions"))
    back = pd.read_parquet(tmp_path / "decisions").sort_values("case_id").reset_index(drop=True)
    direct = route_frame(cases, manifest, arrays)
    assert back["case_id"].astype(str).tolist() == direct["case_id"].astype(str).tolist()
    assert back["route"].astype(str).tolist() == direct["route"].astype(str).tolist()
    np.testing.assert_allclose(back["expected_cost"], direct["expected_cost"])
