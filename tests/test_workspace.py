"""The SQLite workspace: creation, refusal to overwrite, transactions, the append-only journal.

Database facts are checked through Python's own :mod:`sqlite3` (the reference client), not
through routeplan.
"""

from __future__ import annotations

import hashlib
import sqlite3

import numpy as np
import pytest

from conftest import db_dump, query, run_cli
from routeplan.errors import InputError, WorkspaceExists, WorkspaceMissing
from routeplan.workspace import DB_NAME, SCHEMA_VERSION, Workspace


def test_create_then_open(tmp_path):
    with Workspace.create(tmp_path / "w", ["yes", "no"], error_cost=3.0) as ws:
        assert ws.labels == ["yes", "no"]
        assert ws.error_cost == 3.0
        assert ws.schema_version == SCHEMA_VERSION
        assert ws.feature_columns == []
    assert sorted(p.name for p in (tmp_path / "w").iterdir()) == [DB_NAME]  # no temporary file left
    with Workspace.open(tmp_path / "w") as ws:
        assert ws.labels == ["yes", "no"]
        assert [e["command"] for e in ws.journal()] == ["init"]
    # sqlite3 reports WAL journalling (chosen so readers never block the writer)
    assert query(tmp_path / "w", "PRAGMA journal_mode")[0][0] == "wal"


def test_create_refuses_to_overwrite(stocked_ws):
    before = db_dump(stocked_ws)
    with pytest.raises(WorkspaceExists, match="already exists"):
        Workspace.create(stocked_ws, ["a", "b"])
    assert db_dump(stocked_ws) == before


def test_open_without_workspace(tmp_path):
    with pytest.raises(WorkspaceMissing, match="routeplan init"):
        Workspace.open(tmp_path)


@pytest.mark.parametrize("labels", [["one"], ["a", "a"], ["a", ""], ["a", "b\x01"]])
def test_create_refuses_bad_labels(tmp_path, labels):
    with pytest.raises(InputError):
        Workspace.create(tmp_path / "w", labels)
    assert not (tmp_path / "w" / DB_NAME).exists()


def test_create_refuses_labels_that_differ_only_in_letter_case(tmp_path):
    # answers and truth must match a label exactly (ingest._check_labels_in_set), so 'A' and 'a'
    # would be two labels that a spreadsheet reader cannot tell apart (common practice)
    with pytest.raises(InputError, match="'Yes' and 'yes'.*letter case"):
        Workspace.create(tmp_path / "w", ["Yes", "no", "yes"])
    assert not (tmp_path / "w").exists()


@pytest.mark.parametrize("under", ["file.txt/ws", "file.txt"])
def test_create_where_a_file_blocks_the_folder_is_an_input_error(tmp_path, under):
    # POSIX mkdir fails with ENOTDIR when a path component is a regular file and with EEXIST when
    # the path itself is one (POSIX.1-2017, mkdir(); Python raises them as OSError subclasses)
    (tmp_path / "file.txt").write_text("not a folder")
    with pytest.raises(InputError) as caught:
        Workspace.create(tmp_path / under, ["a", "b"])
    assert str(tmp_path / under) in str(caught.value)
    assert "cannot create the workspace folder" in str(caught.value)
    assert (tmp_path / "file.txt").read_text() == "not a folder"


@pytest.mark.parametrize("cost", [0.0, -1.0, float("nan"), float("inf")])
def test_create_refuses_bad_error_cost(tmp_path, cost):
    with pytest.raises(InputError, match="--error-cost"):
        Workspace.create(tmp_path / "w", ["a", "b"], error_cost=cost)


def test_reopening_changes_nothing(stocked_ws):
    before = db_dump(stocked_ws)
    Workspace.open(stocked_ws).close()
    assert db_dump(stocked_ws) == before


@pytest.mark.parametrize(
    "sql",
    ["UPDATE journal SET command = 'forged'", "DELETE FROM journal", "UPDATE journal SET detail = '{}' WHERE entry_id = 1"],
)
def test_journal_refuses_update_and_delete(stocked_ws, sql):
    before = db_dump(stocked_ws)
    conn = sqlite3.connect(stocked_ws / DB_NAME)
    try:
        with pytest.raises(sqlite3.DatabaseError, match="append-only"):
            conn.execute(sql)
        conn.rollback()
    finally:
        conn.close()
    assert db_dump(stocked_ws) == before


