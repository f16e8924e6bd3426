"""Importers: files the user brings -> checked rows -> one transaction in the workspace.

Each importer reads the whole file, checks it against its JSON Schema and against the
workspace (unknown cases or experts, labels outside the label set, conflicts with what is
stored), and only then writes, in one transaction, with one journal entry. Re-importing a cases
or answers file with the same bytes is a no-op (what they stored cannot change since); a truth,
scores or experts file with the same bytes is compared with what is stored now, since a
``--replace`` import or ``experts add`` may have changed it, and is a no-op only where nothing
differs. Any problem raises :class:`~routeplan.errors.InputError`
before anything is written. :func:`read_profiles` checks a file the same way against the
workspace but stores nothing (assumed expert accuracies, for a rehearsal).
"""

from __future__ import annotations

import itertools
import json
from collections import Counter
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Iterator, Sequence

import numpy as np
import pandas as pd

from .errors import InputError
from .files import Table, check_rows, load_schema, read_table, undo_neutralise
from .workspace import Workspace

__all__ = [
    "ImportResult",
    "import_cases",
    "import_truth",
    "import_scores",
    "SCORE_PREFIX",
    "import_experts",
    "add_expert",
    "import_answers",
    "read_profiles",
]


@dataclass
class ImportResult:
    """What an import did.

    Attributes
    ----------
    kind : str
        ``cases``, ``truth``, ``experts``, ``answers`` or ``scores``.
    source : str
        The file (or ``command line``).
    rows : int
        Records read.
    added : int
        Records written that were not stored before.
    unchanged : int
        Records already stored with the same content (skipped).
    no_op : bool
        True when the same bytes were imported before and nothing was done.
    replaced : int
        Records written over a different stored value (truth or scores imported with ``--replace``).
    seen_before : bool
        True when the same bytes were imported before. Truth, scores and experts files are
        then compared with what is stored now, which may have changed since; ``no_op`` says
        whether that changed anything.
    notes : dict
        Importer-specific counts (e.g. ``historical`` answers, ``feature_columns``).
    """

    kind: str
    source: str
    rows: int = 0
    added: int = 0
    unchanged: int = 0
    no_op: bool = False
    replaced: int = 0
    seen_before: bool = False
    notes: dict = field(default_factory=dict)

    def message(self) -> str:
        """One line for the terminal."""
        if self.no_op:
            return f"{self.source}: already imported (same bytes); nothing changed"
        noun = {"cases": "case(s)", "truth": "truth value(s)", "experts": "expert(s)", "answers": "answer(s)",
                "scores": "case score row(s)"}[self.kind]
        text = f"{self.source}: {self.added} {noun} added"
        if self.replaced:
            text += f", {self.replaced} replaced"
        if self.unchanged:
            text += f", {self.unchanged} already stored"
        extras = [f"{k.replace('_', ' ')}: {v}" for k, v in self.notes.items() if isinstance(v, int) and v]
        if self.seen_before:
            extras.append("the same bytes were imported before; the workspace has changed since, so they "
                          "were compared with what is stored now")
        return text + (f" ({'; '.join(extras)})" if extras else "")

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        return dict(self.__dict__)


# --------------------------------------------------------------------------- shared checks


def _first_duplicate(values: pd.Series) -> tuple[int, int] | None:
    """(position of a repeat, position of its first occurrence), or None."""
    dup = values.duplicated(keep="first").to_numpy()
    if not dup.any():
        return None
    at = int(np.argmax(dup))
    first = int(np.argmax((values == values.iloc[at]).to_numpy()))
    return at, first


def _check_labels_in_set(table: Table, column: str, labels: Sequence[str]) -> None:
    cells = table.frame[column]
    bad = (cells.notna() & ~cells.isin(list(labels))).to_numpy()
    if bad.any():
        at = int(np.argmax(bad))
        value = cells.iloc[at]
        alike = [label for label in labels if label.casefold() == str(value).strip().casefold()]
        hint = f"; labels are case-sensitive: did you mean {alike[0]!r}?" if len(alike) == 1 else ""
        raise table.fail(f"{column} {value!r} is not in the label set ({', '.join(labels)}){hint}", at)


