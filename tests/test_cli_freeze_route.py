"""Tests of ``routeplan freeze`` and ``routeplan route`` through click's CliRunner.

One workspace is built per module from ``routeplan.simulate.make_scenario`` (seeded; its
values exercise the commands, they are not correctness data). The stored model follows the
layout ``routeplan fit`` writes (params with meta, features, labels, experts,
training/validation case ids; metrics with the candidate table), fitted here with a small
linear plug-in router to keep the module fast; one slow test runs the real
``fit_workspace`` before freezing. Each check names its outside reference beside it.
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
import os
import re
import shutil
import sqlite3
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner
from jsonschema import Draft202012Validator

from conftest import assert_json_failure, db_dump

from routeplan.cli import cli
from routeplan.workspace import DB_NAME

SCHEMAS = Path(__file__).resolve().parents[1] / "schemas"
LABELS = ("low", "mid", "high")
EXPERTS = {"ana": 0.2, "ben": 0.1, "cy": 0.05}  # name -> capacity share
N_TRUTH, N_NEW, N_FEATURES = 320, 100, 4


def invoke(ws: Path, *args):
    return CliRunner().invoke(cli, ["--workspace", str(ws), *map(str, args)])


def ok(result):
    assert result.exit_code == 0, (result.exit_code, result.stdout, result.stderr, result.exception)
    return result


def one_line_error(result, *fragments: str) -> str:
    """Exit 2 and one stderr line holding every fragment, no traceback (DESIGN.md contract)."""
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr, result.exception)
    lines = result.stderr.strip("\n").split("\n")
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])
    return lines[0]


def validator(name: str) -> Draft202012Validator:
    return Draft202012Validator(json.loads((SCHEMAS / f"{name}.schema.json").read_text()))


def store_model(folder: Path, seed: int = 0) -> int:
    """Fit a small plug-in router on the workspace and store it the way ``fit`` does."""
    from routeplan.features import fit_features
    from routeplan.learner import PluginRouter, select_router
    from routeplan.pool import load_pool
    from routeplan.workspace import Workspace

    with Workspace.open(folder) as ws:
        pool = load_pool(ws)
        mask = pool.has_truth
        spec = fit_features(pool.X[mask], pool.feature_names)
        X, y, A = spec.transform(pool.X[mask]), pool.y[mask], pool.answers[mask]
        ids = pool.case_ids[mask]
        order = np.random.default_rng(seed).permutation(len(y))
        train, val = order[: int(0.75 * len(y))], order[int(0.75 * len(y)):]
        router = PluginRouter(head="linear", max_epochs=5, random_state=seed).fit(
            X[train], y[train], A[train], fees=pool.fees, cost_matrix=pool.cost_matrix())
        table = select_router({"plugin": router}, X[val], y[val], A[val], expert_names=list(pool.experts)).table
        arrays, meta = router.get_arrays()
        params = {"meta": meta, "router": "plugin", "features": spec.to_dict(), "labels": list(pool.labels),
                  "experts": [{"name": n, "fee": float(f), "capacity": float(c)}
                              for n, f, c in zip(pool.experts, pool.fees, pool.capacities)],
                  "error_cost": pool.error_cost, "training_case_ids": [str(c) for c in ids[train]],
                  "validation_case_ids": [str(c) for c in ids[val]], "seed": seed}
        metrics = {"chosen": "plugin", "candidates": table.replace({np.nan: None}).to_dict(orient="records")}
        with ws.transaction():
            return ws.add_model("plugin", params, metrics, arrays, chosen=True)


@pytest.fixture(scope="module")
def built(tmp_path_factory) -> dict:
    """A workspace with a stored model, frozen once; the new cases to route."""
    from routeplan.simulate import make_scenario

    root = tmp_path_factory.mktemp("freeze_route")
    sc = make_scenario(N_TRUTH + N_NEW, n_features=N_FEATURES, n_classes=3, n_experts=3, random_state=11)
    names = [f"x{j}" for j in range(N_FEATURES)]
    frame = pd.DataFrame(sc.X.astype(np.float64), columns=names)
    frame.insert(0, "case_id", [f"k{i:04d}" for i in range(len(frame))])
    truth = frame.iloc[:N_TRUTH].assign(truth=[LABELS[v] for v in sc.y[:N_TRUTH]])
    truth.to_csv(root / "cases.csv", index=False)
    new = frame.iloc[N_TRUTH:].assign(note="shown only")
    new.to_csv(root / "new.csv", index=False)
    answers = sc.answers(random_state=12)[:N_TRUTH]
    known = np.random.default_rng(13).random(answers.shape) < 0.5
    rows, cols = np.nonzero(known)
    experts = list(EXPERTS)
    pd.DataFrame({"case_id": truth["case_id"].to_numpy()[rows], "expert": np.asarray(experts)[cols],
                  "answer": np.asarray(LABELS)[answers[rows, cols]]}).to_csv(root / "answers.csv", index=False)
    ws = root / "ws"
    ok(invoke(ws, "init", "--labels", ",".join(LABELS)))
    ok(invoke(ws, "cases", "import", root / "cases.csv"))
    for name, fee in zip(experts, sc.fees):
        ok(invoke(ws, "experts", "add", name, "--fee", f"{fee:g}", "--capacity", EXPERTS[name]))
    ok(invoke(ws, "answers", "import", root / "answers.csv"))
    model_id = store_model(ws)
    ok(invoke(ws, "freeze", "--out", root / "policy.json"))
    return {"root": root, "ws": ws, "policy": root / "policy.json", "new": root / "new.csv",
            "cases": root / "cases.csv", "model_id": model_id, "names": names}


def read_decisions(path: Path) -> list[dict]:
    """Decision rows as JSON-like dicts (numbers as float, text kept as written)."""
    with open(path, newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    out = []
    for row in rows:
        item = {}
        for key, value in row.items():
            item[key] = (float(value) if key == "expected_cost" or key.startswith("cost_")
                         else int(value) if key == "outside_range" else value)
        out.append(item)
    return out


def manifest_of(path: Path) -> dict:
    return json.loads(path.read_text(encoding="utf-8"))["manifest"]


def dense_lp_optimum(costs: np.ndarray, n_classes: int, limits: np.ndarray) -> float:
    """The capacity LP written out densely and solved by scipy's HiGHS (the reference)."""
    from scipy.optimize import linprog

    n, n_options = costs.shape
    A_eq = np.kron(np.eye(n), np.ones((1, n_options)))
    A_ub = np.zeros((limits.size, n * n_options))
    for j in range(limits.size):
        A_ub[j, n_classes + j::n_options] = 1.0
    res = linprog(costs.ravel(), A_ub=A_ub, b_ub=limits, A_eq=A_eq, b_eq=np.ones(n), bounds=(0, None),
                  method="highs")
    assert res.status == 0
    return float(res.fun)


