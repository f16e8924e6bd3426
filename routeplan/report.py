"""Rendering: rich tables and panels built from the plain data the library returns."""

from __future__ import annotations

from rich import box
from rich.console import Group
from rich.table import Table
from rich.text import Text

__all__ = ["render_status"]


def render_status(info: dict) -> Group:
    """Render :meth:`routeplan.workspace.Workspace.status` as tables.

    Parameters
    ----------
    info : dict
        The status data.

    Returns
    -------
    rich.console.Group
    """
    cases = info["cases"]
    head = Text()
    head.append(f"Workspace {info['workspace']} (schema v{info['schema_version']})\n", style="bold")
    head.append(f"Labels: {', '.join(info['labels'])}; one wrong decision costs {info['error_cost']:g}\n")
    head.append(
        f"Cases: {cases['total']} ({cases['with_truth']} with truth, {cases['without_truth']} without); "
        f"{len(info['feature_columns'])} feature column(s)"
        + (f"; imported model probabilities: {cases['with_imported_scores']}" if cases.get("with_imported_scores") else "")
        + "\n"
    )
    head.append(f"Answers: {info['answers']['total']} ({info['answers']['historical']} historical); "
                f"models: {info['models']}; policies: {info['policies']}")
    parts: list = [head]
    if info["experts"]:
        parts.append(_experts_table(info["experts"]))
    else:
        parts.append(Text("No experts yet: routeplan experts add NAME --fee F"))
    if info["rounds"]:
        table = Table(title="Rounds", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False, collapse_padding=True,
                      show_edge=False)  # the blank edges would cost two of 80 columns and fold "answered"
        for name in ("round", "strategy", "budget", "spent", "state", "asked", "answered", "open", "overdue", "expired"):
            table.add_column(name, justify="left" if name in ("strategy", "state") else "right", overflow="fold")
        for r in info["rounds"]:
            table.add_row(str(r["round"]), r["strategy"], f"{r['budget']:g}", f"{r['spent']:g}", r["state"],
                          str(r["assignments"]), str(r["answered"]), str(r["open"]), str(r["overdue"]),
                          str(r["expired"]), style="bold red" if r["overdue"] else None)
        parts.append(table)
    return Group(*parts)


def _experts_table(experts: list[dict]) -> Table:
    """The experts of a status; fees pending or expired get columns only where there are any."""
    extra = [key for key in ("pending_fees", "expired_fees") if any(e.get(key) for e in experts)]
    table = Table(title="Experts", title_justify="left", expand=False, box=box.SIMPLE_HEAD, pad_edge=False,
                  caption_justify="left")
    for name, justify in (("expert", "left"), ("fee", "right"), ("capacity", "right"),
                          ("answers", "right"), ("historical", "right"), ("spent", "right")):
        table.add_column(name, justify=justify, overflow="fold")
    for key in extra:
        table.add_column(key.replace("_fees", ""), justify="right", overflow="fold")
    for e in experts:
        table.add_row(e["name"], f"{e['fee']:g}", f"{e['capacity']:.0%}", str(e["answers"]),
                      str(e["historical_answers"]), f"{e['spent']:g}", *(f"{e[key]:g}" for key in extra))
    notes = {"pending_fees": "pending: fees of assignments still awaiting an answer",
             "expired_fees": "expired: fees of assignments unanswered when their round closed (not spent)"}
    table.caption = "spent: fees of answered assignments" + "".join(f"; {notes[key]}" for key in extra)
    return table


def _agreement_table(frame) -> Table:
    """Pairwise agreement; a pair without shared cases says so instead of showing nan."""
    table = Table(title="Agreement between experts (Cohen's kappa, shared cases)", title_justify="left",
                  box=box.SIMPLE_HEAD, pad_edge=False)
    for name in ("expert", "expert", "shared", "agreement", "kappa"):
        table.add_column(name, justify="left" if name == "expert" else "right", overflow="fold")
    for row in frame.to_dict(orient="records"):
        shared = int(row["n_shared"])
        agreement = "no shared cases" if shared == 0 else _figure(row["agreement"])
        table.add_row(str(row["expert_a"]), str(row["expert_b"]), str(shared), agreement, _figure(row["kappa"]))
    return table


def _figure(value: float) -> str:
    """A figure with two decimals, or a dash where there is none (nan)."""
    return "-" if value != value else f"{value:.2f}"


def _interval(value: float, low: float, high: float, fmt: str = "{:.2f}") -> str:
    if value != value:  # nan
        return "-"
    return f"{fmt.format(value)} [{fmt.format(low)}, {fmt.format(high)}]"


