"""The column-wise schema checker (``files.check_rows``) against the reference validator.

Reference library: ``jsonschema.Draft202012Validator`` (the jsonschema package, JSON Schema
2020-12). For every schema in ``schemas/``, hypothesis generates small tables of rows; the
table passes ``check_rows`` exactly when every row is valid for the reference validator, and
when it fails, the reported row is the first row the reference validator refuses.

One documented difference: JSON Schema patterns are ECMA-262 regular expressions (JSON Schema
2020-12 validation spec, section 6.3.3), where ``$`` matches only at the end of the text;
jsonschema runs them with Python's :mod:`re`, whose ``$`` also matches before a final newline.
``check_rows`` follows ECMA-262, so text ending in a newline is left out of the comparison and
checked on its own below.
"""

from __future__ import annotations

import errno
import json
import math
import os
import re
from pathlib import Path

import jsonschema
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from routeplan.errors import InputError, OutputError
from routeplan.files import Table, check_rows, load_schema, read_table

SCHEMA_DIR = Path(__file__).resolve().parents[1] / "schemas"
SCHEMA_NAMES = sorted(p.name[: -len(".schema.json")] for p in SCHEMA_DIR.glob("*.schema.json"))
# check_rows evaluates the keyword subset listed in routeplan.files; the schemas of files routeplan
# writes (decisions, round plans) use more and are checked with jsonschema where they are written.
_TOP = {"$schema", "$id", "title", "description", "type", "required", "properties", "additionalProperties"}
_RULE = {"type", "minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum", "minLength", "maxLength",
         "pattern", "enum", "not", "description"}


def _within_subset(schema: dict) -> bool:
    rules = list(schema.get("properties", {}).values())
    if isinstance(schema.get("additionalProperties"), dict):
        rules.append(schema["additionalProperties"])
    for rule in rules:
        if set(rule) - _RULE:
            return False
        negated = rule.get("not", {})
        if set(negated) - {"anyOf", "pattern"} or any(set(b) - {"pattern"} for b in negated.get("anyOf", [])):
            return False
    return schema.get("type") == "object" and not set(schema) - _TOP


ROW_SCHEMAS = [name for name in SCHEMA_NAMES if _within_subset(load_schema(name))]
IMPORTED = {"cases-row", "truth-row", "experts-row", "answers-row"}  # the schemas routeplan.ingest checks with


def test_every_imported_schema_is_within_the_checked_subset():
    assert IMPORTED <= set(ROW_SCHEMAS)


def test_every_schema_is_valid_2020_12():
    assert SCHEMA_NAMES, "no schemas found"
    for name in SCHEMA_NAMES:
        schema = load_schema(name)
        assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
        jsonschema.Draft202012Validator.check_schema(schema)  # the meta-schema of the reference library


# --------------------------------------------------------------------------- generated rows

_INTERESTING_TEXT = [
    "model", "Model", "MODEL", "models", "a", "A.b", "a..b", "..", "../x", "x/y", "x\\y", ".x", "x.", "x-", "_x",
    "x\x01", "\x7f", "tab\there", "sp ace", "é", "名前", "0", "1.5", "-2", "x" * 64, "y" * 65, "z" * 200, "w" * 201,
    "",
]


def _spells_finite_number(text: str) -> bool:
    """True if ``pandas.to_numeric`` reads the text as a finite number (then it is a number, not text)."""
    value = pd.to_numeric(pd.Series([text], dtype=object), errors="coerce").iloc[0]
    return bool(pd.notna(value) and math.isfinite(value))


_text = st.one_of(
    st.sampled_from(_INTERESTING_TEXT),
    st.text(max_size=12),
    st.text(alphabet="abcXYZ019._-/ \x00\x1f", max_size=70),
).filter(lambda s: not s.endswith("\n"))  # see the module docstring (ECMA-262 vs Python `$`)
_number = st.floats(allow_nan=False, allow_infinity=False, width=64)
_non_number_text = _text.filter(lambda s: not _spells_finite_number(s))


