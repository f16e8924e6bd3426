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

import csv
import hashlib
import io
import json
import math
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = [
    "Table",
    "read_table",
    "load_schema",
    "check_rows",
    "file_sha256",
    "write_csv",
    "neutralise_formula",
]

_SCHEMA_DIR = Path(__file__).resolve().parent / "schemas"
_FORMULA_LEAD = ("=", "+", "-", "@", "\t", "\r")


@dataclass(frozen=True)
class Table:
    """A file read into memory.

    Attributes
    ----------
    frame : pandas.DataFrame
        The cells as text (``None`` where empty), columns as in the header.
    source : str
        The file's name as the user gave it, for messages.
    sha256 : str
        Hex digest of the file's bytes.
    first_line : int
        Line (CSV) or row (Parquet) number of the frame's first record.
    is_text : bool
        True for CSV: messages say "line"; False for Parquet: they say "row".
    numeric : dict
        For Parquet, columns that are already numeric (kept as float arrays).
    """

    frame: pd.DataFrame
    source: str
    sha256: str
    first_line: int
    is_text: bool
    numeric: dict

    def line_of(self, position: int) -> int:
        """Line (or row) number of the record at 0-based ``position``."""
        return self.first_line + int(position)

    def fail(self, message: str, position: int | None = None) -> InputError:
        """Build the :class:`InputError` for a record (or for the whole file)."""
        line = None if position is None else self.line_of(position)
        return InputError(message, source=self.source, line=line)


def file_sha256(path: str | Path) -> str:
    """Hex sha256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def read_table(path: str | Path) -> Table:
    """Read a CSV or Parquet file into a :class:`Table`.

    Parameters
    ----------
    path : str or Path
        A ``.csv`` (UTF-8, comma separated, header on line 1) or ``.parquet`` file.

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
    data = path.read_bytes()
    sha = hashlib.sha256(data).hexdigest()
    if path.suffix.lower() in (".parquet", ".pq"):
        frame, numeric = _read_parquet(data, source)
        table = Table(frame, source, sha, 1, False, numeric)
    else:
        frame = _read_csv(data, source)
        table = Table(frame, source, sha, 2, True, {})
    _check_header(table)
    if len(table.frame) == 0:
        raise InputError("the file has a header but no records", source=source)
    return table


def _read_csv(data: bytes, source: str) -> pd.DataFrame:
    if not data.strip():
        raise InputError("the file is empty", source=source)
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise InputError(
            f"byte 0x{data[exc.start]:02x} is not UTF-8; save the file as UTF-8 and import it again",
            source=source,
            line=line,
        ) from None
    if text.startswith("\ufeff"):
        text = text[1:]
    if "\x00" in text:
        line = text[: text.index("\x00")].count("\n") + 1
        raise InputError("the file contains a NUL character", source=source, line=line)
    _check_csv_shape(text, source)
    try:
        frame = pd.read_csv(
            io.StringIO(text),
            dtype=str,
            keep_default_na=False,
            na_filter=False,
            skip_blank_lines=True,
            engine="c",
        )
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError, csv.Error) as exc:
        raise InputError(f"cannot parse the CSV: {_first_line(exc)}", source=source) from None
    frame.columns = [str(c).strip() for c in frame.columns]
    if len(frame) == 0:
        return frame
    frame = frame.apply(lambda col: col.str.strip())
    return frame.mask(frame == "")


def _check_csv_shape(text: str, source: str) -> None:
    """Check quoting and field counts with the csv module, naming the first bad line."""
    reader = csv.reader(io.StringIO(text), strict=True)
    try:
        header = next(reader)
    except StopIteration:
        raise InputError("the file is empty", source=source) from None
    except csv.Error as exc:
        raise InputError(f"cannot parse the header: {exc}", source=source, line=1) from None
    width = len(header)
    line = 1
    try:
        for row in reader:
            line = reader.line_num
            if row and len(row) != width and any(cell.strip() for cell in row):
                raise InputError(
                    f"{len(row)} fields where the header has {width}", source=source, line=line
                )
    except csv.Error as exc:
        raise InputError(f"cannot parse the CSV: {exc}", source=source, line=reader.line_num) from None