_NO_INTERVAL = "\u2020"  # dagger: a value whose interval could not be formed


def _estimate_cell(value: float, low: float, high: float, fmt: str) -> tuple[str, bool]:
    """A competence figure with its interval; True when the value stands without one.

    "-" where there is no value; the value and a dagger where there is a value but no
    interval (the caption explains it), so that a bare figure is never shown silently.
    """
    if value != value:  # nan
        return "-", False
    if low != low or high != high:
        return f"{fmt.format(value)} {_NO_INTERVAL}", True
    return _interval(value, low, high, fmt), False


def _n_cell(row: dict, prefix: str) -> tuple[str, bool]:
    """``scored/answered``, with Kish's effective size where weighted answers are worth fewer."""
    n_scored = row.get(prefix + "n_scored", 0)
    n_scored = int(n_scored) if n_scored == n_scored else 0
    text = f"{n_scored}/{int(row['n_answered'])}"
    n_eff = row.get(prefix + "n_effective", float("nan"))
    weighted = bool(prefix and row.get("audit_weighted")) and n_eff == n_eff and n_scored > 0
    if weighted and n_eff < 0.95 * n_scored:
        return f"{text} (~{n_eff:.0f})", True
    return text, False


def _accuracy_table(frame, title: str, level: str | None, basis: str) -> Table:
    """One accuracy table of a competence report, with a legend for every mark it uses.

    Parameters
    ----------
    frame : DataFrame
        A table of :func:`routeplan.competence.expert_accuracy_table`.
    title : str
        Table title.
    level : str or None
        The breakdown column (``"class"``, ``"group"``, ``"region"``), if any.
    basis : {"truth", "audit"}
        Which columns to show: unprefixed or ``audit_``.

    Returns
    -------
    rich.table.Table
    """
    prefix = "audit_" if basis == "audit" else ""
    table = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False,
                  caption_justify="left")
    table.add_column("expert", overflow="fold", min_width=6)
    if level:
        table.add_column(level, overflow="fold", max_width=12)
    table.add_column("n", justify="right", no_wrap=True)
    table.add_column("accuracy [95% CI]", justify="right", no_wrap=True)
    table.add_column("kappa", justify="right", no_wrap=True)
    table.add_column("saved/fee [95% CI]", justify="right", no_wrap=True)
    any_bare = any_effective = False
    for row in frame.to_dict(orient="records"):
        wide = bool(row.get(prefix + "too_wide"))
        n_text, effective = _n_cell(row, prefix)
        accuracy, bare_a = _estimate_cell(row[prefix + "accuracy"], row[prefix + "accuracy_low"],
                                          row[prefix + "accuracy_high"], "{:.2f}")
        value, bare_v = _estimate_cell(row[prefix + "value_per_fee"], row[prefix + "value_low"],
                                       row[prefix + "value_high"], "{:.1f}")
        any_bare |= bare_a or bare_v
        any_effective |= effective
        cells = [str(row["expert"])] + ([str(row[level])] if level else [])
        cells += [
            n_text,
            accuracy + ("*" if wide else " "),
            "-" if row[prefix + "kappa"] != row[prefix + "kappa"] else f"{row[prefix + 'kappa']:.2f}",
            value,
        ]
        table.add_row(*cells, style="dim" if wide else None)
    legend = ["n: scored/answered (scored: on cases with truth)"]
    if any_effective:
        legend.append("(~k): weighted audit answers, worth about k unweighted ones "
                      "(Kish's effective size), which the rate and interval rest on")
    legend.append("*: accuracy interval too wide to act on")
    legend.append("intervals: Wilson (accuracy), Agresti-Min paired (saved/fee); kappa has none")
    legend.append("-: none (no scored answers; kappa undefined; saved/fee: no fee, or the model's own row)")
    if any_bare:
        legend.append(f"{_NO_INTERVAL}: too few answers for an interval")
    table.caption = "; ".join(legend)
    return table


def _confusion_table(name: str, matrix, labels: list[str]) -> Table:
    """One confusion matrix: rows are the truth, columns the answer."""
    table = Table(title=f"Confusion of {name} (rows: truth, columns: answer)", title_justify="left",
                  box=box.SIMPLE_HEAD, pad_edge=False)
    table.add_column("truth", overflow="fold")
    for label in labels:
        table.add_column(str(label), justify="right", overflow="fold")
    for label, row in zip(labels, matrix):
        table.add_row(str(label), *[str(int(v)) if float(v).is_integer() else f"{v:.1f}" for v in row])
    return table