# --------------------------------------------------------------------------- freeze


def test_freeze_writes_a_valid_recorded_policy_and_card(built):
    from routeplan.policy import read_policy

    manifest, arrays = read_policy(built["policy"])
    # jsonschema's reference Draft 2020-12 validator against our published schema
    validator("policy-manifest").validate(manifest_of(built["policy"]))
    document = json.loads(built["policy"].read_text())
    canonical = json.dumps({"manifest": document["manifest"], "arrays": document["arrays"]},
                           sort_keys=True, separators=(",", ":"))
    # hashlib's SHA-256 (FIPS 180-4) of the canonical JSON, as the schema's description defines it
    digest = hashlib.sha256(canonical.encode("utf-8")).hexdigest()
    assert digest == document["sha256"]
    with sqlite3.connect(built["ws"] / DB_NAME) as conn:
        rows = conn.execute("SELECT sha256, model_id, path FROM policies").fetchall()
        journal = conn.execute("SELECT detail FROM journal WHERE command = 'freeze'").fetchall()
    assert rows == [(digest, built["model_id"], str(built["policy"].resolve()))]
    assert len(journal) == 1 and json.loads(journal[0][0])["sha256"] == digest
    assert [e["name"] for e in manifest["experts"]] == list(EXPERTS)
    assert [e["capacity"] for e in manifest["experts"]] == list(EXPERTS.values())
    assert set(manifest["router"]["arrays"]) == set(arrays)
    assert manifest["labels"] == list(LABELS) and manifest["features"]["names"] == built["names"]


def test_freeze_records_and_describes_the_manifest_of_the_file(built):
    # The workspace's record and the card describe the manifest exactly as the file holds it
    # (created time included), read back here with the standard library's json parser.
    from routeplan.card import policy_card

    document = json.loads(built["policy"].read_text(encoding="utf-8"))
    with sqlite3.connect(built["ws"] / DB_NAME) as conn:
        (stored,) = conn.execute("SELECT manifest FROM policies WHERE sha256 = ?", (document["sha256"],)).fetchone()
    assert json.loads(stored) == document["manifest"]
    card = built["policy"].with_suffix(".md").read_text(encoding="utf-8")
    assert card == policy_card(document["manifest"], sha256=document["sha256"], path=built["policy"].name)


def test_policy_card_has_the_required_sections(built):
    card = built["policy"].with_suffix(".md").read_text(encoding="utf-8")
    # the brief's list of card contents (common practice for model cards)
    for fragment in ("## Intended use", "## Experts, fees, capacities and prices", "## Cautions",
                     "model alone", "ana alone", "ben alone", "cy alone", "95% interval",
                     "health, credit, legal", "Human oversight", "Check subgroups", "Validate on local data"):
        assert fragment in card, fragment
    for name in ("system cost", "accuracy", "coverage", "workload of ana"):
        assert name in card


def _validation_costs(built):
    """The stored router's expected costs on its validation cases, rebuilt independently of freeze."""
    from routeplan.features import FeatureSpec
    from routeplan.fitting import load_router
    from routeplan.pool import load_pool
    from routeplan.workspace import Workspace

    with Workspace.open(built["ws"]) as ws:
        _, router, params, _ = load_router(ws)
        pool = load_pool(ws)
    where = {c: i for i, c in enumerate(pool.case_ids)}
    pos = np.array([where[c] for c in params["validation_case_ids"]])
    spec = FeatureSpec.from_dict(params["features"])
    return router.predict_costs(spec.transform(pool.X[pos]))


