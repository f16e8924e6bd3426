"""Reading and checking the files users bring, and writing the files they take away.

A file is read whole into a :class:`pandas.DataFrame` of text cells, checked against a JSON
Schema from ``schemas/`` and only then handed on. Every problem is raised as
:class:`~routeplan.errors.InputError` naming the file and the line (CSV: the header is line 1,
so the first record is line 2; Parquet: row 1 is the first record).

Rows are checked column by column: :func:`check_rows` evaluates the subset of JSON Schema
2020-12 that our schemas use (``type``, ``required``, ``properties``, ``additionalProperties``,
``minimum``, ``maximum``, ``minLength``, ``maxLength``, ``pattern``, ``enum``, ``not``/``anyOf``)
over whole columns at once, which keeps a million-row import fast. ``tests/test_files.py``
checks that it agrees with the reference validator of the ``jsonschema`` package.
"""

from __future__ import annotations

import contextlib
import csv
import hashlib
import io
import json
import os
import re
import shutil
import tempfile
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import InputError, OutputError

__all__ = [
    "Table",
    "undo_neutralise",
    "read_table",
    "load_schema",
    "check_rows",
    "separator_hint",
    "file_sha256",
    "write_csv",
    "write_csvs",
    "write_atomically",
    "write_all_or_none",
    "check_out_path",
    "check_outputs",
    "neutralise_formula",
    "FORMULA_LEAD",
]

_SCHEMA_DIR = Path(__file__).resolve().parent / "schemas"
#: First characters that make a spreadsheet run a cell as a formula (or hide it).
FORMULA_LEAD = ("=", "+", "-", "@", "\t", "\r")


@dataclass(frozen=True)
class Table:
    """A file read into memory.

    Attributes
    ----------
    frame : pandas.DataFrame
        The records. Text columns hold stripped strings (missing where empty); columns that
        parsed as numbers hold float64 (NaN where empty or not a number).
    source : str
        The file's name as the user gave it, for messages.
    sha256 : str
        Hex digest of the file's bytes.
    is_text : bool
        True for CSV: messages say "line"; False for Parquet: they say "row".
    numeric : dict of str to ndarray
        float64 values of the columns that parsed as numbers.
    empty : dict of str to ndarray
        Boolean masks of empty cells, per column.
    lines : ndarray or None
        Line number of each record where blank lines make it differ from position + 2.
    """

    frame: pd.DataFrame
    source: str
    sha256: str
    is_text: bool
    numeric: dict
    empty: dict
    lines: np.ndarray | None = None

    def line_of(self, position: int) -> int:
        """Line (CSV; the header is line 1) or row (Parquet) of the record at 0-based ``position``."""
        if self.lines is not None:
            return int(self.lines[position])
        return int(position) + (2 if self.is_text else 1)

    def fail(self, message: str, position: int | None = None) -> InputError:
        """Build the :class:`InputError` for a record (or for the whole file)."""
        line = None if position is None else self.line_of(position)
        return InputError(message, source=self.source, line=line, unit="line" if self.is_text else "row")

    def take(self, positions: np.ndarray, columns: list[str] | None = None) -> "Table":
        """The records at ``positions`` (and only ``columns``), keeping their line numbers."""
        positions = np.asarray(positions, dtype=np.int64)
        columns = list(self.frame.columns) if columns is None else columns
        lines = np.array([self.line_of(p) for p in positions], dtype=np.int64)
        pick = lambda d: {k: v[positions] for k, v in d.items() if k in columns}  # noqa: E731
        frame = self.frame.iloc[positions][columns].reset_index(drop=True)
        return Table(frame, self.source, self.sha256, self.is_text, pick(self.numeric), pick(self.empty), lines)

    def renamed(self, mapping: dict[str, str]) -> "Table":
        """The same table with columns renamed."""
        rename = lambda d: {mapping.get(k, k): v for k, v in d.items()}  # noqa: E731
        return Table(self.frame.rename(columns=mapping), self.source, self.sha256, self.is_text,
                     rename(self.numeric), rename(self.empty), self.lines)


