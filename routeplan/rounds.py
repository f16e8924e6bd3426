"""Labelling rounds in a workspace: plan one, export its sheets, close it.

``plan_round`` reads the workspace into arrays, lets :func:`routeplan.acquisition.select_assignments`
choose the (case, expert) pairs, and stores the round and its assignments in one transaction.
``export_round`` writes one CSV sheet per expert; ``close_round`` marks a round closed.

Choices written down here
-------------------------
* Candidates are the cases with truth (``include_unverified`` adds the rest). A pair is
  eligible unless the expert already answered the case (historical answers included) or was
  assigned it in any earlier round (the database holds ``UNIQUE(case_id, expert)``).
* Regions: k-means on the standardised features of *every* case in the workspace, with a
  fixed seed (0), so they do not move with the round's seed
  (:func:`routeplan.regions.regions_from_features`).
* ``P(y | x)`` for the model's expected cost: :func:`routeplan.acquisition.class_probabilities`,
  seeded by the round's seed. Its predicted class is also the stratum over which a cell's
  picks are spread, for every candidate, never the truth: the chance that a pair is asked
  then depends on the features alone (region, predicted class, the router's focus), never on
  the outcome, so the answers are missing at random given the features and a model of
  ``P(expert right | x)`` fitted on them needs no weights (the round's detail says
  ``"strata": "predicted"``; :func:`routeplan.fitting.round_weights`). Strictly, the
  predicted class comes from a regularised linear model fitted on every case with truth, so
  a case's own label moves it by a share of about one over the number of such cases: a
  negligible dependence, not none.
* Accuracies per (expert, region) rest on every stored answer on a case with truth (historical
  ones included); open assignments of open rounds count as answers still to come.
* Focus: once ``routeplan fit`` has kept a router fitted on the current labels, experts and
  feature columns, ``value`` and ``uncertain`` pick only pairs where that router's estimated
  cost of asking the expert is within ``focus_margin`` of its best other option, on either
  side: its open choices (:func:`routeplan.acquisition.router_focus`); the audit stays
  uniform. The plan names the model. A router that keeps the team's own model (two-stage) scores the candidates with
  their imported probabilities; if some candidate has none, the round is planned without
  focus and says so. The planner's own ``P(y | x)`` above stays the linear model's.
* The assignments are stored in a seeded random order, so a sheet does not reveal which rows
  are the audit.
* Closing a round leaves its open assignments unanswered (state ``open`` in a ``closed``
  round): they count as expired. An answer that arrives later is still linked on import.
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Sequence

import numpy as np
import pandas as pd

from .acquisition import (
    STRATEGIES,
    PlannerInput,
    Selection,
    cell_counts,
    class_probabilities,
    model_decision_cost,
    router_focus,
    select_assignments,
)
from .errors import InputError, NotFitted, OutputError
from .files import check_outputs, write_csvs
from .workspace import Workspace

__all__ = ["RoundPlan", "SheetExport", "RoundClosed", "plan_round", "export_round", "close_round", "sheet_path"]


# --------------------------------------------------------------------------- results


@dataclass
class RoundPlan:
    """A planned round, as plain data.

    Attributes
    ----------
    round : int or None
        Round id (None for a dry run, which stores nothing).
    strategy : str
    seed : int
    budget : float
    spend : float
        Sum of the fees of the assignments.
    audit_share : float
    audit_spend : float
        Sum of the fees of the audit assignments.
    assignments : int
    experts : list of dict
        Per expert: expert, fee, capacity, cases, audit, spend, expected_gain.
    due_at : str or None
        ISO 8601 time (UTC) by which answers are due.
    notes : list of str
    """

    round: int | None
    strategy: str
    seed: int
    budget: float
    spend: float
    audit_share: float
    audit_spend: float
    assignments: int
    experts: list[dict]
    due_at: str | None = None
    notes: list[str] = field(default_factory=list)
    focus: dict | None = None

    def to_dict(self) -> dict:
        """Plain data for ``--json`` (see ``schemas/round-plan.schema.json``)."""
        return asdict(self)

    def __rich__(self):
        from rich.console import Group
        from rich.table import Table
        from rich.text import Text

        title = "Dry run (nothing stored)" if self.round is None else f"Round {self.round}"
        head = Text(
            f"{title}: strategy {self.strategy}, seed {self.seed}; {self.assignments} assignment(s), "
            f"spend {self.spend:.4g} of {self.budget:.4g} (audit {self.audit_spend:.4g})"
            + (f"; due {self.due_at}" if self.due_at else "")
        )
        table = Table(title="Per expert", title_justify="left")
        for name in ("expert", "cases", "audit", "spend", "expected gain"):
            table.add_column(name, justify="left" if name == "expert" else "right", overflow="fold")
        for e in self.experts:
            table.add_row(e["expert"], str(e["cases"]), str(e["audit"]), f"{e['spend']:.4g}",
                          f"{e['expected_gain']:.4g}")
        parts: list = [head, table]
        parts.append(Text("expected gain: expected drop of the summed decision cost over the workspace's "
                          "cases, in fee units, once these answers are in", style="dim"))
        if self.focus:
            parts.append(Text(f"focus: pairs where model #{self.focus['model_id']}'s choice about the expert "
                              f"is open (its cost within {self.focus['margin']:g} of the best other option, "
                              f"either side): {self.focus['pairs_in_focus']:.0%} of the candidate pairs",
                              style="dim"))
        parts.extend(Text(f"note: {n}") for n in self.notes)
        return Group(*parts)


@dataclass
class SheetExport:
    """What ``export_round`` wrote.

    Attributes
    ----------
    round : int
    folder : str
    sheets : list of dict
        Per expert: expert, path, rows, answered.
    """

    round: int
    folder: str
    sheets: list[dict]

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        return asdict(self)

    def message(self) -> str:
        """One line per sheet."""
        lines = [f"Round {self.round}: {len(self.sheets)} sheet(s) in {self.folder}"]
        lines += [f"  {s['path']}: {s['rows']} case(s), {s['answered']} already answered" for s in self.sheets]
        return "\n".join(lines)


@dataclass
class RoundClosed:
    """What ``close_round`` did.

    Attributes
    ----------
    round : int
    answered : int
    expired : int
        Assignments left unanswered.
    already_closed : bool
    """

    round: int
    answered: int
    expired: int
    already_closed: bool = False

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        return asdict(self)

    def message(self) -> str:
        """One line for the terminal."""
        if self.already_closed:
            return f"Round {self.round} was already closed ({self.answered} answered, {self.expired} expired)."
        return f"Closed round {self.round}: {self.answered} answered, {self.expired} expired."


# --------------------------------------------------------------------------- plan


#: Longest answer deadline a round may set, in days (ten years; dates further out overflow).
_MAX_DUE_DAYS = 3650


#: Largest budget a round accepts, as a multiple of the larger of ``--error-cost`` and the dearest fee:
#: far more than any round can spend, and small enough that budget / fee stays a finite number.
_MAX_BUDGET_FACTOR = 1e12


def _check_plan_options(budget, strategy, audit_share, max_per_expert, due_days, n_regions, seed) -> None:
    """Refuse option values that make no sense, with a hint."""
    if not (np.isfinite(budget) and budget > 0):
        raise InputError(f"--budget must be a positive number, not {budget!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= seed <= 2**32 - 1:
        raise InputError(f"--seed must be an integer in [0, 2**32 - 1], not {seed!r}")
    if strategy not in STRATEGIES:
        raise InputError(f"--strategy must be one of {', '.join(STRATEGIES)}, not {strategy!r}")
    if not (0.0 <= audit_share <= 1.0):
        raise InputError(f"--audit-share must lie in [0, 1], not {audit_share!r}")
    if max_per_expert is not None and max_per_expert < 1:
        raise InputError(f"--max-per-expert must be at least 1 (a round with no assignment is no round), "
                         f"not {max_per_expert!r}")
    if due_days is not None and not (np.isfinite(due_days) and 0 < due_days <= _MAX_DUE_DAYS):
        raise InputError(f"--due-days must be a number of days in (0, {_MAX_DUE_DAYS}], not {due_days!r}")
    if int(n_regions) != n_regions or n_regions < 1:
        raise InputError(f"--regions must be a positive integer, not {n_regions!r}")


def plan_round(
    ws: Workspace,
    budget: float,
    *,
    strategy: str = "value",
    seed: int = 0,
    audit_share: float = 0.1,
    max_per_expert: int | None = None,
    include_unverified: bool = False,
    due_days: float | None = None,
    n_regions: int = 6,
    focus_margin: float | None = 0.1,
    dry_run: bool = False,
) -> RoundPlan:
    """Choose a round of assignments and store it (one transaction, one journal entry).

    Parameters
    ----------
    ws : Workspace
    budget : float
        Largest sum of fees, > 0.
    strategy : {"value", "uncertain", "random"}, default="value"
        See :mod:`routeplan.acquisition`.
    seed : int, default=0
        The same seed on the same workspace gives the same plan.
    audit_share : float, default=0.1
        Share of the budget drawn uniformly at random (flagged audit).
    max_per_expert : int, optional
        Most assignments per expert in this round.
    include_unverified : bool, default=False
        Also consider cases without truth.
    due_days : float, optional
        Answers are due this many days from now (stored with the round).
    n_regions : int, default=6
        Regions of the feature space.
    focus_margin : float or None, default=0.1
        With a kept router (``routeplan fit``) fitted on the workspace's current experts,
        labels and features, ``value`` and ``uncertain`` pick only pairs where that router's
        estimated cost of asking the expert is within this margin of its best other option,
        on either side (:func:`routeplan.acquisition.router_focus`); None, or no usable
        router, plans without focus.
    dry_run : bool, default=False
        Plan but store nothing.

    Returns
    -------
    RoundPlan

    Raises
    ------
    InputError
        On bad options, or when there is nothing to plan (no cases, experts, eligible pairs,
        or a budget below every fee).
    """
    _check_plan_options(budget, strategy, audit_share, max_per_expert, due_days, n_regions, seed)
    if focus_margin is not None and not (np.isfinite(focus_margin) and focus_margin >= 0):
        raise InputError(f"--focus-margin must be a number >= 0, got {focus_margin!r}")
    pool, case_ids, experts, X = _pool(ws, include_unverified, int(n_regions), int(seed))
    _check_something_fits(pool, experts, budget, include_unverified)
    focus, focus_model, focus_note = (None, None, None) if focus_margin is None or strategy == "random" else \
        _router_focus(ws, X, case_ids, [e["name"] for e in experts], float(focus_margin))
    rng = np.random.default_rng(int(seed))
    sel = select_assignments(pool, budget=float(budget), strategy=strategy, audit_share=float(audit_share),
                             max_per_expert=max_per_expert, focus=focus, random_state=rng)
    order = rng.permutation(sel.case.size)
    due_at = _due_at(due_days)
    plan = _plan_result(sel, experts, strategy, int(seed), float(budget), float(audit_share), due_at)
    if focus_note:
        plan.notes.append(focus_note)
    if focus is not None:
        plan.focus = {"model_id": int(focus_model), "margin": float(focus_margin),
                      "pairs_in_focus": round(float(focus[pool.eligible].mean()) if pool.eligible.any() else 0.0, 6)}
    if dry_run:
        return plan
    names = [e["name"] for e in experts]
    fees = pool.fees
    with ws.transaction():
        round_id = ws.add_round(strategy=strategy, budget=float(budget), seed=int(seed), due_at=due_at,
                                detail=_detail(plan, max_per_expert, include_unverified, n_regions, sel))
        rows = [
            (round_id, case_ids[sel.case[i]], names[sel.expert[i]], "audit" if sel.audit[i] else strategy,
             float(sel.selection_prob[i]), int(sel.audit[i]), float(fees[sel.expert[i]]))
            for i in order
        ]
        ws.add_assignments(rows)
        ws.log("round plan", {"round": round_id, "strategy": strategy, "seed": int(seed), "budget": float(budget),
                              "assignments": len(rows), "spend": plan.spend})
    plan.round = round_id
    return plan


def _due_at(due_days: float | None) -> str | None:
    if due_days is None:
        return None
    return (datetime.now(timezone.utc) + timedelta(days=float(due_days))).isoformat(timespec="seconds")


def _detail(plan: RoundPlan, max_per_expert, include_unverified, n_regions, sel: Selection) -> dict:
    """What the round row keeps besides its columns.

    ``design`` is :attr:`routeplan.acquisition.Selection.design` (experts x regions x
    predicted classes): each group's chance of being asked in this round. ``strata`` names
    what the design's third axis holds; rounds stored before it (no key) were stratified by
    the truth, and later fits weight their answers by the combined design.
    """
    return {
        "design": np.round(np.asarray(sel.design, dtype=float), 12).tolist(),
        "strata": "predicted",
        "audit_share": plan.audit_share,
        "max_per_expert": max_per_expert,
        "include_unverified": bool(include_unverified),
        "regions": int(n_regions),
        "spend": plan.spend,
        "audit_spend": plan.audit_spend,
        "experts": plan.experts,
        "notes": plan.notes,
        "focus": plan.focus,
    }


def _plan_result(sel: Selection, experts: list[dict], strategy, seed, budget, audit_share, due_at) -> RoundPlan:
    """Turn a Selection into per-expert figures."""
    rows = []
    for j, e in enumerate(experts):
        mine = sel.expert == j
        rows.append({
            "expert": e["name"],
            "fee": float(e["fee"]),
            "capacity": float(e["capacity"]),
            "cases": int(mine.sum()),
            "audit": int((mine & sel.audit).sum()),
            "spend": round(float(sel.spend[j]), 9),
            "expected_gain": round(float(sel.gain[j]), 12),
        })
    return RoundPlan(
        round=None, strategy=strategy, seed=seed, budget=budget, spend=round(float(sel.spend.sum()), 9),
        audit_share=audit_share, audit_spend=round(sel.audit_spend, 9), assignments=int(sel.case.size),
        experts=rows, due_at=due_at, notes=list(sel.notes),
    )


def _router_focus(ws: Workspace, X: np.ndarray, case_ids: list[str], experts: list[str], margin: float
                  ) -> tuple[np.ndarray | None, int | None, str | None]:
    """The kept router's focus on the candidates (features X) and its model id; else why not.

    Usable: fitted on the workspace's current labels, experts (same names, same order) and
    feature columns, and, for a two-stage router, every candidate has imported
    probabilities. Fees and capacities may have changed since; the router's costs use the
    fees it was fitted with.
    """
    from .features import FeatureSpec
    from .fitting import load_router

    try:
        model_id, router, params, _ = load_router(ws)
    except NotFitted:
        return None, None, None  # nothing fitted yet: the usual first round
    spec = FeatureSpec.from_dict(params["features"])
    stored_experts = [e["name"] for e in params.get("experts", [])]
    if (list(params.get("labels", [])) != list(ws.labels) or stored_experts != list(experts)
            or list(spec.names) != list(ws.feature_columns)):
        return None, None, (f"planned without focus: the kept model #{model_id} was fitted on other "
                            "experts, labels or features; run 'routeplan fit' again")
    kw = {}
    if getattr(router, "two_stage_", False):
        kw["class_proba"] = ws.score_matrix(case_ids)
        lacking = int(np.isnan(kw["class_proba"]).any(axis=1).sum())
        if lacking:
            return None, None, (f"planned without focus: the kept model #{model_id} keeps your own model, and "
                                f"{lacking} candidate case(s) have no imported probabilities ('routeplan scores import')")
    try:
        costs = router.predict_costs(spec.transform(X), **kw)
    except (TypeError, ValueError):
        return None, None, f"planned without focus: the kept model #{model_id} cannot score these cases"
    return router_focus(costs, len(ws.labels), margin), int(model_id), None


def _check_something_fits(pool: PlannerInput, experts: list[dict], budget: float,
                          include_unverified: bool = False) -> None:
    """Refuse a plan that cannot hold a single assignment, saying why."""
    open_experts = pool.capacities > 0
    if not open_experts.any():
        raise InputError("every expert has capacity 0; raise one with "
                         "'routeplan experts add NAME --capacity C'")
    usable = open_experts & pool.eligible.any(axis=0)
    if not usable.any():
        hint = "import more cases" if include_unverified else "import more cases or truth, or pass --include-unverified"
        raise InputError("no eligible (case, expert) pair: every candidate case was already asked of every "
                         f"expert ({hint})")
    most = _MAX_BUDGET_FACTOR * max(float(pool.error_cost), float(pool.fees.max()))
    if budget > most:
        raise InputError(f"--budget {budget:g} is beyond any round: give at most {most:g} (10^12 times the "
                         "larger of the error cost and the dearest fee); a round stops where caps, capacities "
                         "or eligible cases run out")
    cheapest = int(np.flatnonzero(usable)[np.argmin(pool.fees[usable])])
    if budget < pool.fees[cheapest]:
        done = [e["name"] for j, e in enumerate(experts) if open_experts[j] and not usable[j]]
        also = f"; {', '.join(done)} already answered or hold every candidate case" if done else ""
        raise InputError(f"--budget {budget:g} buys no assignment: the cheapest expert with cases left to ask "
                         f"is {experts[cheapest]['name']} at {pool.fees[cheapest]:g}{also}")


def _pool(ws: Workspace, include_unverified: bool, n_regions: int, seed: int
          ) -> tuple[PlannerInput, list[str], list[dict], np.ndarray]:
    """Read the workspace into a PlannerInput; also return candidate case ids, the experts and
    the candidates' features."""
    from .regions import regions_from_features

    frame, X = ws.case_frame()
    if len(frame) == 0:
        raise InputError("the workspace has no cases; run 'routeplan cases import FILE' first")
    experts = ws.experts()
    if not experts:
        raise InputError("the workspace has no experts; run 'routeplan experts add NAME --fee F' first")
    labels = ws.labels
    truth = pd.Categorical(frame["truth"], categories=labels).codes.astype(np.int64)
    candidates = np.flatnonzero(truth >= 0) if not include_unverified else np.arange(len(frame))
    if candidates.size == 0:
        raise InputError("no case has truth yet; import truth with 'routeplan truth import FILE' "
                         "or pass --include-unverified")
    region = regions_from_features(X, n_regions=min(n_regions, len(frame)), random_state=0)
    r = int(region.max()) + 1
    proba = class_probabilities(X, truth, len(labels), random_state=seed)
    stratum = proba.argmax(axis=1)  # not the truth: see "Choices written down here"
    names = [e["name"] for e in experts]
    position = pd.Index(frame["case_id"])
    answers = ws.answer_frame()
    a_case = position.get_indexer(answers["case_id"])
    a_expert = pd.Index(names).get_indexer(answers["expert"])
    answer = pd.Categorical(answers["answer"], categories=labels).codes
    correct, answered = cell_counts(a_case, a_expert, answer, truth, region, len(names), r)
    taken, pending = _assigned(ws, position, region, names, r)
    eligible = _eligibility(len(frame), candidates, len(names), [(a_case, a_expert), taken])
    pool = PlannerInput(
        eligible=eligible, region=region[candidates], stratum=stratum[candidates],
        fees=np.array([e["fee"] for e in experts], dtype=np.float64),
        capacities=np.array([e["capacity"] for e in experts], dtype=np.float64),
        correct=correct, answered=answered, pending=pending,
        model_cost=model_decision_cost(proba, ws.error_cost), population_region=region,
        error_cost=ws.error_cost,
    )
    return pool, frame["case_id"].to_numpy()[candidates].tolist(), experts, X[candidates]


