"""Tests of ``routeplan round plan / export / close`` through click's CliRunner.

The workspace is built from a small seeded cases file written here (invented values; they
exercise the commands, not any number). Constraint checks are "common practice" for a
budgeted labelling plan unless a source is named.
"""

from __future__ import annotations

import csv
import json
import math
import os
import shutil
import sqlite3
from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from jsonschema import Draft202012Validator

from routeplan.cli import cli
from routeplan.workspace import DB_NAME

SCHEMAS = Path(__file__).resolve().parents[1] / "schemas"
EXPERTS = {"ann": (0.1, 0.5), "bo": (0.25, 1.0), "cy": (0.05, 0.3)}
LEADS = ("=", "+", "-", "@")


def invoke(ws: Path, *args):
    return CliRunner().invoke(cli, ["--workspace", str(ws), *map(str, args)])


def ok(result):
    assert result.exit_code == 0, (result.exit_code, result.stderr, result.exception)
    return result


def one_line_error(result, *fragments: str) -> str:
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr)
    lines = result.stderr.strip("\n").split("\n")
    assert len(lines) == 1 and "Traceback" not in result.stderr, result.stderr
    for fragment in fragments:
        assert fragment in lines[0], (fragment, lines[0])
    return lines[0]


def rows(ws: Path, sql: str, params: tuple = ()) -> list[tuple]:
    conn = sqlite3.connect(ws / DB_NAME)
    try:
        return conn.execute(sql, params).fetchall()
    finally:
        conn.close()


def dump(ws: Path) -> str:
    conn = sqlite3.connect(ws / DB_NAME)
    try:
        return "\n".join(conn.iterdump())
    finally:
        conn.close()


def _cases_csv(path: Path) -> None:
    """240 seeded cases: 2 features, truth on 3 of 4, a display column; ids and notes that look like formulas."""
    rng = np.random.default_rng(11)
    n = 240
    X = rng.normal(size=(n, 2))
    labels = np.array(["a", "b", "c"])[np.digitize(X[:, 0] + 0.3 * rng.normal(size=n), [-0.5, 0.5])]
    with open(path, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["case_id", "x0", "x1", "truth", "note"])
        for i in range(n):
            case_id = f"{LEADS[i % 4]}c{i}" if i % 3 == 0 else f"c{i}"
            truth = "" if i % 4 == 3 else labels[i]
            note = f"{LEADS[i % 4]}1+{i}" if i % 2 == 0 else f"plain {i}"
            writer.writerow([case_id, f"{X[i, 0]:.6f}", f"{X[i, 1]:.6f}", truth, note])


