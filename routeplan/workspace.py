"""The workspace: one SQLite file (``routeplan.sqlite``) that holds a project's state.

Only this module builds SQL. It opens the file through :mod:`sqlite_utils`, applies the
schema's forward migrations (``sqlite_utils.migrations.Migrations``), runs every change in one
``BEGIN IMMEDIATE`` transaction (so a change is wholly in or wholly out, and two terminals
wait for each other instead of failing), and appends one row to the ``journal`` for every
command that changed state. The journal refuses updates and deletes (triggers).

Tables (schema version 1):

``label_set``        code, name
``settings``         key, value (JSON)
``cases``            pos, case_id, truth, grp, features (float64 bytes), display (JSON), batch
``feature_columns``  position, name
``experts``          name, fee, capacity, added_at
``rounds``           round_id, created_at, strategy, budget, seed, state, detail (JSON)
``assignments``      assignment_id, round_id, case_id, expert, strategy, selection_prob, audit,
                     fee, state, created_at
``answers``          answer_id, case_id, expert, answer, round_id, assignment_id, source_file,
                     source_sha256, imported_at
``models``           model_id, created_at, kind, params (JSON), metrics (JSON), chosen
``model_arrays``     model_id, name, dtype, shape (JSON), data (bytes)
``policies``         policy_id, created_at, path, sha256, model_id, manifest (JSON)
``journal``          entry_id, at, command, detail (JSON), input_file, input_sha256
"""

from __future__ import annotations

import json
import os
import sqlite3
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Iterator, Mapping, Sequence

import numpy as np
from sqlite_utils import Database
from sqlite_utils.migrations import Migrations

from .errors import InputError, OutputError, WorkspaceExists, WorkspaceMissing

__all__ = ["Workspace", "DB_NAME", "SCHEMA_VERSION", "RESERVED_ROUTE", "SQLITE_SIDECARS", "database_files",
           "refuse_workspace_files"]

DB_NAME = "routeplan.sqlite"
RESERVED_ROUTE = "model"
BUSY_TIMEOUT_S = 60.0
#: Files SQLite keeps beside a database: the write-ahead log, its shared memory, the rollback journal.
SQLITE_SIDECARS = ("-wal", "-shm", "-journal")

migrations = Migrations("routeplan")


@migrations(name="0001_initial")
def _m0001_initial(db: Database) -> None:
    """Create the tables of schema version 1."""
    db.execute("CREATE TABLE label_set (code INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE)")
    db.execute("CREATE TABLE settings (key TEXT PRIMARY KEY, value TEXT NOT NULL)")
    db.execute(
        """CREATE TABLE cases (
            pos INTEGER PRIMARY KEY,
            case_id TEXT NOT NULL UNIQUE,
            truth TEXT REFERENCES label_set(name),
            grp TEXT,
            features BLOB NOT NULL,
            display TEXT,
            batch INTEGER NOT NULL)"""
    )
    db.execute("CREATE TABLE feature_columns (position INTEGER PRIMARY KEY, name TEXT NOT NULL UNIQUE)")
    db.execute(
        """CREATE TABLE experts (
            name TEXT PRIMARY KEY,
            fee REAL NOT NULL CHECK (fee >= 0),
            capacity REAL NOT NULL CHECK (capacity >= 0 AND capacity <= 1),
            added_at TEXT NOT NULL)"""
    )
    db.execute(
        """CREATE TABLE rounds (
            round_id INTEGER PRIMARY KEY,
            created_at TEXT NOT NULL,
            strategy TEXT NOT NULL,
            budget REAL NOT NULL,
            seed INTEGER,
            state TEXT NOT NULL DEFAULT 'open',
            due_at TEXT,
            detail TEXT)"""
    )
    db.execute(
        """CREATE TABLE assignments (
            assignment_id INTEGER PRIMARY KEY,
            round_id INTEGER NOT NULL REFERENCES rounds(round_id),
            case_id TEXT NOT NULL REFERENCES cases(case_id),
            expert TEXT NOT NULL REFERENCES experts(name),
            strategy TEXT NOT NULL,
            selection_prob REAL NOT NULL CHECK (selection_prob > 0 AND selection_prob <= 1),
            audit INTEGER NOT NULL DEFAULT 0,
            fee REAL NOT NULL,
            state TEXT NOT NULL DEFAULT 'open',
            created_at TEXT NOT NULL,
            UNIQUE (case_id, expert))"""
    )
    db.execute(
        """CREATE TABLE answers (
            answer_id INTEGER PRIMARY KEY,
            case_id TEXT NOT NULL REFERENCES cases(case_id),
            expert TEXT NOT NULL REFERENCES experts(name),
            answer TEXT NOT NULL REFERENCES label_set(name),
            round_id INTEGER REFERENCES rounds(round_id),
            assignment_id INTEGER REFERENCES assignments(assignment_id),
            source_file TEXT NOT NULL,
            source_sha256 TEXT NOT NULL,
            imported_at TEXT NOT NULL,
            UNIQUE (case_id, expert))"""
    )
    db.execute("CREATE INDEX answers_expert ON answers(expert)")
    db.execute(
        """CREATE TABLE models (
            model_id INTEGER PRIMARY KEY,
            created_at TEXT NOT NULL,
            kind TEXT NOT NULL,
            params TEXT NOT NULL,
            metrics TEXT,
            chosen INTEGER NOT NULL DEFAULT 0)"""
    )
    db.execute(
        """CREATE TABLE model_arrays (
            model_id INTEGER NOT NULL REFERENCES models(model_id),
            name TEXT NOT NULL,
            dtype TEXT NOT NULL,
            shape TEXT NOT NULL,
            data BLOB NOT NULL,
            PRIMARY KEY (model_id, name))"""
    )
    db.execute(
        """CREATE TABLE policies (
            policy_id INTEGER PRIMARY KEY,
            created_at TEXT NOT NULL,
            path TEXT NOT NULL,
            sha256 TEXT NOT NULL,
            model_id INTEGER REFERENCES models(model_id),
            manifest TEXT NOT NULL)"""
    )
    db.execute(
        """CREATE TABLE journal (
            entry_id INTEGER PRIMARY KEY,
            at TEXT NOT NULL,
            command TEXT NOT NULL,
            detail TEXT NOT NULL,
            input_file TEXT,
            input_sha256 TEXT)"""
    )
    db.execute("CREATE INDEX journal_sha ON journal(command, input_sha256)")
    for action in ("UPDATE", "DELETE"):
        db.execute(
            f"""CREATE TRIGGER journal_no_{action.lower()} BEFORE {action} ON journal
            BEGIN SELECT RAISE(ABORT, 'the journal is append-only'); END"""
        )