def _cell_strategy(rule: dict):
    kinds = rule.get("type", ["string", "number", "null"])
    kinds = {kinds} if isinstance(kinds, str) else set(kinds)
    if kinds & {"number", "integer"} and "string" not in kinds:
        # a number column: numbers, missing cells, and text that is not a number
        return st.one_of(_number, _number, st.none(), _non_number_text)
    options = [_text, _text, st.none()]
    if "number" in kinds:
        # numbers or text: in a CSV a cell that spells a number is a number, so text here never does
        options = [_non_number_text, _non_number_text, st.none(), _number]
    return st.one_of(*options)


@st.composite
def tables(draw, schema: dict):
    """(columns, rows): a set of columns and 1-4 rows of typed JSON values."""
    properties = schema["properties"]
    columns = [name for name in properties if draw(st.booleans()) or (name in schema["required"] and draw(st.booleans()))]
    extra = schema.get("additionalProperties", True)
    if draw(st.integers(0, 4)) == 0:
        columns.append(draw(st.sampled_from(["extra", "f1", "note"])))
    n_rows = draw(st.integers(1, 4))
    rules = {c: properties.get(c, extra if isinstance(extra, dict) else {}) for c in columns}
    rows = [{c: draw(_cell_strategy(rules[c])) for c in columns} for _ in range(n_rows)]
    return columns, rows


def _as_table(columns: list[str], rows: list[dict]) -> Table:
    """The table ``files.read_table`` would make: numeric columns as float64, others as text."""
    cells, numeric, empty = {}, {}, {}
    for name in columns:
        values = [row[name] for row in rows]
        empty[name] = np.array([v is None for v in values])
        if any(isinstance(v, float) for v in values) and not any(isinstance(v, str) for v in values):
            array = np.array([np.nan if v is None else v for v in values], dtype=np.float64)
            numeric[name] = cells[name] = array
        else:  # text: numbers appear as their shortest repr, as in a CSV file
            cells[name] = pd.Series([repr(v) if isinstance(v, float) else v for v in values], dtype=object)
    frame = pd.DataFrame(cells, columns=columns)
    return Table(frame, "generated", "", False, numeric, empty)