def _check_known(table: Table, column: str, known: set[str], what: str, hint: str) -> None:
    cells = table.frame[column]
    bad = ~cells.isin(known).to_numpy()
    if bad.any():
        at = int(np.argmax(bad))
        raise table.fail(f"unknown {what} {cells.iloc[at]!r}; {hint}", at)


# --------------------------------------------------------------------------- cases


def import_cases(
    ws: Workspace,
    path: str | Path,
    *,
    id_column: str = "case_id",
    truth_column: str | None = None,
    group_column: str | None = None,
    feature_columns: Sequence[str] | None = None,
) -> ImportResult:
    """Import a cases file (CSV or Parquet).

    Parameters
    ----------
    ws : Workspace
    path : str or Path
    id_column : str, default="case_id"
        The column holding each case's unique id.
    truth_column : str, optional
        The column of verified outcomes (may be empty for some cases). Default: ``truth``
        if the file has such a column.
    group_column : str, optional
        A column of groups (site, shift...) used by competence tables; not a feature.
    feature_columns : sequence of str, optional
        The feature columns, each named once. Default: every other column whose cells are all
        numbers. The first import fixes the feature columns; later imports must carry the same
        ones, and may name them again only as the same set.

    Returns
    -------
    ImportResult

    Raises
    ------
    InputError
        If the file or the options are not valid, among others when one column is given two
        roles (id, truth, group, feature), or the feature columns differ from those stored.
    """
    table = read_table(path, text_columns=tuple(c for c in (id_column, truth_column or "truth", group_column) if c))
    result = ImportResult("cases", table.source)
    columns = list(table.frame.columns)
    truth_by_default = truth_column is None and "truth" in columns
    if truth_by_default:
        truth_column = "truth"
    options = {"id_column": id_column, "truth_column": truth_column, "group_column": group_column,
               "feature_columns": None if feature_columns is None else list(feature_columns)}
    stored_features = ws.feature_columns
    _check_roles(table, options, truth_by_default=truth_by_default, stored_features=stored_features)
    prior = ws.input_detail("cases import", table.sha256)
    if prior is not None:
        _check_same_options(table, options, prior.get("options"))
        result.no_op = True
        return result
    mapping = {id_column: "case_id"}
    for option, name, target in (("--truth-column", truth_column, "truth"), ("--group-column", group_column, "group")):
        if name is not None:
            if name not in columns:
                raise InputError(f"{option} names '{name}', which is not in the header", source=table.source, line=1)
            mapping[name] = target
    if id_column not in columns:
        raise InputError(
            f"missing id column '{id_column}' (use --id-column to name another); the header has "
            f"{', '.join(repr(c) for c in columns)}",
            source=table.source,
            line=1,
        )
    clash = [c for c in ("case_id", "truth", "group") if c in columns and c not in mapping]
    if clash:
        raise InputError(f"column '{clash[0]}' is reserved; rename it or map it with an option", source=table.source, line=1)
    table = table.renamed(mapping)
    features = _choose_features(stored_features, table, feature_columns)
    parsed = check_rows(table, load_schema("cases-row"), numeric_columns=tuple(features))
    frame = table.frame
    dup = _first_duplicate(frame["case_id"])
    if dup:
        at, first = dup
        raise table.fail(f"duplicate case_id {frame['case_id'].iloc[at]!r} (first on line {table.line_of(first)})", at)
    if "truth" in frame.columns:
        _check_labels_in_set(table, "truth", ws.labels)
    stored = ws.existing_case_ids(frame["case_id"].tolist())
    if stored:
        at = int(np.argmax(frame["case_id"].isin(stored).to_numpy()))
        raise table.fail(f"case_id {frame['case_id'].iloc[at]!r} is already in the workspace", at)
    X = np.column_stack([parsed.pop(name) for name in features]).astype("<f8", copy=False)
    with ws.transaction():
        if not ws.feature_columns:
            ws.set_feature_columns(features)
        ws.add_cases(_case_rows(frame, X, features, ws.next_batch()))
        ws.log("cases import", {"rows": len(frame), "features": features, "options": options},
               input_file=table.source, input_sha256=table.sha256)
    result.rows = result.added = len(frame)
    result.notes = {
        "feature_columns": features,
        "with_truth": int(frame["truth"].notna().sum()) if "truth" in frame.columns else 0,
    }
    return result