def _assigned(ws, position, region, names, r):
    """(case position, expert index) of every assignment, and open ones of open rounds per cell."""
    frame = ws.assignment_frame()
    case = position.get_indexer(frame["case_id"])
    expert = pd.Index(names).get_indexer(frame["expert"])
    keep = (case >= 0) & (expert >= 0)
    pending = np.zeros((len(names), r))
    waiting = keep & (frame["state"].to_numpy() == "open") & (frame["round_state"].to_numpy() == "open")
    np.add.at(pending, (expert[waiting], region[case[waiting]]), 1.0)
    return (case[keep], expert[keep]), pending


def _eligibility(n_cases, candidates, n_experts, pairs) -> np.ndarray:
    """Eligible[candidate, expert]: not answered and not assigned before."""
    row = np.full(n_cases, -1, dtype=np.int64)
    row[candidates] = np.arange(candidates.size)
    eligible = np.ones((candidates.size, n_experts), dtype=bool)
    for case, expert in pairs:
        ok = (case >= 0) & (expert >= 0)
        rows = row[case[ok]]
        hit = rows >= 0
        eligible[rows[hit], expert[ok][hit]] = False
    return eligible


# --------------------------------------------------------------------------- export


def sheet_path(folder: str | Path, expert: str) -> Path:
    """The sheet file of ``expert`` inside ``folder``, refusing names that lead elsewhere.

    Parameters
    ----------
    folder : str or Path
        The output folder (must exist).
    expert : str

    Returns
    -------
    Path
        ``folder/<expert>.csv``, resolved.

    Raises
    ------
    InputError
        If the name holds a path separator, a control character, is ``.``/``..``, or the
        resolved file (following links) does not lie directly in ``folder``.
    """
    root = Path(folder).resolve()
    bad = (
        not expert
        or expert in (".", "..")
        or any(sep in expert for sep in ("/", "\\", ":"))
        or any(ord(ch) < 32 or ord(ch) == 127 for ch in expert)
    )
    if bad:
        raise InputError(f"expert name {expert!r} is not safe as a file name; the sheet would leave {root} "
                         "(rename the expert in the workspace)")
    target = (root / f"{expert}.csv").resolve()
    if target.parent != root or target.name != f"{expert}.csv":
        raise InputError(f"{root / f'{expert}.csv'} is a link to {target}; a sheet is written directly in the "
                         "--out folder only: remove the link or choose another --out")
    return target


