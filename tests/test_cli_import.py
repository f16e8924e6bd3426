"""The importers through the command line: normal paths, and every bad input we promise to refuse.

Contract under test (DESIGN.md, "Command-line contract"): exit 0 on success, 2 on bad input or
usage, 1 on an internal fault; a bad input gets one line on stderr naming the file, the line
and the problem, no traceback, and leaves the workspace exactly as it was. "Exactly" is
checked on the whole database: ``sqlite3.Connection.iterdump()`` before and after.

Expected line numbers count the header as line 1 (common practice for CSV: RFC 4180 puts the
optional header on the first line). The files are invented and only exercise the checks.
"""

from __future__ import annotations

import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from conftest import (
    CASES_CSV,
    LABELS,
    assert_one_line_error,
    db_dump,
    query,
    routeplan_subprocess,
    run_cli,
)
from routeplan.cli import cli

# --------------------------------------------------------------------------- normal paths


def test_init_creates_a_workspace_with_the_label_set(tmp_path):
    result = run_cli(tmp_path / "new", "init", "--labels", "low,high", "--error-cost", "2.5", "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)
    assert info["labels"] == ["low", "high"]
    assert info["error_cost"] == 2.5
    assert query(tmp_path / "new", "SELECT code, name FROM label_set ORDER BY code") == [(0, "low"), (1, "high")]


def test_init_refuses_to_overwrite(stocked_ws):
    before = db_dump(stocked_ws)
    result = run_cli(stocked_ws, "init", "--labels", "x,y")
    assert_one_line_error(result, "routeplan.sqlite", "already exists")
    assert db_dump(stocked_ws) == before


@pytest.mark.parametrize("labels", ["solo", "a,a", "a,,b", "Accept,reject,accept"])
def test_init_refuses_a_bad_label_set(tmp_path, labels):
    result = run_cli(tmp_path / "new", "init", "--labels", labels)
    assert_one_line_error(result, "--labels")
    assert not (tmp_path / "new" / "routeplan.sqlite").exists()


def test_init_under_a_regular_file_is_refused_naming_the_path(tmp_path):
    # a path through a regular file cannot be a folder (POSIX.1-2017, mkdir(): ENOTDIR)
    (tmp_path / "somefile.txt").write_text("x")
    target = tmp_path / "somefile.txt" / "ws"
    result = run_cli(target, "init", "--labels", "a,b")
    assert_one_line_error(result, str(target), "cannot create the workspace folder")


def test_cases_import_stores_ids_truth_and_features(empty_ws, write_file):
    path = write_file("cases.csv", CASES_CSV)
    result = run_cli(empty_ws, "cases", "import", path)
    assert result.exit_code == 0, result.stderr
    assert "6 case(s) added" in result.stdout
    rows = query(empty_ws, "SELECT case_id, truth, features FROM cases ORDER BY pos")
    # compare with the file read by the standard library's csv module (reference reader)
    import csv
    import io

    expected = list(csv.DictReader(io.StringIO(CASES_CSV)))
    assert [r[0] for r in rows] == [e["case_id"] for e in expected]
    assert [r[1] for r in rows] == [e["truth"] or None for e in expected]
    X = np.vstack([np.frombuffer(r[2], dtype="<f8") for r in rows])
    np.testing.assert_array_equal(X, [[float(e["f1"]), float(e["f2"])] for e in expected])
    assert query(empty_ws, "SELECT name FROM feature_columns ORDER BY position") == [("f1",), ("f2",)]


def test_truth_import_fills_unknown_truth(stocked_ws, write_file):
    path = write_file("truth.csv", "case_id,truth\nc2,refer\nc4,accept\nc1,accept\n")
    result = run_cli(stocked_ws, "truth", "import", path)
    assert result.exit_code == 0, result.stderr
    assert "2 truth value(s) added, 1 already stored" in result.stdout
    got = dict(query(stocked_ws, "SELECT case_id, truth FROM cases"))
    assert (got["c2"], got["c4"], got["c1"]) == ("refer", "accept", "accept")


def test_truth_replace_reports_added_replaced_and_unchanged_apart(stocked_ws, write_file):
    # An import says what it did to each record: new, written over, or left alone (common practice).
    path = write_file("truth.csv", "case_id,truth\nc1,reject\nc2,accept\nc3,reject\n")
    result = run_cli(stocked_ws, "truth", "import", path, "--replace", "--json")
    assert result.exit_code == 0, result.stderr
    (report,) = json.loads(result.stdout)
    assert (report["added"], report["replaced"], report["unchanged"], report["rows"]) == (1, 1, 1, 3)
    got = dict(query(stocked_ws, "SELECT case_id, truth FROM cases"))
    assert (got["c1"], got["c2"], got["c3"]) == ("reject", "accept", "reject")
    path = write_file("again.csv", "case_id,truth\nc1,refer\nc4,refer\n")
    again = run_cli(stocked_ws, "truth", "import", path, "--replace")
    assert again.exit_code == 0, again.stderr
    assert again.stdout.strip() == f"{path}: 1 truth value(s) added, 1 replaced"


def test_reimporting_the_same_bytes_after_the_workspace_changed(stocked_ws, write_file):
    # The same bytes imported again are compared with what is stored now: a skip by content
    # hash alone would say "nothing changed" after a --replace or 'experts add' changed the
    # stored values since (common practice: report what the workspace holds, not a cache).
    first = write_file("a.csv", "case_id,truth\nc2,accept\n")
    second = write_file("b.csv", "case_id,truth\nc2,refer\n")
    truth_of = lambda: dict(query(stocked_ws, "SELECT case_id, truth FROM cases"))["c2"]  # noqa: E731
    assert run_cli(stocked_ws, "truth", "import", first).exit_code == 0
    assert run_cli(stocked_ws, "truth", "import", second, "--replace").exit_code == 0
    assert truth_of() == "refer"
    assert_one_line_error(run_cli(stocked_ws, "truth", "import", first),
                          "'accept' for case 'c2' conflicts with the stored 'refer'", "--replace")
    back = run_cli(stocked_ws, "truth", "import", first, "--replace", "--json")
    (report,) = json.loads(back.stdout)
    assert (report["replaced"], report["no_op"], report["seen_before"]) == (1, False, True)
    assert truth_of() == "accept"
    assert "already imported" in run_cli(stocked_ws, "truth", "import", first, "--replace").stdout

    fees = write_file("experts.csv", "name,fee\nalice,0.6\n")
    fee_of = lambda: dict(query(stocked_ws, "SELECT name, fee FROM experts"))["alice"]  # noqa: E731
    assert run_cli(stocked_ws, "experts", "import", fees).exit_code == 0
    assert run_cli(stocked_ws, "experts", "add", "alice", "--fee", "0.9").exit_code == 0
    again = run_cli(stocked_ws, "experts", "import", fees)
    assert again.exit_code == 0, again.stderr
    assert "updated: 1" in again.stdout and "imported before" in again.stdout
    assert fee_of() == 0.6
    assert "already imported" in run_cli(stocked_ws, "experts", "import", fees).stdout


def test_experts_add_of_a_new_name_without_options_asks_for_a_fee(stocked_ws):
    # the hint names what is missing (a new expert has no fee to keep), as 'experts add --help' says
    before = db_dump(stocked_ws)
    line = assert_one_line_error(run_cli(stocked_ws, "experts", "add", "zoe"))
    assert line == "Error: expert 'zoe' is new: give its --fee (and, if you like, --capacity)"
    line = assert_one_line_error(run_cli(stocked_ws, "experts", "add", "alice"))
    assert line == "Error: give --fee, --capacity or both to change expert 'alice'"
    assert db_dump(stocked_ws) == before


@pytest.mark.parametrize("cell", ["NaN", "-INF", "Infinity", "TRUE"])
def test_messages_keep_the_spelling_of_the_file(stocked_ws, write_file, cell):
    # A message quotes the cell as the user wrote it, so that a search in the file finds it
    # (common practice); the parser reads NaN/INF as floats and TRUE as a boolean.
    path = write_file("experts.csv", f"name,fee\ncarol,{cell}\n")
    assert_one_line_error(run_cli(stocked_ws, "experts", "import", path),
                          f"line 2: column 'fee' holds '{cell}', not a finite number")


def test_experts_add_and_import(stocked_ws, write_file):
    assert run_cli(stocked_ws, "experts", "add", "carol", "--fee", "1.5", "--capacity", "0.25").exit_code == 0
    path = write_file("experts.csv", "name,fee,capacity\ndave,0,1\nerin,2,\nalice,0.75,0.5\n")
    result = run_cli(stocked_ws, "experts", "import", path)
    assert result.exit_code == 0, result.stderr
    assert "2 expert(s) added" in result.stdout and "updated: 1" in result.stdout
    got = {r[0]: r[1:] for r in query(stocked_ws, "SELECT name, fee, capacity FROM experts")}
    # a new expert's empty capacity means "no limit" (1.0), as documented in ingest.import_experts
    assert got == {"alice": (0.75, 0.5), "bob": (0.25, 1.0), "carol": (1.5, 0.25), "dave": (0.0, 1.0), "erin": (2.0, 1.0)}


def test_changing_a_fee_keeps_the_capacity(stocked_ws, write_file):
    # what the user leaves out stays as it was (documented in `experts add --help`)
    assert run_cli(stocked_ws, "experts", "add", "carol", "--fee", "1.5", "--capacity", "0.25").exit_code == 0
    assert run_cli(stocked_ws, "experts", "add", "carol", "--fee", "2").exit_code == 0
    assert run_cli(stocked_ws, "experts", "add", "alice", "--capacity", "0.4").exit_code == 0
    path = write_file("fees.csv", "name,fee\ncarol,3\n")
    assert run_cli(stocked_ws, "experts", "import", path).exit_code == 0
    path = write_file("caps.csv", "name,fee,capacity\ncarol,3,\n")
    assert run_cli(stocked_ws, "experts", "import", path).exit_code == 0
    got = {r[0]: r[1:] for r in query(stocked_ws, "SELECT name, fee, capacity FROM experts")}
    assert got["carol"] == (3.0, 0.25)
    assert got["alice"] == (0.5, 0.4)  # the fee set in conftest stays
    before = db_dump(stocked_ws)
    assert_one_line_error(run_cli(stocked_ws, "experts", "add", "zoe", "--capacity", "0.5"), "new", "--fee")
    assert_one_line_error(run_cli(stocked_ws, "experts", "add", "carol"), "--fee", "--capacity", "'carol'")
    assert db_dump(stocked_ws) == before


def test_answers_import_counts_historical_answers_in_the_message(stocked_ws, write_file):
    path = write_file("answers.csv", "case_id,expert,answer\nc2,alice,reject\nc4,bob,accept\nc2,bob,refer\n")
    result = run_cli(stocked_ws, "answers", "import", path)
    assert result.exit_code == 0, result.stderr
    assert "3 answer(s) added" in result.stdout
    assert "historical: 3" in result.stdout  # no round asked for these: all historical
    rows = query(stocked_ws, "SELECT case_id, expert, answer, round_id, assignment_id FROM answers ORDER BY answer_id")
    assert rows[-3:] == [("c2", "alice", "reject", None, None), ("c4", "bob", "accept", None, None),
                         ("c2", "bob", "refer", None, None)]


def test_answers_to_a_round_are_linked_and_the_rest_counted_as_historical(stocked_ws, write_file):
    planned = run_cli(stocked_ws, "round", "plan", "--budget", "1", "--strategy", "random", "--seed", "0",
                      "--include-unverified")
    assert planned.exit_code == 0, planned.stderr
    stored = set(query(stocked_ws, "SELECT case_id, expert FROM answers"))
    asked = [(c, e, a, r) for c, e, a, r in query(
        stocked_ws, "SELECT case_id, expert, assignment_id, round_id FROM assignments ORDER BY assignment_id")
        if (c, e) not in stored]
    assert asked, "the plan asked nothing new"
    unasked = next((c, e) for c in ("c1", "c2", "c3", "c4", "c5", "c6") for e in ("alice", "bob")
                   if (c, e) not in stored and (c, e) not in {(a[0], a[1]) for a in asked})
    rows = [(c, e) for c, e, _, _ in asked] + [unasked]
    path = write_file("answers.csv", "case_id,expert,answer\n" + "".join(f"{c},{e},reject\n" for c, e in rows))
    result = run_cli(stocked_ws, "answers", "import", path)
    assert result.exit_code == 0, result.stderr
    assert f"{len(rows)} answer(s) added" in result.stdout
    assert "historical: 1" in result.stdout and f"linked to assignments: {len(asked)}" in result.stdout
    linked = query(stocked_ws, "SELECT case_id, expert, assignment_id, round_id FROM answers WHERE assignment_id IS NOT NULL")
    assert sorted(linked) == sorted(asked)
    states = dict(query(stocked_ws, "SELECT assignment_id, state FROM assignments"))
    assert all(states[a] == "answered" for _, _, a, _ in asked)


def test_answers_import_of_several_files_is_all_or_nothing(stocked_ws, write_file):
    good = write_file("good.csv", "case_id,expert,answer\nc2,alice,reject\n")
    bad = write_file("bad.csv", "case_id,expert,answer\nc4,bob,maybe\n")
    before = db_dump(stocked_ws)
    result = run_cli(stocked_ws, "answers", "import", good, bad)
    assert_one_line_error(result, str(bad), "line 2", "maybe")
    assert db_dump(stocked_ws) == before


def test_answers_conflicting_across_two_files_of_one_command(stocked_ws, write_file):
    one = write_file("one.csv", "case_id,expert,answer\nc2,alice,reject\n")
    two = write_file("two.csv", "case_id,expert,answer\nc5,bob,accept\nc2,alice,accept\n")
    before = db_dump(stocked_ws)
    result = run_cli(stocked_ws, "answers", "import", one, two)
    assert_one_line_error(result, str(two), "line 3", "conflicts", str(one))
    assert db_dump(stocked_ws) == before



def test_a_label_in_another_letter_case_is_refused_naming_the_label_meant(stocked_ws, write_file):
    # Spreadsheets capitalise words as they are typed; labels stay exact (a label set may hold
    # 'A' and 'a'), but the line says which label was meant (common practice: say what to do).
    path = write_file("answers.csv", "case_id,expert,answer\nc2,alice,reject\nc4,bob, Refer \n")
    before = db_dump(stocked_ws)
    assert_one_line_error(run_cli(stocked_ws, "answers", "import", path), "line 3", "'Refer'",
                          "labels are case-sensitive: did you mean 'refer'?")
    assert db_dump(stocked_ws) == before


@pytest.mark.parametrize("separator", [";", "\t"])
def test_a_sheet_saved_with_another_separator_is_refused_naming_it(stocked_ws, write_file, separator):
    # Spreadsheets in many locales save "CSV" with semicolons (common practice: name the cause)
    text = "case_id,expert,answer\nc2,alice,reject\n".replace(",", separator)
    path = write_file("answers.csv", text)
    before = db_dump(stocked_ws)
    assert_one_line_error(run_cli(stocked_ws, "answers", "import", path), "line 1", "missing column(s)",
                          f"separate values with {separator!r}", "save it as CSV with commas")
    assert db_dump(stocked_ws) == before


def test_a_sheet_edited_in_a_spreadsheet_imports(stocked_ws, write_file):
    # Byte order mark, CRLF line ends, reordered columns, padded cells, a repeated row and
    # trailing empty rows, as spreadsheets write them (common practice); a regression guard.
    text = ("\ufeffanswer,case_id,expert\r\n reject ,c2,alice\r\naccept, c4 ,bob\r\n"
            "reject,c2,alice\r\n,,\r\n,,\r\n")
    result = run_cli(stocked_ws, "answers", "import", write_file("answers.csv", text), "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)[0]
    assert (info["added"], info["notes"]["repeated_rows"], info["notes"]["left_blank"]) == (2, 1, 2)
    assert sorted(query(stocked_ws, "SELECT case_id, expert, answer FROM answers WHERE case_id IN ('c2', 'c4')")) == [
        ("c2", "alice", "reject"), ("c4", "bob", "accept")]

REIMPORTS = [
    ("cases", "empty", "case_id,f1,f2\nn1,1,2\nn2,3,4\n"),
    ("truth", "stocked", "case_id,truth\nc2,accept\n"),
    ("experts", "stocked", "name,fee,capacity\ncarol,1,0.5\n"),
    ("answers", "stocked", "case_id,expert,answer\nc2,alice,reject\n"),
]


@pytest.mark.parametrize("command,kind,content", REIMPORTS, ids=[r[0] for r in REIMPORTS])
def test_reimporting_an_identical_file_is_a_no_op(command, kind, content, template_dirs, tmp_path, write_file):
    from conftest import copy_workspace

    ws = copy_workspace(template_dirs[kind], tmp_path / "ws")
    path = write_file("data.csv", content)
    assert run_cli(ws, command, "import", path).exit_code == 0
    after_first = db_dump(ws)
    second = run_cli(ws, command, "import", path)
    assert second.exit_code == 0, second.stderr
    assert "already imported" in second.stdout
    assert db_dump(ws) == after_first


def test_reimporting_cases_with_other_options_is_refused(template_dirs, tmp_path, write_file):
    # a second import of the same bytes changes nothing, so options that would read the
    # file differently (or name no column) must not be accepted silently (common practice:
    # refuse rather than ignore an option)
    from conftest import copy_workspace

    ws = copy_workspace(template_dirs["empty"], tmp_path / "ws")
    path = write_file("cases.csv", "case_id,f1,f2,site\nn1,1,2,north\nn2,3,4,south\n")
    assert run_cli(ws, "cases", "import", path).exit_code == 0
    after_first = db_dump(ws)
    for extra, fragments in ((["--group-column", "site"], ["already imported", "--group-column"]),
                             (["--group-column", "oven"], ["'oven'", "not in the header"]),
                             (["--feature-columns", "f1,nope"], ["'nope'", "not in the header"]),
                             (["--feature-columns", "f1"], ["already imported", "--feature-columns"])):
        assert_one_line_error(run_cli(ws, "cases", "import", path, *extra), *fragments)
    again = run_cli(ws, "cases", "import", path)
    assert again.exit_code == 0 and "already imported" in again.stdout
    assert db_dump(ws) == after_first


def test_adding_the_same_expert_twice_changes_nothing(stocked_ws):
    before = db_dump(stocked_ws)
    assert run_cli(stocked_ws, "experts", "add", "alice", "--fee", "0.5", "--capacity", "0.5").exit_code == 0
    assert db_dump(stocked_ws) == before


def test_parquet_import_of_cases_equals_csv_import(template_dirs, tmp_path):
    from conftest import copy_workspace

    rng = np.random.default_rng(7)
    n = 50
    ids = [f"p{i:03d}" for i in range(n)]
    truth = [LABELS[i % 3] if i % 4 else None for i in range(n)]
    X = rng.normal(size=(n, 3))
    table = pa.table({"case_id": ids, "a": X[:, 0], "b": X[:, 1], "c": X[:, 2], "truth": truth,
                      "note": [f"note {i}" for i in range(n)]})
    pq.write_table(table, tmp_path / "cases.parquet")
    import pyarrow.csv as pacsv

    pacsv.write_csv(table, tmp_path / "cases.csv")
    out = {}
    for suffix in ("parquet", "csv"):
        ws = copy_workspace(template_dirs["empty"], tmp_path / f"ws_{suffix}")
        result = run_cli(ws, "cases", "import", tmp_path / f"cases.{suffix}")
        assert result.exit_code == 0, result.stderr
        out[suffix] = (
            query(ws, "SELECT case_id, truth, grp, features, display, batch FROM cases ORDER BY pos"),
            query(ws, "SELECT * FROM feature_columns ORDER BY position"),
        )
    assert out["parquet"] == out["csv"]
    stored = np.vstack([np.frombuffer(r[3], dtype="<f8") for r in out["parquet"][0]])
    np.testing.assert_array_equal(stored, X)  # shortest-repr floats round-trip exactly (IEEE 754)


@pytest.mark.parametrize("kind", ["list", "struct", "binary"])
def test_parquet_cases_with_a_column_not_readable_as_text_are_refused(empty_ws, tmp_path, kind):
    # nested (LIST, struct groups) and raw BYTE_ARRAY columns are Parquet types of the Apache Parquet
    # format specification (LogicalTypes.md); routeplan keeps every column, so it names the column
    extra = {"list": pa.array([[1, 2], [3]]), "struct": pa.array([{"a": 1}, {"a": 2}]),
             "binary": pa.array([b"ok", b"\xff\xfe"], pa.binary())}[kind]
    pq.write_table(pa.table({"case_id": ["p1", "p2"], "f1": [1.0, 2.0], "extra": extra}), tmp_path / "cases.parquet")
    before = db_dump(empty_ws)
    result = run_cli(empty_ws, "cases", "import", tmp_path / "cases.parquet")
    assert_one_line_error(result, "cases.parquet", "column 'extra'", kind)
    assert db_dump(empty_ws) == before


def test_cases_import_refuses_a_feature_column_named_twice(empty_ws, write_file):
    # a feature named twice is a typing slip, not two features (common practice: refuse, do not guess)
    path = write_file("cases.csv", "case_id,x1,x2\nn1,1,2\n")
    before = db_dump(empty_ws)
    result = run_cli(empty_ws, "cases", "import", path, "--feature-columns", "x1,x1")
    assert_one_line_error(result, str(path), "'x1'", "more than once")
    assert db_dump(empty_ws) == before


ROLE_CLASHES = [
    ("group-is-default-truth", "empty", ["--group-column", "truth"], ["'truth'", "truth column", "group column"]),
    ("id-is-default-truth", "empty", ["--id-column", "truth"], ["'truth'", "id column", "truth column"]),
    ("truth-is-group", "empty", ["--truth-column", "site", "--group-column", "site"],
     ["'site'", "--truth-column", "--group-column"]),
    ("id-is-feature", "empty", ["--feature-columns", "case_id,f1"], ["'case_id'", "id column", "feature column"]),
    ("group-is-feature", "empty", ["--feature-columns", "f1,f2", "--group-column", "f2"],
     ["'f2'", "group column", "--feature-columns"]),
    ("group-is-stored-feature", "stocked", ["--group-column", "f1"],
     ["'f1'", "group column", "the workspace's feature columns"]),
]


@pytest.mark.parametrize("kind,options,fragments", [c[1:] for c in ROLE_CLASHES], ids=[c[0] for c in ROLE_CLASHES])
def test_cases_import_refuses_a_column_given_two_roles(kind, options, fragments, template_dirs, tmp_path, write_file):
    # one column cannot be both, say, the truth and the group: one of the two would be dropped
    # without a word (common practice: refuse, do not guess)
    from conftest import copy_workspace

    ws = copy_workspace(template_dirs[kind], tmp_path / "ws")
    path = write_file("cases.csv", "case_id,f1,f2,truth,site\nn1,1,2,accept,north\nn2,3,4,,south\n")
    before = db_dump(ws)
    result = run_cli(ws, "cases", "import", path, *options)
    assert_one_line_error(result, str(path), "two roles", *fragments)
    assert db_dump(ws) == before


def test_a_later_cases_import_names_the_stored_feature_columns_or_none(stocked_ws, write_file):
    # the first import fixes the feature columns (README, command reference); another set named
    # later would be ignored, so it is refused (common practice: refuse rather than ignore an option)
    path = write_file("more.csv", "case_id,f2,f3,f1\nm1,2,3,1\n")
    before = db_dump(stocked_ws)
    for named in ("f1,f3", "f1", "f1,f2,f3"):
        result = run_cli(stocked_ws, "cases", "import", path, "--feature-columns", named)
        assert_one_line_error(result, str(path), f"--feature-columns {named}", "f1,f2")
    assert db_dump(stocked_ws) == before
    assert run_cli(stocked_ws, "cases", "import", path, "--feature-columns", "f1,f2").exit_code == 0
    other = write_file("other.csv", "case_id,f1,f2\nm2,5,6\n")
    assert run_cli(stocked_ws, "cases", "import", other, "--feature-columns", "f2,f1").exit_code == 0
    stored = dict(query(stocked_ws, "SELECT case_id, features FROM cases WHERE case_id IN ('m1', 'm2')"))
    # features are read by name in the stored order f1, f2 (the file's own order does not matter)
    assert np.frombuffer(stored["m1"], dtype="<f8").tolist() == [1.0, 2.0]
    assert np.frombuffer(stored["m2"], dtype="<f8").tolist() == [5.0, 6.0]


def test_json_output_writes_non_finite_numbers_as_null(capsys):
    # JSON has no NaN or infinity (RFC 8259, section 6); Python's json writes them as the
    # non-standard Infinity and NaN unless told otherwise
    from pathlib import Path

    from routeplan.cli import App

    def refuse(constant: str) -> None:
        raise AssertionError(f"non-standard JSON constant {constant}")

    App(folder=Path(".")).emit_json({"reach": float("inf"),
                                     "rows": [{"cost": np.float64("nan")}, (np.float32(-np.inf), 1.5)],
                                     "curve": np.array([0.5, np.inf]), "count": np.int64(3), "name": "x"})
    data = json.loads(capsys.readouterr().out, parse_constant=refuse)
    assert data == {"reach": None, "rows": [{"cost": None}, [None, 1.5]], "curve": [0.5, None], "count": 3, "name": "x"}


# --------------------------------------------------------------------------- workspace selection


def test_workspace_option_and_environment_variable(stocked_ws, empty_ws, tmp_path, monkeypatch):
    runner = CliRunner()
    monkeypatch.chdir(tmp_path)
    by_env = runner.invoke(cli, ["status", "--json"], env={"ROUTEPLAN_WORKSPACE": str(stocked_ws)})
    assert by_env.exit_code == 0, by_env.stderr
    assert json.loads(by_env.stdout)["cases"]["total"] == 6
    # the option wins over the environment
    both = runner.invoke(cli, ["--workspace", str(empty_ws), "status", "--json"],
                         env={"ROUTEPLAN_WORKSPACE": str(stocked_ws)})
    assert json.loads(both.stdout)["cases"]["total"] == 0
    # neither: the current folder, which holds no workspace here
    none = runner.invoke(cli, ["status"], env={"ROUTEPLAN_WORKSPACE": None})
    assert_one_line_error(none, "no workspace", str(tmp_path))
    monkeypatch.chdir(stocked_ws)
    here = runner.invoke(cli, ["status", "--json"], env={"ROUTEPLAN_WORKSPACE": None})
    assert json.loads(here.stdout)["workspace"] == str(stocked_ws.resolve())


def test_status_json_content(stocked_ws):
    result = run_cli(stocked_ws, "status", "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)
    assert info["labels"] == list(LABELS)
    assert info["error_cost"] == 1.0
    assert info["schema_version"] >= 1
    assert info["cases"] == {"total": 6, "with_truth": 3, "without_truth": 3, "with_imported_scores": 0}
    assert info["feature_columns"] == ["f1", "f2"]
    assert info["answers"] == {"total": 2, "historical": 2}
    experts = {e["name"]: e for e in info["experts"]}
    assert set(experts) == {"alice", "bob"}
    assert (experts["alice"]["fee"], experts["alice"]["capacity"], experts["alice"]["answers"]) == (0.5, 0.5, 1)
    assert (experts["bob"]["fee"], experts["bob"]["capacity"], experts["bob"]["historical_answers"]) == (0.25, 1.0, 1)
    assert info["rounds"] == []
    # counts agree with the database read directly
    assert query(stocked_ws, "SELECT COUNT(*) FROM answers")[0][0] == info["answers"]["total"]


def test_status_table_renders(stocked_ws):
    result = run_cli(stocked_ws, "status")
    assert result.exit_code == 0, result.stderr
    assert "alice" in result.stdout and "Cases: 6" in result.stdout


def test_debug_shows_the_traceback(stocked_ws, write_file):
    path = write_file("bad.csv", "case_id,truth\nc99,accept\n")
    result = CliRunner().invoke(cli, ["--workspace", str(stocked_ws), "--debug", "truth", "import", str(path)])
    assert result.exit_code == 2
    assert "Traceback" in result.stderr


# --------------------------------------------------------------------------- bad inputs

# (id, command, workspace, file content, fragments of the message, line or None)
BAD_FILES = [
    # missing or unknown columns
    ("cases-missing-id", "cases", "empty", "id,f1,f2\nc9,1,2\n", ["case_id"], 1),
    ("cases-missing-feature", "cases", "stocked", "case_id,f1\nc9,1\n", ["'f2'"], 1),
    ("truth-missing-column", "truth", "stocked", "case_id\nc2\n", ["missing", "'truth'"], 1),
    ("truth-unknown-column", "truth", "stocked", "case_id,truth,x\nc2,accept,1\n", ["unknown column", "'x'"], 1),
    ("experts-missing-fee", "experts", "stocked", "name,capacity\ncarol,0.5\n", ["missing", "'fee'"], 1),
    ("experts-unknown-column", "experts", "stocked", "name,fee,hours\ncarol,1,8\n", ["unknown column", "'hours'"], 1),
    ("answers-missing-column", "answers", "stocked", "case_id,expert\nc2,alice\n", ["missing", "'answer'"], 1),
    ("answers-unknown-column", "answers", "stocked", "case_id,expert,answer,note\nc2,alice,accept,x\n",
     ["unknown column", "'note'"], 1),
    ("answers-blank-column-name", "answers", "stocked", "case_id,expert,answer,\nc2,alice,accept,\n", ["blank"], 1),
    ("answers-repeated-column", "answers", "stocked", "case_id,expert,expert\nc2,alice,bob\n", ["twice"], 1),
    # duplicate ids
    ("cases-duplicate-id", "cases", "empty", "case_id,f1,f2\nc9,1,2\nc10,1,2\nc9,3,4\n",
     ["duplicate", "'c9'", "line 2"], 4),
    ("cases-id-already-stored", "cases", "stocked", "case_id,f1,f2\nc7,1,2\nc1,1,2\n", ["'c1'", "already"], 3),
    ("experts-duplicate-name", "experts", "stocked", "name,fee\ncarol,1\ndave,1\ncarol,2\n", ["'carol'", "twice"], 4),
    # empty file or header only
    *[(f"{cmd}-empty", cmd, ws, "", ["empty"], None) for cmd, ws in
      (("cases", "empty"), ("truth", "stocked"), ("experts", "stocked"), ("answers", "stocked"))],
    *[(f"{cmd}-header-only", cmd, ws, head, ["no records"], None) for cmd, ws, head in
      (("cases", "empty", "case_id,f1\n"), ("truth", "stocked", "case_id,truth\n"),
       ("experts", "stocked", "name,fee,capacity\n"), ("answers", "stocked", "case_id,expert,answer\n"))],
    # bytes that are not UTF-8 (Latin-1 e-acute, a lone continuation byte, 0xff)
    ("cases-not-utf8-id", "cases", "empty", b"case_id,f1\nc1,1\nc\xff2,2\n", ["UTF-8", "0xff"], 3),
    ("cases-not-utf8-display", "cases", "empty", b"case_id,f1,note\nc1,1,ok\nc2,2,caf\xe9\n", ["UTF-8"], 3),
    ("truth-not-utf8", "truth", "stocked", b"case_id,truth\nc2,accept\nc4,\x80\n", ["UTF-8"], 3),
    ("experts-not-utf8", "experts", "stocked", b"name,fee\nZo\xeb,1\n", ["UTF-8"], 2),
    ("answers-not-utf8", "answers", "stocked", b"case_id,expert,answer\nc2,al\xc3ice,accept\n", ["UTF-8"], 2),
    ("answers-not-utf8-ragged", "answers", "stocked", b"case_id,expert,answer\nc2,bob,accept\nc4,al\xffice,accept,x\n",
     ["UTF-8"], 3),
    # NaN or infinite features (IEEE 754 special values as text)
    *[(f"cases-feature-{word}", "cases", "empty", f"case_id,f1,f2\nc1,1,2\nc2,3,{word}\n", ["'f2'", "finite"], 3)
      for word in ("nan", "NaN", "inf", "-inf", "Infinity", "1e999")],
    ("cases-feature-not-a-number", "cases", "stocked", "case_id,f1,f2\nc7,1,2\nc8,x,2\n", ["'f1'", "'x'"], 3),
    ("cases-feature-empty", "cases", "stocked", "case_id,f1,f2\nc7,1,2\nc8,,2\n", ["'f1'", "empty"], 3),
    # a label outside the label set
    ("cases-truth-outside-labels", "cases", "empty", "case_id,f1,truth\nc1,1,accept\nc2,2,maybe\n",
     ["'maybe'", "label set"], 3),
    ("truth-outside-labels", "truth", "stocked", "case_id,truth\nc2,Accept\n", ["'Accept'", "label set"], 2),
    ("answers-outside-labels", "answers", "stocked", "case_id,expert,answer\nc2,alice,accept\nc4,bob,maybe\n",
     ["'maybe'", "label set"], 3),
    # an unknown case or expert
    ("truth-unknown-case", "truth", "stocked", "case_id,truth\nc2,accept\nc99,accept\n", ["unknown case", "'c99'"], 3),
    ("answers-unknown-case", "answers", "stocked", "case_id,expert,answer\nc99,alice,accept\n",
     ["unknown case", "'c99'"], 2),
    ("answers-unknown-expert", "answers", "stocked", "case_id,expert,answer\nc2,alice,accept\nc2,carol,accept\n",
     ["unknown expert", "'carol'"], 3),
    # conflicting duplicates: in one file, or against what is stored
    ("answers-conflict-in-file", "answers", "stocked", "case_id,expert,answer\nc2,alice,accept\nc2,alice,reject\n",
     ["conflicting", "'reject'", "line 2"], 3),
    ("answers-conflict-with-stored", "answers", "stocked", "case_id,expert,answer\nc5,bob,accept\nc1,alice,reject\n",
     ["conflicts with the stored", "'accept'"], 3),
    ("truth-conflict-in-file", "truth", "stocked", "case_id,truth\nc2,accept\nc2,refer\n", ["conflicting"], 3),
    ("truth-conflict-with-stored", "truth", "stocked", "case_id,truth\nc1,reject\n", ["conflicts with the stored"], 2),
    # a negative or non-numeric fee; a capacity outside [0, 1]
    ("experts-negative-fee", "experts", "stocked", "name,fee\ncarol,-0.5\n", ["'fee'", "minimum"], 2),
    ("experts-text-fee", "experts", "stocked", "name,fee\ncarol,1\ndave,cheap\n", ["'fee'", "'cheap'"], 3),
    ("experts-nan-fee", "experts", "stocked", "name,fee\ncarol,nan\n", ["'fee'", "finite"], 2),
    ("experts-empty-fee", "experts", "stocked", "name,fee\ncarol,\n", ["'fee'", "empty"], 2),
    ("experts-capacity-above-one", "experts", "stocked", "name,fee,capacity\ncarol,1,1.5\n", ["'capacity'", "maximum"], 2),
    ("experts-capacity-negative", "experts", "stocked", "name,fee,capacity\ncarol,1,-0.1\n",
     ["'capacity'", "minimum"], 2),
    # an expert named `model`; names not safe as file names
    *[(f"experts-name-{tag}", "experts", "stocked", f"name,fee\ncarol,1\n{cell},1\n", ["'name'"], 3)
      for tag, cell in (("model", "model"), ("Model", "Model"), ("slash", "a/b"), ("backslash", "a\\b"),
                        ("dotdot", ".."), ("dotdot-inside", "a..b"), ("parent", "../x"), ("leading-dot", ".hidden"),
                        ("trailing-dot", "x."), ("control", '"a\x01b"'), ("tab", '"a\tb"'), ("space", '"a b"'),
                        ("too-long", "x" * 65))],
    # a CSV that does not parse
    ("answers-ragged-row", "answers", "stocked", "case_id,expert,answer\nc2,alice,accept,extra\n", ["4 fields"], 2),
    ("answers-unterminated-quote", "answers", "stocked", 'case_id,expert,answer\nc2,alice,accept\n"c4,bob,refer\n',
     ["parse"], None),
    ("answers-value-over-two-lines", "answers", "stocked", 'case_id,expert,answer\nc2,alice,accept\nc4,bob,"ref\ner"\n',
     ["several lines"], None),
    ("answers-nul-byte", "answers", "stocked", "case_id,expert,answer\nc2,alice,acc\x00ept\n", ["NUL"], 2),
]


@pytest.mark.parametrize("command,kind,content,fragments,line", [b[1:] for b in BAD_FILES], ids=[b[0] for b in BAD_FILES])
def test_bad_file_is_refused_with_one_line_and_nothing_changes(command, kind, content, fragments, line,
                                                               template_dirs, tmp_path, write_file):
    from conftest import copy_workspace

    ws = copy_workspace(template_dirs[kind], tmp_path / "ws")
    path = write_file("input.csv", content)
    before = db_dump(ws)
    result = run_cli(ws, command, "import", path)
    message = assert_one_line_error(result, str(path), *fragments)
    if line is not None:
        assert f"{path} line {line}:" in message
    assert db_dump(ws) == before


def test_blank_lines_do_not_shift_the_reported_line(stocked_ws, write_file):
    path = write_file("answers.csv", "case_id,expert,answer\n\nc2,alice,accept\n\n\nc4,bob,maybe\n")
    result = run_cli(stocked_ws, "answers", "import", path)
    assert_one_line_error(result, f"{path} line 6:", "'maybe'")


def test_bad_parquet_is_refused(empty_ws, tmp_path):
    table = pa.table({"case_id": ["a", "b", "c"], "f1": [1.0, float("nan"), 2.0]})
    pq.write_table(table, tmp_path / "cases.parquet")
    before = db_dump(empty_ws)
    result = run_cli(empty_ws, "cases", "import", tmp_path / "cases.parquet")
    assert_one_line_error(result, "cases.parquet row 2", "finite")  # Parquet: row 2 of the records
    assert db_dump(empty_ws) == before
    (tmp_path / "broken.parquet").write_bytes(b"PAR1 not really")
    assert_one_line_error(run_cli(empty_ws, "cases", "import", tmp_path / "broken.parquet"), "Parquet")
    assert db_dump(empty_ws) == before


def test_missing_file_is_refused(stocked_ws, tmp_path):
    before = db_dump(stocked_ws)
    assert_one_line_error(run_cli(stocked_ws, "truth", "import", tmp_path / "nope.csv"), "nope.csv", "no such file")
    assert db_dump(stocked_ws) == before


BAD_EXPERT_ADDS = [
    ("model", ["model", "1"], ["expert name", "'model'"]),
    ("MODEL", ["MODEL", "1"], ["expert name"]),
    ("slash", ["a/b", "1"], ["expert name", "'a/b'"]),
    ("parent", ["../x", "1"], ["expert name"]),
    ("dotdot", ["..", "1"], ["expert name"]),
    ("control", ["a\x07b", "1"], ["expert name"]),
    ("newline", ["a\nb", "1"], ["expert name"]),
    ("negative-fee", ["carol", "-1"], ["--fee", "minimum"]),
    ("nan-fee", ["carol", "nan"], ["--fee", "finite"]),
    ("inf-fee", ["carol", "inf"], ["--fee", "finite"]),
    ("capacity-above-one", ["carol", "1", "--capacity", "1.01"], ["--capacity", "maximum"]),
    ("capacity-negative", ["carol", "1", "--capacity", "-0.2"], ["--capacity", "minimum"]),
]


@pytest.mark.parametrize("args,fragments", [b[1:] for b in BAD_EXPERT_ADDS], ids=[b[0] for b in BAD_EXPERT_ADDS])
def test_bad_experts_add_is_refused(args, fragments, stocked_ws):
    before = db_dump(stocked_ws)
    name, fee, *rest = args
    result = run_cli(stocked_ws, "experts", "add", name, "--fee", fee, *rest)
    assert_one_line_error(result, *fragments)
    assert db_dump(stocked_ws) == before


def test_non_numeric_fee_option_is_a_usage_error(stocked_ws):
    before = db_dump(stocked_ws)
    result = run_cli(stocked_ws, "experts", "add", "carol", "--fee", "cheap")
    assert result.exit_code == 2  # click.BadParameter: usage error, exit 2 (click's own convention)
    assert "Traceback" not in result.stderr
    assert "'--fee'" in result.stderr.strip().splitlines()[-1]
    assert db_dump(stocked_ws) == before


# --------------------------------------------------------------------------- real processes


def test_exit_codes_in_real_processes(stocked_ws, tmp_path):
    good = tmp_path / "good.csv"
    good.write_text("case_id,expert,answer\nc2,alice,reject\n")
    ok = routeplan_subprocess("--workspace", stocked_ws, "answers", "import", good)
    assert ok.returncode == 0, ok.stderr
    assert "historical: 1" in ok.stdout

    bad = tmp_path / "bad.csv"
    bad.write_text("case_id,expert,answer\nc4,bob,maybe\n")
    before = db_dump(stocked_ws)
    refused = routeplan_subprocess("--workspace", stocked_ws, "answers", "import", bad)
    assert refused.returncode == 2
    assert refused.stderr.strip().count("\n") == 0 and f"{bad} line 2" in refused.stderr
    assert "Traceback" not in refused.stderr
    assert db_dump(stocked_ws) == before

    usage = routeplan_subprocess("--workspace", stocked_ws, "status", "--no-such-option")
    assert usage.returncode == 2  # click's usage errors exit 2 (click.exceptions.UsageError.exit_code)

    env = {**os.environ, "ROUTEPLAN_WORKSPACE": str(stocked_ws)}
    by_env = routeplan_subprocess("status", "--json", env=env)
    assert by_env.returncode == 0 and json.loads(by_env.stdout)["cases"]["total"] == 6


def test_a_damaged_database_is_an_internal_fault_without_traceback(tmp_path):
    folder = tmp_path / "damaged"
    folder.mkdir()
    (folder / "routeplan.sqlite").write_bytes(b"this is not an SQLite file" * 10)
    done = routeplan_subprocess("--workspace", folder, "status")
    assert done.returncode in (1, 2)
    assert "Traceback" not in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1


# --------------------------------------------------------------------------- storage failures


def _storage_limited(monkeypatch, pragma: str) -> None:
    """Open every workspace with ``pragma`` set, so that SQLite itself refuses to write.

    ``max_page_count`` at the current size makes the next new page fail with SQLITE_FULL,
    "database or disk is full", as a full disk does; ``query_only`` makes every write fail
    with SQLITE_READONLY, "attempt to write a readonly database", as a read-only file does
    (sqlite.org, "Pragma statements" and "Result and Error Codes"). Real SQLite errors,
    simulated this way because the tests run as root, where file modes do not stop writes.
    """
    from routeplan.workspace import Workspace

    real = Workspace._connect

    def limited(path):
        db = real(path)
        pages = db.execute("PRAGMA page_count").fetchone()[0]
        db.execute(pragma.format(pages=pages))
        return db

    monkeypatch.setattr(Workspace, "_connect", staticmethod(limited))


_STORAGE_LIMITS = [
    ("PRAGMA max_page_count = {pages}", "database or disk is full"),
    ("PRAGMA query_only = ON", "attempt to write a readonly database"),
]


@pytest.mark.parametrize("pragma, reason", _STORAGE_LIMITS)
def test_a_database_that_cannot_be_written_is_exit_2_and_keeps_the_workspace(stocked_ws, write_file,
                                                                            monkeypatch, pragma, reason):
    # A full disk or a read-only database is the user's to fix (routeplan.errors.OutputError):
    # exit 2 with one line naming the database and SQLite's reason, and the transaction
    # rolled back, so the workspace is exactly as it was (routeplan.workspace docstring).
    from routeplan.workspace import DB_NAME

    rows = "".join(f"n{i:04d},{i * 0.5},{-i * 0.25},\n" for i in range(600))  # far more than one page
    cases = write_file("many.csv", "case_id,f1,f2,truth\n" + rows)
    before = db_dump(stocked_ws)
    _storage_limited(monkeypatch, pragma)
    result = run_cli(stocked_ws, "cases", "import", cases)
    line = assert_one_line_error(result, f"{stocked_ws / DB_NAME}: cannot write the workspace database ({reason})",
                                 "the change was rolled back")
    assert line.startswith("Error: ")
    assert db_dump(stocked_ws) == before


def test_a_storage_failure_with_json_prints_the_json_failure(stocked_ws, monkeypatch):
    # --json failures are JSON on stdout (README, Command reference), storage errors included
    from conftest import assert_json_failure
    from routeplan.workspace import DB_NAME

    before = db_dump(stocked_ws)
    _storage_limited(monkeypatch, "PRAGMA query_only = ON")
    result = run_cli(stocked_ws, "experts", "add", "carol", "--fee", "0.3", "--json")
    assert_json_failure(result, str(stocked_ws / DB_NAME), "attempt to write a readonly database")
    assert db_dump(stocked_ws) == before