_CASE_OPTIONS = {"id_column": "--id-column", "truth_column": "--truth-column",
                 "group_column": "--group-column", "feature_columns": "--feature-columns"}


def _check_same_options(table: Table, options: dict, before: dict | None) -> None:
    """A file imported again with the same bytes must name real columns and, where the
    first import recorded its options, the same ones: a second import changes nothing,
    so other options would be silently ignored."""
    columns = set(table.frame.columns)
    named = [options["id_column"], options["truth_column"], options["group_column"],
             *(options["feature_columns"] or [])]
    missing = [c for c in named if c is not None and c not in columns]
    if missing:
        raise InputError(f"'{missing[0]}' is not in the header", source=table.source, line=1)
    if before is None:
        return
    changed = [flag for key, flag in _CASE_OPTIONS.items() if options.get(key) != before.get(key)]
    if changed:
        raise InputError(
            f"this file was already imported (same bytes) with other {', '.join(changed)}; importing "
            "it again changes nothing, so its cases keep the columns of the first import (to read "
            "them differently, start a new workspace with 'routeplan init')", source=table.source)


def _check_roles(table: Table, options: dict, *, truth_by_default: bool, stored_features: Sequence[str]) -> None:
    """Refuse a column given two roles (id, truth, group, feature): one of them would be lost.

    The feature role is that of ``--feature-columns`` when given, else that of the features
    the workspace stores (later imports read those).
    """
    truth_flag = "by default, as the header has 'truth'" if truth_by_default else "--truth-column"
    roles = [(options["id_column"], "id column (--id-column)"),
             (options["truth_column"], f"truth column ({truth_flag})"),
             (options["group_column"], "group column (--group-column)")]
    requested = options["feature_columns"]
    whose = "--feature-columns" if requested else "the workspace's feature columns"
    roles += [(name, f"feature column ({whose})") for name in dict.fromkeys(requested or stored_features)]
    seen: dict[str, str] = {}
    for name, role in roles:
        if name is None:
            continue
        if name in seen:
            raise InputError(f"column '{name}' is given two roles, {seen[name]} and {role}; give each column "
                             "one role only", source=table.source, line=1)
        seen[name] = role


def _choose_features(fixed: Sequence[str], table: Table, requested: Sequence[str] | None) -> list[str]:
    """The feature columns: ``fixed`` (the workspace's, if any), else ``requested``, else the numeric ones."""
    frame = table.frame
    candidates = [c for c in frame.columns if c not in ("case_id", "truth", "group")]
    repeated = [name for name, count in Counter(requested or ()).items() if count > 1]
    if repeated:
        raise InputError(f"--feature-columns names '{repeated[0]}' more than once; name each feature column once",
                         source=table.source, line=1)
    if fixed and requested and set(requested) != set(fixed):
        raise InputError(f"--feature-columns {','.join(requested)} differs from the workspace's feature columns "
                         f"{','.join(fixed)} (fixed by the first cases import); name those or leave the option out",
                         source=table.source, line=1)
    wanted = list(fixed) if fixed else (list(requested) if requested else None)
    if wanted is not None:
        missing = [c for c in wanted if c not in frame.columns]
        if missing:
            why = "the workspace's feature columns" if fixed else "--feature-columns"
            raise InputError(f"missing feature column(s) {', '.join(repr(m) for m in missing)} ({why})", source=table.source, line=1)
        return wanted
    chosen = []
    for name in candidates:
        if name in table.numeric:
            chosen.append(name)
            continue
        cells = frame[name]
        present = ~table.empty[name]
        numbers = pd.to_numeric(cells, errors="coerce").notna().to_numpy()
        if present.any() and (numbers | ~present).all():
            chosen.append(name)
        elif numbers[present].mean() >= 0.9 if present.any() else False:
            at = int(np.argmax(present & ~numbers))
            raise table.fail(f"column '{name}' holds {cells.iloc[at]!r} among numbers; fix the value or pass --feature-columns", at)
    if not chosen:
        raise InputError("no numeric feature columns found; pass --feature-columns", source=table.source, line=1)
    return chosen