def export_round(
    ws: Workspace,
    round_id: int,
    out_dir: str | Path,
    *,
    columns: Sequence[str] | None = None,
    overwrite: bool = False,
) -> SheetExport:
    """Write one CSV sheet per expert of a round: ``out_dir/<expert>.csv``.

    A sheet holds the columns ``case_id``, the chosen ``columns`` (features or display
    columns of the cases), ``expert`` and ``answer`` (the stored answer, else empty). Cells
    a spreadsheet would run as a formula are neutralised (:func:`routeplan.files.write_csv`).
    Rows follow the round's stored (shuffled) order; the audit flag is not shown. A sheet
    with no display columns is an answers file once filled in. Rows validate against
    ``schemas/sheet-row.schema.json``.

    Parameters
    ----------
    ws : Workspace
    round_id : int
    out_dir : str or Path
        Created if missing.
    columns : sequence of str, optional
        Feature or display columns to show.
    overwrite : bool, default=False
        Replace sheets already in ``out_dir``.

    Returns
    -------
    SheetExport

    Raises
    ------
    InputError
        Unknown round or column, an unsafe expert name, a sheet that is (a link to) the
        workspace's database, or a sheet already there.
    OutputError
        The folder or a sheet could not be written (no permission, read-only file system,
        disk full); the sheets are written all or none.
    """
    record = ws.round_record(round_id)
    if record is None:
        raise InputError(f"there is no round {round_id}; 'routeplan status' lists the rounds")
    rows = pd.DataFrame(ws.round_sheet(round_id), columns=["assignment_id", "case_id", "expert", "state", "answer"])
    if rows.empty:
        raise InputError(f"round {round_id} has no assignments")
    columns = _check_columns(ws, columns or [])
    folder = Path(out_dir)
    if folder.exists() and not folder.is_dir():
        raise InputError(f"--out {folder} is a file, not a folder")
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:  # no permission, read-only file system, a file in the path...
        raise OutputError.from_os_error(exc, folder, what="create the --out folder") from exc
    experts = sorted(set(rows["expert"]))
    targets = {e: sheet_path(folder, e) for e in experts}
    _check_targets(targets)
    check_outputs({f"--out (the sheet of {e})": p for e, p in targets.items()}, overwrite=overwrite,
                  workspace=ws.folder)
    shown = _display_columns(ws, rows["case_id"].unique().tolist(), columns)
    sheets, frames = [], {}
    for expert in experts:
        part = rows[rows["expert"] == expert]
        sheet = pd.DataFrame({"case_id": part["case_id"].to_numpy()})
        for name in columns:
            sheet[name] = [shown[c][name] for c in part["case_id"]]
        sheet["expert"] = expert
        sheet["answer"] = part["answer"].to_numpy()
        frames[targets[expert]] = sheet
        sheets.append({"expert": expert, "path": str(targets[expert]), "rows": len(sheet),
                       "answered": int(part["answer"].notna().sum())})
    write_csvs(frames)  # all sheets or none
    return SheetExport(round=int(round_id), folder=str(folder.resolve()), sheets=sheets)