def test_journal_accepts_appends(stocked_ws):
    n = query(stocked_ws, "SELECT COUNT(*) FROM journal")[0][0]
    with Workspace.open(stocked_ws) as ws, ws.transaction():
        ws.log("probe", {"k": 1})
    assert query(stocked_ws, "SELECT COUNT(*) FROM journal")[0][0] == n + 1


def test_journal_records_each_import_with_the_file_digest(empty_ws, write_file):
    path = write_file("cases.csv", "case_id,f1\na,1\nb,2\n")
    assert run_cli(empty_ws, "cases", "import", path).exit_code == 0
    rows = query(empty_ws, "SELECT command, input_file, input_sha256 FROM journal ORDER BY entry_id")
    # the digest agrees with hashlib's sha256 of the file's bytes (reference implementation)
    assert rows[-1] == ("cases import", str(path), hashlib.sha256(path.read_bytes()).hexdigest())
    assert [r[0] for r in rows] == ["init", "cases import"]


def test_transaction_is_all_or_nothing(stocked_ws):
    before = db_dump(stocked_ws)
    with Workspace.open(stocked_ws) as ws:
        with pytest.raises(RuntimeError):
            with ws.transaction():
                ws.upsert_experts([("zed", 1.0, 0.5)])
                ws.log("experts add", {"experts": [["zed", 1.0, 0.5]]})
                raise RuntimeError("stop half way")
        assert "zed" not in {e["name"] for e in ws.experts()}
    assert db_dump(stocked_ws) == before


def test_database_constraints_back_up_the_importers(stocked_ws):
    """Foreign keys and CHECK constraints refuse rows the importers should never send."""
    with Workspace.open(stocked_ws) as ws:
        conn = ws.db.conn
        with pytest.raises(sqlite3.IntegrityError):
            conn.execute("INSERT INTO experts VALUES ('neg', -1, 0.5, 'now')")
        with pytest.raises(sqlite3.IntegrityError):
            conn.execute("INSERT INTO experts VALUES ('big', 1, 1.5, 'now')")
        with pytest.raises(sqlite3.IntegrityError):  # foreign key: no such case
            conn.execute(
                "INSERT INTO answers (case_id, expert, answer, source_file, source_sha256, imported_at) "
                "VALUES ('nope', 'alice', 'accept', 'f', 's', 'now')"
            )
        with pytest.raises(sqlite3.IntegrityError):  # foreign key: label outside the set
            conn.execute(
                "INSERT INTO answers (case_id, expert, answer, source_file, source_sha256, imported_at) "
                "VALUES ('c2', 'alice', 'maybe', 'f', 's', 'now')"
            )


def test_case_frame_returns_the_stored_features(stocked_ws):
    with Workspace.open(stocked_ws) as ws:
        frame, X = ws.case_frame()
    assert frame["case_id"].tolist() == ["c1", "c2", "c3", "c4", "c5", "c6"]
    assert X.dtype == np.float64 and X.shape == (6, 2)
    np.testing.assert_array_equal(X[:, 0], [0.5, 1.0, 2.5, -1.0, 0.0, 4.0])  # the values in conftest.CASES_CSV


def test_seen_input_and_answer_frame(stocked_ws):
    with Workspace.open(stocked_ws) as ws:
        sha = query(stocked_ws, "SELECT input_sha256 FROM journal WHERE command = 'answers import'")[0][0]
        assert ws.seen_input("answers import", sha)
        assert not ws.seen_input("truth import", sha)
        answers = ws.answer_frame()
    assert len(answers) == 2
    assert answers["selection_prob"].isna().all()  # historical answers carry no selection probability
    assert not answers["audit"].any()


