"""A workspace that cannot be written: schema upgrades that fail, read-only file systems.

SQLite's own errors are the reference (sqlite.org, "Result and Error Codes"). The read-only
file system is a real one: a read-only bind mount in a private mount namespace
(``unshare``, util-linux), skipped where the machine does not allow that; the tests run as
root, where file modes do not stop writes.
"""

from __future__ import annotations

import shlex
import shutil
import sqlite3
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from conftest import assert_one_line_error, db_dump, run_cli
from routeplan.workspace import DB_NAME, SCHEMA_VERSION


def _make_schema_1(folder: Path) -> None:
    """Turn a workspace back into schema 1 (before the imported-scores table)."""
    conn = sqlite3.connect(folder / DB_NAME)
    conn.execute("DROP TABLE imported_scores")
    conn.execute("DELETE FROM _sqlite_migrations WHERE name = '0002_imported_scores'")
    conn.commit()
    conn.execute("VACUUM")  # no free pages left, so the migration's new table needs a new one
    conn.close()


@pytest.mark.parametrize("pragma, reason", [
    ("PRAGMA query_only = ON", "attempt to write a readonly database"),
    ("PRAGMA max_page_count = {pages}", "database or disk is full"),
])
def test_a_migration_that_cannot_be_written_is_exit_2_and_changes_nothing(stocked_ws, monkeypatch,
                                                                          pragma, reason):
    # Opening an older workspace applies its pending migrations; on a read-only or full
    # database that write fails with SQLITE_READONLY or SQLITE_FULL (simulated with the
    # pragmas, as in test_cli_import). The user can fix that: exit 2 naming the database,
    # the schema version and SQLite's reason, and the migration rolled back.
    from test_cli_import import _storage_limited

    _make_schema_1(stocked_ws)
    before = db_dump(stocked_ws)
    _storage_limited(monkeypatch, pragma)
    result = run_cli(stocked_ws, "status")
    assert_one_line_error(result, f"{stocked_ws / DB_NAME}: cannot upgrade the workspace database to schema "
                                  f"version {SCHEMA_VERSION} ({reason})", "rolled back")
    assert db_dump(stocked_ws) == before


def _read_only_mount_works() -> bool:
    """Can this machine make a private read-only bind mount (unshare -r -m)?"""
    if shutil.which("unshare") is None or shutil.which("mount") is None:
        return False
    with tempfile.TemporaryDirectory() as folder:
        probe = subprocess.run(["unshare", "-r", "-m", "sh", "-c", _read_only(folder) + " && ! touch "
                                + shlex.quote(str(Path(folder) / "probe"))], capture_output=True)
    return probe.returncode == 0


def _read_only(folder: Path | str) -> str:
    """Shell commands that mount ``folder`` over itself, read-only (in the caller's namespace)."""
    q = shlex.quote(str(folder))
    return f"mount --bind {q} {q} && mount -o remount,ro,bind {q}"


needs_read_only_mount = pytest.mark.skipif(not _read_only_mount_works(),
                                           reason="no private read-only bind mount on this machine")


def _run_read_only(folder: Path, *args: str) -> subprocess.CompletedProcess:
    """``routeplan --workspace FOLDER ARGS`` with FOLDER mounted read-only for that run only."""
    command = shlex.join([sys.executable, "-m", "routeplan", "--workspace", str(folder), *args])
    script = f"{_read_only(folder)} && exec {command}"
    return subprocess.run(["unshare", "-r", "-m", "sh", "-c", script], capture_output=True, text=True,
                          timeout=120)


@needs_read_only_mount
def test_a_workspace_on_a_read_only_file_system_can_be_read(stocked_ws):
    # A WAL database needs its -shm file, which a read-only file system cannot hold, so
    # SQLite's usual open fails with SQLITE_CANTOPEN (sqlite.org, "Write-Ahead Logging",
    # sec. 8). routeplan then opens it read-only and unchanging: reading commands work.
    import json

    done = _run_read_only(stocked_ws, "status", "--json")
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout)["cases"]["total"] == 6  # conftest.CASES_CSV has 6 cases
    done = _run_read_only(stocked_ws, "competence", "--json")
    assert done.returncode == 0, done.stderr
    assert json.loads(done.stdout) == json.loads(run_cli(stocked_ws, "competence", "--json").stdout)


@needs_read_only_mount
def test_writing_to_a_workspace_on_a_read_only_file_system_is_exit_2(stocked_ws):
    before = db_dump(stocked_ws)
    done = _run_read_only(stocked_ws, "experts", "add", "carol", "--fee", "0.3")
    assert done.returncode == 2, (done.stdout, done.stderr)
    assert "cannot write the workspace database (attempt to write a readonly database)" in done.stderr
    assert "Traceback" not in done.stderr
    assert db_dump(stocked_ws) == before


@needs_read_only_mount
def test_a_read_only_workspace_with_a_pending_log_is_refused(stocked_ws, tmp_path):
    # Changes still in the write-ahead log would be ignored by an unchanging open (sqlite.org,
    # "Uniform Resource Identifiers", immutable), so that case is refused: exit 2 with what to do.
    copy = tmp_path / "copy"
    copy.mkdir()
    conn = sqlite3.connect(stocked_ws / DB_NAME)
    conn.execute("PRAGMA wal_autocheckpoint = 0")
    conn.execute("INSERT INTO settings VALUES ('scratch', '1')")
    conn.commit()  # the change is in the -wal file until a checkpoint
    for name in (DB_NAME, DB_NAME + "-wal"):
        shutil.copyfile(stocked_ws / name, copy / name)
    conn.close()
    assert (copy / (DB_NAME + "-wal")).stat().st_size > 0
    done = _run_read_only(copy, "status")
    assert done.returncode == 2, (done.stdout, done.stderr)
    assert f"{copy / DB_NAME}: cannot open the workspace database" in done.stderr
    assert "open it once where it is writable" in done.stderr


def test_a_file_that_is_not_sqlite_is_still_not_a_workspace(tmp_path):
    # the read-only fallback is only for files that begin with SQLite's header (sqlite.org,
    # "Database File Format", sec. 1.3): anything else stays "not a routeplan workspace"
    (tmp_path / DB_NAME).write_bytes(b"case_id,f1\nc1,0.5\n" * 200)
    result = run_cli(tmp_path, "status")
    assert_one_line_error(result, "is not a routeplan workspace")


def test_a_database_that_cannot_be_read_is_exit_2_naming_the_reason(stocked_ws, monkeypatch):
    # SQLITE_CANTOPEN on a file that the system will not let us read (EACCES, simulated: the
    # tests run as root) is the user's to fix, not a damaged workspace: exit 2, the reason named
    import builtins

    from routeplan.workspace import Workspace

    def cannot_open(path):
        error = sqlite3.OperationalError("unable to open database file")
        error.sqlite_errorcode, error.sqlite_errorname = sqlite3.SQLITE_CANTOPEN, "SQLITE_CANTOPEN"
        raise error

    real_open = builtins.open

    def refusing_open(file, *args, **kwargs):
        if str(file).endswith(DB_NAME):
            raise PermissionError(13, "Permission denied", str(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(Workspace, "_connect", staticmethod(cannot_open))
    monkeypatch.setattr(builtins, "open", refusing_open)
    result = run_cli(stocked_ws, "status")
    monkeypatch.undo()
    assert_one_line_error(result, f"{stocked_ws / DB_NAME}: cannot read the workspace database (Permission denied)")