@migrations(name="0002_imported_scores")
def _m0002_imported_scores(db: Database) -> None:
    """Class probabilities of the team's own model per case (two-stage learning to defer)."""
    db.execute(
        """CREATE TABLE imported_scores (
            case_id TEXT PRIMARY KEY REFERENCES cases(case_id),
            proba BLOB NOT NULL,
            source_sha256 TEXT NOT NULL,
            imported_at TEXT NOT NULL)"""
    )


SCHEMA_VERSION = len(migrations._migrations)


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


@dataclass
class Workspace:
    """An open workspace.

    Use :meth:`create` or :meth:`open`, not the constructor.

    Attributes
    ----------
    folder : Path
        The workspace folder.
    db : sqlite_utils.Database
        The open database.
    """

    folder: Path
    db: Database

    # ------------------------------------------------------------------ opening

    @staticmethod
    def _connect(path: Path) -> Database:
        conn = sqlite3.connect(str(path), timeout=BUSY_TIMEOUT_S, isolation_level=None)
        conn.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_S * 1000)}")
        conn.execute("PRAGMA foreign_keys = ON")
        return Database(conn, execute_plugins=False)

    @classmethod
    def create(cls, folder: str | Path, labels: Sequence[str], *, error_cost: float = 1.0) -> "Workspace":
        """Create a new workspace in ``folder``.

        Parameters
        ----------
        folder : str or Path
            Created if missing.
        labels : sequence of str
            The label set, in order (codes 0..K-1). At least two, unique.
        error_cost : float, default=1.0
            What one wrong decision costs, in the unit of fees and budgets.

        Returns
        -------
        Workspace

        Raises
        ------
        WorkspaceExists
            If ``folder`` already holds a workspace.
        InputError
            If the labels or the error cost are not valid, or the folder or the database
            cannot be created there (no permission, read-only file system, disk full); the
            half-made database file is removed, and so are the folders ``create`` made for
            it, unless something else has been put in them.
        """
        labels = _check_labels(labels)
        if not (np.isfinite(error_cost) and error_cost > 0):
            raise InputError(f"--error-cost must be a positive number, not {error_cost!r}")
        folder = Path(folder)
        path = folder / DB_NAME
        if path.exists():
            raise WorkspaceExists(
                f"{path} already exists; routeplan will not overwrite a workspace "
                "(choose another folder with --workspace)"
            )
        tmp = folder / (DB_NAME + ".creating")
        made = _missing_folders(folder)
        try:
            folder.mkdir(parents=True, exist_ok=True)
            tmp.unlink(missing_ok=True)
        except OSError as exc:  # a part of the path is a file, no permission, read-only disk...
            _remove_empty(made)
            raise OutputError.from_os_error(exc, folder, what="create the workspace folder",
                                            hint="choose another folder with --workspace") from None
        db = None
        try:
            db = cls._connect(tmp)
            db.execute("PRAGMA journal_mode = WAL")
            migrations.apply(db)
            ws = cls(folder, db)
            with ws._atomic():  # a storage error is reported below, naming the file being created
                db.conn.executemany("INSERT INTO label_set VALUES (?, ?)", list(enumerate(labels)))
                ws._set("error_cost", float(error_cost))
                ws._set("created_at", _now())
                ws.log("init", {"labels": list(labels), "error_cost": float(error_cost)})
            db.close()
            os.replace(tmp, path)
        except BaseException as exc:
            _discard(db, tmp)
            _remove_empty(made)
            if not _is_storage_error(exc):
                raise
            raise OutputError.from_os_error(exc, path, what="create the workspace database",
                                            hint="check that the folder is writable and has free space, or "
                                                 "choose another folder with --workspace") from exc
        return cls.open(folder)

    @classmethod
    def open(cls, folder: str | Path) -> "Workspace":
        """Open the workspace in ``folder``, applying pending migrations.

        A workspace on a read-only file system is opened read-only (see
        :func:`_open_unchanging`): reading commands work, writing ones exit 2.

        Raises
        ------
        WorkspaceMissing
            If there is no workspace there.
        InputError
            If the file there is not an SQLite database.
        OutputError
            If SQLite cannot open it, or a pending migration cannot be written (a read-only
            or full disk): the migration is rolled back and the message says so.
        """
        folder = Path(folder)
        path = folder / DB_NAME
        if not path.is_file():
            raise WorkspaceMissing(
                f"no workspace in {folder.resolve()}; run 'routeplan init --labels A,B' there "
                "or point --workspace (or ROUTEPLAN_WORKSPACE) at one"
            )
        db = None
        try:
            db = cls._connect(path)
            db.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()
        except sqlite3.DatabaseError as exc:
            if db is not None:
                db.close()
            if not (_is_storage_error(exc) and _has_sqlite_header(path)):
                raise InputError(f"{path} is not a routeplan workspace ({exc}); restore it from a backup "
                                 "or point --workspace at another folder") from None
            db = _open_unchanging(path, exc)
        try:
            if migrations.pending(db):
                migrations.apply(db)
        except sqlite3.OperationalError as exc:
            if not _is_storage_error(exc):
                raise
            db.close()
            raise OutputError.from_os_error(
                exc, path, what=f"upgrade the workspace database to schema version {SCHEMA_VERSION}",
                hint="the step that failed was rolled back; make the workspace writable (or free space on its disk) "
                     "and run the command again") from exc
        return cls(folder, db)

    def close(self) -> None:
        """Close the database connection."""
        self.db.close()

    def __enter__(self) -> "Workspace":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ transactions and journal

    @contextmanager
    def transaction(self) -> Iterator["Workspace"]:
        """Run the block in one write transaction (``BEGIN IMMEDIATE``): all of it or none.

        If the block (or the ``COMMIT``) fails, the transaction is rolled back and the error
        that stopped it is raised. Should the rollback fail as well, its failure is added to
        that error as a note (:meth:`BaseException.add_note`) rather than raised in its place.

        Raises
        ------
        OutputError
            SQLite could not write the database (a full disk, a read-only file, an I/O
            error): the message names the database and SQLite's reason; the change was
            rolled back, the original error is its ``__cause__``.
        """
        try:
            with self._atomic():
                yield self
        except sqlite3.OperationalError as exc:
            if not _is_storage_error(exc):
                raise
            raise OutputError.from_os_error(
                exc, self.folder / DB_NAME, what="write the workspace database",
                hint="nothing was saved (the change was rolled back); free space on the disk or make the "
                     "workspace writable, then run the command again") from exc

    @contextmanager
    def _atomic(self) -> Iterator["Workspace"]:
        """The transaction of :meth:`transaction`, with SQLite's errors as they are."""
        conn = self.db.conn
        if conn.in_transaction:
            with self.db.atomic():
                yield self
            return
        conn.execute("BEGIN IMMEDIATE")
        try:
            yield self
            conn.execute("COMMIT")
        except BaseException as exc:
            _roll_back(conn, exc)
            raise

    def log(self, command: str, detail: dict, *, input_file: str | None = None, input_sha256: str | None = None) -> None:
        """Append one entry to the journal (call inside :meth:`transaction`)."""
        self.db.conn.execute(
            "INSERT INTO journal (at, command, detail, input_file, input_sha256) VALUES (?, ?, ?, ?, ?)",
            (_now(), command, json.dumps(detail, sort_keys=True), input_file, input_sha256),
        )

    def seen_input(self, command: str, sha256: str) -> bool:
        """True if ``command`` already imported a file with these bytes."""
        return self.input_detail(command, sha256) is not None

    def input_detail(self, command: str, sha256: str) -> dict | None:
        """The journal detail of ``command``'s first import of these bytes (None: never)."""
        row = self.db.execute(
            "SELECT detail FROM journal WHERE command = ? AND input_sha256 = ? ORDER BY entry_id LIMIT 1",
            (command, sha256),
        ).fetchone()
        return None if row is None else json.loads(row[0] or "{}")

    def journal(self, limit: int | None = None) -> list[dict]:
        """Journal entries, newest first."""
        sql = "SELECT * FROM journal ORDER BY entry_id DESC" + (f" LIMIT {int(limit)}" if limit else "")
        return [dict(r) for r in self._rows(sql)]

    # ------------------------------------------------------------------ settings and labels

    def _set(self, key: str, value: Any) -> None:
        self.db.conn.execute("INSERT OR REPLACE INTO settings VALUES (?, ?)", (key, json.dumps(value)))

    def setting(self, key: str, default: Any = None) -> Any:
        """A stored setting (JSON value), or ``default``."""
        row = self.db.execute("SELECT value FROM settings WHERE key = ?", (key,)).fetchone()
        return default if row is None else json.loads(row[0])

    @property
    def labels(self) -> list[str]:
        """The label set in code order."""
        return [r[0] for r in self.db.execute("SELECT name FROM label_set ORDER BY code")]

    @property
    def error_cost(self) -> float:
        """What one wrong decision costs, in fee units."""
        return float(self.setting("error_cost", 1.0))

    @property
    def schema_version(self) -> int:
        """How many schema migrations have been applied."""
        return len(migrations.applied(self.db))

    # ------------------------------------------------------------------ cases and truth

    @property
    def feature_columns(self) -> list[str]:
        """Feature column names, fixed by the first cases import (empty before it)."""
        return [r[0] for r in self.db.execute("SELECT name FROM feature_columns ORDER BY position")]

    def set_feature_columns(self, names: Sequence[str]) -> None:
        """Record the feature columns (first cases import only)."""
        self.db.conn.executemany("INSERT INTO feature_columns VALUES (?, ?)", list(enumerate(names)))

    def existing_case_ids(self, case_ids: Iterable[str]) -> set[str]:
        """The subset of ``case_ids`` already stored."""
        return self._existing("cases", "case_id", case_ids)

    def add_cases(self, rows: Iterable[tuple]) -> int:
        """Insert cases: tuples (case_id, truth, grp, features_bytes, display_json, batch)."""
        cursor = self.db.conn.executemany(
            "INSERT INTO cases (case_id, truth, grp, features, display, batch) VALUES (?, ?, ?, ?, ?, ?)", rows
        )
        return cursor.rowcount

    def next_batch(self) -> int:
        """Number for the next cases import."""
        row = self.db.execute("SELECT COALESCE(MAX(batch), 0) + 1 FROM cases").fetchone()
        return int(row[0])

    def stored_truth(self, case_ids: Sequence[str]) -> dict[str, str | None]:
        """Stored truth of the given cases (None where unknown); unknown cases are left out."""
        return self._lookup("SELECT case_id, truth FROM cases WHERE case_id IN ({})", case_ids)

    def set_truth(self, pairs: Iterable[tuple[str, str]]) -> int:
        """Set truth for (case_id, label) pairs."""
        cursor = self.db.conn.executemany(
            "UPDATE cases SET truth = ? WHERE case_id = ?", ((t, c) for c, t in pairs)
        )
        return cursor.rowcount

    def set_scores(self, rows: Sequence[tuple[str, bytes]], *, source_sha256: str) -> int:
        """Store (case_id, float64 probabilities in label order) pairs, replacing earlier ones."""
        now = _now()
        cursor = self.db.conn.executemany(
            "INSERT OR REPLACE INTO imported_scores (case_id, proba, source_sha256, imported_at) VALUES (?, ?, ?, ?)",
            ((c, blob, source_sha256, now) for c, blob in rows),
        )
        return cursor.rowcount

    def score_matrix(self, case_ids: Sequence[str]) -> np.ndarray:
        """Imported class probabilities of ``case_ids``, shape (n, K); NaN rows where none."""
        K = len(self.labels)
        out = np.full((len(case_ids), K), np.nan)
        where = {c: i for i, c in enumerate(case_ids)}
        for case_id, blob in self.db.execute("SELECT case_id, proba FROM imported_scores").fetchall():
            i = where.get(case_id)
            if i is not None:
                out[i] = np.frombuffer(blob, dtype="<f8", count=K)
        return out

    def case_frame(self, *, with_features: bool = True):
        """All cases as a DataFrame (case_id, truth, group) and, optionally, the float64 feature matrix.

        Returns
        -------
        frame : pandas.DataFrame
        X : ndarray of shape (n_cases, n_features) or None
        """
        import pandas as pd

        cols = "case_id, truth, grp" + (", features" if with_features else "")
        rows = self.db.execute(f"SELECT {cols} FROM cases ORDER BY pos").fetchall()
        frame = pd.DataFrame([r[:3] for r in rows], columns=["case_id", "truth", "group"])
        X = None
        if with_features:
            d = len(self.feature_columns)
            X = np.frombuffer(b"".join(r[3] for r in rows), dtype="<f8").reshape(len(rows), d)
        return frame, X

    # ------------------------------------------------------------------ experts

    def experts(self) -> list[dict]:
        """Experts as dicts (name, fee, capacity, added_at), in the order they were added."""
        return [dict(r) for r in self._rows("SELECT name, fee, capacity, added_at FROM experts ORDER BY rowid")]

    def upsert_experts(self, rows: Sequence[tuple[str, float | None, float | None]]) -> tuple[int, int]:
        """Add experts or update fee and capacity; returns (added, updated).

        A fee or capacity of None keeps the expert's own (a new expert's capacity is then
        1; a new expert needs a fee).
        """
        known = {e["name"]: e for e in self.experts()}
        added = updated = 0
        for name, fee, capacity in rows:
            if name not in known and fee is None:
                raise InputError(f"expert {name!r} is new: give its fee")
            if name in known:
                fee = known[name]["fee"] if fee is None else fee
                capacity = known[name]["capacity"] if capacity is None else capacity
                if (known[name]["fee"], known[name]["capacity"]) != (fee, capacity):
                    self.db.conn.execute(
                        "UPDATE experts SET fee = ?, capacity = ? WHERE name = ?", (fee, capacity, name)
                    )
                    updated += 1
            else:
                capacity = 1.0 if capacity is None else capacity
                self.db.conn.execute("INSERT INTO experts VALUES (?, ?, ?, ?)", (name, fee, capacity, _now()))
                added += 1
        return added, updated

    # ------------------------------------------------------------------ answers and assignments

    def stored_answers(self, keys: Sequence[tuple[str, str]]) -> dict[tuple[str, str], str]:
        """Stored answers for (case_id, expert) keys."""
        return self._pair_lookup("answers", "answer", keys)

    def open_assignments(self, keys: Sequence[tuple[str, str]]) -> dict[tuple[str, str], tuple[int, int]]:
        """Assignments for (case_id, expert) keys: (assignment_id, round_id)."""
        found: dict[tuple[str, str], tuple[int, int]] = {}
        self._with_keys(keys)
        for c, e, a, r in self.db.execute(
            "SELECT a.case_id, a.expert, a.assignment_id, a.round_id FROM assignments a "
            "JOIN temp.keys k ON k.case_id = a.case_id AND k.expert = a.expert"
        ):
            found[(c, e)] = (a, r)
        return found

    def add_answers(self, rows: Sequence[tuple], *, source_file: str, source_sha256: str) -> int:
        """Insert answers: tuples (case_id, expert, answer, round_id, assignment_id)."""
        at = _now()
        self.db.conn.executemany(
            "INSERT INTO answers (case_id, expert, answer, round_id, assignment_id, source_file, "
            "source_sha256, imported_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            [(*r, source_file, source_sha256, at) for r in rows],
        )
        linked = [r[4] for r in rows if r[4] is not None]
        self.db.conn.executemany(
            "UPDATE assignments SET state = 'answered' WHERE assignment_id = ?", [(a,) for a in linked]
        )
        return len(rows)

    def answer_frame(self):
        """All answers with their assignment's selection probability and audit flag.

        Returns
        -------
        pandas.DataFrame
            Columns case_id, expert, answer, round_id, selection_prob (NaN for historical
            answers), audit (bool).
        """
        import pandas as pd

        rows = self.db.execute(
            "SELECT n.case_id, n.expert, n.answer, n.round_id, a.selection_prob, COALESCE(a.audit, 0) "
            "FROM answers n LEFT JOIN assignments a ON a.assignment_id = n.assignment_id ORDER BY n.answer_id"
        ).fetchall()
        frame = pd.DataFrame(rows, columns=["case_id", "expert", "answer", "round_id", "selection_prob", "audit"])
        frame["selection_prob"] = frame["selection_prob"].astype(float)
        frame["audit"] = frame["audit"].astype(bool)
        return frame

    # ------------------------------------------------------------------ models

    def add_model(self, kind: str, params: dict, metrics: dict, arrays: dict[str, np.ndarray], *, chosen: bool) -> int:
        """Store a fitted model as named arrays plus JSON (call inside :meth:`transaction`); returns its id."""
        if chosen:
            self.db.conn.execute("UPDATE models SET chosen = 0 WHERE chosen = 1")
        cursor = self.db.conn.execute(
            "INSERT INTO models (created_at, kind, params, metrics, chosen) VALUES (?, ?, ?, ?, ?)",
            (_now(), kind, json.dumps(params, sort_keys=True), json.dumps(metrics, sort_keys=True), int(chosen)),
        )
        model_id = int(cursor.lastrowid)
        self.db.conn.executemany(
            "INSERT INTO model_arrays VALUES (?, ?, ?, ?, ?)",
            [(model_id, name, str(a.dtype), json.dumps(list(a.shape)), np.ascontiguousarray(a).tobytes())
             for name, a in arrays.items()],
        )
        return model_id

    def models(self) -> list[dict]:
        """Stored models (id, created_at, kind, metrics, chosen), newest first."""
        rows = self._rows("SELECT model_id, created_at, kind, metrics, chosen FROM models ORDER BY model_id DESC")
        return [{**dict(r), "metrics": json.loads(r["metrics"] or "{}"), "chosen": bool(r["chosen"])} for r in rows]

    def load_model(self, model_id: int | None = None) -> tuple[int, str, dict, dict, dict[str, np.ndarray]]:
        """A stored model: (id, kind, params, metrics, arrays); default the chosen one.

        Raises
        ------
        NotFitted
            If there is no such model.
        InputError
            If ``model_id`` is not a whole number SQLite's INTEGER can hold (it would overflow).
        """
        from .errors import NotFitted

        whole = isinstance(model_id, (int, np.integer)) and not isinstance(model_id, bool)
        if model_id is not None and not (whole and -(2**63) <= model_id < 2**63):
            raise InputError(f"no model {model_id!r} in this workspace: a model id is a whole number from 1 to "
                             f"{2**63 - 1} (leave --model out for the chosen model)")
        sql = "SELECT model_id, kind, params, metrics FROM models WHERE " + (
            "model_id = ?" if model_id is not None else "chosen = 1 ORDER BY model_id DESC LIMIT 1")
        row = self.db.execute(sql, (model_id,) if model_id is not None else ()).fetchone()
        if row is None:
            stored = self.db.execute("SELECT model_id, kind FROM models ORDER BY model_id").fetchall()
            if model_id is None or not stored:
                raise NotFitted("no fitted model in this workspace; run 'routeplan fit' first")
            shown = (", ".join(f"{i} ({kind})" for i, kind in stored[-8:])
                     + (f"; older: {stored[0][0]} to {stored[-9][0]}" if len(stored) > 8 else ""))
            raise NotFitted(f"no model {model_id} in this workspace; its models are {shown}")
        arrays = {
            name: np.frombuffer(data, dtype=np.dtype(dtype)).reshape(json.loads(shape)).copy()
            for name, dtype, shape, data in self.db.execute(
                "SELECT name, dtype, shape, data FROM model_arrays WHERE model_id = ?", (row[0],))
        }
        return int(row[0]), row[1], json.loads(row[2]), json.loads(row[3] or "{}"), arrays

    # ------------------------------------------------------------------ policies

    def add_policy(self, path: str, sha256: str, model_id: int | None, manifest: dict) -> int:
        """Record a frozen policy file (call inside :meth:`transaction`); returns its id."""
        cursor = self.db.conn.execute(
            "INSERT INTO policies (created_at, path, sha256, model_id, manifest) VALUES (?, ?, ?, ?, ?)",
            (_now(), str(path), sha256, model_id, json.dumps(manifest, sort_keys=True)),
        )
        return int(cursor.lastrowid)

    def policies(self) -> list[dict]:
        """Recorded policies (policy_id, created_at, path, sha256, model_id), newest first."""
        return [dict(r) for r in self._rows(
            "SELECT policy_id, created_at, path, sha256, model_id FROM policies ORDER BY policy_id DESC")]

    # ------------------------------------------------------------------ status

    def status(self) -> dict:
        """A summary of the workspace as plain data (see ``routeplan status``).

        Fees are split by what became of the assignment: ``spent`` counts answered ones only
        (also answers that came after their round closed), ``pending_fees`` those still
        awaiting an answer in an open round, and ``expired_fees`` those left unanswered when
        their round closed, which cost nothing. Each expert and each round has all three.
        """
        q = lambda sql: self.db.execute(sql).fetchall()  # noqa: E731
        n_cases, n_truth = q("SELECT COUNT(*), COUNT(truth) FROM cases")[0]
        per_expert = {r[0]: r[1] for r in q("SELECT expert, COUNT(*) FROM answers GROUP BY expert")}
        historical = {r[0]: r[1] for r in q("SELECT expert, COUNT(*) FROM answers WHERE assignment_id IS NULL GROUP BY expert")}
        fees = self._fees_by_outcome()
        experts = []
        for e in self.experts():
            name = e["name"]
            experts.append(
                {
                    "name": name,
                    "fee": e["fee"],
                    "capacity": e["capacity"],
                    "answers": per_expert.get(name, 0),
                    "historical_answers": historical.get(name, 0),
                    **fees.get(name, {"spent": 0.0, "pending_fees": 0.0, "expired_fees": 0.0}),
                }
            )
        now = _now()
        rounds = []
        for r in q(
            "SELECT r.round_id, r.created_at, r.strategy, r.budget, r.state, r.due_at, COUNT(a.assignment_id), "
            "COALESCE(SUM(a.state = 'answered'), 0), COALESCE(SUM(CASE WHEN a.state = 'answered' THEN a.fee END), 0), "
            "COALESCE(SUM(CASE WHEN a.state != 'answered' THEN a.fee END), 0) FROM rounds r LEFT JOIN assignments a "
            "ON a.round_id = r.round_id GROUP BY r.round_id ORDER BY r.round_id"
        ):
            still_open = r[6] - r[7]
            closed = r[4] != "open"
            overdue = not closed and r[5] is not None and r[5] < now
            rounds.append({
                "round": r[0], "created_at": r[1], "strategy": r[2], "budget": r[3], "state": r[4],
                "due_at": r[5], "assignments": r[6], "answered": r[7], "spent": round(float(r[8]), 9),
                "open": 0 if closed else still_open,
                "overdue": still_open if overdue else 0,
                "expired": still_open if closed else 0,
                "pending_fees": 0.0 if closed else round(float(r[9]), 9),
                "expired_fees": round(float(r[9]), 9) if closed else 0.0,
            })
        return {
            "workspace": str(self.folder.resolve()),
            "schema_version": self.schema_version,
            "labels": self.labels,
            "error_cost": self.error_cost,
            "cases": {"total": n_cases, "with_truth": n_truth, "without_truth": n_cases - n_truth,
                      "with_imported_scores": q("SELECT COUNT(*) FROM imported_scores")[0][0]},
            "feature_columns": self.feature_columns,
            "experts": experts,
            "answers": {"total": sum(per_expert.values()), "historical": sum(historical.values())},
            "rounds": rounds,
            "models": q("SELECT COUNT(*) FROM models")[0][0],
            "policies": q("SELECT COUNT(*) FROM policies")[0][0],
        }

    def _fees_by_outcome(self) -> dict[str, dict[str, float]]:
        """Per expert, the fees of assignments answered (spent), awaiting an answer in an open
        round (pending) and left unanswered when their round closed (expired: not spent)."""
        rows = self.db.execute(
            "SELECT a.expert, "
            "COALESCE(SUM(CASE WHEN a.state = 'answered' THEN a.fee END), 0), "
            "COALESCE(SUM(CASE WHEN a.state != 'answered' AND r.state = 'open' THEN a.fee END), 0), "
            "COALESCE(SUM(CASE WHEN a.state != 'answered' AND r.state != 'open' THEN a.fee END), 0) "
            "FROM assignments a JOIN rounds r ON r.round_id = a.round_id GROUP BY a.expert"
        ).fetchall()
        keys = ("spent", "pending_fees", "expired_fees")
        return {r[0]: {k: round(float(v), 9) for k, v in zip(keys, r[1:])} for r in rows}  # sums: no float noise

    # ------------------------------------------------------------------ rounds (planner)

    def assignment_frame(self):
        """All assignments with their round's state.

        Returns
        -------
        pandas.DataFrame
            Columns assignment_id, round_id, case_id, expert, strategy, selection_prob, audit
            (bool), fee, state (``open`` or ``answered``), round_state.
        """
        import pandas as pd

        rows = self.db.execute(
            "SELECT a.assignment_id, a.round_id, a.case_id, a.expert, a.strategy, a.selection_prob, a.audit, "
            "a.fee, a.state, r.state FROM assignments a JOIN rounds r ON r.round_id = a.round_id "
            "ORDER BY a.assignment_id"
        ).fetchall()
        frame = pd.DataFrame(rows, columns=["assignment_id", "round_id", "case_id", "expert", "strategy",
                                            "selection_prob", "audit", "fee", "state", "round_state"])
        frame["audit"] = frame["audit"].astype(bool)
        return frame

    def add_round(self, *, strategy: str, budget: float, seed: int | None, due_at: str | None, detail: dict) -> int:
        """Insert a round (state ``open``) and return its id (call inside :meth:`transaction`)."""
        cursor = self.db.conn.execute(
            "INSERT INTO rounds (created_at, strategy, budget, seed, state, due_at, detail) "
            "VALUES (?, ?, ?, ?, 'open', ?, ?)",
            (_now(), strategy, float(budget), seed, due_at, json.dumps(detail, sort_keys=True)),
        )
        return int(cursor.lastrowid)

    def add_assignments(self, rows: Sequence[tuple]) -> int:
        """Insert assignments: tuples (round_id, case_id, expert, strategy, selection_prob, audit, fee)."""
        at = _now()
        self.db.conn.executemany(
            "INSERT INTO assignments (round_id, case_id, expert, strategy, selection_prob, audit, fee, state, "
            "created_at) VALUES (?, ?, ?, ?, ?, ?, ?, 'open', ?)",
            [(*r, at) for r in rows],
        )
        return len(rows)

    def round_record(self, round_id: int) -> dict | None:
        """The round's row (detail parsed from JSON), or None if there is no such round."""
        rows = self._rows("SELECT * FROM rounds WHERE round_id = ?", (int(round_id),))
        if not rows:
            return None
        record = dict(rows[0])
        record["detail"] = json.loads(record["detail"]) if record["detail"] else {}
        return record

    def closed_round_ids(self) -> set[int]:
        """Ids of the rounds that are closed."""
        return {int(r[0]) for r in self.db.execute("SELECT round_id FROM rounds WHERE state != 'open'")}

    def round_details(self) -> list[dict]:
        """Every round's id and parsed detail, oldest first."""
        return [{"round_id": int(r["round_id"]), "detail": json.loads(r["detail"]) if r["detail"] else {}}
                for r in self._rows("SELECT round_id, detail FROM rounds ORDER BY round_id")]

    def round_sheet(self, round_id: int) -> list[dict]:
        """A round's assignments with any stored answer: assignment_id, case_id, expert, state, answer."""
        return [
            dict(r)
            for r in self._rows(
                "SELECT a.assignment_id, a.case_id, a.expert, a.state, n.answer FROM assignments a "
                "LEFT JOIN answers n ON n.case_id = a.case_id AND n.expert = a.expert "
                "WHERE a.round_id = ? ORDER BY a.assignment_id",
                (int(round_id),),
            )
        ]

    def case_details(self, case_ids: Sequence[str]) -> dict[str, tuple[bytes, str | None, str | None]]:
        """Feature bytes (float64), display JSON and group of the given cases, keyed by case_id."""
        out: dict[str, tuple[bytes, str | None, str | None]] = {}
        keys = list(case_ids)
        for start in range(0, len(keys), 900):
            chunk = keys[start : start + 900]
            marks = ",".join("?" * len(chunk))
            for case_id, blob, display, group in self.db.execute(
                f"SELECT case_id, features, display, grp FROM cases WHERE case_id IN ({marks})", chunk
            ):
                out[case_id] = (blob, display, group)
        return out

    def sheet_columns(self) -> set[str]:
        """Columns a round's sheet may show besides its own: features, display columns and,
        where some case has one, ``group``."""
        grouped = self.db.execute("SELECT 1 FROM cases WHERE grp IS NOT NULL LIMIT 1").fetchone() is not None
        return set(self.feature_columns) | set(self.display_column_names()) | ({"group"} if grouped else set())

    def set_round_state(self, round_id: int, state: str) -> None:
        """Set a round's state (``open`` or ``closed``; call inside :meth:`transaction`)."""
        self.db.conn.execute("UPDATE rounds SET state = ? WHERE round_id = ?", (state, int(round_id)))

    def display_column_names(self) -> list[str]:
        """Names of the display columns stored with any case, sorted."""
        rows = self.db.execute(
            "SELECT DISTINCT j.key FROM cases c, json_each(c.display) j WHERE c.display IS NOT NULL ORDER BY j.key"
        ).fetchall()
        return [r[0] for r in rows]

    # ------------------------------------------------------------------ helpers

    def _rows(self, sql: str, params: Sequence = ()) -> list[sqlite3.Row]:
        cursor = self.db.conn.cursor()
        cursor.row_factory = sqlite3.Row
        return cursor.execute(sql, params).fetchall()

    def _existing(self, table: str, column: str, values: Iterable[str]) -> set[str]:
        values = list(values)
        found: set[str] = set()
        for start in range(0, len(values), 900):
            chunk = values[start : start + 900]
            marks = ",".join("?" * len(chunk))
            found.update(
                r[0] for r in self.db.execute(f"SELECT {column} FROM {table} WHERE {column} IN ({marks})", chunk)
            )
        return found

    def _lookup(self, sql: str, keys: Sequence[str]) -> dict:
        out: dict = {}
        keys = list(keys)
        for start in range(0, len(keys), 900):
            chunk = keys[start : start + 900]
            out.update(self.db.execute(sql.format(",".join("?" * len(chunk))), chunk).fetchall())
        return out

    def _with_keys(self, keys: Sequence[tuple[str, str]]) -> None:
        self.db.execute("CREATE TEMP TABLE IF NOT EXISTS keys (case_id TEXT, expert TEXT)")
        self.db.execute("DELETE FROM temp.keys")
        self.db.conn.executemany("INSERT INTO temp.keys VALUES (?, ?)", list(keys))

    def _pair_lookup(self, table: str, column: str, keys: Sequence[tuple[str, str]]) -> dict:
        self._with_keys(keys)
        return {
            (c, e): v
            for c, e, v in self.db.execute(
                f"SELECT t.case_id, t.expert, t.{column} FROM {table} t "
                "JOIN temp.keys k ON k.case_id = t.case_id AND k.expert = t.expert"
            )
        }