@pytest.fixture(scope="module")
def template(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("round_template")
    _cases_csv(root / "cases.csv")
    ws = root / "ws"
    ok(invoke(ws, "init", "--labels", "a,b,c"))
    ok(invoke(ws, "cases", "import", root / "cases.csv"))
    for name, (fee, cap) in EXPERTS.items():
        ok(invoke(ws, "experts", "add", name, "--fee", fee, "--capacity", cap))
    return ws


@pytest.fixture
def ws(template, tmp_path) -> Path:
    return Path(shutil.copytree(template, tmp_path / "ws"))


def plan(ws: Path, *args) -> dict:
    return json.loads(ok(invoke(ws, "round", "plan", *args, "--json")).stdout)


def assignments(ws: Path, round_id: int | None = None) -> list[tuple]:
    where = "" if round_id is None else f" WHERE round_id = {int(round_id)}"
    return rows(ws, "SELECT case_id, expert, strategy, selection_prob, audit, fee FROM assignments"
                    f"{where} ORDER BY assignment_id")


# --------------------------------------------------------------------------- plan


def test_plan_respects_budget_caps_capacities_and_truth(ws):
    budget, cap = 8.0, 30
    info = plan(ws, "--budget", budget, "--max-per-expert", cap, "--seed", 1)
    Draft202012Validator(json.loads((SCHEMAS / "round-plan.schema.json").read_text())).validate(info)
    got = assignments(ws, info["round"])
    assert len(got) == info["assignments"] > 0
    assert sum(r[5] for r in got) <= budget + 1e-9
    counts = {name: sum(1 for r in got if r[1] == name) for name in EXPERTS}
    for name, (_, capacity) in EXPERTS.items():
        assert counts[name] <= cap
        # capacity: at most ceil(capacity x candidate cases), exact decimal arithmetic
        n_candidates = rows(ws, "SELECT COUNT(*) FROM cases WHERE truth IS NOT NULL")[0][0]
        assert counts[name] <= math.ceil(Fraction(str(capacity)) * n_candidates)
    assert len({(r[0], r[1]) for r in got}) == len(got)
    no_truth = {r[0] for r in rows(ws, "SELECT case_id FROM cases WHERE truth IS NULL")}
    assert not any(r[0] in no_truth for r in got)
    # the round keeps its design (experts x regions x classes): chances of being asked, in [0, 1]
    design = np.array(json.loads(rows(ws, "SELECT detail FROM rounds WHERE round_id = ?", (info["round"],))[0][0])["design"])
    assert design.ndim == 3 and design.shape[0] == len(EXPERTS)
    assert ((design >= 0) & (design <= 1)).all() and design.sum() > 0
    # the JSON figures are the stored ones
    for e in info["experts"]:
        assert e["cases"] == counts[e["expert"]]
        assert e["spend"] == pytest.approx(sum(r[5] for r in got if r[1] == e["expert"]))
        assert e["audit"] == sum(r[4] for r in got if r[1] == e["expert"])
    assert all(0 < r[3] <= 1 for r in got)


def test_plan_table_lists_every_expert(ws):
    out = ok(invoke(ws, "round", "plan", "--budget", 3)).stdout
    for name in EXPERTS:
        assert name in out
    assert "expected gain" in out


def test_same_seed_reproduces_plan_exactly(ws, tmp_path):
    other = Path(shutil.copytree(ws, tmp_path / "twin"))
    third = Path(shutil.copytree(ws, tmp_path / "third"))
    plan(ws, "--budget", 6, "--seed", 5)
    plan(other, "--budget", 6, "--seed", 5)
    plan(third, "--budget", 6, "--seed", 6)
    assert assignments(ws) == assignments(other)
    assert assignments(ws) != assignments(third)


@pytest.mark.parametrize("strategy", ["random", "uncertain"])
def test_other_strategies_run(ws, strategy):
    info = plan(ws, "--budget", 4, "--strategy", strategy)
    assert info["strategy"] == strategy and info["assignments"] > 0
    assert {r[2] for r in assignments(ws)} <= {strategy, "audit"}


def test_audit_share_met_within_one_fee(ws):
    budget, share = 10.0, 0.3
    info = plan(ws, "--budget", budget, "--audit-share", share)
    audit_spend = sum(r[5] for r in assignments(ws) if r[4])
    assert share * budget - max(f for f, _ in EXPERTS.values()) < audit_spend <= share * budget + 1e-9
    assert info["audit_spend"] == pytest.approx(audit_spend)


def test_later_rounds_skip_answered_and_assigned_pairs(ws, tmp_path):
    with_truth = [r[0] for r in rows(ws, "SELECT case_id FROM cases WHERE truth IS NOT NULL ORDER BY pos")]
    history = tmp_path / "history.csv"
    with open(history, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["case_id", "expert", "answer"])
        for case_id in with_truth[:40]:
            writer.writerow([case_id, "ann", "a"])
    ok(invoke(ws, "answers", "import", history))
    first = plan(ws, "--budget", 6)
    second = plan(ws, "--budget", 6, "--seed", 9)
    one = {(r[0], r[1]) for r in assignments(ws, first["round"])}
    two = {(r[0], r[1]) for r in assignments(ws, second["round"])}
    answered = {(c, "ann") for c in with_truth[:40]}
    assert two and not (one & two)
    assert not ((one | two) & answered)


def test_include_unverified_reaches_cases_without_truth(ws):
    info = plan(ws, "--budget", 20, "--include-unverified")
    no_truth = {r[0] for r in rows(ws, "SELECT case_id FROM cases WHERE truth IS NULL")}
    assert any(r[0] in no_truth for r in assignments(ws, info["round"]))


def test_dry_run_stores_nothing(ws):
    before = dump(ws)
    info = plan(ws, "--budget", 4, "--dry-run")
    assert info["round"] is None and info["assignments"] > 0
    assert dump(ws) == before


@pytest.mark.parametrize(
    "args,fragment",
    [
        (["--budget", "0.01"], "buys no assignment"),
        (["--budget", "-3"], "--budget must be a positive number"),
        (["--budget", "5", "--due-days", "0"], "--due-days"),
        (["--budget", "5", "--due-days", "1e12"], "--due-days must be a number of days in (0, 3650]"),
        (["--budget", "5", "--max-per-expert", "0"], "--max-per-expert must be at least 1"),
        # a finite budget so large that budget / fee overflows once was an internal error (exit 1);
        # the README's command reference caps a round's budget, so it is a usage error (exit 2)
        (["--budget", "1e308"], "is beyond any round"),
    ],
)
def test_plan_bad_input_leaves_workspace_unchanged(ws, args, fragment):
    before = dump(ws)
    one_line_error(invoke(ws, "round", "plan", *args), fragment)
    assert dump(ws) == before


def test_plan_without_truth_says_what_to_do(tmp_path):
    ws = tmp_path / "bare"
    ok(invoke(ws, "init", "--labels", "a,b"))
    (tmp_path / "c.csv").write_text("case_id,x\nq1,0.5\nq2,1.5\nq3,-1\n")
    ok(invoke(ws, "cases", "import", tmp_path / "c.csv"))
    ok(invoke(ws, "experts", "add", "ann", "--fee", "0.1"))
    one_line_error(invoke(ws, "round", "plan", "--budget", "1"), "--include-unverified")


def test_due_days_is_stored(ws):
    info = plan(ws, "--budget", 2, "--due-days", 3)
    stored = rows(ws, "SELECT due_at FROM rounds WHERE round_id = ?", (info["round"],))[0][0]
    assert stored == info["due_at"] and stored is not None


# --------------------------------------------------------------------------- export


def _read_sheet(path: Path) -> tuple[list[str], list[dict]]:
    """Read a sheet the way a spreadsheet shows it: numbers as numbers, empty cells as null."""
    with open(path, newline="", encoding="utf-8") as handle:
        reader = csv.DictReader(handle)
        records = list(reader)
        header = list(reader.fieldnames or [])
    out = []
    for record in records:
        row = {}
        for key, cell in record.items():
            if cell == "":
                row[key] = None
            elif key in ("case_id", "expert", "answer"):
                row[key] = cell
            else:
                try:
                    row[key] = float(cell)
                except ValueError:
                    row[key] = cell
        out.append(row)
    return header, out


def test_export_writes_one_valid_neutralised_sheet_per_expert(ws, tmp_path):
    info = plan(ws, "--budget", 8)
    out = tmp_path / "sheets"
    result = json.loads(ok(invoke(ws, "round", "export", info["round"], "--out", out,
                                  "--columns", "note,x0", "--json")).stdout)
    validator = Draft202012Validator(json.loads((SCHEMAS / "sheet-row.schema.json").read_text()))
    stored = assignments(ws, info["round"])
    seen_formula = 0
    for e in info["experts"]:
        if e["cases"] == 0:
            continue
        header, records = _read_sheet(out / f"{e['expert']}.csv")
        assert header == ["case_id", "note", "x0", "expert", "answer"]
        assert len(records) == e["cases"]
        assert {r["case_id"].lstrip("'") for r in records} == {r[0] for r in stored if r[1] == e["expert"]}
        for record in records:
            validator.validate(record)
            # OWASP CSV-injection guidance (common practice): no text cell may start a formula
            for key in ("case_id", "note"):
                value = record[key]
                if isinstance(value, str) and value.lstrip("'")[:1] in LEADS:
                    assert value.startswith("'")
                    seen_formula += 1
    assert seen_formula > 0
    assert sorted(s["expert"] for s in result["sheets"]) == sorted(e["expert"] for e in info["experts"] if e["cases"])


def test_export_refuses_unknown_round_and_column(ws, tmp_path):
    one_line_error(invoke(ws, "round", "export", 7, "--out", tmp_path / "s"), "no round 7")
    info = plan(ws, "--budget", 2)
    one_line_error(invoke(ws, "round", "export", info["round"], "--out", tmp_path / "s", "--columns", "nope"),
                   "unknown column 'nope'", "x0")
    # no case has a group here, so 'group' is not a column either
    one_line_error(invoke(ws, "round", "export", info["round"], "--out", tmp_path / "s", "--columns", "group"),
                   "unknown column 'group'")


def test_export_shows_the_group_and_the_filled_sheet_imports_back(tmp_path):
    # the group column of `cases import --group-column` can be shown on a sheet, and a
    # filled sheet carrying it imports as answers (display columns are dropped on import;
    # common practice: what a tool exports, it reads back)
    rng = np.random.default_rng(5)
    cases = tmp_path / "cases.csv"
    with open(cases, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["case_id", "x0", "site", "truth"])
        for i in range(60):
            writer.writerow([f"c{i}", f"{rng.normal():.4f}", ("north", "south")[i % 2], "ab"[i % 3 == 0]])
    ws = tmp_path / "ws"
    ok(invoke(ws, "init", "--labels", "a,b"))
    one_line_error(invoke(ws, "cases", "import", cases, "--group-column", "nope"), "'nope'")
    ok(invoke(ws, "cases", "import", cases, "--group-column", "site"))
    ok(invoke(ws, "experts", "add", "ann", "--fee", 0.05))
    info = plan(ws, "--budget", 0.3, "--strategy", "random")
    ok(invoke(ws, "round", "export", info["round"], "--out", tmp_path / "s", "--columns", "group,x0"))
    header, records = _read_sheet(tmp_path / "s" / "ann.csv")
    assert header == ["case_id", "group", "x0", "expert", "answer"] and len(records) == 6
    assert all(r["group"] == ("north", "south")[int(r["case_id"][1:]) % 2] for r in records)
    with open(tmp_path / "s" / "ann.csv", "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        for r in records:
            writer.writerow([r["case_id"], r["group"], r["x0"], "ann", "a"])
    done = json.loads(ok(invoke(ws, "answers", "import", tmp_path / "s" / "ann.csv", "--json")).stdout)
    assert done[0]["added"] == 6 and done[0]["notes"]["linked_to_assignments"] == 6


def test_export_keeps_filled_sheets_unless_told(ws, tmp_path):
    info = plan(ws, "--budget", 2)
    out = tmp_path / "sheets"
    ok(invoke(ws, "round", "export", info["round"], "--out", out))
    sheet = next(out.glob("*.csv"))
    sheet.write_text(sheet.read_text() + "# filled in\n")
    one_line_error(invoke(ws, "round", "export", info["round"], "--out", out), f"{out.resolve()}/",
                   "already exists", "--overwrite")
    assert sheet.read_text().endswith("# filled in\n")
    ok(invoke(ws, "round", "export", info["round"], "--out", out, "--overwrite"))
    assert not sheet.read_text().endswith("# filled in\n")


@pytest.mark.parametrize("hostile", ["../escape", "..", "sub/inner", "/tmp/abs"])
def test_export_refuses_expert_name_leading_outside(ws, tmp_path, hostile):
    # A name the importers would refuse, written straight into the database to test the guard.
    info = plan(ws, "--budget", 2)
    case_id = rows(ws, "SELECT case_id FROM cases WHERE truth IS NOT NULL LIMIT 1")[0][0]
    conn = sqlite3.connect(ws / DB_NAME)
    with conn:
        conn.execute("INSERT INTO experts VALUES (?, 0.1, 1.0, '2024-01-01T00:00:00+00:00')", (hostile,))
        conn.execute("INSERT INTO assignments (round_id, case_id, expert, strategy, selection_prob, audit, fee, "
                     "state, created_at) VALUES (?, ?, ?, 'value', 0.5, 0, 0.1, 'open', 'x')",
                     (info["round"], case_id, hostile))
    conn.close()
    out = tmp_path / "deep" / "sheets"
    one_line_error(invoke(ws, "round", "export", info["round"], "--out", out), "not safe as a file name")
    assert not list(out.glob("*.csv"))
    assert not (tmp_path / "deep" / "escape.csv").exists()


def test_export_refuses_sheet_linked_outside(ws, tmp_path):
    # resolve-and-check: an existing link DIR/ann.csv -> elsewhere is not followed
    info = plan(ws, "--budget", 4)
    out = tmp_path / "sheets"
    out.mkdir()
    victim = tmp_path / "victim.csv"
    victim.write_text("keep me\n")
    (out / "ann.csv").symlink_to(victim)
    one_line_error(invoke(ws, "round", "export", info["round"], "--out", out, "--overwrite"), "is a link to", "remove the link")
    assert victim.read_text() == "keep me\n"


def test_export_refuses_a_sheet_that_is_the_workspace_database(ws):
    # A sheet that is the database under another name (a hard link) is refused, --overwrite or
    # not (common practice: never write over an open SQLite file); a symbolic link is already
    # refused as a name leading elsewhere.
    info = plan(ws, "--budget", 4)
    expert = rows(ws, "SELECT expert FROM assignments WHERE round_id = ? LIMIT 1", (info["round"],))[0][0]
    os.link(ws / DB_NAME, ws / f"{expert}.csv")
    before = dump(ws)
    line = one_line_error(invoke(ws, "round", "export", info["round"], "--out", ws, "--overwrite"),
                          f"--out (the sheet of {expert}) would overwrite the workspace database")
    assert line.startswith(f"Error: {(ws / f'{expert}.csv').resolve()}:")
    assert dump(ws) == before and os.path.samefile(ws / f"{expert}.csv", ws / DB_NAME)
    assert not [p for p in ws.glob("*.csv") if p.name != f"{expert}.csv"]  # no other sheet was written


# --------------------------------------------------------------------------- close


def test_close_counts_answered_and_expired(ws, tmp_path):
    info = plan(ws, "--budget", 3)
    got = assignments(ws, info["round"])
    truth = dict(rows(ws, "SELECT case_id, truth FROM cases"))
    answers = tmp_path / "answers.csv"
    with open(answers, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["case_id", "expert", "answer"])
        for case_id, expert, *_ in got[:5]:
            writer.writerow([case_id, expert, truth[case_id]])
    ok(invoke(ws, "answers", "import", answers))
    closed = json.loads(ok(invoke(ws, "round", "close", info["round"], "--json")).stdout)
    assert closed == {"round": info["round"], "answered": 5, "expired": len(got) - 5, "already_closed": False}
    status = json.loads(ok(invoke(ws, "status", "--json")).stdout)
    assert [r["state"] for r in status["rounds"]] == ["closed"]
    again = json.loads(ok(invoke(ws, "round", "close", info["round"], "--json")).stdout)
    assert again["already_closed"] is True
    one_line_error(invoke(ws, "round", "close", 99), "no round 99")
    # an answer that arrives after the close is kept and linked (nothing lost), and the
    # import says it was late (common practice: tell, don't drop)
    case_id, expert, *_ = got[5]
    answers.write_text(f"case_id,expert,answer\n{case_id},{expert},{truth[case_id]}\n", encoding="utf-8")
    late = json.loads(ok(invoke(ws, "answers", "import", answers, "--json")).stdout)
    assert late[0]["notes"]["late_for_closed_rounds"] == 1
    assert late[0]["notes"]["linked_to_assignments"] == 1
    status = json.loads(ok(invoke(ws, "status", "--json")).stdout)
    assert (status["rounds"][0]["answered"], status["rounds"][0]["expired"]) == (6, len(got) - 6)


def test_status_counts_only_answered_fees_as_spent(ws, tmp_path):
    # Spend is what was paid for: an assignment's fee is spent once it is answered; one still
    # open is pending, one left unanswered when its round closed is not spent (common practice).
    info = plan(ws, "--budget", 3)
    got = rows(ws, "SELECT case_id, expert, fee FROM assignments WHERE round_id = ? ORDER BY assignment_id",
               (info["round"],))
    truth = dict(rows(ws, "SELECT case_id, truth FROM cases"))
    answers = tmp_path / "answers.csv"
    answers.write_text("case_id,expert,answer\n" + "".join(f"{c},{e},{truth[c]}\n" for c, e, _ in got[:4]),
                       encoding="utf-8")
    ok(invoke(ws, "answers", "import", answers))

    def fees(chosen):  # exact sums of the stored fees, per expert
        out: dict = {}
        for _, expert, fee in chosen:
            out[expert] = out.get(expert, Fraction(0)) + Fraction(fee)
        return out

    def check(status, spent, pending, expired):
        for e in status["experts"]:
            for key, expected in (("spent", spent), ("pending_fees", pending), ("expired_fees", expired)):
                assert e[key] == pytest.approx(float(expected.get(e["name"], 0)), abs=1e-9), (e["name"], key)
        (r,) = status["rounds"]
        for key, expected in (("spent", spent), ("pending_fees", pending), ("expired_fees", expired)):
            assert r[key] == pytest.approx(float(sum(expected.values(), Fraction(0))), abs=1e-9), key

    check(json.loads(ok(invoke(ws, "status", "--json")).stdout), fees(got[:4]), fees(got[4:]), {})
    ok(invoke(ws, "round", "close", info["round"]))
    status = json.loads(ok(invoke(ws, "status", "--json")).stdout)
    check(status, fees(got[:4]), {}, fees(got[4:]))
    assert sum(e["spent"] for e in status["experts"]) < sum(fee for *_, fee in got)
    table = " ".join(ok(invoke(ws, "status")).stdout.split())  # the caption wraps
    assert "expired: fees of assignments unanswered when their round closed (not spent)" in table


# --------------------------------------------------------------------------- weights for fit


def test_plan_spreads_picks_over_predicted_classes_not_the_truth(ws):
    # The planner's strata are the model's predicted classes, so the chance of a pair being
    # asked depends on the features only (missing at random given x: Rubin, Biometrika 1976).
    from routeplan.acquisition import class_probabilities
    from routeplan.rounds import _pool
    from routeplan.workspace import Workspace

    with Workspace.open(ws) as handle:
        pool, case_ids, _, _ = _pool(handle, False, 6, 3)
        frame, X = handle.case_frame()
        truth = np.array([handle.labels.index(t) if isinstance(t, str) else -1 for t in frame["truth"]])
        predicted = class_probabilities(X, truth, len(handle.labels), random_state=3).argmax(axis=1)
    position = {c: i for i, c in enumerate(frame["case_id"])}
    rows_ = [position[c] for c in case_ids]
    assert np.array_equal(pool.stratum, predicted[rows_])
    assert np.any(predicted[rows_] != truth[rows_])  # else this test could not tell them apart
    info = plan(ws, "--budget", 6, "--seed", 3)
    with Workspace.open(ws) as handle:
        detail = {d["round_id"]: d["detail"] for d in handle.round_details()}[info["round"]]
    assert detail["strata"] == "predicted"


def test_fit_weights_answers_of_rounds_equally_and_old_rounds_by_their_designs(ws, tmp_path):
    # Rounds planned on predicted classes: every answer weighs 1 (ignorable missingness, Rubin,
    # Biometrika 1976). Rounds stored before that rule (no "strata" in the detail, stratified
    # by the truth): stabilized inverse-probability weights (Robins, Hernan & Brumback,
    # Epidemiology 2000) over their designs: inside one (expert, region, class) group every
    # round answer weighs the same, each expert's round answers average 1, historical answers
    # weigh 1, and a group asked more often than its region's mean weighs less than 1.
    from routeplan.competence import regions_from_features
    from routeplan.fitting import round_weights
    from routeplan.pool import load_pool
    from routeplan.workspace import Workspace

    truth = dict(rows(ws, "SELECT case_id, truth FROM cases"))
    history = tmp_path / "history.csv"
    with open(history, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["case_id", "expert", "answer"])
        writer.writerow(["c1", "ann", truth["c1"]])
    ok(invoke(ws, "answers", "import", history))
    for seed in (1, 2):
        info = plan(ws, "--budget", 6, "--seed", seed)
        answers = tmp_path / f"answers{seed}.csv"
        with open(answers, "w", newline="", encoding="utf-8") as handle:
            writer = csv.writer(handle)
            writer.writerow(["case_id", "expert", "answer"])
            for case_id, expert, *_ in assignments(ws, info["round"]):
                writer.writerow([case_id, expert, truth[case_id]])
        ok(invoke(ws, "answers", "import", answers))
    with Workspace.open(ws) as handle:
        pool = load_pool(handle)
        details = handle.round_details()
    mask = pool.has_truth
    A, prob = pool.answers[mask], pool.selection_prob[mask]
    assert all(d["detail"]["strata"] == "predicted" for d in details)
    equal = round_weights(pool, details, mask)
    assert np.all(equal[A >= 0] == 1.0) and np.all(np.isnan(equal[A < 0]))
    rng = np.random.default_rng(0)
    for d in details:  # as stored before the rule: no "strata", a design over true classes
        del d["detail"]["strata"]
        shape = np.shape(d["detail"]["design"])
        d["detail"]["design"] = rng.uniform(0.05, 0.5, size=(shape[0], shape[1], pool.n_classes)).tolist()
    w = round_weights(pool, details, mask)
    asked = np.isfinite(prob) & (A >= 0)
    historical = (A >= 0) & ~asked
    assert historical.sum() == 1 and np.all(w[historical] == 1.0)
    assert np.all(np.isnan(w[A < 0]))
    assert np.all(w[asked] > 0)
    region = regions_from_features(pool.X, n_regions=6, random_state=0)[mask]
    total = sum(np.asarray(d["detail"]["design"]) for d in details)
    for j in range(A.shape[1]):
        assert w[asked[:, j], j].mean() == pytest.approx(1.0)
        groups = {}
        for i in np.flatnonzero(asked[:, j]):
            groups.setdefault((region[i], pool.y[mask][i]), set()).add(round(float(w[i, j]), 12))
        assert all(len(v) == 1 for v in groups.values())
    # inside one region, a group asked more often per case weighs less (the weight is the
    # region's mean chance over the group's own chance)
    y = pool.y[mask]
    for j in range(A.shape[1]):
        for g in np.unique(region[asked[:, j]]):
            members = np.flatnonzero(asked[:, j] & (region == g))
            own, weight = total[j, g, y[members]], w[members, j]
            order = np.argsort(own)
            assert np.all(np.diff(weight[order]) <= 1e-9)

    # A workspace holding both kinds: the rule is per round. Answers of the round planned on
    # predicted classes weigh 1; the old round's answers get stabilized weights over the old
    # round's design alone (the same function, routeplan.rehearse.stabilized_weights).
    from routeplan.rehearse import stabilized_weights

    details[1]["detail"]["strata"] = "predicted"
    mixed = round_weights(pool, details, mask)
    rnd = pool.answer_round[mask]
    newer, older = asked & (rnd == details[1]["round_id"]), asked & (rnd == details[0]["round_id"])
    assert newer.any() and older.any() and not (newer & older).any()
    assert np.all(mixed[newer] == 1.0) and np.all(mixed[historical] == 1.0)
    alone = stabilized_weights([np.asarray(details[0]["detail"]["design"])], region, y, older)
    np.testing.assert_allclose(mixed[older], alone[older])
    assert not np.allclose(mixed[older], w[older])  # the newer round's design no longer counts

# --------------------------------------------------------------------------- focus


def test_plan_after_fit_is_steered_by_the_kept_router(ws, tmp_path):
    # margin sampling on the router's deferral decisions (Scheffer, Decomain & Wrobel, IDA 2001):
    # once 'fit' keeps a router, value picks (not the audit) lie where that router's choice about
    # the expert is open; the plan names the model; --no-focus and 'random' ignore it
    from routeplan.acquisition import router_focus
    from routeplan.features import FeatureSpec
    from routeplan.fitting import load_router
    from routeplan.workspace import Workspace

    schema = Draft202012Validator(json.loads((SCHEMAS / "round-plan.schema.json").read_text()))
    first = plan(ws, "--budget", 8, "--seed", 1)
    assert first["focus"] is None  # nothing fitted yet
    truth = dict(rows(ws, "SELECT case_id, truth FROM cases"))
    answers = tmp_path / "answers.csv"
    with open(answers, "w", newline="", encoding="utf-8") as handle:
        writer = csv.writer(handle)
        writer.writerow(["case_id", "expert", "answer"])
        for case_id, expert, *_ in assignments(ws, first["round"]):
            writer.writerow([case_id, expert, truth[case_id] if expert != "cy" else "a"])
    ok(invoke(ws, "answers", "import", answers))
    ok(invoke(ws, "fit", "--router", "plugin", "--max-epochs", "5", "--seed", "0"))
    kept = rows(ws, "SELECT model_id FROM models WHERE chosen = 1")[0][0]
    # a budget the two-sided focus can hold (about a tenth of the pairs here); past it the rest
    # goes outside the focus by the same strategy (acquisition docstring, "Focus")
    second = plan(ws, "--budget", 2, "--seed", 2)
    schema.validate(second)
    assert second["focus"]["model_id"] == kept and second["focus"]["margin"] == pytest.approx(0.1)
    assert 0 < second["focus"]["pairs_in_focus"] <= 1
    with Workspace.open(ws) as handle:
        _, router, params, _ = load_router(handle)
        frame, X = handle.case_frame()
    spec = FeatureSpec.from_dict(params["features"])
    index = {c: i for i, c in enumerate(frame["case_id"])}
    names = list(EXPERTS)
    picks = [(c, e) for c, e, strategy, *_ in assignments(ws, second["round"]) if strategy != "audit"]
    assert picks
    costs = router.predict_costs(spec.transform(X[[index[c] for c, _ in picks]]))
    focus = router_focus(costs, 3, 0.1)
    assert all(focus[i, names.index(e)] for i, (_, e) in enumerate(picks))
    assert plan(ws, "--budget", 8, "--seed", 3, "--no-focus", "--dry-run")["focus"] is None
    assert plan(ws, "--budget", 8, "--seed", 3, "--strategy", "random", "--dry-run")["focus"] is None
    # a router fitted before an expert joined cannot steer: the plan says so
    ok(invoke(ws, "experts", "add", "dee", "--fee", "0.1"))
    later = plan(ws, "--budget", 8, "--seed", 4, "--dry-run")
    assert later["focus"] is None and any("without focus" in n for n in later["notes"])


# --------------------------------------------------------------------------- hostile use


@pytest.mark.parametrize("command", [["round", "plan", "--budget", "5"], ["competence"], ["fit"], ["rehearse"]])
@pytest.mark.parametrize("seed", ["-1", str(2**32)])
def test_seed_outside_the_generators_range_is_a_usage_error(ws, command, seed):
    # numpy's SeedSequence takes non-negative integers only, and sklearn's k-means (through
    # np.random.RandomState) at most 2**32 - 1 (numpy and scikit-learn documentation); a seed
    # outside that was an internal error (exit 1) and is now refused at the option (exit 2).
    before = dump(ws)
    result = invoke(ws, *command, "--seed", seed)
    assert result.exit_code == 2, (result.exit_code, result.stderr)
    assert "Invalid value for '--seed'" in result.stderr and "Internal error" not in result.stderr
    assert dump(ws) == before


def test_plan_round_library_refuses_a_negative_seed(ws):
    # library first (DEVELOPERS.md house rules): the library says so too, not only the CLI
    from routeplan.errors import InputError
    from routeplan.rounds import plan_round
    from routeplan.workspace import Workspace

    with Workspace.open(ws) as opened, pytest.raises(InputError, match="--seed"):
        plan_round(opened, 5.0, seed=-1)


def test_export_refuses_a_folder_where_a_sheet_goes_and_writes_no_sheet(ws, tmp_path):
    # A folder named like a sheet cannot be replaced by it: refused before any sheet is written
    # (was: an internal error after the first sheets had been written; common practice: check
    # every output before writing any).
    info = plan(ws, "--budget", 4)
    experts = sorted({e for _, e, *_ in assignments(ws, info["round"])})
    assert len(experts) >= 2
    out = tmp_path / "sheets"
    (out / f"{experts[-1]}.csv").mkdir(parents=True)
    one_line_error(invoke(ws, "round", "export", info["round"], "--out", out, "--overwrite"),
                   "is a folder", "move it away")
    assert not [p for p in out.iterdir() if p.is_file()]


def test_export_writes_every_sheet_or_none(ws, tmp_path, monkeypatch):
    # A failure while writing a later sheet leaves the earlier ones as they were (filled-in
    # sheets are not half replaced; common practice: all-or-nothing output of one command).
    import routeplan.files

    info = plan(ws, "--budget", 4)
    out = tmp_path / "sheets"
    ok(invoke(ws, "round", "export", info["round"], "--out", out))
    sheets = sorted(out.glob("*.csv"))
    assert len(sheets) >= 2
    for sheet in sheets:
        sheet.write_text(sheet.read_text() + "# filled in\n")
    real, calls = routeplan.files._csv_writer, []

    def failing(frame, neutralise):  # the second sheet's writer fails (a full disk)
        calls.append(frame)
        if len(calls) == 2:
            def full(tmp):
                raise OSError(28, "No space left on device")
            return full
        return real(frame, neutralise)

    monkeypatch.setattr(routeplan.files, "_csv_writer", failing)
    result = invoke(ws, "round", "export", info["round"], "--out", out, "--overwrite")
    # a full disk is the user's to fix: exit 2, one line naming the sheet and the system's reason
    one_line_error(result, f"{sheets[1]}: cannot write the file (No space left on device)")
    assert len(calls) == len(sheets)
    assert all(sheet.read_text().endswith("# filled in\n") for sheet in sheets)
    assert sorted(out.iterdir()) == sheets  # no temporary file left behind


def test_export_into_a_folder_that_cannot_be_written_is_exit_2(ws, tmp_path, monkeypatch):
    # No permission on the folder (EACCES, POSIX.1-2017 <errno.h>), simulated because the tests
    # run as root, where file modes do not stop writes: exit 2 with one line naming the path and
    # the system's reason, and no sheet, temporary file or backup left behind (common practice).
    import errno
    import tempfile

    info = plan(ws, "--budget", 4)
    out = tmp_path / "sheets"
    out.mkdir()

    def refused(*args, **kwargs):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), kwargs.get("dir"))

    monkeypatch.setattr(tempfile, "mkstemp", refused)
    result = invoke(ws, "round", "export", info["round"], "--out", out)
    one_line_error(result, f"{out}/", "cannot write the file (Permission denied)")
    assert list(out.iterdir()) == []
    monkeypatch.undo()

    def no_folder(self, *args, **kwargs):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(self))

    listing, state = sorted(tmp_path.iterdir()), dump(ws)
    monkeypatch.setattr(Path, "mkdir", no_folder)
    result = invoke(ws, "round", "export", info["round"], "--out", tmp_path / "new")
    one_line_error(result, f"{tmp_path / 'new'}: cannot create the --out folder (Permission denied)")
    # nothing written beside the folder that could not be made, and the workspace as it was
    assert sorted(tmp_path.iterdir()) == listing and dump(ws) == state