def file_sha256(path: str | Path) -> str:
    """Hex sha256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


_NO_RECORDS = "the file has a header but no records"


def read_table(path: str | Path, *, text_columns: tuple[str, ...] = ()) -> Table:
    """Read a CSV or Parquet file into a :class:`Table`.

    Parameters
    ----------
    path : str or Path
        A ``.parquet`` file, or a CSV file (UTF-8, comma separated, header on line 1, one
        record per line).
    text_columns : tuple of str, default=()
        Columns to keep as text even where they look like numbers (ids, labels, names).

    Returns
    -------
    Table

    Raises
    ------
    InputError
        If the file is missing, empty, has only a header, is not UTF-8, cannot be parsed, or
        has blank or repeated column names.
    """
    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise InputError("no such file", source=source)
    if path.suffix.lower() in (".parquet", ".pq"):
        data = path.read_bytes()
        sha = hashlib.sha256(data).hexdigest()
        arrow, is_text, lines = _read_parquet(data, source), False, None
    else:
        scan = _scan(path)
        sha = scan.sha256
        arrow, lines = _read_csv(path, scan, source, text_columns)
        is_text = True
    table = _to_table(arrow, source, sha, is_text, lines, text_columns)
    _check_header(table)
    if len(table.frame) == 0:
        raise InputError(_NO_RECORDS, source=source)
    return table


@dataclass(frozen=True)
class _Scan:
    """What one streaming pass over a CSV file's bytes found (the file is not held in memory)."""

    sha256: str
    head: bytes
    has_text: bool
    has_nul: bool
    has_quote: bool
    has_blank_line: bool


def _scan(path: Path, block: int = 1 << 22) -> _Scan:
    """Hash the file and look for NUL bytes, quotes and blank lines, block by block."""
    digest = hashlib.sha256()
    head = b""
    has_text = has_nul = has_quote = has_blank = False
    tail = b""
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(block), b""):
            digest.update(chunk)
            if len(head) < 65536:
                head += chunk[: 65536 - len(head)]
            has_text = has_text or bool(chunk.strip())
            has_nul = has_nul or b"\x00" in chunk
            has_quote = has_quote or b'"' in chunk
            joined = tail + chunk
            has_blank = has_blank or b"\n\n" in joined or b"\n\r\n" in joined
            tail = chunk[-2:]
    return _Scan(digest.hexdigest(), head, has_text, has_nul, has_quote, has_blank)


def _read_csv(path: Path, scan: _Scan, source: str, text_columns: tuple[str, ...]):
    import pyarrow as pa
    import pyarrow.csv as pacsv

    if not scan.has_text:
        raise InputError("the file is empty", source=source)
    if scan.has_nul:
        data = path.read_bytes()
        line = data[: data.index(b"\x00")].count(b"\n") + 1
        raise InputError("the file contains a NUL character", source=source, line=line)
    first = re.split(rb"\r\n|\n|\r", scan.head, maxsplit=1)[0]  # the header line, whatever the line ends
    _check_utf8(first, source)
    header = first.decode("utf-8").lstrip("\ufeff")
    try:
        names = [n.strip() for n in next(csv.reader([header]), [])]
    except csv.Error as exc:
        raise InputError(f"cannot parse the header: {exc}", source=source, line=1) from None
    # no invalid_row_handler: pyarrow decodes a bad row's text before calling it, which prints a
    # traceback for non-UTF-8 bytes; a parse error is explained below instead
    try:
        arrow = pacsv.read_csv(
            str(path),
            read_options=pacsv.ReadOptions(encoding="utf8"),
            convert_options=pacsv.ConvertOptions(
                null_values=[""],
                true_values=[],  # no booleans: TRUE stays the text the user wrote, not 'true'
                false_values=[],
                strings_can_be_null=True,
                quoted_strings_can_be_null=True,
                column_types={raw: pa.string() for raw in _raw_names(header) if raw.strip() in text_columns},
            ),
        )
    except (pa.ArrowInvalid, pa.ArrowException, ValueError) as exc:
        data = path.read_bytes()
        _check_utf8(data, source)
        _check_csv_shape(data.decode("utf-8"), source)
        raise InputError(f"cannot parse the CSV: {_first_line(exc)}", source=source) from None
    if any(pa.types.is_binary(t) or pa.types.is_large_binary(t) for t in arrow.schema.types):
        _check_utf8(path.read_bytes(), source)
    if scan.has_quote and _spans_lines(arrow):
        # a quoted value holding a line break: refuse it (one record per line keeps line numbers right)
        data = path.read_bytes()
        _check_utf8(data, source)
        _check_csv_shape(data.decode("utf-8"), source)
        raise InputError("a value spans several lines; put one record per line", source=source)
    arrow = arrow.rename_columns([n.strip() for n in arrow.column_names])
    if len(names) != arrow.num_columns:
        raise InputError("cannot parse the header", source=source, line=1)
    lines = _record_lines(path.read_bytes(), arrow.num_rows) if scan.has_blank_line else None
    return arrow, lines