def test_a_schema_1_workspace_is_migrated_forward(stocked_ws):
    # a workspace written before the imported-scores table existed (schema 1) opens with it
    # added and nothing else changed; checked through sqlite3 (the reference client)
    conn = sqlite3.connect(stocked_ws / DB_NAME)
    conn.execute("DROP TABLE imported_scores")
    conn.execute("DELETE FROM _sqlite_migrations WHERE name = '0002_imported_scores'")
    conn.commit()
    conn.close()
    cases_before = query(stocked_ws, "SELECT * FROM cases")
    with Workspace.open(stocked_ws) as ws:
        assert ws.schema_version == SCHEMA_VERSION == 2
        assert np.isnan(ws.score_matrix(["c1"])).all()
    tables = {r[0] for r in query(stocked_ws, "SELECT name FROM sqlite_master WHERE type = 'table'")}
    assert "imported_scores" in tables
    assert query(stocked_ws, "SELECT * FROM cases") == cases_before


def test_refuse_workspace_files_guards_the_database_and_its_sidecars(tmp_path):
    # Overwriting an SQLite database or its journal damages it (common practice: sqlite.org,
    # "How To Corrupt An SQLite Database File"); other names, and folders without a
    # workspace, are left alone.
    import os

    from routeplan.workspace import SQLITE_SIDECARS, refuse_workspace_files

    refuse_workspace_files({"--out": tmp_path / DB_NAME}, tmp_path)  # no workspace there yet
    Workspace.create(tmp_path / "ws", ["a", "b"]).close()
    folder = tmp_path / "ws"
    for name in [DB_NAME] + [DB_NAME + s for s in SQLITE_SIDECARS]:
        with pytest.raises(InputError, match="--csv would overwrite the workspace database"):
            refuse_workspace_files({"--csv": folder / name, "--plot": None})
    os.link(folder / DB_NAME, tmp_path / "copy.csv")
    refuse_workspace_files({"--csv": tmp_path / "copy.csv"})  # a hard link is found only with the folder
    with pytest.raises(InputError, match="copy.csv: --csv would overwrite"):
        refuse_workspace_files({"--csv": tmp_path / "copy.csv"}, folder)
    refuse_workspace_files({"--csv": folder / "table.csv", "--plot": folder / "routeplan.png"}, folder)


class _RollbackFails:
    """A connection whose ROLLBACK fails (a disk gone, a lost lock), for Workspace.transaction."""

    def __init__(self) -> None:
        self.in_transaction = False

    def execute(self, sql: str):
        if sql == "ROLLBACK":
            raise sqlite3.OperationalError("disk I/O error")
        self.in_transaction = sql.startswith("BEGIN")
        return None


def test_a_failing_rollback_does_not_hide_the_original_error(tmp_path):
    # The error that stopped the block is what the caller must see; the rollback's own failure
    # is added as a note (PEP 678, Python 3.11), not raised in its place.
    from types import SimpleNamespace

    ws = Workspace(tmp_path, SimpleNamespace(conn=_RollbackFails()))
    with pytest.raises(InputError, match="bad row") as caught:
        with ws.transaction():
            raise InputError("bad row")
    notes = getattr(caught.value, "__notes__", [])
    assert any("rollback" in note and "disk I/O error" in note for note in notes), notes


def test_a_transaction_that_sqlite_already_rolled_back_keeps_its_error(stocked_ws):
    # SQLite ends the transaction itself on some errors (RAISE(ROLLBACK) in a trigger; sqlite.org,
    # "CREATE TRIGGER"); a second ROLLBACK then fails with "no transaction is active" and must
    # not take the place of the first error.
    before = db_dump(stocked_ws)
    with Workspace.open(stocked_ws) as ws:
        ws.db.conn.execute("CREATE TEMP TRIGGER stop BEFORE INSERT ON experts "
                           "BEGIN SELECT RAISE(ROLLBACK, 'stopped by trigger'); END")
        with pytest.raises(sqlite3.IntegrityError, match="stopped by trigger"):
            with ws.transaction():
                ws.upsert_experts([("zed", 1.0, 0.5)])
        assert not ws.db.conn.in_transaction
    assert db_dump(stocked_ws) == before


def _connect_fails(path):
    """Stand-in for Workspace._connect in a folder SQLite cannot write: the file half made."""
    path.write_bytes(b"")  # SQLite may leave the file it began to create
    raise sqlite3.OperationalError("unable to open database file")


