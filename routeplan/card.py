"""The policy card: a Markdown summary of a frozen policy, built from its manifest alone."""

from __future__ import annotations

from typing import Any, Mapping

__all__ = ["policy_card"]


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
    own = manifest["router"].get("class_proba_columns")
    if own:
        text += (f" The model that decides is the team's own: each case must also carry its class "
                 f"probabilities in the columns {', '.join(own)}; the policy learned only whom to defer to. "
                 "Retraining that model changes what the policy was validated on: fit and freeze again.")
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