def _spans_lines(arrow) -> bool:
    """True if a text cell holds a line break (CR or LF)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    for column in arrow.columns:
        if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
            for pattern in ("\n", "\r"):
                if pc.any(pc.match_substring(column, pattern)).as_py():
                    return True
    return False


def _check_utf8(data: bytes, source: str) -> None:
    """Name the line of the first byte that is not UTF-8 (only after a parse error)."""
    try:
        data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InputError(
            f"byte 0x{data[exc.start]:02x} is not UTF-8; save the file as UTF-8 and import it again",
            source=source,
            line=line,
        ) from None


def _raw_names(header: str) -> list[str]:
    return next(csv.reader([header]), [])


def _record_lines(data: bytes, n_records: int) -> np.ndarray | None:
    """Line numbers of the records when blank lines are present (else None: line = position + 2)."""
    if b"\n\n" not in data and b"\n\r\n" not in data:
        return None
    raw = np.frombuffer(data, dtype=np.uint8)
    ends = np.flatnonzero(raw == 10)
    starts = np.concatenate(([0], ends + 1))[: len(ends) + 1]
    stops = np.concatenate((ends, [len(raw)]))
    lengths = stops - starts
    blank = lengths == 0
    cr = (lengths == 1) & (raw[np.minimum(starts, len(raw) - 1)] == 13)
    content = np.flatnonzero(~(blank | cr)) + 1
    return content[1 : 1 + n_records]


def _check_csv_shape(text: str, source: str) -> None:
    """Find the first malformed line with the csv module (slow; only after a parse error)."""
    reader = csv.reader(io.StringIO(text.lstrip("\ufeff")), strict=True)
    try:
        header = next(reader)
    except StopIteration:
        raise InputError("the file is empty", source=source) from None
    except csv.Error as exc:
        raise InputError(f"cannot parse the header: {exc}", source=source, line=1) from None
    width = len(header)
    n_records = 0
    try:
        for row in reader:
            if row and len(row) != width and any(cell.strip() for cell in row):
                raise InputError(f"{len(row)} fields where the header has {width}", source=source, line=reader.line_num)
            if any("\n" in cell or "\r" in cell for cell in row):
                raise InputError("a value spans several lines; put one record per line", source=source, line=reader.line_num)
            n_records += any(cell.strip() for cell in row)
    except csv.Error as exc:
        raise InputError(f"cannot parse the CSV: {exc}", source=source, line=reader.line_num) from None
    if n_records == 0:  # a header alone, without a line end after it, is not a parse error
        raise InputError(_NO_RECORDS, source=source)


def _read_parquet(data: bytes, source: str):
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        return pq.read_table(pa.BufferReader(data))
    except Exception as exc:  # pyarrow raises several types for damaged files
        raise InputError(f"cannot read the Parquet file: {_first_line(exc)}", source=source) from None


def _to_table(arrow, source: str, sha: str, is_text: bool, lines, text_columns: tuple[str, ...]) -> Table:
    """Turn an Arrow table into a :class:`Table`: numbers as float64, everything else as stripped text."""
    import pyarrow as pa
    import pyarrow.compute as pc

    cells: dict[str, Any] = {}
    numeric: dict[str, np.ndarray] = {}
    empty: dict[str, np.ndarray] = {}
    for name, column in zip(arrow.column_names, arrow.columns):
        name = str(name)
        kind = column.type
        is_number = (pa.types.is_integer(kind) or pa.types.is_floating(kind)) and name not in text_columns
        if is_number:
            values = column.cast(pa.float64()).to_numpy(zero_copy_only=False)
            missing = column.is_null().to_numpy(zero_copy_only=False)
            numeric[name] = values
            empty[name] = missing
            cells[name] = values
            continue
        if not pa.types.is_string(kind) and not pa.types.is_large_string(kind):
            column = _as_text(column, name, source)
        column = pc.utf8_trim_whitespace(column)
        column = pc.if_else(pc.equal(column, ""), pa.scalar(None, pa.string()), column)
        empty[name] = column.is_null().to_numpy(zero_copy_only=False)
        cells[name] = pd.Series(column.to_numpy(zero_copy_only=False), dtype=object)
    frame = pd.DataFrame(cells, columns=[str(n) for n in arrow.column_names])
    return Table(frame, source, sha, is_text, numeric, empty, lines)


def _as_text(column, name: str, source: str):
    """Cast a non-numeric Arrow column to text, refusing nested values and bytes that are not UTF-8.

    Only Parquet columns get here with such types (a CSV file's bytes are checked for UTF-8 as it
    is read), so a bad value is named by its row.

    Parameters
    ----------
    column : pyarrow.ChunkedArray
        A column that is neither numeric (as read) nor already text.
    name : str
        Its name, for the message.
    source : str
        The file, for the message.

    Returns
    -------
    pyarrow.ChunkedArray
        The column as ``string``.

    Raises
    ------
    InputError
        Naming the column and its type, and for bytes that are not UTF-8 the first such row.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    kind = column.type
    if pa.types.is_null(kind):
        return column.cast(pa.string())
    if pa.types.is_nested(kind) or (pa.types.is_dictionary(kind) and pa.types.is_nested(kind.value_type)):
        raise InputError(f"column '{name}' holds nested values (type {kind}); routeplan reads plain numbers "
                         "and text only: flatten it into one column per value", source=source)
    try:
        return pc.cast(column, pa.string())
    except pa.ArrowException:
        pass
    for position, value in enumerate(column.to_pylist()):
        if isinstance(value, bytes):
            try:
                value.decode("utf-8")
            except UnicodeDecodeError:
                raise InputError(f"column '{name}' (type {kind}) holds bytes that are not UTF-8 text; store it as "
                                 "UTF-8 text or leave it out", source=source, line=position + 1, unit="row") from None
    raise InputError(f"column '{name}' has type {kind}, which routeplan cannot read as text; store it as numbers "
                     "or text", source=source)