@pytest.mark.parametrize("name", ROW_SCHEMAS)
@settings(max_examples=100, deadline=None, derandomize=True, suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
@given(data=st.data())
def test_check_rows_agrees_with_jsonschema(name, data):
    schema = load_schema(name)
    columns, rows = data.draw(tables(schema))
    validator = jsonschema.Draft202012Validator(schema)  # reference library
    verdicts = [validator.is_valid(row) for row in rows]
    table = _as_table(columns, rows)
    try:
        check_rows(table, schema)
    except InputError as exc:
        assert not all(verdicts), f"check_rows refused valid rows: {exc.message}"
        # Parquet-style numbering (is_text=False): record i is row i + 1; header problems are row 1
        assert exc.line == verdicts.index(False) + 1, (exc.message, verdicts)
    else:
        failing = [(row, [e.message for e in validator.iter_errors(row)]) for row, ok in zip(rows, verdicts) if not ok]
        assert all(verdicts), f"check_rows accepted invalid rows: {failing}"


def test_check_rows_returns_parsed_numbers():
    schema = load_schema("experts-row")
    table = _as_table(["name", "fee", "capacity"], [
        {"name": "a", "fee": "0.25", "capacity": None},
        {"name": "b", "fee": "3", "capacity": 0.5},
    ])
    parsed = check_rows(table, schema)
    np.testing.assert_array_equal(parsed["fee"], [0.25, 3.0])
    assert np.isnan(parsed["capacity"][0]) and parsed["capacity"][1] == 0.5


def test_check_rows_numeric_columns_must_be_finite():
    schema = load_schema("cases-row")
    table = _as_table(["case_id", "f1"], [{"case_id": "a", "f1": 1.0}, {"case_id": "b", "f1": None}])
    # the schema alone lets a display column be empty ...
    assert jsonschema.Draft202012Validator(schema).is_valid({"case_id": "b", "f1": None})
    check_rows(table, schema)
    # ... a feature column may not be
    with pytest.raises(InputError, match="'f1' is empty") as info:
        check_rows(table, schema, numeric_columns=("f1",))
    assert info.value.line == 2


@pytest.mark.parametrize("schema_name,column,value", [
    ("experts-row", "name", "ab\n"),
    ("experts-row", "name", "model\n"),
    ("answers-row", "case_id", "c1\n"),
])
def test_pattern_end_anchor_follows_ecma_262(schema_name, column, value):
    """``$`` does not match before a final newline (ECMA-262; JSON Schema 2020-12 validation, 6.3.3)."""
    schema = load_schema(schema_name)
    row = {c: ("x" if c != "fee" else 1.0) for c in schema["required"]}
    row[column] = value
    with pytest.raises(InputError):
        check_rows(_as_table(list(row), [row]), schema)


# --------------------------------------------------------------------------- reading files


def test_read_table_keeps_ids_as_text_and_strips_cells(tmp_path):
    path = tmp_path / "t.csv"
    path.write_bytes("\ufeffcase_id , f1\r\n007 ,  1.5\r\n 8,2\r\n".encode("utf-8"))
    table = read_table(path, text_columns=("case_id",))
    assert list(table.frame.columns) == ["case_id", "f1"]
    assert table.frame["case_id"].tolist() == ["007", "8"]
    np.testing.assert_array_equal(table.numeric["f1"], [1.5, 2.0])
    assert table.line_of(1) == 3


@pytest.mark.parametrize("eol", ["\n", "\r\n", "\r"])
def test_read_table_accepts_every_common_line_end(tmp_path, eol):
    # LF (Unix), CRLF (RFC 4180) and a lone CR (classic Mac OS) all end a record (common practice)
    path = tmp_path / "t.csv"
    path.write_bytes(eol.join(["case_id,expert,answer", "c1,ann,yes", "c2,bo,no"]).encode("utf-8"))
    table = read_table(path, text_columns=("case_id", "expert", "answer"))
    assert table.frame.values.tolist() == [["c1", "ann", "yes"], ["c2", "bo", "no"]]


@pytest.mark.parametrize("column,fragments", [
    ("list", ["'extra'", "nested", "list<"]),
    ("struct", ["'extra'", "nested", "struct<"]),
    ("binary", ["'extra'", "binary", "not UTF-8", "row 2"]),
])
def test_read_table_refuses_parquet_columns_it_cannot_read_as_text(tmp_path, column, fragments):
    # every column of a cases file is kept (features, roles or display), so an unreadable column is
    # refused by name; Parquet's nested and byte-array types are in the Apache Parquet format
    # specification (LogicalTypes.md: LIST, MAP; BYTE_ARRAY without the STRING annotation)
    import pyarrow as pa
    import pyarrow.parquet as pq

    extra = {"list": pa.array([[1, 2], [3]]), "struct": pa.array([{"a": 1}, {"a": 2}]),
             "binary": pa.array([b"ok", b"caf\xe9"], pa.binary())}[column]
    pq.write_table(pa.table({"case_id": ["c1", "c2"], "f1": [1.0, 2.0], "extra": extra}), tmp_path / "t.parquet")
    with pytest.raises(InputError) as caught:
        read_table(tmp_path / "t.parquet", text_columns=("case_id",))
    for fragment in fragments:
        assert fragment in str(caught.value)


def test_read_table_reads_utf8_bytes_of_parquet_as_text(tmp_path):
    # a BYTE_ARRAY column that holds UTF-8 text still reads (Apache Parquet format, LogicalTypes.md:
    # STRING is only an annotation of UTF-8 bytes)
    import pyarrow as pa
    import pyarrow.parquet as pq

    pq.write_table(pa.table({"case_id": ["c1"], "note": pa.array([" caf\u00e9 ".encode("utf-8")], pa.binary())}),
                   tmp_path / "t.parquet")
    assert read_table(tmp_path / "t.parquet").frame["note"].tolist() == ["caf\u00e9"]


def test_schemas_in_package_are_the_schemas_folder():
    """The installed package ships the same schema documents as ``schemas/``."""
    for name in SCHEMA_NAMES:
        assert load_schema(name) == json.loads((SCHEMA_DIR / f"{name}.schema.json").read_text(encoding="utf-8"))


def test_write_atomically_keeps_the_old_file_when_the_write_fails(tmp_path):
    # Atomic replacement (write a temporary file, fsync, rename; common practice on POSIX):
    # a failed write leaves the old content and no temporary file; a good one is readable by all.
    import stat

    from routeplan.files import write_atomically

    path = tmp_path / "out.txt"
    write_atomically(path, lambda tmp: Path(tmp).write_text("old", encoding="utf-8"))

    def half_then_fail(tmp):
        Path(tmp).write_text("half", encoding="utf-8")
        raise OSError("disk full")

    with pytest.raises(OutputError, match=re.escape(f"{path}: cannot write the file (disk full)")):  # exit 2
        write_atomically(path, half_then_fail)
    assert path.read_text(encoding="utf-8") == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]
    write_atomically(path, lambda tmp: Path(tmp).write_text("new", encoding="utf-8"))
    assert path.read_text(encoding="utf-8") == "new"
    assert stat.S_IMODE(path.stat().st_mode) == 0o644