def _case_rows(frame: pd.DataFrame, X: np.ndarray, features: list[str], batch: int) -> Iterator[tuple]:
    """Rows for the cases table, made one at a time (a million cases stay light)."""
    display_cols = [c for c in frame.columns if c not in ("case_id", "truth", "group") and c not in features]
    n = len(frame)
    truth = frame["truth"].tolist() if "truth" in frame.columns else [None] * n
    group = frame["group"].tolist() if "group" in frame.columns else [None] * n
    if display_cols:
        records = frame[display_cols].to_dict(orient="records")
        display = (json.dumps({k: v for k, v in r.items() if v is not None and v == v}) for r in records)
    else:
        display = itertools.repeat(None, n)
    blobs = (row.tobytes() for row in X)
    return zip(frame["case_id"].tolist(), _none(truth), _none(group), blobs, display, itertools.repeat(batch, n))


def _none(values: list) -> list:
    return [None if (v is None or v != v) else v for v in values]


# --------------------------------------------------------------------------- truth


def import_truth(ws: Workspace, path: str | Path, *, replace: bool = False) -> ImportResult:
    """Import verified outcomes (columns ``case_id``, ``truth``).

    Parameters
    ----------
    ws : Workspace
    path : str or Path
    replace : bool, default=False
        Allow changing a truth already stored (otherwise a conflict is an error).

    Returns
    -------
    ImportResult
    """
    table = read_table(path, text_columns=("case_id", "truth"))
    result = ImportResult("truth", table.source)
    seen = ws.seen_input("truth import", table.sha256)  # stored truth may have changed since: compare
    check_rows(table, load_schema("truth-row"))
    frame = table.frame
    _check_labels_in_set(table, "truth", ws.labels)
    _check_pair_conflicts(table, ["case_id"], "truth")
    frame = frame.drop_duplicates()
    stored = ws.stored_truth(frame["case_id"].tolist())
    _check_known(table, "case_id", set(stored), "case", "import it with 'routeplan cases import' first")
    changes = []
    for position, (case_id, truth) in zip(frame.index, zip(frame["case_id"], frame["truth"])):
        old = stored[case_id]
        if old == truth:
            result.unchanged += 1
            continue
        if old is not None and not replace:
            raise table.fail(f"truth {truth!r} for case {case_id!r} conflicts with the stored {old!r} (use --replace to change it)", position)
        result.replaced += old is not None
        changes.append((case_id, truth))
    result.rows = len(table.frame)
    if changes:
        with ws.transaction():
            ws.set_truth(changes)
            ws.log("truth import", {"rows": result.rows, "changed": len(changes), "replaced": result.replaced},
                   input_file=table.source, input_sha256=table.sha256)
    result.added = len(changes) - result.replaced
    return _mark_seen(result, seen, changed=bool(changes))


def _mark_seen(result: ImportResult, seen: bool, *, changed: bool) -> ImportResult:
    """Flag a file whose bytes were imported before: a no-op if it changed nothing this time."""
    result.no_op = seen and not changed
    result.seen_before = seen and changed
    return result


# --------------------------------------------------------------------------- imported scores

#: Prefix of the class-probability columns: ``proba_<label>`` (scores files and route inputs).
SCORE_PREFIX = "proba_"
#: How far a row's probabilities may sum from 1 before the row is refused.
_SUM_TOLERANCE = 1e-3


def score_columns(labels: Sequence[str]) -> list[str]:
    """The class-probability column of every label, in label order."""
    return [SCORE_PREFIX + label for label in labels]