def _roll_back(conn: sqlite3.Connection, error: BaseException) -> None:
    """Roll back after ``error``; a rollback that fails is noted on ``error``, not raised."""
    if not conn.in_transaction:  # SQLite already ended it (e.g. RAISE(ROLLBACK), a full disk)
        return
    try:
        conn.execute("ROLLBACK")
    except Exception as failure:
        error.add_note(f"The rollback after this error failed too: {type(failure).__name__}: {failure}")


#: SQLite result codes (and their extended forms) that mean the file system refused: the user can
#: fix them by choosing another folder, freeing space or granting permission (sqlite.org, "Result
#: and Error Codes").
_STORAGE_CODES = ("SQLITE_CANTOPEN", "SQLITE_FULL", "SQLITE_IOERR", "SQLITE_READONLY", "SQLITE_PERM")


def _is_storage_error(exc: BaseException) -> bool:
    """True for an OSError, or an SQLite error caused by the file system (not by our SQL).

    An :class:`sqlite3.OperationalError` raised without a result code (not by SQLite itself,
    e.g. by a wrapper) is taken as one too: SQLite's own errors always carry their code.
    """
    if isinstance(exc, OSError):
        return True
    if not isinstance(exc, sqlite3.OperationalError):
        return False
    name = getattr(exc, "sqlite_errorname", None)
    return name is None or name.startswith(_STORAGE_CODES)


