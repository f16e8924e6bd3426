"""Freezing a workspace's fitted router into a policy file (``routeplan freeze``).

:func:`freeze_workspace` takes the chosen router of a workspace, scores its held-out
validation cases, solves the capacity LP there (:func:`routeplan.routing.capacity_lp`) for
one dual price per expert, measures the *deployed* rule (priced routing with streaming caps)
on those cases with 95% intervals, and writes everything as one policy file
(:func:`routeplan.policy.write_policy`) plus a Markdown policy card
(:func:`routeplan.card.policy_card`). Applying the file to new cases is
:mod:`routeplan.deploy`'s job.

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
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from .card import policy_card
from .errors import InputError
from .files import check_outputs, write_all_or_none

__all__ = ["CONFIDENCE", "FreezeResult", "freeze_workspace"]

#: Confidence level of every interval in the manifest.
CONFIDENCE = 0.95


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
                     model_id: int | None = None, confidence: float = CONFIDENCE,
                     overwrite: bool = True) -> FreezeResult:
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
    overwrite : bool, default=True
        Replace a policy file or card already there (the command line's default is to
        refuse).

    Returns
    -------
    FreezeResult

    Raises
    ------
    InputError
        No fitted model, a two-stage router whose held-out cases lack imported
        probabilities, no held-out cases, feature columns changed
        since the fit, a model id that is not a stored one, an output that is the
        workspace's database (or one of its sidecar files), a folder, or in a folder that
        does not exist, or (without ``overwrite``) an output file that does. The policy
        file and the card are written all or none, and recorded in the workspace only if
        both were written.
    OutputError
        The policy file or the card could not be written (no permission, read-only file
        system, disk full); neither is replaced and nothing is recorded.
    """
    from .fitting import load_router
    from .policy import render_policy
    from .pool import load_pool

    out = Path(out)
    card_path = _card_path(out, card)
    check_outputs({"--out": out, "--card": card_path}, overwrite=overwrite, workspace=ws.folder)
    model_id, router, params, fit_metrics = load_router(ws, model_id)
    pool = load_pool(ws)
    frozen = _freeze_parts(router, params, fit_metrics, pool, model_id, confidence)
    arrays, meta = router.get_arrays()
    frozen.manifest["router"] = {"kind": str(params["router"]), "hyperparameters": meta["params"],
                                 "arrays": sorted(arrays), "meta": meta}
    if getattr(router, "two_stage_", False):
        from .ingest import score_columns

        frozen.manifest["router"]["class_proba_columns"] = score_columns(params["labels"])
        frozen.notes.extend(_scores_changed_since(ws, model_id))
    policy_text, sha, manifest = render_policy(frozen.manifest, arrays)  # manifest: as route will read it
    card_text = policy_card(manifest, sha256=sha, path=out.name)
    with ws.transaction():  # the files last: if writing them fails, the records roll back
        policy_id = ws.add_policy(str(out.resolve()), sha, model_id, manifest)
        ws.log("freeze", {"policy_id": policy_id, "model_id": model_id, "path": str(out.resolve()),
                          "card": str(card_path.resolve()), "sha256": sha})
        write_all_or_none({out: lambda tmp: Path(tmp).write_text(policy_text, encoding="utf-8"),
                           card_path: lambda tmp: Path(tmp).write_text(card_text, encoding="utf-8")})
    return FreezeResult(str(out), str(card_path), sha, policy_id, model_id, str(params["router"]),
                        manifest["experts"], manifest["metrics"], frozen.notes)


def _scores_changed_since(ws: Any, model_id: int) -> list[str]:
    """A note if imported probabilities changed after the two-stage model was fitted."""
    journal = ws.journal()  # newest first; entry ids order the commands even within a second
    fitted = next((e["entry_id"] for e in journal if e["command"] == "fit"
                   and model_id in json.loads(e["detail"] or "{}").get("model_ids", {}).values()), None)
    if fitted is None:
        return []
    later = [e for e in journal if e["command"] == "scores import" and e["entry_id"] > fitted
             and json.loads(e["detail"] or "{}").get("replaced", 0)]
    if not later:
        return []
    return [f"your model's imported probabilities were replaced after model {model_id} was fitted "
            f"({len(later)} import(s), the last at {later[0]['at']}): this policy and its figures rest on "
            "the old ones; fit again, then freeze"]


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
    kw = _imported_proba(router, pool, pos)
    ec = np.asarray(router.predict_costs(Xs, **kw), dtype=np.float64)
    K = len(params["labels"])
    lp = capacity_lp(ec, caps, K)
    routes = route_with_prices(ec, lp.prices, K, caps, stream_caps=True)
    metrics, basis = _held_out_metrics(router, Xs, ec, routes, pool, pos, names, fees, confidence, kw)
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


def _imported_proba(router: Any, pool: Any, pos: np.ndarray) -> dict:
    """``{"class_proba": ...}`` of the cases ``pos`` for a two-stage router, else ``{}``."""
    if not getattr(router, "two_stage_", False):
        return {}
    if not pool.has_scores[pos].all():
        raise InputError("the chosen router keeps your own model, but some of its held-out cases have no "
                         "imported probabilities; import them with 'routeplan scores import'")
    return {"class_proba": pool.class_proba[pos]}


def _held_out_metrics(router: Any, Xs: np.ndarray, ec: np.ndarray, routes: np.ndarray, pool: Any,
                      pos: np.ndarray, names: list[str], fees: np.ndarray, confidence: float,
                      kw: dict) -> tuple[dict, dict]:
    """Metrics of a routing on held-out cases, realised where possible, with intervals."""
    from .costs import cost_vectors, expected_cost_vectors, impute_missing_costs

    K, M = ec.shape[1] - len(names), len(names)
    y = pool.y[pos]
    A = _expert_columns(pool, names)[pos]
    C = np.asarray(router.cost_matrix_, dtype=np.float64)
    q = np.asarray(router.predict_expert_correct(Xs, **kw), dtype=np.float64) if M else np.zeros((len(pos), 0))
    P = np.asarray(router.predict_proba(Xs, **kw), dtype=np.float64)
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


def _percent(x: float) -> str:
    """A share as a percentage, with the decimals it needs not to read as 0% or 100%."""
    if x <= 0.0 or x >= 1.0 or 0.005 <= x <= 0.995:
        return f"{x:.0%}"
    gap = 100.0 * min(x, 1.0 - x)  # in percent, below 0.5
    return f"{100.0 * x:.{max(1, math.ceil(-math.log10(gap)) + 1)}f}%"


def _basis_summary(shares: dict) -> str:
    """One sentence on how much of the metrics is realised."""
    if shares["realised"] == 1.0:
        return "realised: every routed case has known truth and, where deferred, the expert's answer"
    parts = [f"{_percent(shares[k])} {k}" for k in ("realised", "imputed", "expected") if shares[k] > 0]
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