def render_competence(report, *, by: str | None = None, basis: str = "truth") -> Group:
    """Render a :class:`routeplan.competence.CompetenceReport` as rich tables.

    Parameters
    ----------
    report : CompetenceReport
    by : {None, "class", "group", "region"}
        Which breakdown to show beside the overall table.
    basis : {"truth", "audit"}
        Which answers the accuracy figures rest on (see ``routeplan.competence.BASES``).

    Returns
    -------
    rich.console.Group
    """
    from .competence import BASES

    parts: list = []
    note = Text()
    note.append(f"Basis: {basis}: {BASES[basis]}.\n")
    note.append("saved/fee: expected wrong decisions saved per unit of fee, against letting the model decide "
                "(on the same cases; model row: held-out cases only).")
    parts.append(note)
    parts.append(_accuracy_table(report.accuracy, "Competence", None, basis))
    if by:
        frame = getattr(report, f"by_{by}")
        if frame is not None and len(frame):
            parts.append(_accuracy_table(frame, f"Competence by {by}", by, basis))
    per_class = report.per_class
    if per_class is not None and len(per_class):
        table = Table(title="Per class (truth basis)", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
        for name in ("expert", "class", "support", "recall (95% CI)", "precision (95% CI)"):
            table.add_column(name, justify="left" if name in ("expert", "class") else "right", overflow="fold")
        for row in per_class.to_dict(orient="records"):
            table.add_row(str(row["expert"]), str(row["class"]), str(int(row["support"])),
                          _interval(row["recall"], row["recall_low"], row["recall_high"]),
                          _interval(row["precision"], row["precision_low"], row["precision_high"]))
        parts.append(table)
    for name, matrix in (report.confusion or {}).items():
        parts.append(_confusion_table(name, matrix, report.labels))
    if report.agreement is not None and len(report.agreement):
        parts.append(_agreement_table(report.agreement))
    if report.fleiss is not None and len(report.fleiss):
        text = Text("Fleiss' kappa where three or more experts answered the same cases:\n")
        for row in report.fleiss.to_dict(orient="records"):
            text.append(f"  {row['experts']}: {row['kappa']:.2f} on {int(row['n_cases'])} cases\n")
        parts.append(text)
    if report.latent is not None and report.latent_accuracy is not None:
        latent = report.latent
        text = Text("Latent truth (Dawid-Skene EM; known truth held fixed):\n")
        shares = ", ".join(f"{label} {p:.2f}" for label, p in zip(report.labels, latent.class_prior))
        text.append(f"  class proportions: {shares}\n")
        for row in report.latent_accuracy.to_dict(orient="records"):
            text.append(f"  {row['expert']}: estimated accuracy {row['latent_accuracy']:.2f} "
                        f"from {int(row['n_answers'])} answers\n")
        parts.append(text)
    return Group(*parts)


def render_fit(report) -> Group:
    """Render a :class:`routeplan.fitting.FitReport`: candidates and baselines on held-out cases.

    One table where the console is wide enough; otherwise the share of cases per route
    moves to a second table, so that no router name or figure is folded.

    Parameters
    ----------
    report : FitReport

    Returns
    -------
    rich.console.Group
    """
    return Group(_FitTables(report), _fit_notes(report))


class _FitTables:
    """The fit's tables, laid out for the width of the console they are printed on."""

    def __init__(self, report) -> None:
        self.report = report

    def __rich_console__(self, console, options):
        from rich.measure import Measurement

        whole = _fit_table(self.report, with_shares=True)
        # measured unbounded: a measurement within the console's width is clamped to it
        if Measurement.get(console, options.update_width(10_000), whole).maximum <= options.max_width:
            yield whole
            return
        yield _fit_table(self.report, with_shares=False)
        yield _share_table(self.report)


def _router_cell(report, row: dict) -> str:
    """A router's name, marked where it is the one kept."""
    return row["router"] + (" (kept)" if row["router"] == report.chosen else "")


def _row_style(report, row: dict) -> str | None:
    """Bold for the router kept, dim for the baselines."""
    return "bold" if row["router"] == report.chosen else ("dim" if row.get("kind") != "router" else None)


def _share_columns(report) -> list[str]:
    """The table's ``share_<expert>`` columns, in order."""
    return [c for c in report.table.columns if c.startswith("share_")]


def _fit_table(report, *, with_shares: bool) -> Table:
    """Cost, accuracy, coverage (and, if ``with_shares``, each expert's share) per router."""
    table = Table(title=f"Routers on {report.n_selection} held-out cases (fitted on {report.n_train})",
                  title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    table.add_column("router", overflow="fold")  # on a narrow console the names fold, not the figures
    table.add_column("system cost [95% CI]", justify="right", no_wrap=True)
    for name in ("accuracy", "coverage"):
        table.add_column(name, justify="right", min_width=len(name))
    shares = _share_columns(report) if with_shares else []
    for column in shares:
        table.add_column(column[len("share_"):], justify="right")
    imputed = "imputed_share" in report.table.columns and bool((report.table["imputed_share"] > 0).any())
    if imputed:
        table.add_column("imputed", justify="right", min_width=len("imputed"))
    for row in report.table.to_dict(orient="records"):
        table.add_row(
            _router_cell(report, row),
            _interval(row["system_cost"], row["ci_low"], row["ci_high"], "{:.3f}"),
            f"{row['accuracy']:.3f}",
            f"{row['coverage']:.0%}",
            *[f"{row[c]:.0%}" for c in shares],
            *([f"{row['imputed_share']:.0%}"] if imputed else []),
            style=_row_style(report, row),
        )
    if imputed:
        table.caption = ("imputed: share of the held-out cases whose cost is an estimate (the expert "
                         "sent to had not answered it), not an observed outcome; the interval does "
                         "not include that estimate's error")
        table.caption_justify = "left"
    return table


def _share_table(report) -> Table:
    """Each router's share of held-out cases per expert (coverage is the model's share)."""
    table = Table(title="Share of the held-out cases sent to each expert", title_justify="left",
                  box=box.SIMPLE_HEAD, pad_edge=False)
    table.add_column("router", overflow="fold")
    shares = _share_columns(report)
    for column in shares:
        table.add_column(column[len("share_"):], justify="right")
    for row in report.table.to_dict(orient="records"):
        table.add_row(_router_cell(report, row), *[f"{row[c]:.0%}" for c in shares],
                      style=_row_style(report, row))
    return table


def _fit_notes(report) -> Text:
    """Answers per expert, calibration, notes and the stored models, under the tables."""
    text = Text()
    eff = report.effective_answers or {}

    def answers(name: str, n: int) -> str:
        e = eff.get(name)
        return f"{name} {n}" if e is None or e >= 0.95 * n else f"{name} {n} (weighted, worth {e:.0f})"

    text.append("Answers on cases with truth: " + ", ".join(answers(k, v) for k, v in report.answers_per_expert.items()) + "\n")
    ece = report.calibration or {}
    if ece:
        text.append("Calibration (expected calibration error, validation split): " + _ece_words(ece) + "\n")
    for note in report.notes:
        text.append(f"Note: {note}\n")
    text.append(f"Stored models: {', '.join(f'{k} #{v}' for k, v in report.model_ids.items())}; kept {report.chosen}.")
    return text


def _ece_words(ece: dict) -> str:
    parts = []
    for key, value in ece.items():
        if isinstance(value, dict):
            inner = ", ".join(f"{k} {v:.3f}" for k, v in value.items() if isinstance(v, (int, float)))
            if inner:
                parts.append(f"{key}: {inner}")
        elif isinstance(value, (int, float)):
            parts.append(f"{key} {value:.3f}")
    return "; ".join(parts) or "not available"


def render_rehearsal(result, reach: dict, target: float) -> Group:
    """Render a :class:`routeplan.rehearse.Rehearsal`: cost per round and strategy.

    Parameters
    ----------
    result : Rehearsal
    reach : dict of str to float
        Spend at which each strategy first reached ``target``.
    target : float

    Returns
    -------
    rich.console.Group
    """
    curves = result.curves
    strategies = list(dict.fromkeys(curves["strategy"]))
    table = Table(title="Exact system cost per held-out case", title_justify="left",
                  box=box.SIMPLE_HEAD, pad_edge=False)
    table.add_column("round", justify="right")
    table.add_column("spend", justify="right")
    for s in strategies:
        table.add_column(s, justify="right")
    for round_no, rows in curves.groupby("round"):
        by = dict(zip(rows["strategy"], rows["system_cost"]))
        table.add_row(str(round_no), f"{rows['spend'].max():.1f}", *[f"{by.get(s, float('nan')):.3f}" for s in strategies])
    text = Text()
    bayes = "" if result.bayes_cost is None else f"Bayes-optimal cost {result.bayes_cost:.3f}; "
    text.append(f"{bayes}same router with every answer known {result.full_information_cost:.3f} "
                f"(those answers would cost {result.full_information_spend:.0f}).\n")
    for s in strategies:
        spent = reach.get(s, float("inf"))
        text.append(f"{s}: within 0.01 of the all-answers cost (a cost of at most {target:.3f}) "
                    + (f"after spending {spent:.1f}\n" if spent != float("inf") else "not reached in these rounds\n"))
    return Group(table, text)