def import_scores(ws: Workspace, path: str | Path, *, replace: bool = False) -> ImportResult:
    """Import the team's own model's class probabilities (two-stage learning to defer).

    The file has ``case_id`` and one column ``proba_<label>`` per label of the workspace
    (``schemas/scores-row.schema.json``). ``routeplan fit`` then keeps that model and
    learns only the routing (two-stage learning to defer: Mao, Mohri & Zhong, NeurIPS
    2023) when every case with truth has scores.

    Parameters
    ----------
    ws : Workspace
    path : str or Path
    replace : bool, default=False
        Allow changing probabilities already stored (otherwise a change is an error).

    Returns
    -------
    ImportResult
    """
    table = read_table(path, text_columns=("case_id",))
    result = ImportResult("scores", table.source)
    seen = ws.seen_input("scores import", table.sha256)  # stored scores may have changed since: compare
    wanted = score_columns(ws.labels)
    columns = list(table.frame.columns)
    missing = [c for c in wanted if c not in columns]
    unknown = [c for c in columns if c != "case_id" and c not in wanted]
    if missing or unknown:
        problem = (f"missing column(s) {', '.join(map(repr, missing))}" if missing
                   else f"unknown column(s) {', '.join(map(repr, unknown))}")
        raise InputError(f"{problem}; a scores file has 'case_id' and one column per label: "
                         f"{', '.join(map(repr, wanted))}", source=table.source, line=1)
    parsed = check_rows(table, load_schema("scores-row"))
    P = np.column_stack([parsed[c] for c in wanted]) if len(table.frame) else np.zeros((0, len(wanted)))
    sums = P.sum(axis=1)
    off = np.abs(sums - 1.0) > _SUM_TOLERANCE
    if off.any():
        at = int(np.argmax(off))
        raise table.fail(f"the probabilities of case {table.frame['case_id'].iloc[at]!r} sum to {sums[at]:.6g}, "
                         f"not 1 (within {_SUM_TOLERANCE:g})", at)
    dup = _first_duplicate(table.frame["case_id"])
    if dup is not None:
        raise table.fail(f"case {table.frame['case_id'].iloc[dup[0]]!r} appears again (first on line "
                         f"{table.line_of(dup[1])})", dup[0])
    ids = table.frame["case_id"].tolist()
    _check_known(table, "case_id", ws.existing_case_ids(ids), "case", "import it with 'routeplan cases import' first")
    P = P / sums[:, None]
    stored = ws.score_matrix(ids)
    had = ~np.isnan(stored).any(axis=1)
    same = had & np.all(np.abs(stored - P) <= 1e-12, axis=1)
    changed = had & ~same
    if changed.any() and not replace:
        at = int(np.argmax(changed))
        raise table.fail(f"case {ids[at]!r} already has other imported probabilities (use --replace to change "
                         "them; the routers fitted on the old ones stay as they are)", at)
    write = np.flatnonzero(~same)
    result.rows = len(ids)
    result.unchanged = int(same.sum())
    result.replaced = int(changed.sum())
    if write.size:
        with ws.transaction():
            ws.set_scores([(ids[i], P[i].astype("<f8").tobytes()) for i in write], source_sha256=table.sha256)
            ws.log("scores import", {"rows": result.rows, "written": int(write.size),
                                     "replaced": int(changed.sum())},
                   input_file=table.source, input_sha256=table.sha256)
    result.added = int(write.size - changed.sum())
    return _mark_seen(result, seen, changed=bool(write.size))


def _check_pair_conflicts(table: Table, keys: list[str], value: str) -> None:
    """Refuse rows that repeat a key with a different value (identical repeats are fine)."""
    frame = table.frame
    distinct = frame.drop_duplicates(subset=keys + [value])
    clash = distinct.duplicated(subset=keys, keep="first")
    if clash.any():
        at = distinct.index[int(np.argmax(clash.to_numpy()))]
        row = frame.loc[at]
        key_text = ", ".join(f"{k} {row[k]!r}" for k in keys)
        mask = np.ones(len(frame), dtype=bool)
        for k in keys:
            mask &= (frame[k] == row[k]).to_numpy()
        first = int(np.argmax(mask))
        raise table.fail(
            f"conflicting {value} for {key_text}: {_shown(row[value])} here, {_shown(frame[value].iloc[first])} "
            f"on line {table.line_of(first)}",
            int(at),
        )


