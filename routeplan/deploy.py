"""Routing new cases with a frozen policy file (``routeplan route``).

:func:`route_file` reads a policy and a cases file, checks both, scores the cases chunk by
chunk and routes them: by default to the option of least ``expected cost + price`` with the
caps held by a running count (:func:`routeplan.routing.route_with_prices`); with
``exact=True`` by the LP of the whole batch (:func:`routeplan.routing.route_exact`). It
needs no workspace; the policy comes from :func:`routeplan.freezing.freeze_workspace`.

The core, :func:`route_frame`, is a pure function of a :class:`pandas.DataFrame` (no caps:
caps are a property of a batch), so it runs unchanged on a partitioned engine::

    import dask.dataframe as dd
    from routeplan.deploy import decision_columns, route_frame
    from routeplan.policy import read_policy

    manifest, arrays = read_policy("policy.json")
    cases = dd.read_parquet("cases/*.parquet")
    decisions = cases.map_partitions(route_frame, manifest, arrays,
                                     meta=decision_columns(manifest))
    decisions.to_parquet("decisions/")

CSV decision files neutralise cells that a spreadsheet would run as a formula
(:func:`routeplan.files.neutralise_formula`), case ids included; the summary counts such
ids. Parquet keeps them verbatim.
"""

from __future__ import annotations

import contextlib
import math
import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Iterator, Mapping

import numpy as np
import pandas as pd

from .errors import InputError
from .files import FORMULA_LEAD, check_outputs, write_atomically

__all__ = [
    "DEFAULT_SCORE_CHUNK",
    "MODEL_ROUTE",
    "Policy",
    "RouteResult",
    "decision_columns",
    "load_policy",
    "route_file",
    "route_frame",
]