def _check_header(table: Table) -> None:
    columns = list(table.frame.columns)
    seen: set[str] = set()
    for name in columns:
        if not name or name.startswith("Unnamed:"):
            raise InputError("the header has a blank column name", source=table.source, line=1)
        if name in seen:
            raise InputError(f"column '{name}' appears twice in the header", source=table.source, line=1)
        seen.add(name)
    if any(name.endswith(tuple(f".{i}" for i in range(1, 10))) and name.rsplit(".", 1)[0] in seen for name in columns):
        raise InputError("the header repeats a column name", source=table.source, line=1)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


# --------------------------------------------------------------------------- schemas


def load_schema(name: str) -> dict:
    """Load ``schemas/<name>.schema.json``.

    Parameters
    ----------
    name : str
        For example ``"answers-row"``.

    Returns
    -------
    dict
        The JSON Schema document.
    """
    with open(_SCHEMA_DIR / f"{name}.schema.json", encoding="utf-8") as handle:
        return json.load(handle)


def check_rows(table: Table, schema: dict, *, numeric_columns: tuple[str, ...] = ()) -> dict[str, np.ndarray]:
    """Check every record of ``table`` against a row schema, column by column.

    Parameters
    ----------
    table : Table
        The file, with columns already renamed to the schema's property names.
    schema : dict
        A row schema (``type: object``) from ``schemas/``.
    numeric_columns : tuple of str, default=()
        Columns that must hold finite numbers (parsed here); used for features, whose
        names are not known to the schema.

    Returns
    -------
    dict of str to ndarray
        The parsed float64 values of every column whose schema type is ``number`` and of
        every column in ``numeric_columns``.

    Raises
    ------
    InputError
        At the first (lowest-line) problem, naming the column and the value.
    """
    frame = table.frame
    properties = schema.get("properties", {})
    columns = list(frame.columns)
    missing = [name for name in schema.get("required", []) if name not in columns]
    if missing:
        hint = separator_hint(columns)
        raise InputError(
            f"missing column(s) {', '.join(repr(m) for m in missing)}; the header has "
            f"{', '.join(repr(c) for c in columns)}{hint}",
            source=table.source,
            line=1,
        )
    extra_rule = schema.get("additionalProperties", True)
    if extra_rule is False:
        unknown = [c for c in columns if c not in properties]
        if unknown:
            raise InputError(
                f"unknown column(s) {', '.join(repr(u) for u in unknown)}; expected "
                f"{', '.join(repr(p) for p in properties)}",
                source=table.source,
                line=1,
            )
    problems: list[tuple[int, str]] = []
    parsed: dict[str, np.ndarray] = {}
    for name in columns:
        rule = properties.get(name, extra_rule if isinstance(extra_rule, dict) else {})
        if name in numeric_columns:
            rule = {"type": "number"}
        found = _check_column(table, name, rule, parsed)
        if found is not None:
            problems.append(found)
    if problems:
        position, message = min(problems)
        raise table.fail(message, position)
    return parsed