def test_frozen_prices_are_optimal_duals_of_the_capacity_lp(built):
    manifest = manifest_of(built["policy"])
    costs = _validation_costs(built)
    n, K = costs.shape[0], len(LABELS)
    caps = np.array([e["capacity"] for e in manifest["experts"]])
    prices = np.array([e["price"] for e in manifest["experts"]])
    limits = np.minimum(caps, 1.0) * n
    optimum = dense_lp_optimum(costs, K, limits)
    # LP strong duality (e.g. Bertsimas & Tsitsiklis, "Introduction to Linear Optimization",
    # 1997, Thm 4.4): the Lagrangian dual value sum_i min_o (c_io + p_o) - sum_j p_j L_j equals
    # the primal optimum exactly when the prices are optimal duals; any other p >= 0 gives less.
    dual_value = np.min(costs + np.concatenate([np.zeros(K), prices]), axis=1).sum() - prices @ limits
    assert dual_value == pytest.approx(optimum, rel=1e-6, abs=1e-6)
    assert np.all(prices >= 0) and prices.max() > 0  # the 5% cap of cy binds on these cases


def test_frozen_intervals_are_wilson_and_caps_hold(built):
    from statsmodels.stats.proportion import proportion_confint

    metrics = manifest_of(built["policy"])["metrics"]
    for key in ["coverage", *[f"workload_{n}" for n in EXPERTS]]:
        m = metrics[key]
        count = round(m["estimate"] * m["n"])
        # statsmodels' Wilson score interval (Wilson, JASA 1927) as the reference
        low, high = proportion_confint(count, m["n"], alpha=0.05, method="wilson")
        assert (m["low"], m["high"]) == pytest.approx((low, high), abs=1e-9), key
        assert m["level"] == 0.95
    for name, cap in EXPERTS.items():  # the routed policy keeps each cap on the held-out cases
        assert metrics[f"workload_{name}"]["estimate"] <= cap + 1e-12
    cost = metrics["system_cost"]
    assert 0 <= cost["low"] <= cost["estimate"] <= cost["high"]


def test_freeze_without_a_model_is_refused(empty_ws, tmp_path):
    one_line_error(invoke(empty_ws, "freeze", "--out", tmp_path / "p.json"), "no fitted model", "routeplan fit")
    assert not (tmp_path / "p.json").exists()


def test_freeze_keeps_existing_files_unless_told_and_names_stored_models(built, tmp_path):
    # common practice: a command does not silently replace a file it did not write this run
    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    policy = tmp_path / "p.json"
    policy.write_text("keep me\n")
    one_line_error(invoke(ws, "freeze", "--out", policy), "already exists", "--overwrite")
    assert policy.read_text() == "keep me\n" and not policy.with_suffix(".md").exists()
    ok(invoke(ws, "freeze", "--out", policy, "--overwrite"))
    assert json.loads(policy.read_text())["sha256"]
    one_line_error(invoke(ws, "freeze", "--out", tmp_path / "q.json", "--model", 999),
                   "no model 999", f"{built['model_id']} (")


@pytest.mark.parametrize("suffix", ["", "-wal", "-shm", "-journal"])
def test_freeze_and_route_refuse_to_write_over_the_workspace_database(built, tmp_path, suffix):
    # Writing over an SQLite database or its sidecar files damages it (common practice:
    # sqlite.org, "How To Corrupt An SQLite Database File"); --overwrite does not make it safe.
    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    target = ws / (DB_NAME + suffix)
    before = hashlib.sha256((ws / DB_NAME).read_bytes()).hexdigest()
    one_line_error(invoke(ws, "freeze", "--out", target, "--overwrite"),
                   "--out would overwrite the workspace database", str(target))
    one_line_error(invoke(ws, "freeze", "--out", tmp_path / "p.json", "--card", target, "--overwrite"),
                   "--card would overwrite the workspace database")
    one_line_error(invoke(ws, "route", "--policy", built["policy"], built["new"], "--out", target, "--overwrite"),
                   "--out would overwrite the workspace database")
    # also when --workspace points elsewhere: the folder of the output holds a workspace
    one_line_error(invoke(tmp_path, "route", "--policy", built["policy"], built["new"], "--out", target,
                          "--overwrite"), "--out would overwrite the workspace database")
    assert hashlib.sha256((ws / DB_NAME).read_bytes()).hexdigest() == before
    assert not (tmp_path / "p.json").exists()


def test_freeze_after_the_real_fit(built, tmp_path):
    from routeplan.fitting import fit_workspace
    from routeplan.workspace import Workspace

    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    with Workspace.open(ws) as opened:
        fit_workspace(opened, routers=("plugin",), max_epochs=2, random_state=1)
    result = ok(invoke(ws, "freeze", "--out", tmp_path / "p.json", "--card", tmp_path / "card.md", "--json"))
    info = json.loads(result.stdout)
    validator("policy-manifest").validate(manifest_of(tmp_path / "p.json"))  # jsonschema reference
    assert info["sha256"] == json.loads((tmp_path / "p.json").read_text())["sha256"]
    assert (tmp_path / "card.md").read_text().startswith("# Routing policy card")