def _has_sqlite_header(path: Path) -> bool:
    """True if ``path`` starts with the 16 bytes every SQLite 3 database file starts with
    (sqlite.org, "Database File Format", sec. 1.3).

    Raises
    ------
    OutputError
        The file cannot be read (no permission, an I/O error), naming the system's reason.
    """
    try:
        with open(path, "rb") as fh:
            return fh.read(16) == b"SQLite format 3\x00"
    except OSError as exc:
        raise OutputError.from_os_error(exc, path, what="read the workspace database",
                                        hint="check that you may read the file and its folder") from None


def _open_unchanging(path: Path, first: sqlite3.Error) -> Database:
    """Open a workspace that SQLite could not open the usual way, read-only and unchanging.

    A database in WAL mode needs its ``-shm`` file beside it, which cannot be made on a
    read-only file system (a mounted archive, a read-only share). Opened with the URI
    parameters ``mode=ro&immutable=1`` (sqlite.org, "Uniform Resource Identifiers"), SQLite
    reads it without that file, so reading commands work; every write then fails as on a
    read-only file and :meth:`Workspace.transaction` reports it. Refused when a non-empty
    write-ahead log (or rollback journal) lies beside the database: changes in it would be
    silently ignored, so the workspace must first be opened once where it is writable.

    Raises
    ------
    OutputError
        The log is there, or the read-only open failed as well (``first`` is SQLite's reason).
    """
    logs = [path.with_name(path.name + suffix) for suffix in ("-wal", "-journal")]
    hint = ("open it once where it is writable (SQLite then merges its write-ahead log), "
            "or copy the workspace folder to a writable disk")
    if any(log.is_file() and log.stat().st_size > 0 for log in logs):
        raise OutputError.from_os_error(first, path, what="open the workspace database", hint=hint) from None
    conn = None
    try:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro&immutable=1", uri=True,
                               isolation_level=None)
        conn.execute("PRAGMA foreign_keys = ON")
        conn.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()
    except sqlite3.DatabaseError as exc:
        if conn is not None:
            conn.close()
        raise OutputError.from_os_error(first, path, what="open the workspace database", hint=hint) from exc
    return Database(conn, execute_plugins=False)