# --------------------------------------------------------------------------- failures while writing

# The errno values and their strerror texts are the operating system's (POSIX.1-2017, <errno.h>:
# EACCES, EROFS, ENOSPC); Python raises them as OSError or its subclasses (PermissionError).
_ENOSPC = OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
_EACCES = PermissionError(errno.EACCES, os.strerror(errno.EACCES))
_EROFS = OSError(errno.EROFS, os.strerror(errno.EROFS))


def _old_files(folder: Path) -> dict[str, str]:
    """Two files with old content, in a folder of their own."""
    folder.mkdir()
    for name in ("a.txt", "b.txt"):
        (folder / name).write_text(f"old {name}", encoding="utf-8")
    return _contents(folder)


def _contents(folder: Path) -> dict[str, str]:
    return {p.name: p.read_text(encoding="utf-8") for p in folder.iterdir()}


def _writers(folder: Path, names=("a.txt", "b.txt", "c.txt")) -> dict:
    return {folder / n: (lambda tmp, n=n: Path(tmp).write_text(f"new {n}", encoding="utf-8")) for n in names}


@pytest.mark.parametrize("step, error", [("open", _EACCES), ("write", _ENOSPC), ("rename", _EROFS)])
@pytest.mark.parametrize("n_files", [1, 3])
def test_an_os_error_while_writing_is_an_input_error_naming_the_path(tmp_path, monkeypatch, step, error, n_files):
    # A folder without write permission, a read-only file system or a full disk is the user's
    # to fix (common practice: report it as bad input, naming the file and the system's reason);
    # simulated, as the tests run as root, where file modes do not stop writes.
    import tempfile

    from routeplan.errors import OutputError
    from routeplan.files import write_all_or_none

    folder = tmp_path / "out"
    before = _old_files(folder)
    writers = _writers(folder, ("a.txt", "b.txt", "c.txt")[:n_files])
    failing = list(writers)[-1]  # the last file fails
    if step == "open":
        real_mkstemp = tempfile.mkstemp

        def mkstemp(*args, **kwargs):
            if kwargs.get("prefix", "").startswith(f".{failing.name}."):
                raise error
            return real_mkstemp(*args, **kwargs)

        monkeypatch.setattr(tempfile, "mkstemp", mkstemp)
    elif step == "write":
        def half_then_full(tmp):
            Path(tmp).write_text("half", encoding="utf-8")
            raise error

        writers[failing] = half_then_full
    else:
        real_replace = os.replace

        def replace(src, dst):
            if Path(dst) == failing and str(src).endswith(".part"):
                raise error
            real_replace(src, dst)

        monkeypatch.setattr(os, "replace", replace)
    with pytest.raises(OutputError) as caught:
        write_all_or_none(writers)
    assert isinstance(caught.value, InputError)  # exit 2 in the CLI
    assert str(caught.value).startswith(f"{failing}: cannot write the file ({error.strerror})")
    assert _contents(folder) == before  # old files as they were; no new, temporary or backup file


def _second_rename_fails(monkeypatch, *, restore_fails: bool = False) -> list[str]:
    """Make os.replace fail (ENOSPC) on the second new file; returns the names it was asked for."""
    real_replace, renamed = os.replace, []

    def replace(src, dst):
        if restore_fails and str(src).endswith(".old"):
            raise _EROFS
        if str(src).endswith(".part"):
            renamed.append(Path(dst).name)
            if len(renamed) == 2:
                raise _ENOSPC
        real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    return renamed