# --------------------------------------------------------------------------- route


def test_route_writes_one_valid_row_per_case_in_order(built, tmp_path):
    out = tmp_path / "decisions.csv"
    result = ok(invoke(tmp_path / "no_workspace_here", "route", "--policy", built["policy"], built["new"],
                       "--out", out))
    assert "Workload" in result.stdout
    rows = read_decisions(out)
    new_ids = pd.read_csv(built["new"], dtype={"case_id": str})["case_id"].tolist()
    assert [r["case_id"] for r in rows] == new_ids  # one row per input case, input order
    check = validator("decisions-row")  # jsonschema's reference validator
    option_columns = [f"cost_model:{label}" for label in LABELS] + [f"cost_{name}" for name in EXPERTS]
    for row in rows:
        check.validate(row)
        assert list(row)[:4] == ["case_id", "route", "label", "expected_cost"]
        assert list(row)[4:] == [*option_columns, "outside_range"]
        chosen = f"cost_model:{row['label']}" if row["route"] == "model" else f"cost_{row['route']}"
        assert row["expected_cost"] == row[chosen]  # the schema's definition of expected_cost


def test_parquet_output_and_chunk_size_give_the_same_decisions(built, tmp_path):
    import pyarrow.parquet as pq

    ok(invoke(tmp_path, "route", "--policy", built["policy"], built["new"], "--out", tmp_path / "a.csv"))
    ok(invoke(tmp_path, "route", "--policy", built["policy"], built["new"], "--out", tmp_path / "b.csv",
              "--chunk-size", "7"))
    ok(invoke(tmp_path, "route", "--policy", built["policy"], built["new"], "--out", tmp_path / "c.parquet"))
    # Same decisions whatever the chunk size; the costs agree to float32 rounding only, since a
    # matrix product's last bits may depend on the batch's shape (common practice: BLAS kernels
    # block by shape), so chunks of 7 rows can differ from one chunk in the last digit.
    whole, chunked = (pd.read_csv(tmp_path / f, dtype={"case_id": str, "label": str}, keep_default_na=False)
                      for f in ("a.csv", "b.csv"))
    assert list(whole.columns) == list(chunked.columns)
    for column in ("case_id", "route", "label"):
        assert whole[column].tolist() == chunked[column].tolist()
    numeric = [c for c in whole.columns if c.startswith("cost") or c == "expected_cost"]
    np.testing.assert_allclose(whole[numeric].to_numpy(float), chunked[numeric].to_numpy(float),
                               rtol=1e-5, atol=1e-7)
    from_csv = pd.read_csv(tmp_path / "a.csv", dtype={"case_id": str, "label": str}, keep_default_na=False)
    from_parquet = pq.read_table(tmp_path / "c.parquet").to_pandas()  # pyarrow reads it back
    assert from_parquet["case_id"].tolist() == from_csv["case_id"].tolist()
    assert from_parquet["route"].tolist() == from_csv["route"].tolist()
    assert from_parquet["label"].fillna("").tolist() == from_csv["label"].tolist()
    assert np.allclose(from_parquet["expected_cost"], from_csv["expected_cost"], rtol=1e-15, atol=0)


@pytest.mark.parametrize("n", [9, 40, N_NEW])
def test_caps_are_never_exceeded_and_exact_is_lp_optimal(built, tmp_path, n):
    cases = tmp_path / "subset.csv"
    pd.read_csv(built["new"], dtype={"case_id": str}).iloc[:n].to_csv(cases, index=False)
    for mode in ("exact", "priced"):
        out = tmp_path / f"{mode}.csv"
        # --outside-range model: every case on its estimated costs, the LP's own contract
        ok(invoke(tmp_path, "route", "--policy", built["policy"], cases, "--out", out,
                  *(["--exact"] if mode == "exact" else []), "--outside-range", "model", "--json"))
        rows = read_decisions(out)
        counts = {name: sum(r["route"] == name for r in rows) for name in EXPERTS}
        for name, cap in EXPERTS.items():  # the capacity contract of DESIGN.md (common practice)
            assert counts[name] <= math.floor(cap * n + 1e-9), (mode, name, counts)
        if mode == "exact":
            costs = np.array([[r[c] for c in list(r)[4:-1]] for r in rows])
            limits = np.floor(np.minimum(list(EXPERTS.values()), 1.0) * n + 1e-9)
            # integral limits on a bipartite (totally unimodular) constraint matrix: the LP
            # optimum by scipy's HiGHS is the best integral routing (Heller & Tompkins, 1956)
            optimum = dense_lp_optimum(costs, len(LABELS), limits)
            assert sum(r["expected_cost"] for r in rows) == pytest.approx(optimum, rel=1e-9, abs=1e-9)