def _discard(db: Database | None, tmp: Path) -> None:
    """Close ``db`` if open and remove the half-made database ``tmp`` with its sidecar files."""
    if db is not None:
        with suppress(Exception):
            db.close()
    for name in _with_sidecars(tmp):
        with suppress(OSError):
            name.unlink(missing_ok=True)


def _missing_folders(folder: Path) -> list[Path]:
    """The folders of ``folder``'s path that do not exist yet (what ``mkdir -p`` would make), deepest first."""
    missing = []
    for candidate in (folder, *folder.parents):
        if os.path.lexists(candidate):
            break
        missing.append(candidate)
    return missing


def _remove_empty(folders: Sequence[Path]) -> None:
    """Remove ``folders``, deepest first, while they are empty; stop at the first that is not (or is gone)."""
    for folder in folders:
        try:
            folder.rmdir()  # refuses a folder with anything in it
        except OSError:
            return


def database_files(folder: str | Path) -> list[Path]:
    """The workspace database of ``folder`` and its SQLite sidecar files (which need not exist).

    Parameters
    ----------
    folder : str or Path
        A workspace folder.

    Returns
    -------
    list of Path
        ``folder/routeplan.sqlite`` first, then its ``-wal``, ``-shm`` and ``-journal`` files.
    """
    return _with_sidecars(Path(folder) / DB_NAME)