def test_a_failing_rename_puts_every_file_back(tmp_path, monkeypatch):
    # All or none (common practice for one command's outputs): when the second of three renames
    # fails, the first target gets its old content back, and a target that did not exist
    # before (c.txt) is not left behind.
    from routeplan.files import write_all_or_none

    folder = tmp_path / "out"
    before = _old_files(folder)
    renamed = _second_rename_fails(monkeypatch)
    with pytest.raises(OutputError, match=re.escape(f"{folder / 'b.txt'}: cannot write the file (No space left")):
        write_all_or_none(_writers(folder))
    assert renamed == ["a.txt", "b.txt"]
    assert _contents(folder) == before


def test_a_failing_rename_of_the_first_new_file_removes_it(tmp_path, monkeypatch):
    # the same all-or-none rule when the file renamed first did not exist before
    from routeplan.files import write_all_or_none

    folder = tmp_path / "out"
    before = _old_files(folder)
    renamed = _second_rename_fails(monkeypatch)
    writers = _writers(folder, ("c.txt", "a.txt"))
    with pytest.raises(OutputError, match=re.escape(f"{folder / 'a.txt'}: cannot write the file (No space left")):
        write_all_or_none(writers)
    assert renamed == ["c.txt", "a.txt"]
    assert _contents(folder) == before


def test_a_backup_that_cannot_be_put_back_is_kept_and_named(tmp_path, monkeypatch):
    # If undoing a rename fails too, the old content must not be lost: its backup stays and
    # the message says where it is (common practice: never delete the only copy).
    from routeplan.files import write_all_or_none

    folder = tmp_path / "out"
    _old_files(folder)
    _second_rename_fails(monkeypatch, restore_fails=True)  # and putting a.txt back fails too
    with pytest.raises(InputError) as caught:
        write_all_or_none(_writers(folder))
    kept = [p for p in folder.iterdir() if p.name.endswith(".old")]
    assert len(kept) == 1 and kept[0].read_text(encoding="utf-8") == "old a.txt"
    assert f"its old content is in {kept[0]}" in str(caught.value)
    assert (folder / "b.txt").read_text(encoding="utf-8") == "old b.txt"
    assert not (folder / "c.txt").exists() and not list(folder.glob("*.part"))


def test_all_or_none_keeps_a_symbolic_link_a_link(tmp_path, monkeypatch):
    # os.replace over a symbolic link replaces the link itself (POSIX rename()); putting it back
    # must restore the link, not a copy of the file it points to
    from routeplan.files import write_all_or_none

    folder = tmp_path / "out"
    _old_files(folder)
    (folder / "link.txt").symlink_to(folder / "a.txt")
    _second_rename_fails(monkeypatch)
    with pytest.raises(OutputError, match=re.escape(f"{folder / 'b.txt'}: cannot write the file (No space left")):
        write_all_or_none(_writers(folder, ("link.txt", "b.txt")))
    assert (folder / "link.txt").is_symlink() and os.readlink(folder / "link.txt") == str(folder / "a.txt")
    assert sorted(p.name for p in folder.iterdir()) == ["a.txt", "b.txt", "link.txt"]


def test_a_plot_that_cannot_be_written_leaves_no_partial_file(tmp_path, monkeypatch):
    # A full disk while matplotlib writes: the plot is written atomically (temporary file and
    # rename, common practice), so neither a half PNG nor a temporary file stays behind.
    import matplotlib.figure

    from routeplan.figures import rehearsal_plot

    def half_then_full(self, fname, **kwargs):
        Path(fname).write_bytes(b"\x89PNG half")
        raise _ENOSPC

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", half_then_full)
    curves = pd.DataFrame({"strategy": ["a", "a"], "spend": [0.0, 1.0], "system_cost": [0.5, 0.4]})
    path = tmp_path / "plot.png"
    with pytest.raises(InputError, match=f"{path}: cannot write the file \\(No space left on device\\)"):
        rehearsal_plot(curves, path, bayes_cost=None, full_information_cost=0.3)
    assert list(tmp_path.iterdir()) == []