#: Cases scored at once by :func:`route_file` (bounds the memory of the scoring step). One
#: router chunk, so chunks are not scored side by side here: with two (131,072) routing
#: 1,000,000 cases with the averaged router took 10.4 s instead of 12.2 s but peaked at
#: 1.38 GB instead of 1.20 GB (``benchmarks/bench_route.py``, 2026-12-03), too near 1.5 GB.
DEFAULT_SCORE_CHUNK = 65_536
#: The route of a case the model decides (no expert may take this name).
MODEL_ROUTE = "model"
_PARQUET = (".parquet", ".pq")


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
    proba_columns : list of str
        For a router that keeps the team's own model (two-stage), the columns
        ``proba_<label>`` every case to route must carry; else empty.
    """

    manifest: dict
    arrays: dict
    router: Any
    spec: Any
    labels: list
    experts: list
    prices: np.ndarray
    capacities: np.ndarray
    proba_columns: list = field(default_factory=list)

    @property
    def input_columns(self) -> list[str]:
        """The columns a case must carry: the features, then any ``proba_<label>`` columns."""
        return list(self.spec.names) + list(self.proba_columns)

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
            If the router cannot be rebuilt, disagrees with the manifest, or an array holds
            NaN or infinity.
        """
        from .features import FeatureSpec
        from .learner import router_from_arrays

        manifest = dict(manifest)
        router_info = manifest.get("router", {})
        meta = router_info.get("meta")
        if not isinstance(meta, Mapping):
            raise InputError("the policy's router has no 'meta' description; freeze it again", source=source)
        broken = next((name for name, value in arrays.items()
                       if np.asarray(value).dtype.kind == "f" and not np.isfinite(value).all()), None)
        if broken is not None:  # freeze never writes one; a re-hashed edit could
            raise InputError(f"the policy's array {broken!r} holds NaN or infinity; freeze it again", source=source)
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
        proba_columns: list = []
        if getattr(router, "two_stage_", False):
            from .ingest import score_columns

            proba_columns = list(router_info.get("class_proba_columns") or [])
            if proba_columns != score_columns(manifest["labels"]):
                raise InputError("the policy's router keeps the team's own model, but the manifest does not list "
                                 "its proba_<label> columns one per label; freeze it again", source=source)
        prices = np.array([float(e["price"]) for e in manifest["experts"]], dtype=np.float64)
        caps = np.array([math.inf if e["capacity"] is None else float(e["capacity"])
                         for e in manifest["experts"]], dtype=np.float64)
        return cls(manifest, dict(arrays), router, spec, list(manifest["labels"]), experts, prices, caps,
                   proba_columns)


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
    ``cost_model:<label>`` per label and ``cost_<expert>`` per expert, and last
    ``outside_range`` (1 where a feature lies outside the range seen in training)
    (``schemas/decisions-row.schema.json``).

    Parameters
    ----------
    manifest : mapping

    Returns
    -------
    pandas.DataFrame
    """
    # text columns get the dtype pandas gives the decisions' text (``str`` under pandas 3): an
    # ``object`` meta makes Dask invent placeholder objects that pyarrow cannot write
    text = pd.Series(np.asarray([""], dtype=object)).iloc[:0].reset_index(drop=True)
    frame = pd.DataFrame({"case_id": text, "route": text.copy(), "label": text.copy(),
                          "expected_cost": pd.Series([], dtype=np.float64)})
    for name in _cost_columns(manifest["labels"], [e["name"] for e in manifest["experts"]]):
        frame[name] = pd.Series([], dtype=np.float64)
    frame["outside_range"] = pd.Series([], dtype=np.int8)
    return frame


def _cost_columns(labels: list, experts: list) -> list[str]:
    """Names of the per-option cost columns."""
    return [f"cost_model:{label}" for label in labels] + [f"cost_{name}" for name in experts]


# --------------------------------------------------------------------------- scoring


#: How far a case's imported probabilities may sum from 1 (as ``routeplan scores import``).
_PROBA_SUM_TOLERANCE = 1e-3


def _score(policy: Policy, Z: np.ndarray) -> np.ndarray:
    """Expected cost of every option for raw input rows (:attr:`Policy.input_columns`), (n, K + M).

    The rows must be scorable (checked by the caller, :func:`_bad_rows`). For a two-stage
    policy the trailing ``proba_<label>`` columns are the team's model's probabilities,
    renormalised to sum to 1.
    """
    if Z.shape[0] == 0:
        return np.zeros((0, policy.n_classes + len(policy.experts)))
    d = len(policy.spec.names)
    X = policy.spec.transform(Z[:, :d])
    if not policy.proba_columns:
        return np.asarray(policy.router.predict_costs(X), dtype=np.float64)
    P = Z[:, d:]
    return np.asarray(policy.router.predict_costs(X, class_proba=P / P.sum(axis=1)[:, None]), dtype=np.float64)


def _bad_rows(policy: Policy, Z: np.ndarray) -> np.ndarray:
    """Rows that cannot be scored: a feature too large to standardise, or (two-stage policy)
    class probabilities that are negative or do not sum to 1."""
    far = policy.spec.unscalable(Z[:, :len(policy.spec.names)]).any(axis=1)
    return far | _bad_proba_rows(policy, Z)


def _row_problem(policy: Policy, row: np.ndarray) -> str:
    """What makes one input row unscorable, for a message."""
    far = policy.spec.unscalable(row[None, :len(policy.spec.names)])[0]
    if far.any():
        j = int(np.argmax(far))
        limit = policy.spec.reach()[j]
        return (f"column {policy.spec.names[j]!r} holds {row[j]:g}, too large to score: this policy takes values "
                f"within {limit:.3g} of the training mean ({float(policy.spec.means[j]):.6g}); check the value")
    return _proba_problem(policy, row)


def _bad_proba_rows(policy: Policy, Z: np.ndarray) -> np.ndarray:
    """Rows whose class-probability columns (two-stage policy) are negative or do not sum to 1."""
    if not policy.proba_columns:
        return np.zeros(Z.shape[0], dtype=bool)
    P = Z[:, len(policy.spec.names):]
    return (P < 0).any(axis=1) | (np.abs(P.sum(axis=1) - 1.0) > _PROBA_SUM_TOLERANCE)


def _proba_problem(policy: Policy, row: np.ndarray) -> str:
    """What is wrong with one row's class probabilities, for a message."""
    P = row[len(policy.spec.names):]
    return (f"the class-probability columns ({', '.join(policy.proba_columns)}) must be non-negative and "
            f"sum to 1, not {P.sum():.6g}")