def _shown(value: object) -> str:
    """A cell for a message: text quoted, numbers plain (not numpy's ``np.float64(0.8)``)."""
    return repr(value) if isinstance(value, str) else f"{value:g}" if isinstance(value, (int, float, np.number)) else repr(value)


# --------------------------------------------------------------------------- experts


def import_experts(ws: Workspace, path: str | Path) -> ImportResult:
    """Import several experts from a CSV or Parquet file (columns ``name``, ``fee``, ``capacity``).

    Existing experts get the file's fee, and its capacity where the file gives one (with
    no ``capacity`` column or an empty cell they keep their own; a new expert gets 1).

    Returns
    -------
    ImportResult
    """
    table = read_table(path, text_columns=("name",))
    result = ImportResult("experts", table.source)
    seen = ws.seen_input("experts import", table.sha256)  # fees may have changed since ('experts add'): compare
    parsed = check_rows(table, load_schema("experts-row"))
    dup = _first_duplicate(table.frame["name"])
    if dup:
        at, first = dup
        raise table.fail(f"expert {table.frame['name'].iloc[at]!r} appears twice (first on line {table.line_of(first)})", at)
    capacity = parsed.get("capacity", np.full(len(table.frame), np.nan))
    rows = [
        (name, float(fee), None if np.isnan(cap) else float(cap))
        for name, fee, cap in zip(table.frame["name"], parsed["fee"], capacity)
    ]
    result = _store_experts(ws, rows, result, "experts import", table.source, table.sha256)
    return _mark_seen(result, seen, changed=result.added + result.notes["updated"] > 0)


def add_expert(ws: Workspace, name: str, *, fee: float | None = None,
               capacity: float | None = None) -> ImportResult:
    """Add one expert, or change the fee and/or capacity of one already there.

    Parameters
    ----------
    ws : Workspace
    name : str
        Safe as a file name (letters, digits, ``_ . -``; no ``..``), not ``model``.
    fee : float, optional
        Fee per case, >= 0, in the unit of budgets. Needed for a new expert; None keeps
        an existing expert's fee.
    capacity : float, optional
        Largest share of routed cases the expert may take, in [0, 1]. None keeps an
        existing expert's capacity (a new expert gets 1).
    """
    shown_fee = 0.0 if fee is None else float(fee)  # placeholders only for the checks
    shown_cap = 1.0 if capacity is None else float(capacity)
    frame = pd.DataFrame({"name": [name], "fee": [repr(shown_fee)], "capacity": [repr(shown_cap)]}, dtype=object)
    table = Table(frame, "command line", "", False, {}, {})
    try:
        check_rows(table, load_schema("experts-row"))
    except InputError as exc:
        raise InputError(_option_words(exc.message)) from None
    if fee is None and name not in {e["name"] for e in ws.experts()}:  # first: --capacity alone would not do
        raise InputError(f"expert {name!r} is new: give its --fee (and, if you like, --capacity)")
    if fee is None and capacity is None:
        raise InputError(f"give --fee, --capacity or both to change expert {name!r}")
    result = ImportResult("experts", "command line")
    row = (name, None if fee is None else float(fee), None if capacity is None else float(capacity))
    return _store_experts(ws, [row], result, "experts add", None, None)


def _option_words(message: str) -> str:
    for column, words in (("name", "expert name"), ("fee", "--fee"), ("capacity", "--capacity")):
        message = message.replace(f"column '{column}' holds", f"{words} is").replace(f"column '{column}'", words)
    return message


def _store_experts(ws, rows, result, command, source, sha) -> ImportResult:
    with ws.transaction():
        added, updated = ws.upsert_experts(rows)
        if added or updated:
            ws.log(command, {"experts": [list(r) for r in rows]}, input_file=source, input_sha256=sha)
    result.rows = len(rows)
    result.added = added
    result.unchanged = len(rows) - added - updated
    result.notes = {"updated": updated}
    return result