def _types(rule: dict) -> set[str]:
    kind = rule.get("type")
    if kind is None:
        return {"string", "number", "null"}
    return {kind} if isinstance(kind, str) else set(kind)


def _check_column(table: Table, name: str, rule: dict, parsed: dict) -> tuple[int, str] | None:
    """Return (position, message) of the column's first problem, or None."""
    cells = table.frame[name]
    kinds = _types(rule)
    empty = table.empty[name] if name in table.empty else cells.isna().to_numpy()
    present = ~empty
    found = [_check_present(table, name, rule, kinds, present, parsed)]
    if "null" not in kinds and empty.any():
        found.append((int(np.argmax(empty)), f"column '{name}' is empty"))
    found = [f for f in found if f is not None]
    return min(found) if found else None


def _check_present(table: Table, name: str, rule: dict, kinds: set, present: np.ndarray, parsed: dict):
    """(position, message) of the first problem among the column's non-empty cells, or None."""
    cells = table.frame[name]
    if kinds & {"number", "integer"} and "string" not in kinds:
        values = _parse_numbers(table, name)
        bad = present & ~np.isfinite(values)
        found = [_check_bounds(name, values, present & ~bad, rule)]
        if bad.any():
            at = int(np.argmax(bad))
            shown = cells.iloc[at] if name not in table.numeric else _spelling(table, name, at, values[at])
            found.append((at, f"column '{name}' holds {shown!r}, not a finite number"))
        found = [f for f in found if f is not None]
        if not found:
            parsed[name] = values
        return min(found) if found else None
    if "number" in kinds:
        # numbers or text: numeric keywords apply to cells that spell a finite number, text keywords to the rest
        values = _parse_numbers(table, name)
        as_text = present & ~np.isfinite(values)
        found = [_check_bounds(name, values, present & ~as_text, rule)]
        if as_text.any():
            found.append(_check_text(name, _text_of(table, name).where(as_text, ""), as_text, rule))
        found = [f for f in found if f is not None]
        return min(found) if found else None
    return _check_text(name, _text_of(table, name).where(present, ""), present, rule)


def _spelling(table: Table, name: str, position: int, value: float) -> str:
    """A parsed number's cell as the file spells it (``NaN``, ``-INF``), for a message.

    Only CSV cells can be read back; elsewhere, or where the column cannot be found in
    the header (it was renamed), the number is shown as Python formats it.
    """
    fallback = f"{value}"
    if not table.is_text:
        return fallback
    wanted = {1, table.line_of(position)}
    rows: dict[int, list[str]] = {}
    try:
        with open(table.source, encoding="utf-8-sig", newline="") as handle:
            for number, text in enumerate(handle, start=1):
                if number in wanted:
                    rows[number] = next(csv.reader([text.rstrip("\r\n")]), [])
                if number >= max(wanted):
                    break
    except (OSError, UnicodeDecodeError, csv.Error):
        return fallback
    header = [cell.strip() for cell in rows.get(1, [])]
    cells = rows.get(table.line_of(position), [])
    if name not in header or header.index(name) >= len(cells):
        return fallback
    return cells[header.index(name)].strip() or fallback


def _text_of(table: Table, name: str) -> pd.Series:
    """The column as text (numbers formatted with ``g``)."""
    if name in table.numeric:
        return pd.Series([format(v, "g") for v in table.numeric[name]], dtype=object)
    return table.frame[name]


def _parse_numbers(table: Table, name: str) -> np.ndarray:
    if name in table.numeric:
        return table.numeric[name]
    return pd.to_numeric(table.frame[name], errors="coerce").to_numpy(dtype=np.float64)


