"""Freezing a fitted router into a policy file, and routing new cases with that file.

Two halves, one per command:

- :func:`freeze_workspace` (``routeplan freeze``) takes the chosen router of a workspace,
  scores its held-out validation cases, solves the capacity LP there
  (:func:`routeplan.routing.capacity_lp`) for one dual price per expert, measures the
  *deployed* rule (priced routing with streaming caps) on those cases with 95% intervals,
  and writes everything as one policy file (:func:`routeplan.policy.write_policy`) plus a
  Markdown policy card (:func:`policy_card`).
- :func:`route_file` (``routeplan route``) reads a policy and a cases file, checks both,
  scores the cases chunk by chunk and routes them: by default to the option of least
  ``expected cost + price`` with the caps held by a running count
  (:func:`routeplan.routing.route_with_prices`); with ``exact=True`` by the LP of the
  whole batch (:func:`routeplan.routing.route_exact`). It needs no workspace.

The core, :func:`route_frame`, is a pure function of a :class:`pandas.DataFrame` (no caps:
caps are a property of a batch), so it runs unchanged on a partitioned engine::

    import dask.dataframe as dd
    from routeplan.freezing import decision_columns, route_frame
    from routeplan.policy import read_policy

    manifest, arrays = read_policy("policy.json")
    cases = dd.read_parquet("cases/*.parquet")
    decisions = cases.map_partitions(route_frame, manifest, arrays,
                                     meta=decision_columns(manifest))
    decisions.to_parquet("decisions/")

Design choices (written down here, as DESIGN.md asks):

- Fees come from the router (the costs it learned include them). Capacities come from the
  workspace at freeze time, so ``experts add NAME --capacity C`` followed by ``freeze``
  applies the new cap without refitting; a fee changed since ``fit`` is reported, as the
  router must then be fitted again.
- The metrics are those of the deployed rule on the fit's selection cases, which the
  router never trained on. The prices are fitted on the same cases, so the capped figures
  are slightly optimistic; the card says so. Per case, the cost is *realised* (truth and,
  for an expert, the expert's answer known), *imputed* (truth known, the routed expert's
  answer not: its expected cost given the truth from the router's correctness model) or
  *expected* (no truth: the router's own estimate); the manifest's ``notes`` give the
  shares of each.
- Intervals: Wilson score intervals for accuracy, coverage and workload shares (Wilson,
  JASA 1927); a normal interval for the mean cost (common practice), clipped at 0 since
  no cost is negative.
- CSV decision files neutralise cells that a spreadsheet would run as a formula
  (:func:`routeplan.files.neutralise_formula`), case ids included; the summary counts such
  ids. Parquet keeps them verbatim.
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterator, Mapping

import numpy as np
import pandas as pd

from .errors import InputError

__all__ = [
    "DEFAULT_SCORE_CHUNK",
    "FreezeResult",
    "Policy",
    "RouteResult",
    "decision_columns",
    "freeze_workspace",
    "load_policy",
    "policy_card",
    "route_file",
    "route_frame",
]

#: Cases scored at once by :func:`route_file` (bounds the memory of the scoring step).
DEFAULT_SCORE_CHUNK = 65_536
#: Confidence level of every interval in the manifest.
CONFIDENCE = 0.95
MODEL_ROUTE = "model"
_PARQUET = (".parquet", ".pq")
_FORMULA_LEAD = ("=", "+", "-", "@", "\t", "\r")


# --------------------------------------------------------------------------- the policy in memory


@dataclass(frozen=True)
class Policy:
    """A policy file's content, checked and ready to score cases.

    Build it with :func:`load_policy` or :meth:`from_parts`.

    Attributes
    ----------
    manifest : dict
    arrays : dict of str to ndarray
    router : fitted router
        Rebuilt once from the arrays (:func:`routeplan.learner.router_from_arrays`).
    spec : FeatureSpec
    labels : list of str
    experts : list of str
    prices : ndarray of shape (M,)
    capacities : ndarray of shape (M,)
        ``inf`` where the manifest says no cap (null).
    """

    manifest: dict
    arrays: dict
    router: Any
    spec: Any
    labels: list
    experts: list
    prices: np.ndarray
    capacities: np.ndarray

    @property
    def n_classes(self) -> int:
        """Number of labels K."""
        return len(self.labels)

    @property
    def option_names(self) -> list[str]:
        """Route name of every option: ``model`` for the K class options, then the experts."""
        return [MODEL_ROUTE] * self.n_classes + list(self.experts)

    @classmethod
    def from_parts(cls, manifest: Mapping[str, Any], arrays: Mapping[str, np.ndarray], *,
                   source: str | None = None) -> "Policy":
        """Check a manifest and its arrays against each other and rebuild the router.

        Parameters
        ----------
        manifest : mapping
            As returned by :func:`routeplan.policy.read_policy`.
        arrays : mapping of str to ndarray
        source : str, optional
            The file, for messages.

        Returns
        -------
        Policy

        Raises
        ------
        InputError
            If the router cannot be rebuilt or disagrees with the manifest.
        """
        from .features import FeatureSpec
        from .learner import router_from_arrays

        manifest = dict(manifest)
        router_info = manifest.get("router", {})
        meta = router_info.get("meta")
        if not isinstance(meta, Mapping):
            raise InputError("the policy's router has no 'meta' description; freeze it again", source=source)
        try:
            router = router_from_arrays(dict(arrays), meta)
        except Exception as exc:  # a damaged but re-hashed file: any failure is bad input
            raise InputError(f"the policy's router cannot be rebuilt ({type(exc).__name__}: "
                             f"{str(exc).splitlines()[0] if str(exc) else ''}); freeze it again",
                             source=source) from None
        feats = manifest["features"]
        d = len(feats["names"])
        spec = FeatureSpec(tuple(feats["names"]), tuple(feats["means"]), tuple(feats["scales"]),
                           tuple(feats.get("lows", [-math.inf] * d)), tuple(feats.get("highs", [math.inf] * d)))
        experts = [e["name"] for e in manifest["experts"]]
        sizes = (router.n_features_in_, router.n_classes_, router.n_experts_)
        if sizes != (d, len(manifest["labels"]), len(experts)) or len(spec.lows) != d or len(spec.highs) != d:
            raise InputError(
                f"the policy's router expects {sizes[0]} features, {sizes[1]} labels and {sizes[2]} experts, "
                f"but the manifest lists {d}, {len(manifest['labels'])} and {len(experts)}; freeze it again",
                source=source)
        if getattr(router, "two_stage_", False):
            raise InputError("the policy's router needs the team's own class probabilities (two-stage); "
                             "route cannot score cases with it", source=source)
        prices = np.array([float(e["price"]) for e in manifest["experts"]], dtype=np.float64)
        caps = np.array([math.inf if e["capacity"] is None else float(e["capacity"])
                         for e in manifest["experts"]], dtype=np.float64)
        return cls(manifest, dict(arrays), router, spec, list(manifest["labels"]), experts, prices, caps)


def load_policy(path: str | os.PathLike) -> Policy:
    """Read, verify (sha256, format version, schema) and rebuild a policy file.

    Parameters
    ----------
    path : str or path-like

    Returns
    -------
    Policy

    Raises
    ------
    InputError
        One line naming the file, if anything about it is wrong.
    """
    from .policy import read_policy

    manifest, arrays = read_policy(path)
    return Policy.from_parts(manifest, arrays, source=str(path))


def decision_columns(manifest: Mapping[str, Any]) -> pd.DataFrame:
    """An empty decisions frame with the right columns and dtypes (Dask's ``meta``).

    Columns: ``case_id``, ``route``, ``label``, ``expected_cost``, then
    ``cost_model:<label>`` per label and ``cost_<expert>`` per expert
    (``schemas/decisions-row.schema.json``).

    Parameters
    ----------
    manifest : mapping

    Returns
    -------
    pandas.DataFrame
    """
    frame = pd.DataFrame({"case_id": pd.Series([], dtype=object), "route": pd.Series([], dtype=object),
                          "label": pd.Series([], dtype=object),
                          "expected_cost": pd.Series([], dtype=np.float64)})
    for name in _cost_columns(manifest["labels"], [e["name"] for e in manifest["experts"]]):
        frame[name] = pd.Series([], dtype=np.float64)
    return frame


def _cost_columns(labels: list, experts: list) -> list[str]:
    """Names of the per-option cost columns."""
    return [f"cost_model:{label}" for label in labels] + [f"cost_{name}" for name in experts]


# --------------------------------------------------------------------------- scoring


def _score(policy: Policy, X: np.ndarray) -> np.ndarray:
    """Expected cost of every option for raw feature rows, shape (n, K + M)."""
    if X.shape[0] == 0:
        return np.zeros((0, policy.n_classes + len(policy.experts)))
    return np.asarray(policy.router.predict_costs(policy.spec.transform(X)), dtype=np.float64)


def _decisions(policy: Policy, case_ids: Any, costs: np.ndarray, routes: np.ndarray,
               index: Any = None) -> pd.DataFrame:
    """The decisions frame from expected costs and chosen options."""
    names = np.asarray(policy.option_names, dtype=object)
    labels = np.asarray(list(policy.labels) + [""] * len(policy.experts), dtype=object)
    rows = np.arange(routes.shape[0])
    columns: dict[str, Any] = {
        "case_id": (case_ids if isinstance(case_ids, pd.api.extensions.ExtensionArray)
                    else np.asarray(case_ids, dtype=object)),
        "route": names[routes],
        "label": labels[routes],
        "expected_cost": costs[rows, routes] if routes.size else np.zeros(0),
    }
    for j, name in enumerate(_cost_columns(policy.labels, policy.experts)):
        columns[name] = costs[:, j]
    return pd.DataFrame(columns, index=index)


def route_frame(frame: pd.DataFrame, manifest: Mapping[str, Any], arrays: Mapping[str, np.ndarray], *,
                id_column: str = "case_id", policy: Policy | None = None) -> pd.DataFrame:
    """Route the cases of a DataFrame with a frozen policy (no capacity caps).

    Each case goes to the option of least ``expected cost + price`` (the experts' dual
    prices from the manifest); ties go to the model. This is a pure function of its inputs,
    row by row, so any partition of the rows gives the same decisions: it is the function
    to map over the partitions of a Dask (or similar) DataFrame. Caps are a property of a
    batch; :func:`route_file` holds them.

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per case: ``id_column`` and every feature column the policy names (other
        columns are ignored).
    manifest : mapping
        The policy's manifest (:func:`routeplan.policy.read_policy`).
    arrays : mapping of str to ndarray
        The policy's arrays.
    id_column : str, default="case_id"
    policy : Policy, optional
        The same policy already rebuilt (skips rebuilding the router on every call).

    Returns
    -------
    pandas.DataFrame
        One row per input row, same order and index; columns as :func:`decision_columns`.

    Raises
    ------
    InputError
        If a column is missing or a feature value is not a finite number.
    """
    policy = policy if policy is not None else Policy.from_parts(manifest, arrays)
    names = list(policy.spec.names)
    missing = [c for c in [id_column, *names] if c not in frame.columns]
    if missing:
        raise InputError(f"missing column(s) {', '.join(repr(m) for m in missing)}")
    if frame[id_column].isna().any():
        at = int(np.argmax(frame[id_column].isna().to_numpy()))
        raise InputError(f"row {frame.index[at]!r}: column '{id_column}' is empty")
    X = _frame_features(frame, names)
    costs = _score(policy, X)
    from .routing import route_with_prices

    routes = route_with_prices(costs, policy.prices, policy.n_classes) if len(frame) else np.zeros(0, np.int64)
    ids = frame[id_column].astype(str).to_numpy(dtype=object) if len(frame) else np.zeros(0, dtype=object)
    return _decisions(policy, ids, costs, routes, index=frame.index)


def _frame_features(frame: pd.DataFrame, names: list[str]) -> np.ndarray:
    """The feature columns as a float64 matrix; InputError on text or non-finite values."""
    X = np.empty((len(frame), len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        values = pd.to_numeric(frame[name], errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        bad = ~np.isfinite(values)
        if bad.any():
            at = int(np.argmax(bad))
            raise InputError(f"row {frame.index[at]!r}: column '{name}' holds {frame[name].iloc[at]!r}, "
                             "not a finite number")
        X[:, j] = values
    return X


# --------------------------------------------------------------------------- route a file


@dataclass
class RouteResult:
    """What :func:`route_file` did.

    Attributes
    ----------
    out : str
        The decisions file written.
    n_cases : int
    mode : str
        ``"exact"`` (LP of the batch) or ``"priced"`` (prices with streaming caps).
    workload : list of dict
        Per route (``model``, then each expert): route, cases, share, capacity (None if
        uncapped), price (None for the model).
    mean_expected_cost : float
        Mean expected cost per case of the chosen options (fee units).
    n_outside_range : int
        Cases with a feature outside the range seen in training.
    notes : list of str
    """

    out: str
    n_cases: int
    mode: str
    workload: list[dict]
    mean_expected_cost: float
    n_outside_range: int
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        return asdict(self)

    @property
    def outside_warning(self) -> str | None:
        """A one-line warning when some cases lie outside the training range, else None."""
        if not self.n_outside_range:
            return None
        share = self.n_outside_range / max(self.n_cases, 1)
        return (f"Warning: {self.n_outside_range} of {self.n_cases} case(s) ({share:.1%}) have a feature "
                "outside the range seen in training; the policy's estimates may not hold for them")

    def __rich__(self):
        from rich.console import Group
        from rich.table import Table
        from rich.text import Text

        how = "exact LP over the batch" if self.mode == "exact" else "dual prices with streaming caps"
        head = Text(f"Routed {self.n_cases} case(s) to {self.out} ({how}); mean expected cost "
                    f"{self.mean_expected_cost:.4g} per case")
        table = Table(title="Workload", title_justify="left")
        for name in ("route", "cases", "share", "capacity", "price"):
            table.add_column(name, justify="left" if name == "route" else "right", overflow="fold")
        for w in self.workload:
            cap = "-" if w["capacity"] is None else f"{w['capacity']:.1%}"
            price = "-" if w["price"] is None else f"{w['price']:.4g}"
            table.add_row(w["route"], str(w["cases"]), f"{w['share']:.1%}", cap, price)
        parts: list = [head, table, Text(f"Cases outside the training range: {self.n_outside_range}")]
        parts.extend(Text(f"note: {n}") for n in self.notes)
        return Group(*parts)


def route_file(
    policy_path: str | os.PathLike,
    cases_path: str | os.PathLike,
    out_path: str | os.PathLike,
    *,
    exact: bool = False,
    id_column: str = "case_id",
    chunk_size: int = DEFAULT_SCORE_CHUNK,
    console: Any = None,
    progress: bool = False,
) -> RouteResult:
    """Route every case of a CSV or Parquet file with a frozen policy.

    The policy is verified (:func:`load_policy`) and its router rebuilt once. The cases
    file is read once and checked (id column present, non-empty and unique; every feature
    column present and finite; errors name the file and line). Cases are scored
    ``chunk_size`` at a time. Routing then holds each expert's capacity share: by default
    with the manifest's dual prices and a running count in arrival order
    (:func:`routeplan.routing.route_with_prices`), or, with ``exact``, by the least-cost
    integral assignment of the whole batch (:func:`routeplan.routing.route_exact`). The
    decisions go to ``out_path`` (Parquet if it ends in ``.parquet`` or ``.pq``, else CSV),
    written to a temporary file and renamed, so a reader never sees half of it.

    Parameters
    ----------
    policy_path : str or path-like
    cases_path : str or path-like
    out_path : str or path-like
    exact : bool, default=False
    id_column : str, default="case_id"
    chunk_size : int, default=65536
        Cases scored at once; the decisions do not depend on it.
    console : rich.console.Console, optional
        Where the progress bar goes.
    progress : bool, default=False
        Show a progress bar while scoring.

    Returns
    -------
    RouteResult

    Raises
    ------
    InputError
        Bad policy, bad cases file, or an output path that would overwrite an input.
    """
    from .routing import route_exact, route_with_prices

    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise InputError(f"--chunk-size must be a positive integer, not {chunk_size!r}")
    out = Path(out_path)
    _check_out_path(out, [Path(policy_path), Path(cases_path)])
    policy = load_policy(policy_path)
    ids, X = _read_cases(cases_path, id_column, list(policy.spec.names))
    costs, n_outside = _score_chunks(policy, X, int(chunk_size), console, progress)
    del X
    if exact:
        routes = route_exact(costs, policy.capacities, policy.n_classes)
    else:
        routes = route_with_prices(costs, policy.prices, policy.n_classes, policy.capacities, stream_caps=True)
    frame = _decisions(policy, ids, costs, routes)
    notes = _write_decisions(frame, out)
    return RouteResult(str(out), len(ids), "exact" if exact else "priced", _workload(policy, routes),
                       float(frame["expected_cost"].mean()) if len(frame) else 0.0, n_outside, notes)


def _check_out_path(out: Path, inputs: list[Path]) -> None:
    """Refuse an output that would overwrite an input or land in a missing folder."""
    for path in inputs:
        with contextlib.suppress(OSError):
            if out.resolve() == path.resolve():
                raise InputError("--out would overwrite an input file; choose another name", source=str(out))
    folder = out.parent if str(out.parent) else Path(".")
    if not folder.is_dir():
        raise InputError(f"the folder {folder} does not exist", source=str(out))


def _read_cases(path: str | os.PathLike, id_column: str, names: list[str]) -> tuple[Any, np.ndarray]:
    """Read and check a cases file; return the ids and the (n, d) float64 feature matrix.

    A fast path reads only the needed columns with pyarrow and checks them vectorised. At
    the first thing it does not like it hands over to :func:`routeplan.files.read_table`
    and :func:`routeplan.files.check_rows`, which either name the file, line and problem
    or accept the file (then their values are used).
    """
    fast = _read_cases_fast(Path(path), id_column, names)
    return fast if fast is not None else _read_cases_checked(path, id_column, names)


def _read_cases_checked(path: str | os.PathLike, id_column: str,
                        names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """The careful reader: every problem raised with its file and line."""
    from .files import Table, check_rows, load_schema, read_table

    table = read_table(path, text_columns=(id_column,))
    frame = table.frame
    absent = [c for c in [id_column, *names] if c not in frame.columns]
    if absent:
        hint = " (use --id-column to name the id column)" if id_column in absent else ""
        raise InputError(f"missing column(s) {', '.join(repr(a) for a in absent)}{hint}; the policy needs "
                         f"{', '.join(repr(n) for n in names)}", source=table.source, line=1)
    keep = [id_column, *names]
    sub = Table(frame[keep], table.source, table.sha256, table.is_text,
                {k: v for k, v in table.numeric.items() if k in keep},
                {k: v for k, v in table.empty.items() if k in keep}, table.lines)
    id_rule = load_schema("decisions-row")["properties"]["case_id"]
    schema = {"type": "object", "required": keep, "properties": {id_column: id_rule}}
    parsed = check_rows(sub, schema, numeric_columns=tuple(names))
    ids = sub.frame[id_column].astype(str).to_numpy(dtype=object)
    repeated = pd.Series(ids).duplicated().to_numpy()
    if repeated.any():
        at = int(np.argmax(repeated))
        raise table.fail(f"case id {ids[at]!r} appears twice; every case needs its own id", at)
    X = np.empty((len(ids), len(names)), dtype=np.float64)
    for j, name in enumerate(names):
        X[:, j] = parsed[name]
    return ids, X


_ID_MAX = 200
_CONTROL = "[\\x00-\\x1f\\x7f]"


def _read_cases_fast(path: Path, id_column: str, names: list[str]) -> tuple[Any, np.ndarray] | None:
    """Only the needed columns, read and checked with pyarrow; None if anything looks off."""
    import pyarrow as pa
    import pyarrow.compute as pc

    if not path.is_file():
        return None
    keep = [id_column, *names]
    try:
        table = _arrow_parquet(path, keep) if path.suffix.lower() in _PARQUET else _arrow_csv(path, keep, id_column)
    except (pa.ArrowException, ValueError, OSError, UnicodeDecodeError):
        return None
    if table is None or table.num_rows == 0:
        return None
    ids = table.column(id_column)
    if not (pa.types.is_string(ids.type) or pa.types.is_large_string(ids.type)):
        return None
    ids = pc.utf8_trim_whitespace(ids)
    if ids.null_count or not _ids_ok(ids):
        return None
    X = np.empty((table.num_rows, len(names)), dtype=np.float64, order="F")  # column by column, contiguous
    for j, name in enumerate(names):
        column = table.column(name)
        if not (pa.types.is_integer(column.type) or pa.types.is_floating(column.type)) or column.null_count:
            return None
        X[:, j] = column.cast(pa.float64()).to_numpy()
    if not np.isfinite(X).all():
        return None
    return ids.to_pandas().array, X  # arrow-backed strings: no million Python objects


def _ids_ok(ids: Any) -> bool:
    """Ids non-empty, at most 200 characters, no control characters, all different."""
    import pyarrow.compute as pc

    lengths = pc.utf8_length(ids)
    if pc.min(lengths).as_py() < 1 or pc.max(lengths).as_py() > _ID_MAX:
        return False
    if pc.any(pc.match_substring_regex(ids, _CONTROL)).as_py():
        return False
    return pc.count_distinct(ids).as_py() == len(ids)


def _arrow_parquet(path: Path, keep: list[str]) -> Any:
    """The needed columns of a Parquet file (None if a name is missing or repeated)."""
    import pyarrow.parquet as pq

    found = pq.read_schema(path).names
    if len(set(found)) != len(found) or any(name not in found for name in keep):
        return None
    return pq.read_table(path, columns=keep)


def _arrow_csv(path: Path, keep: list[str], id_column: str) -> Any:
    """The needed columns of a CSV file (None if the header is not plain and complete)."""
    import csv as csv_module

    import pyarrow as pa
    import pyarrow.csv as pacsv

    with open(path, "rb") as handle:
        first = handle.readline(1 << 20)
    if first.startswith(b"\xef\xbb\xbf") or not first.endswith(b"\n") or b"\x00" in first:
        return None
    header = next(csv_module.reader([first.decode("utf-8").rstrip("\r\n")]), [])
    if any(h != h.strip() or not h for h in header) or len(set(header)) != len(header):
        return None
    if any(name not in header for name in keep):
        return None
    types = {name: pa.float64() for name in keep[1:]}
    types[id_column] = pa.string()
    return pacsv.read_csv(
        path,
        convert_options=pacsv.ConvertOptions(include_columns=keep, column_types=types, null_values=[""],
                                             strings_can_be_null=True, quoted_strings_can_be_null=True),
    )


def _score_chunks(policy: Policy, X: np.ndarray, chunk_size: int, console: Any,
                  progress: bool) -> tuple[np.ndarray, int]:
    """Score the cases chunk by chunk; also count cases outside the training range."""
    n = X.shape[0]
    costs = np.empty((n, policy.n_classes + len(policy.experts)), dtype=np.float64)
    n_outside = 0
    with _progress_bar(console, progress, n) as advance:
        for start in range(0, n, chunk_size):
            stop = min(start + chunk_size, n)
            costs[start:stop] = _score(policy, X[start:stop])
            n_outside += int(policy.spec.outside_range(X[start:stop]).sum())
            advance(stop - start)
    return costs, n_outside


@contextlib.contextmanager
def _progress_bar(console: Any, enabled: bool, total: int) -> Iterator[Any]:
    """A rich progress bar over cases (a no-op when disabled)."""
    if not enabled or (console is not None and not console.is_terminal):
        yield lambda k: None
        return
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    with Progress(TextColumn("scoring"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                  console=console, transient=True) as bar:
        task = bar.add_task("scoring", total=total)
        yield lambda k: bar.advance(task, k)


def _workload(policy: Policy, routes: np.ndarray) -> list[dict]:
    """Cases and share per route, with the experts' caps and prices."""
    K, n = policy.n_classes, max(int(routes.shape[0]), 1)
    counts = np.bincount(routes, minlength=K + len(policy.experts)) if routes.size else np.zeros(
        K + len(policy.experts), dtype=np.int64)
    rows = [{"route": MODEL_ROUTE, "cases": int(counts[:K].sum()), "share": float(counts[:K].sum()) / n,
             "capacity": None, "price": None}]
    for j, name in enumerate(policy.experts):
        cap = policy.capacities[j]
        rows.append({"route": name, "cases": int(counts[K + j]), "share": float(counts[K + j]) / n,
                     "capacity": None if not math.isfinite(cap) else float(cap),
                     "price": float(policy.prices[j])})
    return rows


def _write_decisions(frame: pd.DataFrame, out: Path) -> list[str]:
    """Write the decisions atomically as Parquet or CSV; return notes."""
    import pyarrow as pa

    notes: list[str] = []
    if out.suffix.lower() in _PARQUET:
        import pyarrow.parquet as pq

        table = pa.Table.from_pandas(frame, preserve_index=False)
        _atomic(out, lambda tmp: pq.write_table(table, tmp))
        return notes
    import pyarrow.csv as pacsv

    ids = frame["case_id"].astype(str)
    risky = ids.str.startswith(_FORMULA_LEAD).to_numpy()
    if risky.any():
        frame = frame.assign(case_id=np.where(risky, "'" + ids, ids))
        notes.append(f"{int(risky.sum())} case id(s) begin with =, +, -, @ or a control character and were "
                     "prefixed with ' in the CSV (spreadsheet formula guard); write Parquet to keep them verbatim")
    label = frame["label"].map(lambda v: "'" + v if isinstance(v, str) and v.startswith(_FORMULA_LEAD) else v)
    frame = frame.assign(label=label.where(label != "", None))
    table = pa.Table.from_pandas(frame, preserve_index=False)
    options = pacsv.WriteOptions(quoting_style="needed")
    _atomic(out, lambda tmp: pacsv.write_csv(table, tmp, write_options=options))
    return notes


def _atomic(path: Path, write: Any) -> None:
    """Call ``write(tmp)`` on a temporary file beside ``path``, then rename it over ``path``."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent if str(path.parent) else ".")
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, 0o644)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


# --------------------------------------------------------------------------- freeze


@dataclass
class FreezeResult:
    """What :func:`freeze_workspace` wrote.

    Attributes
    ----------
    path : str
        The policy file.
    card : str
        The policy card (Markdown).
    sha256 : str
    policy_id : int
    model_id : int
    router : str
    experts : list of dict
        name, fee, capacity, price.
    metrics : dict
        The manifest's metrics (estimate, low, high, level, n).
    notes : list of str
    """

    path: str
    card: str
    sha256: str
    policy_id: int
    model_id: int
    router: str
    experts: list[dict]
    metrics: dict
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        return asdict(self)

    def __rich__(self):
        from rich.console import Group
        from rich.table import Table
        from rich.text import Text

        head = Text(f"Froze model {self.model_id} ({self.router}) as {self.path} (sha256 {self.sha256[:12]}...); "
                    f"card {self.card}")
        experts = Table(title="Experts", title_justify="left")
        for name in ("expert", "fee", "capacity", "price"):
            experts.add_column(name, justify="left" if name == "expert" else "right", overflow="fold")
        for e in self.experts:
            experts.add_row(e["name"], f"{e['fee']:.4g}", "-" if e["capacity"] is None else f"{e['capacity']:.1%}",
                            f"{e['price']:.4g}")
        metrics = Table(title="Held-out estimates (95% interval)", title_justify="left")
        for name in ("metric", "estimate", "interval", "n"):
            metrics.add_column(name, justify="left" if name == "metric" else "right", overflow="fold")
        for key, m in self.metrics.items():
            metrics.add_row(key, f"{m['estimate']:.4g}", f"{m['low']:.4g} - {m['high']:.4g}", str(m.get("n", "")))
        parts: list = [head, experts, metrics]
        parts.extend(Text(f"note: {n}") for n in self.notes)
        return Group(*parts)


def freeze_workspace(ws: Any, out: str | os.PathLike, *, card: str | os.PathLike | None = None,
                     model_id: int | None = None, confidence: float = CONFIDENCE) -> FreezeResult:
    """Freeze a workspace's fitted router as a policy file and a policy card.

    The router's expected costs on the fit's held-out selection cases feed the capacity LP
    (:func:`routeplan.routing.capacity_lp`), whose dual prices become the experts' prices.
    The deployed rule -- priced routing with streaming caps -- is then measured on the same
    cases (system cost, accuracy, coverage, each expert's workload, with intervals). The
    policy file holds the manifest and the router's arrays
    (:func:`routeplan.policy.write_policy`); it is recorded in the workspace's
    ``policies`` table with a journal entry, in one transaction.

    Parameters
    ----------
    ws : Workspace
    out : str or path-like
        The policy file to write.
    card : str or path-like, optional
        The Markdown card; default ``out`` with the suffix ``.md``.
    model_id : int, optional
        A stored model (default: the chosen one).
    confidence : float, default=0.95

    Returns
    -------
    FreezeResult

    Raises
    ------
    InputError
        No fitted model, a two-stage router, no held-out cases, feature columns changed
        since the fit, or an output folder that does not exist.
    """
    from .fitting import load_router
    from .policy import write_policy
    from .pool import load_pool

    out = Path(out)
    card_path = _card_path(out, card)
    for path in (out, card_path):
        _check_out_path(path, [])
    model_id, router, params, fit_metrics = load_router(ws, model_id)
    if getattr(router, "two_stage_", False):
        raise InputError("the chosen router needs the team's own class probabilities (two-stage); a policy file "
                         "cannot score new cases with it")
    pool = load_pool(ws)
    frozen = _freeze_parts(router, params, fit_metrics, pool, model_id, confidence)
    arrays, meta = router.get_arrays()
    frozen.manifest["router"] = {"kind": str(params["router"]), "hyperparameters": meta["params"],
                                 "arrays": sorted(arrays), "meta": meta}
    with ws.transaction():
        sha = write_policy(out, frozen.manifest, arrays)
        from .policy import read_policy

        manifest, _ = read_policy(out)  # what route will see (created time filled in)
        policy_id = ws.add_policy(str(out.resolve()), sha, model_id, manifest)
        _atomic_text(card_path, policy_card(manifest, sha256=sha, path=out.name))
        ws.log("freeze", {"policy_id": policy_id, "model_id": model_id, "path": str(out.resolve()),
                          "card": str(card_path.resolve()), "sha256": sha})
    return FreezeResult(str(out), str(card_path), sha, policy_id, model_id, str(params["router"]),
                        manifest["experts"], manifest["metrics"], frozen.notes)


def _card_path(out: Path, card: str | os.PathLike | None) -> Path:
    """The card's path: as given, else the policy's name with ``.md``."""
    if card is not None:
        path = Path(card)
    else:
        path = out.with_suffix(".md")
        if path == out:
            path = out.with_name(out.name + ".card.md")
    if path.resolve() == out.resolve():
        raise InputError("--card and --out name the same file; choose another card name", source=str(path))
    return path


def _atomic_text(path: Path, text: str) -> None:
    """Write UTF-8 text atomically."""
    _atomic(path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"))


@dataclass
class _Frozen:
    """The manifest under construction and the notes for the user."""

    manifest: dict
    notes: list[str]


def _freeze_parts(router: Any, params: dict, fit_metrics: dict, pool: Any, model_id: int,
                  confidence: float) -> _Frozen:
    """Everything of the manifest but the router: prices, metrics, training fingerprint."""
    from .features import FeatureSpec
    from .routing import capacity_lp, route_with_prices

    spec = FeatureSpec.from_dict(params["features"])
    if list(spec.names) != list(pool.feature_names):
        raise InputError("the workspace's feature columns differ from those the model was fitted on; "
                         "run 'routeplan fit' again")
    names = [e["name"] for e in params["experts"]]
    fees = np.asarray(router.fees_, dtype=np.float64)
    caps, notes = _current_capacities(params, pool)
    pos = _validation_positions(pool, params)
    if pos.size < 2:
        raise InputError(f"the model has {pos.size} held-out case(s); freezing needs at least 2 to estimate "
                         "its performance (run 'routeplan fit' with more cases with truth)")
    if pos.size < 30:
        notes.append(f"only {pos.size} held-out cases: the intervals are wide and the normal interval of "
                     "the cost is rough; freeze again after fitting on more cases with truth")
    Xs = spec.transform(pool.X[pos])
    ec = np.asarray(router.predict_costs(Xs), dtype=np.float64)
    K = len(params["labels"])
    lp = capacity_lp(ec, caps, K)
    routes = route_with_prices(ec, lp.prices, K, caps, stream_caps=True)
    metrics, basis = _held_out_metrics(router, Xs, ec, routes, pool, pos, names, fees, confidence)
    experts = [{"name": n, "fee": float(f), "capacity": None if not math.isfinite(c) else float(min(c, 1.0)),
                "price": float(p)} for n, f, c, p in zip(names, fees, caps, lp.prices)]
    manifest = {
        "labels": list(params["labels"]),
        "error_cost": float(params.get("error_cost", pool.error_cost)),
        "cost_matrix": np.asarray(router.cost_matrix_, dtype=float).tolist(),
        "features": spec.to_dict(),
        "experts": experts,
        "training": _training(params, pool),
        "metrics": metrics,
        "notes": {
            "model_id": model_id,
            "metrics_cases": "the fit's held-out selection cases (never used to fit the router); the capacity "
                             "prices were fitted on the same cases, so the capped figures are slightly optimistic",
            "metrics_rule": "priced routing with streaming caps, as route applies it by default",
            "metrics_basis": basis,
            "lp_mean_cost": lp.mean_cost,
            "candidates": _candidate_rows(fit_metrics),
            "fit_notes": [str(n) for n in fit_metrics.get("notes", [])],
        },
    }
    return _Frozen(manifest, notes)


def _current_capacities(params: dict, pool: Any) -> tuple[np.ndarray, list[str]]:
    """Capacities from the workspace now (fit-time values for experts no longer there); fee-change notes."""
    current = {name: (float(f), float(c)) for name, f, c in zip(pool.experts, pool.fees, pool.capacities)}
    caps, notes = [], []
    for e in params["experts"]:
        fee, cap = current.get(e["name"], (float(e["fee"]), float(e["capacity"])))
        caps.append(cap)
        if not math.isclose(fee, float(e["fee"]), rel_tol=1e-9, abs_tol=1e-12):
            notes.append(f"the fee of {e['name']} changed since the fit ({e['fee']:g} -> {fee:g}); the policy "
                         "keeps the fit-time fee: run 'routeplan fit' again to use the new one")
    return np.asarray(caps, dtype=np.float64), notes


def _validation_positions(pool: Any, params: dict) -> np.ndarray:
    """Pool positions of the model's held-out cases (else every case it did not train on)."""
    where = pd.Series(np.arange(len(pool.case_ids)), index=pool.case_ids)
    held = [c for c in params.get("validation_case_ids", []) if c in where.index]
    if not held:
        trained = set(params.get("training_case_ids", []))
        held = [c for c in pool.case_ids if c not in trained and c in where.index]
    return where.loc[held].to_numpy(dtype=np.int64) if held else np.zeros(0, dtype=np.int64)


def _expert_columns(pool: Any, names: list[str]) -> np.ndarray:
    """Answers of the policy's experts (in its order), -1 where unknown or the expert is gone."""
    index = {n: j for j, n in enumerate(pool.experts)}
    A = np.full((pool.answers.shape[0], len(names)), -1, dtype=np.int64)
    for j, name in enumerate(names):
        if name in index:
            A[:, j] = pool.answers[:, index[name]]
    return A


def _held_out_metrics(router: Any, Xs: np.ndarray, ec: np.ndarray, routes: np.ndarray, pool: Any,
                      pos: np.ndarray, names: list[str], fees: np.ndarray, confidence: float) -> tuple[dict, dict]:
    """Metrics of a routing on held-out cases, realised where possible, with intervals."""
    from .costs import cost_vectors, expected_cost_vectors, impute_missing_costs

    K, M = ec.shape[1] - len(names), len(names)
    y = pool.y[pos]
    A = _expert_columns(pool, names)[pos]
    C = np.asarray(router.cost_matrix_, dtype=np.float64)
    q = np.asarray(router.predict_expert_correct(Xs), dtype=np.float64) if M else np.zeros((len(pos), 0))
    P = np.asarray(router.predict_proba(Xs), dtype=np.float64)
    truth = y >= 0
    per_cost = ec.copy()
    right = np.hstack([P, q])
    basis = np.full(ec.shape, "expected", dtype=object)
    if truth.any():
        yt, At = y[truth], A[truth]
        onehot = np.eye(K)[yt]
        raw = cost_vectors(yt, At, cost_matrix=C, fees=fees)
        per_cost[truth] = impute_missing_costs(raw, expected_cost_vectors(onehot, q[truth], cost_matrix=C, fees=fees))
        right[truth] = np.hstack([onehot, np.where(At >= 0, At == yt[:, None], q[truth])])
        basis[truth] = np.where(np.isnan(raw), "imputed", "realised")
    rows = np.arange(len(pos))
    chosen_cost, chosen_right, chosen_basis = per_cost[rows, routes], right[rows, routes], basis[rows, routes]
    n = len(pos)
    metrics = {"system_cost": _cost_metric(chosen_cost, confidence),
               "accuracy": _share_metric(float(chosen_right.sum()), n, confidence),
               "coverage": _share_metric(float((routes < K).sum()), n, confidence)}
    for j, name in enumerate(names):
        metrics[f"workload_{name}"] = _share_metric(float((routes == K + j).sum()), n, confidence)
    shares = {kind: float(np.mean(chosen_basis == kind)) for kind in ("realised", "imputed", "expected")}
    return metrics, {"shares": shares, "summary": _basis_summary(shares)}


def _basis_summary(shares: dict) -> str:
    """One sentence on how much of the metrics is realised."""
    if shares["realised"] == 1.0:
        return "realised: every routed case has known truth and, where deferred, the expert's answer"
    parts = [f"{shares[k]:.0%} {k}" for k in ("realised", "imputed", "expected") if shares[k] > 0]
    return ("mixed: " + ", ".join(parts) + " (imputed: truth known, the routed expert's answer not, so its "
            "expected cost given the truth stands in; expected: no truth, the router's own estimate)")


def _cost_metric(values: np.ndarray, confidence: float) -> dict:
    """Mean cost with a normal interval, clipped at 0."""
    from .stats import mean_interval

    est, low, high = mean_interval(values, confidence)
    return {"estimate": float(est), "low": max(float(low), 0.0), "high": float(high),
            "level": float(confidence), "n": int(values.size)}


def _share_metric(successes: float, n: int, confidence: float) -> dict:
    """A share with its Wilson interval."""
    from .stats import wilson_interval

    low, high = wilson_interval(successes, n, confidence)
    est = successes / n
    return {"estimate": float(est), "low": float(min(low, est)), "high": float(max(high, est)),
            "level": float(confidence), "n": int(n)}


def _training(params: dict, pool: Any) -> dict:
    """Fingerprint and size of the training data."""
    from .policy import training_fingerprint

    ids = [str(c) for c in params.get("training_case_ids", [])]
    where = {c: i for i, c in enumerate(pool.case_ids)}
    pos = np.array([where[c] for c in ids if c in where], dtype=np.int64)
    truth = [pool.labels[v] if v >= 0 else None for v in pool.y[pos]]
    rows, cols = np.nonzero(pool.answers[pos] >= 0)
    answers = [(pool.case_ids[pos[r]], pool.experts[c], pool.labels[pool.answers[pos[r], c]])
               for r, c in zip(rows, cols)]
    seed = params.get("seed")
    return {"fingerprint": training_fingerprint([pool.case_ids[p] for p in pos], truth, answers),
            "n_cases": int(pos.size), "n_answers": len(answers),
            "seed": seed if isinstance(seed, int) else None}


def _candidate_rows(fit_metrics: dict) -> list[dict]:
    """The fit's comparison table (candidates and baselines), key columns only."""
    keep = ("router", "kind", "system_cost", "ci_low", "ci_high", "accuracy", "coverage")
    rows = []
    for row in fit_metrics.get("candidates", []) or []:
        clean = {}
        for k in keep:
            v = row.get(k)
            clean[k] = None if isinstance(v, float) and not math.isfinite(v) else v
        rows.append(clean)
    return rows


# --------------------------------------------------------------------------- card


def policy_card(manifest: Mapping[str, Any], *, sha256: str | None = None, path: str | None = None) -> str:
    """A Markdown policy card: what the policy is for, how well it does, and its limits.

    Built from the manifest alone, so it can be regenerated from the policy file.

    Parameters
    ----------
    manifest : mapping
        A policy manifest (as written by :func:`freeze_workspace`).
    sha256 : str, optional
        The policy file's hash.
    path : str, optional
        The policy file's name.

    Returns
    -------
    str
    """
    notes = manifest.get("notes", {})
    lines = [f"# Routing policy card{': ' + path if path else ''}", ""]
    lines += [f"- Frozen: {manifest['created']} ({manifest['format']})"]
    if sha256:
        lines += [f"- sha256: `{sha256}` (`routeplan route` refuses the file if this does not match)"]
    training = manifest["training"]
    lines += [f"- Router: {manifest['router']['kind']}; training fingerprint `{training['fingerprint'][:16]}...`"
              f" ({training.get('n_cases', '?')} cases, {training.get('n_answers', '?')} answers)",
              ""]
    lines += _card_use(manifest) + _card_experts(manifest) + _card_metrics(manifest, notes)
    lines += _card_baselines(notes) + _card_cautions()
    return "\n".join(lines) + "\n"


def _card_use(manifest: Mapping[str, Any]) -> list[str]:
    """Intended use."""
    labels = ", ".join(manifest["labels"])
    feats = ", ".join(manifest["features"]["names"])
    cost = manifest.get("error_cost", 1.0)
    text = (f"Route new cases of the same kind as the training pool: for each case, either the model "
            f"decides one of the labels ({labels}) or the case goes to one of the experts below. The "
            f"policy reads the feature columns {feats}. It weighs one wrong decision (cost {cost:g}, in "
            "the unit of the fees) against each expert's fee and holds each expert's capacity (largest "
            "share of routed cases). It supports people who decide; it is not meant to replace their "
            "judgement where a decision needs a licensed person.")
    return ["## Intended use", "", text, ""]


def _card_experts(manifest: Mapping[str, Any]) -> list[str]:
    """Experts, fees, capacities and prices."""
    lines = ["## Experts, fees, capacities and prices", "",
             "| expert | fee | capacity (share of cases) | price |", "|---|---:|---:|---:|"]
    for e in manifest["experts"]:
        cap = "no cap" if e["capacity"] is None else f"{e['capacity']:.1%}"
        lines.append(f"| {e['name']} | {e['fee']:.4g} | {cap} | {e['price']:.4g} |")
    lines += ["", "The price is the dual price of the expert's capacity in the routing LP on held-out cases: "
              "route adds it to the expert's expected cost, so a busy expert only gets the cases where it "
              "helps most. A price of 0 means the cap did not bind.", ""]
    return lines


def _card_metrics(manifest: Mapping[str, Any], notes: Mapping[str, Any]) -> list[str]:
    """Held-out estimates with intervals."""
    lines = ["## Estimated performance on held-out cases", "",
             "| measure | estimate | 95% interval | cases |", "|---|---:|---:|---:|"]
    labels = {"system_cost": "system cost per case (fee units)", "accuracy": "accuracy of final decisions",
              "coverage": "coverage (share the model decides)"}
    for key, m in manifest["metrics"].items():
        name = labels.get(key, key.replace("workload_", "workload of ") if key.startswith("workload_") else key)
        fmt = "{:.4g}" if key == "system_cost" else "{:.1%}"
        lines.append(f"| {name} | {fmt.format(m['estimate'])} | {fmt.format(m['low'])} to "
                     f"{fmt.format(m['high'])} | {m.get('n', '')} |")
    basis = notes.get("metrics_basis", {})
    lines += ["", f"Basis: {basis.get('summary', 'not recorded')}.",
              f"Cases: {notes.get('metrics_cases', 'not recorded')}.",
              f"Rule measured: {notes.get('metrics_rule', 'not recorded')}.", ""]
    return lines


def _card_baselines(notes: Mapping[str, Any]) -> list[str]:
    """The fit's comparison: candidates, model alone, each expert alone."""
    rows = notes.get("candidates") or []
    if not rows:
        return ["## Baselines", "", "The fit recorded no comparison table.", ""]
    lines = ["## Baselines (from the fit, same held-out cases, no capacity limits)", "",
             "| router | kind | system cost | 95% interval | accuracy | coverage |", "|---|---|---:|---:|---:|---:|"]
    for r in rows:
        interval = "-" if r.get("ci_low") is None else f"{r['ci_low']:.4g} to {r['ci_high']:.4g}"
        cells = [_fmt(r.get("system_cost"), "{:.4g}"), interval, _fmt(r.get("accuracy"), "{:.1%}"),
                 _fmt(r.get("coverage"), "{:.1%}")]
        lines.append(f"| {r.get('router')} | {r.get('kind')} | " + " | ".join(cells) + " |")
    lines.append("")
    return lines


def _fmt(value: Any, pattern: str) -> str:
    """Format a number, '-' for a missing one."""
    return "-" if value is None else pattern.format(value)


def _card_cautions() -> list[str]:
    """What a team must keep doing."""
    items = [
        "Human oversight: keep people in charge; the experts and a responsible person must be able to "
        "review, overrule and stop the routing, and the model's own decisions should be sampled and "
        "checked regularly.",
        "Check subgroups: the estimates above are averages over the held-out cases; look at accuracy and "
        "workload per group, site or region (`routeplan competence --by group`) before relying on it.",
        "Validate on local data: re-estimate on a fresh, uniformly drawn audit sample of your own cases; "
        "`route` warns about cases outside the training range, where no estimate here holds.",
        "Regulated work (health, credit, legal and similar): local rules and licensed professional practice "
        "come first; this policy is decision support, and the decisions it routes remain the responsibility "
        "of the people and organisations licensed to make them.",
        "Fees, capacities and experts change: freeze again when they do, and refit when the cases drift.",
    ]
    return ["## Cautions", "", *[f"- {item}" for item in items], ""]