def _read_parquet(data: bytes, source: str) -> tuple[pd.DataFrame, dict]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        arrow = pq.read_table(pa.BufferReader(data))
    except Exception as exc:  # pyarrow raises several types for damaged files
        raise InputError(f"cannot read the Parquet file: {_first_line(exc)}", source=source) from None
    frame = arrow.to_pandas()
    numeric = {}
    cells = {}
    for name in frame.columns:
        column = frame[name]
        if pd.api.types.is_numeric_dtype(column) and not pd.api.types.is_bool_dtype(column):
            numeric[str(name)] = column.to_numpy(dtype=np.float64)
            cells[str(name)] = column.map(_number_text).astype(object)
        else:
            cells[str(name)] = column.map(lambda v: None if _is_missing(v) else str(v).strip() or None)
    out = pd.DataFrame(cells, columns=[str(c) for c in frame.columns])
    return out.astype(object), numeric


def _number_text(value: Any) -> str | None:
    if _is_missing(value):
        return None
    return repr(float(value)) if isinstance(value, float) else str(value)


def _is_missing(value: Any) -> bool:
    return value is None or (isinstance(value, float) and math.isnan(value)) or value is pd.NA


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
        raise InputError(
            f"missing column(s) {', '.join(repr(m) for m in missing)}; the header has "
            f"{', '.join(repr(c) for c in columns)}",
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
    empty = cells.isna().to_numpy()
    if "null" not in kinds and empty.any():
        return int(np.argmax(empty)), f"column '{name}' is empty"
    present = ~empty
    if kinds & {"number", "integer"} and "string" not in kinds:
        values = _parse_numbers(table, name)
        bad = present & ~np.isfinite(values)
        if bad.any():
            at = int(np.argmax(bad))
            return at, f"column '{name}' holds {cells.iloc[at]!r}, not a finite number"
        parsed[name] = values
        return _check_bounds(name, values, present, rule)
    text = cells.where(present, "")
    return _check_text(name, text, present, rule)


def _parse_numbers(table: Table, name: str) -> np.ndarray:
    if name in table.numeric:
        return table.numeric[name]
    cells = table.frame[name]
    values = pd.to_numeric(cells, errors="coerce").to_numpy(dtype=np.float64)
    return values


def _check_bounds(name: str, values: np.ndarray, present: np.ndarray, rule: dict) -> tuple[int, str] | None:
    tests = [
        ("minimum", lambda v, b: v < b, "below the minimum"),
        ("maximum", lambda v, b: v > b, "above the maximum"),
        ("exclusiveMinimum", lambda v, b: v <= b, "not above"),
        ("exclusiveMaximum", lambda v, b: v >= b, "not below"),
    ]
    for key, broken, words in tests:
        if key in rule:
            bad = present & broken(values, rule[key])
            if bad.any():
                at = int(np.argmax(bad))
                return at, f"column '{name}' holds {values[at]:g}, {words} {rule[key]:g}"
    return None


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
    compiled = re.compile(pattern)
    return np.fromiter((compiled.search(v) is not None for v in text), dtype=bool, count=len(text))


def _matches_any(text: pd.Series, rule: dict) -> np.ndarray:
    branches = rule.get("anyOf", [rule])
    hit = np.zeros(len(text), dtype=bool)
    for branch in branches:
        if "pattern" in branch:
            hit |= _search(text, branch["pattern"])
    return hit


# --------------------------------------------------------------------------- writing


def neutralise_formula(value: Any) -> Any:
    """Prefix a text cell that a spreadsheet would run as a formula with a quote.

    Cells that begin with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return are
    read as formulas by common spreadsheet programs (common practice: the OWASP
    guidance on CSV injection). Numbers are left alone.
    """
    if isinstance(value, str) and value.startswith(_FORMULA_LEAD):
        return "'" + value
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
    out = frame.copy()
    if neutralise:
        for name in out.columns:
            if out[name].dtype == object or pd.api.types.is_string_dtype(out[name]):
                out[name] = out[name].map(neutralise_formula)
    tmp = path.with_name(path.name + ".part")
    out.to_csv(tmp, index=False, lineterminator="\n")
    tmp.replace(path)
    return path