def _check_columns(ws: Workspace, columns: Sequence[str]) -> list[str]:
    """Refuse unknown or reserved sheet columns, naming what is available."""
    columns = [c.strip() for c in columns if c.strip()]
    reserved = {"case_id", "expert", "answer"}
    clash = [c for c in columns if c in reserved]
    if clash:
        raise InputError(f"--columns: {clash[0]!r} is always on the sheet; name feature or display columns only")
    if len(set(columns)) != len(columns):
        raise InputError("--columns repeats a column")
    known = ws.sheet_columns()
    unknown = [c for c in columns if c not in known]
    if unknown:
        available = ", ".join(sorted(known)) or "none"
        raise InputError(f"--columns: unknown column {unknown[0]!r}; available: {available}")
    return columns


def _display_columns(ws: Workspace, case_ids: list[str], columns: list[str]) -> dict[str, dict]:
    """Per case: the chosen columns' values (features as numbers, display values as stored)."""
    if not columns:
        return {c: {} for c in case_ids}
    features = ws.feature_columns
    details = ws.case_details(case_ids)
    out: dict[str, dict] = {}
    for case_id in case_ids:
        blob, display, group = details[case_id]
        values = dict(zip(features, np.frombuffer(blob, dtype="<f8").tolist()))
        values.update(json.loads(display) if display else {})
        values.setdefault("group", group)  # the --group-column of cases import
        out[case_id] = {name: values.get(name) for name in columns}
    return out