def test_cases_outside_the_training_range_go_to_an_expert(built, tmp_path):
    # common practice: a case unlike anything the model was trained on is not left to the
    # model alone; it is marked, and goes to an expert while the caps leave room
    frame = pd.read_csv(built["new"], dtype={"case_id": str}).iloc[:60].copy()
    far = frame.index[:3]
    frame.loc[far, built["names"][0]] = 1e6
    cases = tmp_path / "far.csv"
    frame.to_csv(cases, index=False)
    for how in ("expert", "model"):
        out = tmp_path / f"{how}.csv"
        info = json.loads(ok(invoke(tmp_path, "route", "--policy", built["policy"], cases, "--out", out,
                                    "--outside-range", how, "--json")).stdout)
        rows = read_decisions(out)
        assert info["n_outside_range"] == sum(r["outside_range"] for r in rows) >= 3
        assert all(rows[i]["outside_range"] == 1 for i in far)
        if how == "expert":
            assert all(rows[i]["route"] in EXPERTS for i in far)
    one_line_error(invoke(tmp_path, "route", "--policy", built["policy"], cases, "--out", out), "already exists",
                   "--overwrite")


def test_a_file_too_small_for_a_cap_says_so(built, tmp_path):
    # the caps hold within each file (DESIGN.md's running count); one case cannot be split, so
    # an expert with a share below 1 gets none, and the result says why (common practice)
    one = tmp_path / "one.csv"
    pd.read_csv(built["new"], dtype={"case_id": str}).iloc[:1].to_csv(one, index=False)
    info = json.loads(ok(invoke(tmp_path, "route", "--policy", built["policy"], one, "--out", tmp_path / "o.csv",
                                "--outside-range", "model", "--json")).stdout)
    capped = [name for name, cap in EXPERTS.items() if 0 < cap < 1]
    assert capped and any("larger batches" in note and capped[0] in note for note in info["notes"])


def _rehash(document: dict) -> dict:
    """Recompute the sha256 as the policy-manifest schema's description defines it (hashlib)."""
    canonical = json.dumps({"manifest": document["manifest"], "arrays": document["arrays"]},
                           sort_keys=True, separators=(",", ":"))
    document["sha256"] = hashlib.sha256(canonical.encode("utf-8")).hexdigest()
    return document


def _flip_byte(raw: bytes) -> bytes:
    longest = max(re.finditer(rb'"data": "([A-Za-z0-9+/=]*)"', raw), key=lambda m: len(m.group(1)))
    at = longest.start(1) + len(longest.group(1)) // 2  # a byte in the middle of the largest weight array
    return raw[:at] + bytes([raw[at] ^ 0x01]) + raw[at + 1:]


def _loosen_cap(raw: bytes) -> bytes:
    document = json.loads(raw)
    document["manifest"]["experts"][0]["capacity"] = 1.0  # an edit by hand, hash left as it was
    return json.dumps(document).encode()


def _new_version(raw: bytes) -> bytes:
    document = json.loads(raw)
    document["manifest"].update(format_version=2, format="routeplan-policy/2")
    return json.dumps(_rehash(document)).encode()


def _drop_array(raw: bytes) -> bytes:
    document = json.loads(raw)
    document["arrays"].pop(document["manifest"]["router"]["arrays"][0])
    return json.dumps(_rehash(document)).encode()


