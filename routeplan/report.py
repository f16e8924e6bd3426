"""Rendering: rich tables and panels built from the plain data the library returns."""

from __future__ import annotations

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
        f"{len(info['feature_columns'])} feature column(s)\n"
    )
    head.append(f"Answers: {info['answers']['total']} ({info['answers']['historical']} historical); "
                f"models: {info['models']}; policies: {info['policies']}")
    parts: list = [head]
    if info["experts"]:
        table = Table(title="Experts", title_justify="left", expand=False)
        for name, justify in (("expert", "left"), ("fee", "right"), ("capacity", "right"),
                              ("answers", "right"), ("historical", "right"), ("spent", "right")):
            table.add_column(name, justify=justify, overflow="fold")
        for e in info["experts"]:
            table.add_row(e["name"], f"{e['fee']:g}", f"{e['capacity']:.0%}", str(e["answers"]),
                          str(e["historical_answers"]), f"{e['spent']:g}")
        parts.append(table)
    else:
        parts.append(Text("No experts yet: routeplan experts add NAME --fee F"))
    if info["rounds"]:
        table = Table(title="Rounds", title_justify="left")
        for name in ("round", "strategy", "budget", "state", "assigned", "answered", "open"):
            table.add_column(name, justify="left" if name in ("strategy", "state") else "right")
        for r in info["rounds"]:
            table.add_row(str(r["round"]), r["strategy"], f"{r['budget']:g}", r["state"],
                          str(r["assignments"]), str(r["answered"]), str(r["open"]))
        parts.append(table)
    return Group(*parts)