def _check_bounds(name: str, values: np.ndarray, present: np.ndarray, rule: dict) -> tuple[int, str] | None:
    tests = [
        ("minimum", lambda v, b: v < b, "below the minimum"),
        ("maximum", lambda v, b: v > b, "above the maximum"),
        ("exclusiveMinimum", lambda v, b: v <= b, "not above"),
        ("exclusiveMaximum", lambda v, b: v >= b, "not below"),
    ]
    found = []
    for key, broken, words in tests:
        if key in rule:
            bad = present & broken(values, rule[key])
            if bad.any():
                at = int(np.argmax(bad))
                found.append((at, f"column '{name}' holds {values[at]:g}, {words} {rule[key]:g}"))
    return min(found) if found else None


def _check_text(name: str, text: pd.Series, present: np.ndarray, rule: dict) -> tuple[int, str] | None:
    checks: list[tuple[np.ndarray, str]] = []
    lengths = text.str.len().to_numpy()
    if "minLength" in rule:
        checks.append((present & (lengths < rule["minLength"]), "is too short"))
    if "maxLength" in rule:
        checks.append((present & (lengths > rule["maxLength"]), f"is longer than {rule['maxLength']} characters"))
    if "enum" in rule:
        checks.append((present & ~text.isin(rule["enum"]).to_numpy(), "is not one of the allowed values"))
    if "pattern" in rule:
        checks.append((present & ~_search(text, rule["pattern"]), "has characters that are not allowed"))
    if "not" in rule:
        checks.append((present & _matches_any(text, rule["not"]), "is not allowed"))
    found = [(int(np.argmax(bad)), words) for bad, words in checks if bad.any()]
    if not found:
        return None
    at, words = min(found)
    return at, f"column '{name}': {text.iloc[at]!r} {words}"


def _search(text: pd.Series, pattern: str) -> np.ndarray:
    compiled = re.compile(_ecma_end(pattern))
    return np.fromiter((compiled.search(v) is not None for v in text), dtype=bool, count=len(text))


def _ecma_end(pattern: str) -> str:
    """A final ``$`` matches only at the very end, as in ECMA-262 (Python's also matches before a final newline)."""
    if pattern.endswith("$") and not pattern.endswith("\\$"):
        return pattern[:-1] + r"\Z"
    return pattern


def _matches_any(text: pd.Series, rule: dict) -> np.ndarray:
    branches = rule.get("anyOf", [rule])
    hit = np.zeros(len(text), dtype=bool)
    for branch in branches:
        if "pattern" in branch:
            hit |= _search(text, branch["pattern"])
    return hit


# --------------------------------------------------------------------------- writing


def separator_hint(columns: Sequence[str]) -> str:
    """A hint for a message about missing columns when the header looks split by another separator.

    A header read as one column whose name holds ``;``, a tab or ``|`` most likely comes from
    a file saved with that separator (common practice: spreadsheets in many locales save
    "CSV" with semicolons).

    Parameters
    ----------
    columns : sequence of str
        The header as read.

    Returns
    -------
    str
        `` (the file seems to separate values with ';': save it as CSV with commas)`` or
        an empty string.
    """
    separator = next((sep for sep in (";", "\t", "|") if len(columns) == 1 and sep in columns[0]), None)
    return f" (the file seems to separate values with {separator!r}: save it as CSV with commas)" if separator else ""


def neutralise_formula(value: Any) -> Any:
    """Prefix a text cell that a spreadsheet would run as a formula with a quote.

    Cells that begin with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return are
    read as formulas by common spreadsheet programs (common practice: the OWASP
    guidance on CSV injection). Numbers are left alone.
    """
    if isinstance(value, str) and value.startswith(FORMULA_LEAD):
        return "'" + value
    return value


def undo_neutralise(value: Any) -> Any:
    """Remove the apostrophe that :func:`neutralise_formula` put before a formula-looking cell."""
    if isinstance(value, str) and len(value) > 1 and value[0] == "'" and value[1] in "=+-@\t\r":
        return value[1:]
    return value


def write_csv(frame: pd.DataFrame, path: str | Path, *, neutralise: bool = True) -> Path:
    """Write ``frame`` as UTF-8 CSV atomically (temporary file, then rename).

    Parameters
    ----------
    frame : pandas.DataFrame
        What to write; the index is not written.
    path : str or Path
        Destination.
    neutralise : bool, default=True
        Neutralise formula-looking text cells (see :func:`neutralise_formula`).

    Returns
    -------
    Path
    """
    path = Path(path)
    write_atomically(path, _csv_writer(frame, neutralise))
    return path