@pytest.mark.parametrize("damage, fragment", [
    (_flip_byte, "sha256 does not match"),
    (lambda raw: raw[: len(raw) // 2], "not a complete policy file"),
    (lambda raw: raw[:-2], "not a complete policy file"),
    (_loosen_cap, "sha256 does not match"),
    (_new_version, "format version 2 is not supported"),
    (_drop_array, "does not hold"),
])
def test_damaged_policies_are_refused(built, tmp_path, damage, fragment):
    bad = tmp_path / "bad.json"
    bad.write_bytes(damage(built["policy"].read_bytes()))
    out = tmp_path / "out.csv"
    line = one_line_error(invoke(tmp_path, "route", "--policy", bad, built["new"], "--out", out), fragment)
    assert str(bad) in line
    assert not out.exists()


@pytest.mark.parametrize("edit, fragments", [
    (lambda f: f.drop(columns="x2"), ("line 1", "missing column(s) 'x2'")),
    (lambda f: f.assign(x1=f["x1"].astype(object).where(f.index != 3, "abc")), ("line 5", "'x1'", "abc")),
    (lambda f: f.assign(x0=f["x0"].where(f.index != 5, np.nan)), ("line 7", "'x0'", "empty")),
    (lambda f: f.assign(case_id=f["case_id"].where(f.index != 8, f["case_id"][2])), ("line 10", "appears twice")),
])
def test_bad_cases_files_are_refused_with_the_line(built, tmp_path, edit, fragments):
    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    bad = tmp_path / "bad.csv"
    edit(frame).to_csv(bad, index=False)
    out = tmp_path / "out.csv"
    line = one_line_error(invoke(tmp_path, "route", "--policy", built["policy"], bad, "--out", out), *fragments)
    assert line.startswith(f"Error: {bad}")
    assert not out.exists()


def test_parquet_cases_and_outside_range_warning(built, tmp_path):
    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    frame.loc[4, "x3"] = 1e6
    frame.to_parquet(tmp_path / "new.parquet")
    result = ok(invoke(tmp_path, "route", "--policy", built["policy"], tmp_path / "new.parquet",
                       "--out", tmp_path / "d.csv", "--json"))
    info = json.loads(result.stdout)
    train = pd.read_csv(built["cases"])
    cols = built["names"]
    # pandas' min/max of the training cases is the reference for "outside the training range"
    outside = ((frame[cols] < train[cols].min()) | (frame[cols] > train[cols].max())).any(axis=1).sum()
    assert info["n_outside_range"] == outside >= 1
    assert f"{outside} of {N_NEW} case(s)" in result.stderr and "Warning" in result.stderr
    assert info["n_cases"] == N_NEW and sum(w["cases"] for w in info["workload"]) == N_NEW


def test_formula_like_ids_are_neutralised_in_csv_only(built, tmp_path):
    import pyarrow.parquet as pq

    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    frame.loc[0, "case_id"] = "=cmd|x"
    frame.to_csv(tmp_path / "new.csv", index=False)
    for out in ("d.csv", "d.parquet"):
        ok(invoke(tmp_path, "route", "--policy", built["policy"], tmp_path / "new.csv", "--out", tmp_path / out))
    # OWASP guidance on CSV injection (common practice): a leading = is quoted away in CSV
    assert read_decisions(tmp_path / "d.csv")[0]["case_id"] == "'=cmd|x"
    assert pq.read_table(tmp_path / "d.parquet").column("case_id")[0].as_py() == "=cmd|x"


def test_route_refuses_to_overwrite_its_input(built, tmp_path):
    copy = tmp_path / "new.csv"
    shutil.copy(built["new"], copy)
    before = copy.read_bytes()
    one_line_error(invoke(tmp_path, "route", "--policy", built["policy"], copy, "--out", copy), "overwrite")
    assert copy.read_bytes() == before


def test_careful_reader_agrees_with_the_fast_one(built, tmp_path):
    # A header with a byte-order mark and padded names sends route to files.read_table (the
    # careful reader); Python's csv module writes the same records either way.
    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    plain, padded = tmp_path / "plain.csv", tmp_path / "padded.csv"
    frame.to_csv(plain, index=False)
    with open(padded, "w", newline="", encoding="utf-8-sig") as handle:
        writer = csv.writer(handle)
        writer.writerow([f" {c} " for c in frame.columns])
        writer.writerows(frame.itertuples(index=False))
    for src, out in ((plain, "a.csv"), (padded, "b.csv")):
        ok(invoke(tmp_path, "route", "--policy", built["policy"], src, "--out", tmp_path / out))
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()


def test_route_frame_is_row_by_row_and_checks_columns(built):
    from routeplan.errors import InputError
    from routeplan.deploy import route_frame
    from routeplan.policy import read_policy

    manifest, arrays = read_policy(built["policy"])
    frame = pd.read_csv(built["new"], dtype={"case_id": str}).set_index(np.arange(N_NEW) * 3)
    whole = route_frame(frame, manifest, arrays)
    halves = pd.concat([route_frame(frame.iloc[:37], manifest, arrays), route_frame(frame.iloc[37:], manifest, arrays)])
    pd.testing.assert_frame_equal(whole, halves)  # pandas' own frame comparison
    assert whole.index.tolist() == frame.index.tolist()
    with pytest.raises(InputError, match="missing column"):
        route_frame(frame.drop(columns="x1"), manifest, arrays)
    with pytest.raises(InputError, match="not a finite number"):
        route_frame(frame.assign(x0=np.inf), manifest, arrays)


def test_freeze_to_a_missing_folder_leaves_the_workspace_as_it_was(built, tmp_path):
    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    with sqlite3.connect(ws / DB_NAME) as conn:
        before = "\n".join(conn.iterdump())  # sqlite3's own dump as the reference state
    line = one_line_error(invoke(ws, "freeze", "--out", tmp_path / "missing" / "p.json"), "does not exist")
    assert "missing" in line
    with sqlite3.connect(ws / DB_NAME) as conn:
        assert "\n".join(conn.iterdump()) == before


def test_card_basis_never_shows_a_present_share_as_zero():
    # common practice: a share that is there is never printed as 0% or 100%
    from routeplan.freezing import _basis_summary, _percent

    assert [_percent(x) for x in (0.0, 0.25, 1.0, 0.0004, 0.9996, 0.003)] == \
        ["0%", "25%", "100%", "0.040%", "99.960%", "0.30%"]
    assert _basis_summary({"realised": 0.9996, "imputed": 0.0004, "expected": 0.0}).startswith(
        "mixed: 99.960% realised, 0.040% imputed")


# --------------------------------------------------------------------------- hostile inputs


def _json_failure(result, *fragments: str) -> dict:
    """One line on stderr, and with --json the failure as JSON on stdout (README, Command reference)."""
    one_line_error(result, *fragments)
    return assert_json_failure(result, *fragments)


@pytest.mark.parametrize("fmt", ["csv", "parquet"])
@pytest.mark.parametrize("value", [1e300, -1e300])
def test_a_feature_too_large_to_standardise_is_refused_with_its_line(built, tmp_path, fmt, value):
    # The routers take float32 inputs: a finite float64 whose standardised value is beyond
    # numpy's finfo(float32).max (IEEE 754 single precision) cannot be scored. Common
    # practice, as for NaN and infinity: refuse the file naming the line, never a traceback.
    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    frame.loc[3, "x2"] = value
    bad, out = tmp_path / f"bad.{fmt}", tmp_path / "out.csv"
    frame.to_csv(bad, index=False) if fmt == "csv" else frame.to_parquet(bad)
    where = "line 5" if fmt == "csv" else "row 4"
    _json_failure(invoke(tmp_path, "route", "--policy", built["policy"], bad, "--out", out, "--json"),
                  str(bad), where, "'x2'", "too large to score")
    assert not out.exists()
    # the same values one step inside float32's range still route (saturated, marked outside the range)
    manifest = manifest_of(built["policy"])
    j = manifest["features"]["names"].index("x2")
    frame.loc[3, "x2"] = manifest["features"]["means"][j] + np.sign(value) * 1e37 * manifest["features"]["scales"][j]
    frame.to_csv(tmp_path / "near.csv", index=False)
    ok(invoke(tmp_path, "route", "--policy", built["policy"], tmp_path / "near.csv", "--out", out))
    assert read_decisions(out)[3]["outside_range"] == 1


def test_route_frame_refuses_a_feature_too_large_to_standardise(built):
    # the same rule for the DataFrame function a Dask user maps over partitions (see above)
    from routeplan.deploy import route_frame
    from routeplan.errors import InputError
    from routeplan.policy import read_policy

    manifest, arrays = read_policy(built["policy"])
    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    frame.loc[7, "x0"] = 1e300
    with pytest.raises(InputError, match=rf"case '{frame.loc[7, 'case_id']}'.*'x0'.*too large to score"):
        route_frame(frame, manifest, arrays)


@pytest.mark.parametrize("id_column", ["x1", "x3"])
def test_an_id_column_that_is_a_feature_is_refused(built, tmp_path, id_column):
    # common practice: a case's id is a column of its own, not one of the model's inputs
    out = tmp_path / "out.csv"
    _json_failure(invoke(tmp_path, "route", "--policy", built["policy"], built["new"], "--out", out,
                         "--id-column", id_column, "--json"), f"--id-column '{id_column}'", "policy reads")
    assert not out.exists()


def _lows_not_numbers(document: dict) -> None:
    document["manifest"]["features"]["lows"][0] = "x"


def _highs_too_short(document: dict) -> None:
    document["manifest"]["features"]["highs"] = document["manifest"]["features"]["highs"][:1]


def _nan_weight(document: dict) -> None:
    import base64

    entry = max(document["arrays"].values(), key=lambda e: len(e["data"]))
    raw = bytearray(base64.b64decode(entry["data"]))
    nan = np.array([np.nan], dtype={"float32": "<f4", "float64": "<f8"}[entry["dtype"]]).tobytes()
    raw[: len(nan)] = nan
    entry["data"] = base64.b64encode(bytes(raw)).decode("ascii")


@pytest.mark.parametrize("edit, fragment", [
    (_lows_not_numbers, "features/lows/0"),
    (_highs_too_short, "highs must have one value per feature"),
    (_nan_weight, "holds NaN or infinity"),
])
def test_rehashed_policy_edits_are_refused(built, tmp_path, edit, fragment):
    # An edit whose sha256 was recomputed (as the policy-manifest schema's description says,
    # with hashlib) passes the hash check; the schema and the arrays must still catch it,
    # with exit code 2 and one line, never a traceback (DESIGN.md contract).
    document = json.loads(built["policy"].read_text(encoding="utf-8"))
    edit(document)
    bad, out = tmp_path / "edited.json", tmp_path / "out.csv"
    bad.write_text(json.dumps(_rehash(document)), encoding="utf-8")
    _json_failure(invoke(tmp_path, "route", "--policy", bad, built["new"], "--out", out, "--json"),
                  str(bad), fragment)
    assert not out.exists()


@pytest.mark.parametrize("eol", ["", "\n", "\r\n"])
def test_a_header_only_cases_file_is_refused_as_such(built, tmp_path, eol):
    # RFC 4180, section 2: the last record may or may not end with a line break; a header
    # alone is the same file either way, and says so.
    header = ",".join(pd.read_csv(built["new"], nrows=0).columns)
    bad, out = tmp_path / "header.csv", tmp_path / "out.csv"
    bad.write_bytes((header + eol).encode("utf-8"))
    one_line_error(invoke(tmp_path, "route", "--policy", built["policy"], bad, "--out", out),
                   str(bad), "a header but no records")
    assert not out.exists()


def test_ids_with_separators_quotes_and_formula_leads_survive_in_csv(built, tmp_path):
    # RFC 4180: a field with a comma or a double quote is quoted, and its quotes doubled;
    # Python's csv module reads it back. OWASP guidance on CSV injection (common practice):
    # a cell beginning with =, +, -, @, a tab or a carriage return gets a leading ', as
    # 'round export' does (routeplan.files.neutralise_formula).
    from routeplan.files import undo_neutralise

    ids = ["a,b", 'say "hi"', "=1+1", "+cmd", "-2", "@SUM(A1)", "=HYPERLINK(\"x\",\"y\")", "T,\"=\""]
    frame = pd.read_csv(built["new"], dtype={"case_id": str})
    frame.loc[: len(ids) - 1, "case_id"] = ids
    frame.to_parquet(tmp_path / "new.parquet")
    ok(invoke(tmp_path, "route", "--policy", built["policy"], tmp_path / "new.parquet", "--out", tmp_path / "d.csv"))
    written = [row["case_id"] for row in read_decisions(tmp_path / "d.csv")][: len(ids)]
    assert written == [("'" + i if i[0] in "=+-@" else i) for i in ids]
    assert [undo_neutralise(w) for w in written] == ids


def test_freeze_refuses_a_folder_where_the_card_goes(built, tmp_path):
    # common practice: a command checks every output before it writes any (here the card's
    # default name, beside the policy, is a folder)
    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    (tmp_path / "p.md").mkdir()
    before = db_dump(ws)
    _json_failure(invoke(ws, "freeze", "--out", tmp_path / "p.json", "--overwrite", "--json"),
                  str(tmp_path / "p.md"), "is a folder")
    assert not (tmp_path / "p.json").exists() and db_dump(ws) == before


@pytest.mark.parametrize("step", ["write", "rename"])
def test_freeze_writes_the_policy_and_the_card_all_or_none(built, tmp_path, monkeypatch, step):
    # common practice (atomic replacement on POSIX): a failure while writing or renaming the
    # card leaves the old policy, the old card and the workspace as they were, and no temporary
    # or backup file; a full disk (ENOSPC, POSIX <errno.h>) is bad input: exit 2, one line
    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    policy, card = tmp_path / "p.json", tmp_path / "p.md"
    policy.write_text("old policy\n")
    card.write_text("old card\n")
    before = db_dump(ws)
    real_write_text, real_replace = Path.write_text, os.replace

    def failing_write_text(self, data, *args, **kwargs):
        if self.name.startswith(".p.md."):
            raise OSError(28, "No space left on device")
        return real_write_text(self, data, *args, **kwargs)

    def failing_replace(src, dst):  # the policy is renamed into place first, then the card fails
        if str(src).endswith(".part") and Path(dst) == card:
            raise OSError(28, "No space left on device")
        return real_replace(src, dst)

    if step == "write":
        monkeypatch.setattr(Path, "write_text", failing_write_text)
    else:
        monkeypatch.setattr(os, "replace", failing_replace)
    result = invoke(ws, "freeze", "--out", policy, "--overwrite")
    monkeypatch.undo()
    one_line_error(result, f"{card}: cannot write the file (No space left on device)")
    assert policy.read_text() == "old policy\n" and card.read_text() == "old card\n"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["p.json", "p.md", "ws"]
    assert db_dump(ws) == before


def test_freeze_refuses_a_model_id_beyond_what_the_workspace_can_hold(built, tmp_path):
    # SQLite's INTEGER is a signed 64-bit number (sqlite.org, "Datatypes In SQLite"): a larger
    # id is no stored model, which is bad input (exit 2), not an overflow
    ws = shutil.copytree(built["ws"], tmp_path / "ws")
    _json_failure(invoke(ws, "freeze", "--out", tmp_path / "p.json", "--model", 2**63, "--json"),
                  f"no model {2**63}")
    assert not (tmp_path / "p.json").exists()


@pytest.mark.parametrize("separator", [";", "\t"])
def test_a_cases_file_with_another_separator_is_refused_saying_so(built, tmp_path, separator):
    # common practice: spreadsheets in locales with a decimal comma save "CSV" with
    # semicolons; the message says so instead of only listing every column as missing
    bad, out = tmp_path / "semi.csv", tmp_path / "out.csv"
    pd.read_csv(built["new"], dtype={"case_id": str}).to_csv(bad, index=False, sep=separator)
    one_line_error(invoke(tmp_path, "route", "--policy", built["policy"], bad, "--out", out),
                   str(bad), "line 1", f"separate values with {separator!r}")
    assert not out.exists()


def test_a_policy_saved_again_with_a_byte_order_mark_or_other_layout_still_routes(built, tmp_path):
    # RFC 8259, section 8.1: a JSON parser may ignore a leading byte-order mark, which some
    # editors add on saving; the sha256 covers the content, not the layout (routeplan.policy)
    document = json.loads(built["policy"].read_text(encoding="utf-8"))
    resaved = tmp_path / "resaved.json"
    resaved.write_bytes(b"\xef\xbb\xbf" + json.dumps(document, indent=4).replace("\n", "\r\n").encode("utf-8"))
    ok(invoke(tmp_path, "route", "--policy", built["policy"], built["new"], "--out", tmp_path / "a.csv"))
    ok(invoke(tmp_path, "route", "--policy", resaved, built["new"], "--out", tmp_path / "b.csv"))
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
