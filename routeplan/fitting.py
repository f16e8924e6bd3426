"""Fitting routers on a workspace and storing them as versions.

``fit_workspace`` is what ``routeplan fit`` runs: it reads the workspace into arrays
(:mod:`routeplan.pool`), standardises the features (:mod:`routeplan.features`), holds out a
validation split, fits the candidate routers (:mod:`routeplan.learner`), compares them and the
baselines by validation system cost with 95% intervals, and stores every fitted router as named
arrays plus JSON (never pickled), marking the chosen one.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from .errors import ExpertsWithoutAnswers, InputError, NotFitted
from .features import FeatureSpec, fit_features
from .pool import Pool, load_pool
from .stats import effective_sample_size
from .workspace import Workspace

__all__ = ["FitReport", "answer_weights", "round_weights", "fit_workspace", "held_out_predictions", "load_router", "MIN_TRUTH_CASES"]

MIN_TRUTH_CASES = 40
"""Fewer cases with truth than this cannot be split into fitting and selection parts usefully."""


@dataclass
class FitReport:
    """What ``routeplan fit`` did.

    Attributes
    ----------
    chosen : str
        Name of the router kept.
    model_ids : dict of str to int
        Stored model id of every fitted candidate.
    table : pandas.DataFrame
        Candidates and baselines on the held-out selection cases (see
        :func:`routeplan.learner.select_router`).
    notes : list of str
        Caveats of the comparison.
    answers_per_expert : dict of str to int
        Answers on cases with truth that each expert contributed.
    n_train, n_selection : int
        Cases used to fit and to compare.
    calibration : dict
        Expected calibration error before and after calibration, from the chosen router.
    effective_answers : dict of str to float
        Kish's effective number of each expert's answers under the weights the fit gave them
        (equal to the count when every answer weighs the same).
    """

    chosen: str
    model_ids: dict[str, int]
    table: pd.DataFrame
    notes: list[str]
    answers_per_expert: dict[str, int]
    n_train: int
    n_selection: int
    calibration: dict = field(default_factory=dict)
    effective_answers: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """Plain data for ``--json``."""
        table = self.table.replace({np.nan: None}).to_dict(orient="records")
        return {"chosen": self.chosen, "model_ids": self.model_ids, "table": table, "notes": self.notes,
                "answers_per_expert": self.answers_per_expert, "n_train": self.n_train,
                "n_selection": self.n_selection, "calibration": self.calibration,
                "effective_answers": self.effective_answers}


def fit_workspace(
    ws: Workspace,
    *,
    routers: tuple[str, ...] | None = None,
    random_state: int = 0,
    max_epochs: int | None = None,
    two_stage: bool | None = None,
    class_offset: str | None = None,
    verbose: bool = False,
    console: Any = None,
) -> FitReport:
    """Fit the candidate routers on a workspace, keep the best, store every one.

    Parameters
    ----------
    ws : Workspace
    routers : tuple of str, optional
        Candidates (names of :data:`routeplan.learner.CANDIDATES`); default the learner's
        default set. With one name, that router is kept.
    random_state : int, default=0
        Seeds the split and every candidate.
    max_epochs : int, optional
        Cap on training epochs (default: the routers' own).
    two_stage : bool, optional
        Keep the team's own model (its probabilities from ``routeplan scores import``) and
        learn only the routing (two-stage learning to defer: Mao, Mohri & Zhong, NeurIPS
        2023); only plug-in candidates apply. Default: when every case with truth has
        imported probabilities. True with some of them missing is an error.
    class_offset : {"auto", "always", "never"}, optional
        Two-stage only: the plug-in routers' ``class_offset`` (default theirs, ``"auto"``);
        see :class:`routeplan.learner.PluginRouter`. Given without two-stage, an error.
    verbose : bool, default=False
        Show progress bars.
    console : rich.console.Console, optional

    Returns
    -------
    FitReport

    Raises
    ------
    InputError
        Too few cases with truth, no experts, an unknown router name, or ``class_offset``
        without two-stage.
    """
    from .learner import CANDIDATES, fit_candidates

    pool = load_pool(ws)
    if routers:
        unknown = [r for r in routers if r not in CANDIDATES]
        if unknown:
            raise InputError(f"unknown router {unknown[0]!r}; choose from {', '.join(sorted(CANDIDATES))}")
    if not pool.experts:
        raise InputError("no experts yet; add them with 'routeplan experts add NAME --fee F'")
    mask = pool.has_truth
    if mask.sum() < MIN_TRUTH_CASES:
        raise InputError(f"only {int(mask.sum())} case(s) have truth; fitting needs at least {MIN_TRUTH_CASES} "
                         "(import more with 'routeplan truth import')")
    if len(np.unique(pool.y[mask])) < 2:
        raise InputError("every case with truth has the same label; fitting needs at least two labels")
    class_proba = _two_stage_proba(pool, mask, two_stage, routers)
    if class_offset is not None and class_proba is None:
        raise InputError("--class-offset applies to two-stage fits only (your model's probabilities from "
                         "'routeplan scores import', with --two-stage)")
    router_params = {k: v for k, v in (("max_epochs", max_epochs), ("class_offset", class_offset)) if v}
    spec = fit_features(pool.X[mask], pool.feature_names)
    X = spec.transform(pool.X[mask])
    y, A = pool.y[mask], pool.answers[mask]
    weights = round_weights(pool, ws.round_details(), mask)
    with warnings.catch_warnings(record=True) as caught:  # the routers' data warnings become notes
        warnings.simplefilter("always", UserWarning)
        best, fitted, table = fit_candidates(
            X, y, A, fees=pool.fees, cost_matrix=pool.cost_matrix(), sample_weight=weights,
            random_state=random_state, names=routers, expert_names=list(pool.experts), class_proba=class_proba,
            router_params=router_params or None, verbose=verbose, console=console,
        )
    for w in caught:
        if not issubclass(w.category, UserWarning):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    ids = pool.case_ids[mask]
    selection = np.asarray(table.attrs.get("selection_index", []), dtype=np.int64)
    training = np.setdiff1d(np.arange(len(ids)), selection)
    counts = {name: int((A[:, j] >= 0).sum()) for j, name in enumerate(pool.experts)}
    effective = {name: round(effective_sample_size(weights[:, j][A[:, j] >= 0]), 1)
                 for j, name in enumerate(pool.experts)}
    table.attrs["notes"] = (list(table.attrs.get("notes", [])) + uneven_weight_notes(counts, effective)
                            + _data_notes(caught, counts))
    if class_proba is not None:
        table.attrs["notes"].append("two-stage: your model's imported probabilities are the classifier (temperature-"
                                    "scaled only); the routers learned whom to defer to")
        offset = _class_offset_experts(fitted[best], list(pool.experts))
        if offset:
            table.attrs["notes"].append(
                f"two-stage: the kept router's correctness model of {', '.join(offset)} starts from each one's "
                "accuracy per true class (an offset its validation answers clearly favoured)")
    elif two_stage is None and pool.has_scores[mask].any():
        missing = int((~pool.has_scores[mask]).sum())
        table.attrs["notes"].append(
            f"not two-stage: {missing} of the {int(mask.sum())} case(s) with truth have no imported "
            "probabilities, so the routers learned their own classifier (import the rest with "
            "'routeplan scores import', or pass --two-stage to be told which)")
    metrics = _metrics(table, best, counts, fitted[best], pool, len(selection))
    metrics["effective_answers"] = effective
    model_ids = {}
    with ws.transaction():
        for name, router in fitted.items():
            arrays, meta = router.get_arrays()
            params = {
                "meta": meta, "router": name, "features": spec.to_dict(), "labels": list(pool.labels),
                "experts": [{"name": n, "fee": float(f), "capacity": float(c)}
                            for n, f, c in zip(pool.experts, pool.fees, pool.capacities)],
                "error_cost": pool.error_cost, "training_case_ids": [str(c) for c in ids[training]],
                "validation_case_ids": [str(c) for c in ids[selection]], "seed": random_state,
            }
            model_ids[name] = ws.add_model(name, params, metrics if name == best else {"chosen": best},
                                           arrays, chosen=name == best)
        ws.log("fit", {"chosen": best, "model_ids": model_ids, "seed": random_state,
                       "cases": int(mask.sum()), "answers": counts,
                       **({"class_offset": class_offset} if class_offset else {})})
    return FitReport(best, model_ids, table, list(table.attrs.get("notes", [])), counts,
                     len(training), len(selection), metrics.get("calibration", {}), effective)


def _class_offset_experts(router: Any, experts: list[str]) -> list[str]:
    """The experts whose correctness model in ``router`` (or in any of its members) takes the
    class route as an offset (:class:`routeplan.learner.PluginRouter`, ``class_offset``)."""
    masks = [m.offset_experts_ for m in getattr(router, "members_", [router]) if hasattr(m, "offset_experts_")]
    if not masks:
        return []
    used = np.any(masks, axis=0)
    return [name for name, u in zip(experts, used) if u]


def _two_stage_proba(pool: Pool, mask: np.ndarray, two_stage: bool | None,
                     routers: tuple[str, ...] | None) -> np.ndarray | None:
    """The imported probabilities of the cases with truth when fitting two-stage, else None."""
    from .learner import CANDIDATES, EnsembleRouter, PluginRouter

    covered = pool.has_scores[mask]
    if two_stage is None:
        two_stage = bool(covered.all())
    if not two_stage:
        return None
    if not covered.all():
        raise InputError(f"{int((~covered).sum())} of the {int(mask.sum())} case(s) with truth have no imported "
                         "probabilities; import them with 'routeplan scores import', or fit without --two-stage")
    wrong = [r for r in routers or () if CANDIDATES[r][0] not in (PluginRouter, EnsembleRouter)]
    if wrong:
        raise InputError(f"router {wrong[0]!r} learns its own classifier; with your model's probabilities "
                         "(two-stage) only plugin-ensemble, plugin and plugin-linear apply; fit with --no-two-stage "
                         "to learn a classifier instead")
    return pool.class_proba[mask]


def uneven_weight_notes(counts: dict[str, int], effective: dict[str, float], *,
                        min_answers: int = 20, share: float = 0.5) -> list[str]:
    """Notes for experts whose answers weigh very unevenly.

    Answers of rounds stratified by the truth (workspaces from before rounds were planned on
    predicted classes) are weighted by how likely the rounds were to ask the expert about each
    case (:func:`round_weights`; answers of newer rounds all weigh 1 and never trigger this
    note); when Kish's effective sample size of those weights
    (:func:`routeplan.stats.effective_sample_size`) is below ``share`` of its
    ``min_answers`` or more answers, the rounds asked it mostly in a few places, and the
    router's estimate of its competence elsewhere rests on few answers. In rehearsals a
    router fitted on answers drawn only where an expert did well trusted it elsewhere too
    (``benchmarks/probe_focus.py --explain``).
    """
    notes = []
    for name, n in counts.items():
        eff = effective.get(name, float(n))
        if n >= min_answers and eff < share * n:
            notes.append(f"{name}'s {n} answers count as about {eff:.0f} once weighted for how "
                         "unevenly the rounds drew them: where it was rarely asked, its competence "
                         "rests on few answers and the router may trust it more than it should. A "
                         "round with a larger --audit-share or --strategy random spreads its answers.")
    return notes


def round_weights(pool: Pool, rounds: list[dict], mask: np.ndarray) -> np.ndarray:
    """Weights of the answers on the cases of ``mask``: 1, or stabilized over old designs.

    Rounds planned on predicted classes (``detail["strata"] == "predicted"``, every round
    since that key exists) chose their pairs from the features alone: regions, the model's
    predicted class, the router's focus and uniform draws, never the truth (up to the
    negligible pull of a case's own label on the predicted class, :mod:`routeplan.rounds`).
    Their answers are then missing at random given the features, and a model of
    ``P(expert right | x)`` fitted on them without weights is unbiased (ignorability: Rubin,
    "Inference and missing data", Biometrika 63(3), 1976), while inverse-probability weights
    would only add variance. So each of their answers weighs 1, as historical answers do.
    Measured (``benchmarks/bench_rounds.py``, 8 seeds, 2 router fits per point, against
    stabilized weights over truth strata): see :mod:`routeplan.rehearse`. The recorded
    selection probabilities still serve the audit's unbiased accuracy estimates
    (:mod:`routeplan.competence`).

    Answers of older rounds (no ``"strata"`` in the detail: stratified by the truth) get
    :func:`routeplan.rehearse.stabilized_weights` over the designs those rounds stored
    (``detail["design"]``, experts x regions x classes; experts matched by name), each
    expert's such answers scaled to mean 1. The rule is per round, so a workspace holding
    both kinds weighs each answer by the round that bought it. Regions are recomputed as
    ``round plan`` computed them (:func:`routeplan.regions.regions_from_features` on every
    case, ``random_state=0``), with the region count most old rounds used; rounds planned
    with another count are left out of the sum (for a round planned before more cases were
    imported, the regions recomputed now may differ a little from the plan's). Without any
    usable design, the old answers get their recorded selection probabilities
    (:func:`answer_weights`). Why: in rehearsals on the synthetic scenario, weighting each
    answer by the inverse of its own round's probability let small early rounds and the
    audit dominate (see :mod:`routeplan.rehearse`).

    Parameters
    ----------
    pool : Pool
    rounds : list of dict
        :meth:`routeplan.workspace.Workspace.round_details`.
    mask : ndarray of bool of shape (n_cases,)
        The cases fitted on (they have truth, which is the old designs' class stratum).

    Returns
    -------
    ndarray of shape (mask.sum(), n_experts)
        NaN where there is no answer.
    """
    A, prob = pool.answers[mask], pool.selection_prob[mask]
    weights = np.where(A >= 0, 1.0, np.nan)
    old_rounds = {int(r["round_id"]): r["detail"] for r in rounds
                  if r["detail"].get("strata") != "predicted"}
    old = (A >= 0) & np.isfinite(prob) & np.isin(pool.answer_round[mask], list(old_rounds))
    if not old.any():
        return weights
    stable = _stabilized_old(pool, list(old_rounds.values()), mask, old)
    if stable is None:
        stable = answer_weights(np.where(old, prob, np.nan), np.where(old, A, -1))
    weights[old] = stable[old]
    return weights


def _stabilized_old(pool: Pool, details: list[dict], mask: np.ndarray, old: np.ndarray
                    ) -> np.ndarray | None:
    """Stabilized weights of the ``old`` answers over the old rounds' designs, or None."""
    from collections import Counter

    from .regions import regions_from_features
    from .rehearse import stabilized_weights

    usable = [d for d in details if d.get("design") and d.get("regions")]
    if not usable:
        return None
    n_regions = Counter(int(d["regions"]) for d in usable).most_common(1)[0][0]
    region = regions_from_features(pool.X, n_regions=min(n_regions, len(pool.X)), random_state=0)
    r, K, index = int(region.max()) + 1, pool.n_classes, {n: j for j, n in enumerate(pool.experts)}
    designs = []
    for detail in usable:
        design = np.asarray(detail["design"], dtype=np.float64)
        names = [e.get("expert") for e in detail.get("experts", [])]
        if int(detail["regions"]) != n_regions or design.ndim != 3 or design.shape[1] != r or len(names) != design.shape[0]:
            continue
        full = np.zeros((len(pool.experts), r, K))
        for row, name in enumerate(names):
            if name in index:
                full[index[name], :, : min(K, design.shape[2])] = design[row, :, :K]
        designs.append(full)
    if not designs:
        return None
    return stabilized_weights(designs, region[mask], pool.y[mask], old)


def answer_weights(selection_prob: np.ndarray, answers: np.ndarray, *, clip: float = 10.0) -> np.ndarray:
    """Per-answer weights for the learners: inverse selection probability, self-normalised.

    Answers from rounds get ``1 / p`` (Horvitz & Thompson, JASA 1952), divided by its mean over
    that expert's round answers so that they weigh like historical answers (weight 1) on
    average (the self-normalised or Hajek form), and truncated at ``clip`` times the mean
    to bound the variance (weight truncation, common practice). NaN where there is no answer.

    Parameters
    ----------
    selection_prob : ndarray of shape (n, M)
        NaN for historical answers and missing ones.
    answers : ndarray of shape (n, M)
        -1 where unknown.
    clip : float, default=10.0

    Returns
    -------
    ndarray of shape (n, M)
    """
    raw = np.where(np.isfinite(selection_prob), 1.0 / np.where(np.isfinite(selection_prob), selection_prob, 1.0), np.nan)
    weights = np.ones_like(raw)
    for j in range(raw.shape[1]):
        asked = np.isfinite(raw[:, j]) & (answers[:, j] >= 0)
        if asked.any():
            scaled = raw[asked, j] / raw[asked, j].mean()
            weights[asked, j] = np.minimum(scaled, clip)
    return np.where(answers >= 0, weights, np.nan)


def _triple(row: pd.Series, name: str, n: int) -> list[float | None]:
    """[estimate, low, high]: the table's interval for system cost, a Wilson interval for shares."""
    from .stats import wilson_interval

    if name == "system_cost":
        return [_num(row.get(k)) for k in ("system_cost", "ci_low", "ci_high")]
    share = _num(row.get(name))
    if share is None or n == 0:
        return [share, None, None]
    low, high = wilson_interval(share * n, n)
    return [share, float(low), float(high)]


def _num(value: Any) -> float | None:
    return None if value is None or value != value else float(value)


def _metrics(table: pd.DataFrame, best: str, counts: dict, router: Any, pool: Pool, n_selection: int) -> dict:
    row = table.loc[table["router"] == best].iloc[0]
    clean = table.replace({np.nan: None}).to_dict(orient="records")
    return {
        "chosen": best,
        "candidates": clean,
        "validation": {
            "n_cases": n_selection,
            "system_cost": _triple(row, "system_cost", n_selection),
            "accuracy": _triple(row, "accuracy", n_selection),
            "coverage": _triple(row, "coverage", n_selection),
            "workload": {name: _triple(row, f"share_{name}", n_selection) for name in pool.experts},
        },
        "answers_per_expert": counts,
        "calibration": getattr(router, "calibration_", {}) and _plain(router.calibration_),
        "notes": list(table.attrs.get("notes", [])),
    }


def _plain(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (np.floating, float)):
        return None if value != value else float(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    return value


def _data_notes(caught: list[warnings.WarningMessage], counts: dict[str, int]) -> list[str]:
    """The routers' data warnings as notes, once each, naming the experts they concern."""
    names = list(counts)
    notes = []
    silent = [name for name, n in counts.items() if n == 0]
    if silent:
        notes.append(f"no answer yet from {', '.join(silent)} on cases with truth: the routers take "
                     "their correctness to be the prior 0.5 and route on that")
    for w in caught:
        if not issubclass(w.category, UserWarning):
            continue
        text = str(w.message)
        columns = getattr(w.message, "experts", None)
        if isinstance(w.message, ExpertsWithoutAnswers) and columns is not None:
            named = [names[j] for j in columns if 0 <= j < len(names) and names[j] not in silent]
            if not named:
                continue  # said above
            text = (f"{', '.join(named)} had no answer in a router's training split (all fell in its "
                    "validation split): that router takes their correctness to be the prior 0.5")
        if text not in notes:
            notes.append(text)
    return notes


def load_router(ws: Workspace, model_id: int | None = None) -> tuple[int, Any, dict, dict]:
    """Rebuild a stored router (default: the chosen one).

    Returns
    -------
    model_id : int
    router : fitted router from :mod:`routeplan.learner`
    params : dict
        Stored parameters: ``meta``, ``features``, ``labels``, ``experts``, ``validation_case_ids``.
    metrics : dict
    """
    from .learner import router_from_arrays

    model_id, kind, params, metrics, arrays = ws.load_model(model_id)
    return model_id, router_from_arrays(arrays, params["meta"]), params, metrics


def held_out_predictions(ws: Workspace, pool: Pool) -> np.ndarray | None:
    """The chosen model's class for each case it did not train on (-1 elsewhere); None if unfitted.

    Parameters
    ----------
    ws : Workspace
    pool : Pool

    Returns
    -------
    ndarray of int, shape (n_cases,), or None
    """
    try:
        _, router, params, _ = load_router(ws)
    except NotFitted:
        return None
    spec = FeatureSpec.from_dict(params["features"])
    if list(spec.names) != list(pool.feature_names):
        return None
    trained = set(params.get("training_case_ids", []))
    scored = np.array([cid not in trained for cid in pool.case_ids], dtype=bool)
    pred = np.full(len(pool.case_ids), -1, dtype=np.int64)
    if getattr(router, "two_stage_", False):
        # the team's own model decides; temperature scaling keeps its arg-max (Guo et al., ICML 2017)
        scored &= pool.has_scores
        if scored.any():
            pred[scored] = np.argmax(pool.class_proba[scored], axis=1)
        return pred
    if scored.any():
        proba = router.predict_proba(spec.transform(pool.X[scored]))
        pred[scored] = np.argmax(proba, axis=1)
    return pred