@pytest.mark.parametrize(
    "args",
    [
        ["round", "plan", "--budget", "-1"],
        ["round", "plan", "--budget", "abc"],
        ["round", "export", "99", "--out", "sheets"],
        ["round", "close", "99"],
        ["status"],
    ],
)
def test_json_failure_is_json_on_stdout(ws, tmp_path, args):
    # A script that asked for --json reads stdout as JSON, failure included (common practice
    # for machine-readable output); the one line on stderr and the exit code stay.
    folder = tmp_path / "no_workspace" if args == ["status"] else ws
    result = invoke(folder, *args, "--json")
    assert result.exit_code == 2
    data = json.loads(result.stdout)
    assert data["exit_code"] == 2 and data["error"]
    assert data["error"].splitlines()[0] in result.stderr


def test_internal_fault_with_json_is_json_on_stdout(ws, monkeypatch):
    # exit 1 (a bug) also answers --json with JSON (common practice, as above)
    import routeplan.rounds

    def broken(*args, **kwargs):
        raise RuntimeError("boom")

    monkeypatch.setattr(routeplan.rounds, "close_round", broken)
    result = invoke(ws, "round", "close", "1", "--json")
    assert result.exit_code == 1
    data = json.loads(result.stdout)
    assert data["exit_code"] == 1 and "RuntimeError: boom" in data["error"]


def test_status_rounds_table_keeps_its_headers_whole_at_80_columns():
    # common practice: a terminal table must stay readable at the classic 80 columns;
    # before, rich folded "answered" into "answere" / "d" with four-digit counts
    from rich.console import Console

    from routeplan.report import render_status

    row = {"strategy": "uncertain", "budget": 1000.0, "spent": 999.94, "state": "closed",
           "assignments": 12210, "answered": 12210, "open": 0, "overdue": 0, "expired": 0}
    info = {"workspace": "ws", "schema_version": 2, "labels": ["a", "b"], "error_cost": 1.0,
            "cases": {"total": 4000, "with_truth": 3000, "without_truth": 1000}, "feature_columns": ["x"],
            "answers": {"total": 6106, "historical": 89}, "models": 25, "policies": 5, "experts": [],
            "rounds": [{"round": r, **row} for r in range(1, 13)]}
    console = Console(width=80, record=True, color_system=None)
    console.print(render_status(info))
    lines = console.export_text().splitlines()
    header = next(line for line in lines if line.lstrip().startswith("round"))
    assert header.split() == ["round", "strategy", "budget", "spent", "state", "asked", "answered", "open",
                              "overdue", "expired"]
    assert max(map(len, lines)) <= 80