#: Where a case lies outside the training range, the ways ``route`` may treat it.
OUTSIDE_RANGE = ("expert", "model")


def _check_outside_option(how: str) -> None:
    if how not in OUTSIDE_RANGE:
        raise InputError(f"--outside-range must be one of {', '.join(OUTSIDE_RANGE)}, not {how!r}")


def _steer_outside(costs: np.ndarray, outside: np.ndarray, n_classes: int, how: str) -> np.ndarray:
    """Costs to route on: with ``how="expert"`` the model's options of cases outside the
    training range are surcharged, so those cases go to an expert while one has room (the
    model's estimates there are extrapolations; common practice: a person looks at what the
    model never saw). The reported expected costs are not changed."""
    _check_outside_option(how)
    if how == "model" or not outside.any() or costs.shape[1] == n_classes:
        return costs
    steered = costs.copy()
    steered[np.ix_(outside, np.arange(n_classes))] += 10.0 * (float(np.abs(costs).max()) + 1.0)
    return steered


def _decisions(policy: Policy, case_ids: Any, costs: np.ndarray, routes: np.ndarray,
               outside: np.ndarray, index: Any = None) -> pd.DataFrame:
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
    columns["outside_range"] = np.asarray(outside, dtype=np.int8)
    return pd.DataFrame(columns, index=index)


def route_frame(frame: pd.DataFrame, manifest: Mapping[str, Any], arrays: Mapping[str, np.ndarray], *,
                id_column: str = "case_id", policy: Policy | None = None,
                outside_range: str = "expert") -> pd.DataFrame:
    """Route the cases of a DataFrame with a frozen policy (no capacity caps).

    Each case goes to the option of least ``expected cost + price`` (the experts' dual
    prices from the manifest); ties go to the model. A case with a feature outside the
    range seen in training goes to an expert unless ``outside_range="model"``. This is a
    pure function of its inputs, row by row, so any partition of the rows gives the same
    decisions: it is the function to map over the partitions of a Dask (or similar)
    DataFrame. Caps are a property of a batch; :func:`route_file` holds them.

    Parameters
    ----------
    frame : pandas.DataFrame
        One row per case: ``id_column`` and every feature column the policy names, and for
        a two-stage policy its ``proba_<label>`` columns (other columns are ignored).
    manifest : mapping
        The policy's manifest (:func:`routeplan.policy.read_policy`).
    arrays : mapping of str to ndarray
        The policy's arrays.
    id_column : str, default="case_id"
    policy : Policy, optional
        The same policy already rebuilt (skips rebuilding the router on every call).
    outside_range : {"expert", "model"}, default="expert"
        How to route cases outside the training range (see :func:`route_file`).

    Returns
    -------
    pandas.DataFrame
        One row per input row, same order and index; columns as :func:`decision_columns`.

    Raises
    ------
    InputError
        If ``id_column`` is one of the policy's input columns, a column is missing, a
        feature value is not a finite number or too large to standardise (beyond
        float32's range once standardised), or a case's class probabilities are negative
        or do not sum to 1.
    """
    policy = policy if policy is not None else Policy.from_parts(manifest, arrays)
    _check_id_column(policy, id_column)
    names = policy.input_columns
    missing = [c for c in [id_column, *names] if c not in frame.columns]
    if missing:
        raise InputError(f"missing column(s) {', '.join(repr(m) for m in missing)}")
    if frame[id_column].isna().any():
        at = int(np.argmax(frame[id_column].isna().to_numpy()))
        raise InputError(f"row {frame.index[at]!r}: column '{id_column}' is empty")
    X = _frame_features(frame, names)
    ids = frame[id_column].astype(str).to_numpy(dtype=object)
    bad = _bad_rows(policy, X)
    if bad.any():
        at = int(np.argmax(bad))
        raise InputError(f"case {ids[at]!r}: {_row_problem(policy, X[at])}")
    costs = _score(policy, X)
    outside = policy.spec.outside_range(X[:, :len(policy.spec.names)])
    steered = _steer_outside(costs, outside, policy.n_classes, outside_range)
    from .routing import route_with_prices

    routes = route_with_prices(steered, policy.prices, policy.n_classes) if len(frame) else np.zeros(0, np.int64)
    return _decisions(policy, ids, costs, routes, outside, index=frame.index)