# --------------------------------------------------------------------------- answers


def import_answers(ws: Workspace, paths: Sequence[str | Path], *, strict: bool = False) -> list[ImportResult]:
    """Import answer files (columns ``case_id``, ``expert``, ``answer``), all or nothing.

    An answer to an assignment is linked to it (its round and selection probability),
    also when its round was closed since: the assignment then counts as answered, not
    expired, and the import counts the answer as late. Answers that no round asked for
    are stored as historical: no selection probability, kept out of the unbiased audit
    estimates.

    Parameters
    ----------
    ws : Workspace
    paths : sequence of str or Path
    strict : bool, default=False
        Refuse answers that no assignment asked for.

    Returns
    -------
    list of ImportResult
        One per file, in order.
    """
    plans = []
    claimed: dict[tuple[str, str], tuple[str, str, int]] = {}
    known = _AnswerContext(ws.labels, {e["name"] for e in ws.experts()}, ws.sheet_columns(),
                           ws.closed_round_ids())  # read once for every file
    for path in paths:
        table = read_table(path, text_columns=("case_id", "expert", "answer"))
        result = ImportResult("answers", table.source)
        if ws.seen_input("answers import", table.sha256):
            result.no_op = True
            plans.append((result, table, []))
            continue
        plans.append((result, table, _plan_answers(ws, table, known, claimed, strict, result)))
    if any(rows for _, _, rows in plans):
        with ws.transaction():
            for result, table, rows in plans:
                if rows:
                    ws.add_answers(rows, source_file=table.source, source_sha256=table.sha256)
                    ws.log("answers import", {"rows": result.rows, "added": len(rows), **result.notes},
                           input_file=table.source, input_sha256=table.sha256)
    return [result for result, _, _ in plans]


@dataclass(frozen=True)
class _AnswerContext:
    """What checking an answers file needs from the workspace, read once per import."""

    labels: Sequence[str]
    experts: set[str]
    sheet_columns: set[str]
    closed_rounds: set[int]


def _sheet_as_answers(table: Table, sheet_columns: set[str]) -> tuple[Table, int]:
    """Accept a filled sheet from ``round export``: drop its display columns and blank answers.

    Columns that a sheet may show (``sheet_columns``) are dropped; rows with an
    empty answer (not answered yet) are skipped; the apostrophe that export puts before
    formula-looking cells is removed. Returns the table and the number of blank rows.
    """
    frame = table.frame
    keep = [c for c in frame.columns if c not in sheet_columns or c in ("case_id", "expert", "answer")]
    blank = table.empty["answer"] if "answer" in table.empty else np.zeros(len(frame), dtype=bool)
    if len(keep) < len(frame.columns) or blank.any():
        table = table.take(np.flatnonzero(~blank), keep)
    for column in ("case_id", "answer"):
        if column in table.frame.columns:
            table.frame[column] = table.frame[column].map(undo_neutralise)
    return table, int(blank.sum())