def test_create_where_sqlite_cannot_write_is_an_input_error(tmp_path, monkeypatch):
    # SQLite's "unable to open database file" (SQLITE_CANTOPEN, sqlite.org result codes) in a
    # folder that exists but cannot be written; simulated because the tests run as root, where
    # file modes do not stop writes. Bad input, naming the path; no half-made file stays.
    folder = tmp_path / "w"
    folder.mkdir()
    monkeypatch.setattr(Workspace, "_connect", staticmethod(_connect_fails))
    with pytest.raises(InputError) as caught:
        Workspace.create(folder, ["a", "b"])
    assert str(caught.value).startswith(f"{folder / DB_NAME}: cannot create the workspace database "
                                        "(unable to open database file)")
    assert list(folder.iterdir()) == []


def test_create_on_a_full_disk_removes_the_half_made_database(tmp_path, monkeypatch):
    # SQLITE_FULL, "database or disk is full" (sqlite.org result codes), raised by the schema's
    # first write after the file and its write-ahead log exist
    import routeplan.workspace

    def full(db):
        db.execute("CREATE TABLE scratch (x)")  # the file and its -wal are on disk now
        error = sqlite3.OperationalError("database or disk is full")
        error.sqlite_errorcode, error.sqlite_errorname = sqlite3.SQLITE_FULL, "SQLITE_FULL"
        raise error

    monkeypatch.setattr(routeplan.workspace.migrations, "apply", full)
    with pytest.raises(InputError, match="cannot create the workspace database \\(database or disk is full\\)"):
        Workspace.create(tmp_path / "w", ["a", "b"])
    assert list(tmp_path.iterdir()) == []  # the folder create made is gone too


def test_init_where_sqlite_cannot_write_is_exit_2(tmp_path, monkeypatch):
    # the same through the command line: exit 2 and one line (routeplan.cli docstring)
    from conftest import assert_one_line_error

    monkeypatch.setattr(Workspace, "_connect", staticmethod(_connect_fails))
    result = run_cli(tmp_path, "init", "--labels", "a,b")
    assert_one_line_error(result, str(tmp_path / DB_NAME), "unable to open database file")
    assert list(tmp_path.iterdir()) == []


def test_init_removes_the_folders_it_made_when_the_database_fails(tmp_path, monkeypatch):
    # A failed command leaves the disk as it found it (routeplan.cli docstring: "the workspace is
    # left as it was"); init made both folders of the path, so it removes both, deepest first.
    from conftest import assert_one_line_error

    folder = tmp_path / "new" / "deeper"
    monkeypatch.setattr(Workspace, "_connect", staticmethod(_connect_fails))
    result = run_cli(folder, "init", "--labels", "a,b")
    assert_one_line_error(result, str(folder / DB_NAME), "unable to open database file")
    assert list(tmp_path.iterdir()) == []


def test_create_keeps_a_folder_that_was_there_before(tmp_path, monkeypatch):
    # Only what create made is removed (common practice: clean up your own files, never the
    # user's); an empty folder the user made stays, and so does its parent.
    folder = tmp_path / "mine"
    folder.mkdir()
    monkeypatch.setattr(Workspace, "_connect", staticmethod(_connect_fails))
    with pytest.raises(InputError, match="cannot create the workspace database"):
        Workspace.create(folder / "made", ["a", "b"])
    assert folder.is_dir() and list(folder.iterdir()) == []


def test_create_keeps_a_folder_it_made_once_other_files_are_in_it(tmp_path, monkeypatch):
    # Another program wrote into the new folder while create ran: the folder and that file stay
    # (common practice: never delete what you did not write).
    folder = tmp_path / "new"

    def other_file_then_fail(path):
        (path.parent / "notes.txt").write_text("not routeplan's", encoding="utf-8")
        _connect_fails(path)

    monkeypatch.setattr(Workspace, "_connect", staticmethod(other_file_then_fail))
    with pytest.raises(InputError, match="cannot create the workspace database"):
        Workspace.create(folder, ["a", "b"])
    assert [p.name for p in folder.iterdir()] == ["notes.txt"]