def write_csvs(frames: Mapping[Path, pd.DataFrame], *, neutralise: bool = True,
               others: Mapping[Path, Callable[[str], Any]] | None = None) -> None:
    """Write several CSV files, and any other files that go with them, all or none (:func:`write_all_or_none`).

    Parameters
    ----------
    frames : mapping of Path to pandas.DataFrame
        Destination and content of each CSV file.
    neutralise : bool, default=True
        As in :func:`write_csv`.
    others : mapping of Path to callable, optional
        Further files of the same group, written after the CSV files: the destination and
        the function that writes its whole content to the path it is given (e.g.
        :func:`routeplan.figures.competence_heatmap_writer`).

    Raises
    ------
    OutputError
        As :func:`write_all_or_none`: every destination is left as it was.
    """
    writers = {Path(path): _csv_writer(frame, neutralise) for path, frame in frames.items()}
    writers.update({Path(path): write for path, write in (others or {}).items()})
    write_all_or_none(writers)


def _csv_writer(frame: pd.DataFrame, neutralise: bool) -> Callable[[str], Any]:
    """A function writing ``frame`` as UTF-8 CSV (formula-looking text neutralised) to a path."""
    out = frame.copy()
    if neutralise:
        for name in out.columns:
            if out[name].dtype == object or pd.api.types.is_string_dtype(out[name]):
                out[name] = out[name].map(neutralise_formula)
    return lambda tmp: out.to_csv(tmp, index=False, lineterminator="\n")


def write_atomically(path: str | Path, write: Callable[[str], Any]) -> None:
    """Call ``write(tmp)`` on a temporary file beside ``path``, then rename it over ``path``.

    The file is flushed to disk (fsync) before the rename, so a crash leaves either the old
    file or the whole new one, never a part (common practice for atomic replacement on
    POSIX). The temporary file is removed if ``write`` fails; the result is readable by all
    (0644), as the files routeplan writes are meant to be shared.

    Parameters
    ----------
    path : str or Path
        Destination.
    write : callable
        Writes the whole content to the path it is given.

    Raises
    ------
    OutputError
        The file could not be written (no permission, read-only file system, disk full...);
        the message names ``path`` and the system's reason, and ``path`` is left as it was.
    """
    write_all_or_none({Path(path): write})


def write_all_or_none(writers: Mapping[Path, Callable[[str], Any]]) -> None:
    """Write several files all or none: each to a temporary file beside it, then the renames.

    Every file is written in full and flushed to disk (fsync) before any destination is
    touched. Then each destination that exists is copied to a hidden backup beside it, and
    the new files are renamed into place. If a write, a copy or a rename fails, the
    destinations already replaced get their backup back (or are removed if they did not
    exist), so every destination is left as it was; the temporary and backup files are
    removed in all cases. One file alone needs no backup: its rename is atomic (common
    practice for atomic replacement on POSIX). Only a crash of the machine in the middle of
    the renames can still leave some files new and others old. The files are readable by all
    (0644), as the files routeplan writes are meant to be shared.

    Parameters
    ----------
    writers : mapping of Path to callable
        Destination of each file and the function that writes its whole content to the
        path it is given.

    Raises
    ------
    OutputError
        A file could not be written or renamed (no permission, read-only file system, disk
        full...); the message names the destination and the system's reason.
    """
    staged: list[tuple[str, Path]] = []
    try:
        for path, write in writers.items():
            path = Path(path)
            try:
                fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
                os.close(fd)
                staged.append((tmp, path))
                write(tmp)
                _fsync(tmp)
                os.chmod(tmp, 0o644)  # mkstemp makes it private
            except OSError as exc:
                raise OutputError.from_os_error(exc, path) from exc
        _move_into_place(staged)
    finally:
        for tmp, _ in staged:
            with contextlib.suppress(OSError):
                os.unlink(tmp)