def _check_id_column(policy: Policy, id_column: str) -> None:
    """Refuse an id column that is one of the columns the policy reads (a feature or a
    ``proba_<label>`` column): a case's id must be a column of its own."""
    if id_column in policy.input_columns:
        raise InputError(f"--id-column {id_column!r} is one of the columns the policy reads as input "
                         f"({', '.join(repr(c) for c in policy.input_columns)}); name the column that holds "
                         "each case's id")


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
                "outside the range seen in training; the policy's estimates may not hold for them "
                "(column outside_range marks them)")

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
    outside_range: str = "expert",
    overwrite: bool = True,
    console: Any = None,
    progress: bool = False,
    workspace: str | os.PathLike | None = None,
) -> RouteResult:
    """Route every case of a CSV or Parquet file with a frozen policy.

    The policy is verified (:func:`load_policy`) and its router rebuilt once. The cases
    file is read once and checked (id column present, non-empty and unique; every feature
    column present and finite; errors name the file and line). Cases are scored
    ``chunk_size`` at a time. Routing then holds each expert's capacity share: by default
    with the manifest's dual prices and a running count in arrival order
    (:func:`routeplan.routing.route_with_prices`), or, with ``exact``, by the least-cost
    integral assignment of the whole batch (:func:`routeplan.routing.route_exact`). The
    caps hold within the file (the running count starts with it), so a file of a few
    cases may leave an expert no room: the result's notes say so. A case with a feature
    outside the range seen in training goes to an expert while one has room (the model's
    estimates there are extrapolations), unless ``outside_range="model"``; the
    ``outside_range`` column marks such cases. The decisions go to ``out_path`` (Parquet
    if it ends in ``.parquet`` or ``.pq``, else CSV), written to a temporary file and
    renamed, so a reader never sees half of it.

    Parameters
    ----------
    policy_path : str or path-like
    cases_path : str or path-like
    out_path : str or path-like
    exact : bool, default=False
    id_column : str, default="case_id"
    chunk_size : int, default=65536
        Cases scored at once; the decisions do not depend on it.
    outside_range : {"expert", "model"}, default="expert"
        Route cases outside the training range to an expert, or like any other case.
    overwrite : bool, default=True
        Replace an existing ``out_path`` (the command line's default is to refuse).
    console : rich.console.Console, optional
        Where the progress bar goes.
    progress : bool, default=False
        Show a progress bar while scoring.
    workspace : str or path-like, optional
        A workspace folder (the command's ``--workspace``) whose database ``out_path``
        must not overwrite; routing itself needs no workspace.

    Returns
    -------
    RouteResult

    Raises
    ------
    InputError
        Bad policy, ``id_column`` one of the policy's input columns, bad cases file (a
        feature too large to standardise included), or an output path that is a folder,
        in a missing folder, or would overwrite an input or a workspace's database.
    OutputError
        The decisions file could not be written (no permission, read-only file system, disk
        full); it is written atomically, so ``out`` is left as it was.
    """
    from .routing import route_exact, route_with_prices

    if int(chunk_size) != chunk_size or chunk_size < 1:
        raise InputError(f"--chunk-size must be a positive integer, not {chunk_size!r}")
    out = Path(out_path)
    check_outputs({"--out": out}, overwrite=overwrite, workspace=workspace,
                  inputs=[Path(policy_path), Path(cases_path)])
    _check_outside_option(outside_range)
    policy = load_policy(policy_path)
    _check_id_column(policy, id_column)
    ids, X = _read_cases(cases_path, id_column, policy.input_columns)
    _check_rows_scorable(policy, X, cases_path, id_column)
    costs, outside = _score_chunks(policy, X, int(chunk_size), console, progress)
    del X
    steered = _steer_outside(costs, outside, policy.n_classes, outside_range)
    if exact:
        routes = route_exact(steered, policy.capacities, policy.n_classes)
    else:
        routes = route_with_prices(steered, policy.prices, policy.n_classes, policy.capacities, stream_caps=True)
    frame = _decisions(policy, ids, costs, routes, outside)
    notes = _write_decisions(frame, out) + _batch_notes(policy, routes, outside, outside_range)
    return RouteResult(str(out), len(ids), "exact" if exact else "priced", _workload(policy, routes),
                       float(frame["expected_cost"].mean()) if len(frame) else 0.0, int(outside.sum()), notes)


