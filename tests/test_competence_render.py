"""The competence table as printed: intervals from a few answers, legends, effective sizes."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest
from rich.console import Console

from routeplan.competence import competence_report
from routeplan.report import _accuracy_table, render_competence
from test_competence import _agresti_min  # the paper's formula, written out once in the tests

CELL = re.compile(r"(-?\d+\.\d+) \[(-?\d+\.\d+), (-?\d+\.\d+)\]")


def _text(renderable) -> str:
    """The rendered text with runs of white space (the wrapped captions' line breaks) as one space."""
    console = Console(record=True, width=200, color_system=None)
    console.print(renderable)
    return " ".join(console.export_text().split())


@pytest.fixture
def few_per_region():
    """Three regions with two or three answers each; in region 0 the expert and the model agree
    and are right on every case (the reviewer's "0.0 [0.0, 0.0]"), in region 1 the model is
    wrong and the expert right on both cases (the "50.0 [50.0, 50.0]" at a fee of 0.02)."""
    truth = np.zeros(8, dtype=int)
    model = np.array([0, 0, 0, 1, 1, 0, 1, 0])
    answers = pd.DataFrame({"case": np.arange(8), "expert": "e",
                            "answer": [0, 0, 0, 0, 0, 1, 0, 0],
                            "audit": True, "weight": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 9.0, 1.0]})
    region = np.array([0, 0, 0, 1, 1, 2, 2, 2])
    report = competence_report(answers, truth, n_classes=2, fees={"e": 0.02}, model_pred=model,
                               region=region, latent=False)
    return report


@pytest.mark.parametrize("basis", ["truth", "audit"])
def test_no_zero_width_interval_and_no_bare_nan(few_per_region, basis):
    text = _text(render_competence(few_per_region, by="region", basis=basis))
    assert "nan" not in text
    cells = CELL.findall(text)
    assert cells, text
    for value, low, high in cells:
        assert float(low) < float(high), (value, low, high)
    # region 0 of the truth basis: b = c = 0 of 3; saved/fee = saving / 0.02 (Agresti & Min 2005)
    if basis == "truth":
        low, high = _agresti_min(0, 0, 3)
        assert f"0.0 [{low / 0.02:.1f}, {high / 0.02:.1f}]" in text
        low, high = _agresti_min(2, 0, 2)
        assert f"50.0 [{low / 0.02:.1f}, {high / 0.02:.1f}]" in text


def test_legend_explains_dashes_and_methods(few_per_region):
    # common practice: a table explains every mark it uses and names its interval methods
    text = _text(render_competence(few_per_region, by="region"))
    assert "-: none (no scored answers; kappa undefined; saved/fee: no fee, or the model's own row)" in text
    assert "Wilson (accuracy), Agresti-Min paired (saved/fee)" in text
    assert "\u2020" not in text  # every value here has its interval


def test_weighted_audit_shows_kish_effective_size(few_per_region):
    text = _text(render_competence(few_per_region, by="region", basis="audit"))
    w = np.array([1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 9.0, 1.0])
    n_eff = w.sum() ** 2 / (w**2).sum()  # Kish, Survey Sampling (1965)
    assert f"8/8 (~{n_eff:.0f})" in text
    assert "Kish's effective size" in text
    region_2 = w[5:].sum() ** 2 / (w[5:] ** 2).sum()
    assert f"3/3 (~{region_2:.0f})" in text


def test_value_without_interval_is_marked_and_explained():
    # common practice: a figure shown without its interval says why
    row = {"expert": "e", "n_answered": 1, "n_scored": 1, "n_effective": 1.0, "accuracy": 1.0,
           "accuracy_low": 0.2, "accuracy_high": 1.0, "too_wide": True, "kappa": np.nan,
           "value_per_fee": 12.5, "value_low": np.nan, "value_high": np.nan}
    text = _text(_accuracy_table(pd.DataFrame([row]), "Competence", None, "truth"))
    assert "12.5 \u2020" in text
    assert "\u2020: too few answers for an interval" in text


def test_agreement_of_experts_without_shared_cases_is_not_shown_as_nan():
    # Cohen's kappa and the observed agreement are undefined without a shared case (common
    # practice); the table says so instead of printing nan.
    answers = pd.DataFrame({"case": [0, 1, 2, 3, 2, 3], "expert": ["a", "a", "b", "b", "c", "c"],
                            "answer": [0, 1, 0, 1, 0, 0]})
    report = competence_report(answers, np.array([0, 1, 0, 1]), n_classes=2, latent=False)
    text = _text(render_competence(report))
    assert "nan" not in text.lower()
    rows = {(r["expert_a"], r["expert_b"]): r for r in report.agreement.to_dict(orient="records")}
    assert rows[("a", "b")]["n_shared"] == 0 and rows[("b", "c")]["n_shared"] == 2
    assert "a b 0 no shared cases -" in text and "a c 0 no shared cases -" in text
    assert "b c 2 0.50" in text  # one of two shared answers equal