def _check_targets(targets: dict[str, Path]) -> None:
    """Refuse what :func:`routeplan.files.check_outputs` lets through: two experts whose sheets
    differ only in letter case (one file on a case-insensitive file system), and a folder or
    other non-file where a sheet goes, even with ``--overwrite``."""
    seen: dict[str, str] = {}
    for expert, path in targets.items():
        key = str(path).lower()
        if key in seen:
            raise InputError(f"experts {seen[key]!r} and {expert!r} would share the sheet {path.name}")
        seen[key] = expert
    for path in targets.values():
        if path.exists() and not path.is_file():
            raise InputError(f"{path} is a folder or other non-file; move it away, since a sheet cannot replace it")


# --------------------------------------------------------------------------- close


def close_round(ws: Workspace, round_id: int) -> RoundClosed:
    """Mark a round closed; its unanswered assignments stay unanswered and count as expired.

    Parameters
    ----------
    ws : Workspace
    round_id : int

    Returns
    -------
    RoundClosed

    Raises
    ------
    InputError
        If there is no such round.
    """
    record = ws.round_record(round_id)
    if record is None:
        raise InputError(f"there is no round {round_id}; 'routeplan status' lists the rounds")
    rows = ws.round_sheet(round_id)
    answered = sum(1 for r in rows if r["state"] == "answered")
    result = RoundClosed(round=int(round_id), answered=answered, expired=len(rows) - answered)
    if record["state"] == "closed":
        result.already_closed = True
        return result
    with ws.transaction():
        ws.set_round_state(round_id, "closed")
        ws.log("round close", {"round": int(round_id), "answered": answered, "expired": result.expired})
    return result