def _with_sidecars(path: Path) -> list[Path]:
    """``path`` and the SQLite sidecar files beside it (``-wal``, ``-shm``, ``-journal``)."""
    return [path] + [path.with_name(path.name + suffix) for suffix in SQLITE_SIDECARS]


def refuse_workspace_files(outputs: Mapping[str, str | Path | None], folder: str | Path | None = None) -> None:
    """Refuse output paths that would overwrite a workspace database or one of its sidecars.

    A path is refused when, after following links, it names ``routeplan.sqlite`` or one of
    its ``-wal``, ``-shm`` or ``-journal`` files in a folder that holds a workspace, or when it
    is the same file as one of the files of the workspace in ``folder`` (a hard link, or a
    name that differs only in case on a case-insensitive file system). Writing over any of
    them would damage the workspace (common practice: SQLite's "How To Corrupt An SQLite
    Database File" names overwriting the database or deleting its journal).

    Parameters
    ----------
    outputs : mapping of str to path or None
        Each output's option (e.g. ``"--csv"``), for the message, and its path; None is skipped.
    folder : str or Path, optional
        The workspace folder of the command (``--workspace``), if it has one.

    Raises
    ------
    InputError
        Naming the option and the path.
    """
    for option, path in outputs.items():
        if path is not None and _is_workspace_file(Path(path), folder):
            raise InputError(f"{option} would overwrite the workspace database (or one of its -wal, -shm or "
                             "-journal files); choose another file", source=str(path))