def _check_rows_scorable(policy: Policy, X: np.ndarray, path: str | os.PathLike, id_column: str) -> None:
    """Refuse a file at its first row that cannot be scored (:func:`_bad_rows`), naming its
    line: the file is read again by the careful reader only then, to number its lines."""
    bad = _bad_rows(policy, X)
    if not bad.any():
        return
    from .files import read_table

    at = int(np.argmax(bad))
    table = read_table(path, text_columns=(id_column,))
    case_id = str(table.frame[id_column].iloc[at]).strip()
    raise table.fail(f"case {case_id!r}: {_row_problem(policy, X[at])}", at)


def _batch_notes(policy: Policy, routes: np.ndarray, outside: np.ndarray, outside_range: str) -> list[str]:
    """Notes on caps that a small file leaves no room under (both modes cap an expert at
    ``floor(capacity * n)`` cases), and on out-of-range cases no expert had room for."""
    notes = []
    n = routes.shape[0]
    shut = [e for e, c in zip(policy.experts, policy.capacities)
            if 0 < c < 1 and math.floor(c * n + 1e-9) == 0]
    if n and shut:
        notes.append(f"with {n} case(s) in this file, the capacity share of {', '.join(shut)} allows none "
                     "(the caps hold within each file): route cases in larger batches")
    kept = int((outside & (routes < policy.n_classes)).sum())
    if kept and outside_range == "expert" and policy.experts:
        notes.append(f"{kept} case(s) outside the training range stayed with the model: every expert "
                     "was at its cap")
    return notes


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
    from .files import Table, check_rows, load_schema, read_table, separator_hint

    table = read_table(path, text_columns=(id_column,))
    frame = table.frame
    absent = [c for c in [id_column, *names] if c not in frame.columns]
    if absent:
        hint = separator_hint(list(frame.columns))
        hint = hint or (" (use --id-column to name the id column)" if id_column in absent else "")
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
                  progress: bool) -> tuple[np.ndarray, np.ndarray]:
    """Score the cases chunk by chunk; also mark the cases outside the training range."""
    n, d = X.shape[0], len(policy.spec.names)
    costs = np.empty((n, policy.n_classes + len(policy.experts)), dtype=np.float64)
    outside = np.zeros(n, dtype=bool)
    with _progress_bar(console, progress, n) as advance:
        for start in range(0, n, chunk_size):
            stop = min(start + chunk_size, n)
            costs[start:stop] = _score(policy, X[start:stop])
            outside[start:stop] = policy.spec.outside_range(X[start:stop, :d])
            advance(stop - start)
    return costs, outside


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
        write_atomically(out, lambda tmp: pq.write_table(table, tmp))
        return notes
    import pyarrow.csv as pacsv

    ids = frame["case_id"].astype(str)
    risky = ids.str.startswith(FORMULA_LEAD).to_numpy()
    if risky.any():
        frame = frame.assign(case_id=np.where(risky, "'" + ids, ids))
        notes.append(f"{int(risky.sum())} case id(s) begin with =, +, -, @ or a control character and were "
                     "prefixed with ' in the CSV (spreadsheet formula guard); write Parquet to keep them verbatim")
    label = frame["label"].map(lambda v: "'" + v if isinstance(v, str) and v.startswith(FORMULA_LEAD) else v)
    frame = frame.assign(label=label.where(label != "", None))
    table = pa.Table.from_pandas(frame, preserve_index=False)
    options = pacsv.WriteOptions(quoting_style="needed")
    write_atomically(out, lambda tmp: pacsv.write_csv(table, tmp, write_options=options))
    return notes
