"""Tests of routeplan.agreement against published data and reference libraries."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss_kappa

from routeplan.agreement import agreement_table, fleiss_for_shared

DATA = Path(__file__).parent / "data"


def test_agreement_table_matches_sklearn_on_shared_cases():
    rng = np.random.default_rng(17)
    frames = []
    for name in ["ann", "bob", "cy"]:
        cases = rng.choice(300, size=200, replace=False)
        frames.append(pd.DataFrame({"case": cases, "expert": name,
                                    "answer": rng.integers(3, size=200)}))
    answers = pd.concat(frames, ignore_index=True)
    # a repeated answer: ann answers her first case again, differently; the first one counts
    first = frames[0].iloc[0]
    answers = pd.concat([answers, pd.DataFrame({"case": [first["case"]], "expert": ["ann"],
                                                "answer": [(first["answer"] + 1) % 3]})])
    table = agreement_table(answers, 3).set_index(["expert_a", "expert_b"])
    for (x, y), row in table.iterrows():
        fx = frames[["ann", "bob", "cy"].index(x)].set_index("case")["answer"]
        fy = frames[["ann", "bob", "cy"].index(y)].set_index("case")["answer"]
        shared = fx.index.intersection(fy.index)
        assert row["n_shared"] == len(shared)
        # reference: sklearn.metrics.cohen_kappa_score on the shared cases
        assert row["kappa"] == pytest.approx(cohen_kappa_score(fx[shared], fy[shared]))


def test_fleiss_for_shared_published_diagnoses():
    wide = pd.read_csv(DATA / "fleiss_1971_diagnoses.csv")
    answers = wide.melt(id_vars="subject", var_name="expert", value_name="rating")
    answers = pd.DataFrame({"case": answers["subject"], "expert": answers["expert"],
                            "answer": answers["rating"] - 1})
    table = fleiss_for_shared(answers, 5)
    assert len(table) == 1 and table.loc[0, "n_raters"] == 6 and table.loc[0, "n_cases"] == 30
    # R irr::kappam.fleiss(diagnoses) = 0.4302445 (Fleiss 1971 data; value recorded in
    # statsmodels' test_inter_rater.py)
    assert table.loc[0, "kappa"] == pytest.approx(0.4302445, abs=1e-7)


def test_fleiss_groups_cases_by_rater_set():
    rng = np.random.default_rng(23)
    panels = {"abc": ["a", "b", "c"], "abcd": ["a", "b", "c", "d"]}
    frames, ratings = [], {}
    for offset, (key, panel) in zip([0, 1000], panels.items()):
        ratings[key] = rng.integers(3, size=(40, len(panel)))
        for j, name in enumerate(panel):
            frames.append(pd.DataFrame({"case": offset + np.arange(40), "expert": name,
                                        "answer": ratings[key][:, j]}))
    # two experts only on other cases: below min_raters, not reported
    frames.append(pd.DataFrame({"case": 5000 + np.arange(40), "expert": "a", "answer": 0}))
    frames.append(pd.DataFrame({"case": 5000 + np.arange(40), "expert": "b", "answer": 1}))
    answers = pd.concat(frames, ignore_index=True)

    def counts(r):
        return np.stack([(r == k).sum(axis=1) for k in range(3)], axis=1)

    table = fleiss_for_shared(answers, 3).set_index("experts")
    assert sorted(table.index) == ["a, b, c", "a, b, c, d"]
    # reference: statsmodels.stats.inter_rater.fleiss_kappa on each panel's counts
    assert table.loc["a, b, c", "kappa"] == pytest.approx(sm_fleiss_kappa(counts(ratings["abc"])))
    assert table.loc["a, b, c, d", "kappa"] == pytest.approx(
        sm_fleiss_kappa(counts(ratings["abcd"]))
    )
    # a fixed panel: the 80 cases a, b and c all answered, d's answers left out
    panel = fleiss_for_shared(answers, 3, experts=["a", "b", "c"])
    both = np.concatenate([ratings["abc"], ratings["abcd"][:, :3]])
    assert panel.loc[0, "n_cases"] == 80
    assert panel.loc[0, "kappa"] == pytest.approx(sm_fleiss_kappa(counts(both)))  # statsmodels