def _is_workspace_file(path: Path, folder: str | Path | None) -> bool:
    """True if ``path`` is a workspace database or sidecar (see :func:`refuse_workspace_files`)."""
    try:
        target = path.resolve()
    except (OSError, RuntimeError):  # a link loop: not ours to judge here
        return False
    names = {p.name for p in database_files(".")}
    if target.name in names and (target.parent / DB_NAME).is_file():
        return True
    if folder is None or not target.exists():
        return False
    for protected in database_files(folder):  # the same file under another name (hard link, letter case)
        try:
            if os.path.samefile(protected, target):
                return True
        except OSError:  # that file does not exist
            continue
    return False


def _check_labels(labels: Sequence[str]) -> list[str]:
    labels = [str(label).strip() for label in labels]
    if len(labels) < 2:
        raise InputError("--labels needs at least two labels, separated by commas (e.g. --labels first,second)")
    if len(set(labels)) != len(labels):
        raise InputError(f"--labels repeats a label: {','.join(labels)}")
    folded: dict[str, str] = {}
    for label in labels:  # labels match exactly, so 'A' and 'a' would look alike in a sheet yet differ
        if label.casefold() in folded:
            raise InputError(f"--labels has {folded[label.casefold()]!r} and {label!r}, which differ only in "
                             "letter case; labels match exactly, so give them distinct names")
        folded[label.casefold()] = label
    for label in labels:
        if not label or any(ord(ch) < 32 for ch in label) or "," in label:
            raise InputError(f"--labels has an empty or unprintable label: {label!r}")
    return labels