def _plan_answers(ws, table, known: _AnswerContext, claimed, strict, result) -> list[tuple]:
    blank = 0
    if "answer" in table.frame.columns:
        table, blank = _sheet_as_answers(table, known.sheet_columns)
        if len(table.frame) == 0:
            raise table.fail("every answer cell is empty; fill in the answer column first")
    check_rows(table, load_schema("answers-row"))
    frame = table.frame
    _check_known(table, "expert", known.experts, "expert", "add it with 'routeplan experts add NAME --fee F'")
    _check_labels_in_set(table, "answer", known.labels)
    _check_pair_conflicts(table, ["case_id", "expert"], "answer")
    known_cases = ws.existing_case_ids(frame["case_id"].unique().tolist())
    _check_known(table, "case_id", known_cases, "case", "import it with 'routeplan cases import' first")
    unique = frame.drop_duplicates()
    keys = list(zip(unique["case_id"], unique["expert"]))
    stored = ws.stored_answers(keys)
    asked = ws.open_assignments(keys)
    rows = []
    historical = late = 0
    for position, key, answer in zip(unique.index, keys, unique["answer"]):
        if key in stored:
            if stored[key] != answer:
                raise table.fail(f"answer {answer!r} of {key[1]!r} on case {key[0]!r} conflicts with the stored {stored[key]!r}", int(position))
            result.unchanged += 1
            continue
        if key in claimed:
            other_source, other_answer, other_line = claimed[key]
            if other_answer != answer:
                raise table.fail(f"answer {answer!r} of {key[1]!r} on case {key[0]!r} conflicts with {other_answer!r} in {other_source} line {other_line}", int(position))
            result.unchanged += 1
            continue
        claimed[key] = (table.source, answer, table.line_of(int(position)))
        link = asked.get(key)
        if link is None:
            if strict:
                raise table.fail(f"no round asked {key[1]!r} about case {key[0]!r} (--strict refuses answers nobody asked for)", int(position))
            historical += 1
            rows.append((key[0], key[1], answer, None, None))
        else:
            late += link[1] in known.closed_rounds
            rows.append((key[0], key[1], answer, link[1], link[0]))
    result.rows = len(frame)
    result.added = len(rows)
    result.notes = {"historical": historical, "linked_to_assignments": len(rows) - historical,
                    "late_for_closed_rounds": late,
                    "repeated_rows": len(frame) - len(unique), "left_blank": blank}
    return rows


# --------------------------------------------------------------------------- assumed profiles


def read_profiles(path: str | Path, labels: Sequence[str], experts: Sequence[str]) -> np.ndarray:
    """Read assumed expert profiles (columns ``expert``, ``accuracy``, optional ``label``).

    Each row says how likely the expert's answer is right on cases whose truth is ``label``;
    a row with an empty label covers every label that has no row of its own for that
    expert. Nothing is stored: the matrix feeds a rehearsal on the workspace's own cases
    (:func:`routeplan.rehearse.scenario_from_workspace`).

    Parameters
    ----------
    path : str or Path
        CSV or Parquet, validated against ``schemas/profiles-row.schema.json``.
    labels, experts : sequence of str
        The workspace's label set and experts.

    Returns
    -------
    ndarray of shape (n_experts, n_labels)
        ``accuracy[j, k]``: P(expert j right | truth k).

    Raises
    ------
    InputError
        A row naming an unknown expert or label, an accuracy outside [0, 1], a repeated
        (expert, label) with another accuracy, or an expert or label left without one.
    """
    table = read_table(path, text_columns=("expert", "label"))
    parsed = check_rows(table, load_schema("profiles-row"))
    frame = table.frame.assign(accuracy=parsed["accuracy"])
    if "label" not in frame.columns:
        frame = frame.assign(label=None)
    table = replace(table, frame=frame)
    _check_known(table, "expert", set(experts), "expert", "add it with 'routeplan experts add' or fix the name")
    _check_labels_in_set(table, "label", labels)
    keyed = frame.assign(label=frame["label"].fillna(""))
    _check_pair_conflicts(replace(table, frame=keyed), ["expert", "label"], "accuracy")
    accuracy = np.full((len(experts), len(labels)), np.nan)
    row_of = {name: j for j, name in enumerate(experts)}
    col_of = {name: k for k, name in enumerate(labels)}
    for expert, label, value in zip(keyed["expert"], keyed["label"], keyed["accuracy"]):
        if label == "":
            continue
        accuracy[row_of[expert], col_of[label]] = value
    for expert, label, value in zip(keyed["expert"], keyed["label"], keyed["accuracy"]):
        if label == "":
            row = accuracy[row_of[expert]]
            row[np.isnan(row)] = value
    missing = np.argwhere(np.isnan(accuracy))
    if missing.size:
        j, k = missing[0]
        raise InputError(f"no assumed accuracy for expert {experts[j]!r} on label {labels[k]!r}; add a row "
                         f"'{experts[j]},{labels[k]},ACCURACY' or one with an empty label for all its labels",
                         source=table.source)
    return accuracy