def _fsync(path: str) -> None:
    """Flush a written file to disk."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _move_into_place(staged: list[tuple[str, Path]]) -> None:
    """Rename each temporary file over its destination, all or none (backups of old files)."""
    if not staged:
        return
    if len(staged) == 1:  # one rename is atomic by itself
        tmp, path = staged[0]
        try:
            os.replace(tmp, path)
        except OSError as exc:
            raise OutputError.from_os_error(exc, path) from exc
        return
    backups: dict[Path, str] = {}
    replaced: list[Path] = []
    current = staged[0][1]
    try:
        for _, current in staged:
            if os.path.lexists(current):
                backups[current] = _back_up(current)
        for tmp, current in staged:
            os.replace(tmp, current)
            replaced.append(current)
    except BaseException as exc:
        _put_back(replaced, backups, exc)
        if isinstance(exc, OSError):
            raise OutputError.from_os_error(exc, current) from exc
        raise
    finally:
        for backup in backups.values():
            with contextlib.suppress(OSError):
                os.unlink(backup)


def _back_up(path: Path) -> str:
    """Copy ``path`` to a new hidden file beside it (a symbolic link is copied as a link)."""
    fd, backup = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".old", dir=path.parent)
    os.close(fd)
    try:
        if path.is_symlink():
            os.unlink(backup)
            os.symlink(os.readlink(path), backup)
        else:
            shutil.copy2(path, backup)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(backup)
        raise
    return backup


def _put_back(replaced: list[Path], backups: dict[Path, str], error: BaseException) -> None:
    """Undo the renames done so far; a backup that cannot be put back is kept and named."""
    for path in reversed(replaced):
        try:
            if path in backups:
                os.replace(backups[path], path)
                del backups[path]
            else:
                os.unlink(path)
        except OSError as exc:
            kept = backups.pop(path, None)  # kept on disk: the only copy of the old content
            where = f"its old content is in {kept}" if kept else "it holds the new content"
            error.add_note(f"{path} could not be put back ({exc.strerror or exc}); {where}")


def check_new_files(paths: list[Path | None], overwrite: bool) -> None:
    """Refuse to replace an existing file unless ``overwrite`` (the ``--overwrite`` flag).

    Raises
    ------
    InputError
    """
    if overwrite:
        return
    for path in paths:
        if path is not None and Path(path).exists():
            raise InputError("already exists; pass --overwrite to replace it", source=str(path))


def check_out_path(out: Path, inputs: list[Path]) -> None:
    """Refuse an output that would overwrite an input, land in a missing folder, or is a folder.

    Raises
    ------
    InputError
    """
    for path in inputs:
        with contextlib.suppress(OSError):
            if out.resolve() == path.resolve():
                raise InputError("--out would overwrite an input file; choose another name", source=str(out))
    folder = out.parent
    if not folder.is_dir():
        raise InputError(f"the folder {folder} does not exist", source=str(out))
    if out.is_dir():
        raise InputError("is a folder; give the name of a file to write", source=str(out))


def check_outputs(
    outputs: Mapping[str, Path | None],
    *,
    overwrite: bool,
    workspace: str | Path | None = None,
    inputs: Sequence[Path] = (),
) -> None:
    """Check every output path of a command before anything is written.

    In order: no output is a workspace database or one of its SQLite sidecars
    (:func:`routeplan.workspace.refuse_workspace_files`); no two outputs name the same file;
    none overwrites an input or lands in a missing folder (:func:`check_out_path`); and one
    already there is replaced only with ``overwrite`` (:func:`check_new_files`).

    Parameters
    ----------
    outputs : mapping of str to Path or None
        Each output's option (e.g. ``"--csv"``), for messages, and its path; None is skipped.
    overwrite : bool
        The ``--overwrite`` flag.
    workspace : str or Path, optional
        The command's workspace folder, whose database files are protected.
    inputs : sequence of Path, default=()
        Files the command reads.

    Raises
    ------
    InputError
    """
    from .workspace import refuse_workspace_files

    given = {option: Path(path) for option, path in outputs.items() if path is not None}
    refuse_workspace_files(given, workspace)
    seen: dict[Path, str] = {}
    for option, path in given.items():
        key = _resolved(path)
        if key in seen:
            raise InputError(f"{seen[key]} and {option} name the same file; give each its own name", source=str(path))
        seen[key] = option
    for path in given.values():
        check_out_path(path, list(inputs))
    check_new_files(list(given.values()), overwrite)


def _resolved(path: Path) -> Path:
    """``path`` with links followed where possible (else absolute), to compare outputs."""
    try:
        return path.resolve()
    except (OSError, RuntimeError):
        return path.absolute()
