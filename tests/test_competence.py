"""Tests of routeplan.competence against reference libraries and hand arithmetic.

Agreement, Dawid-Skene and regions have their own files (test_agreement, test_latent,
test_regions).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import cohen_kappa_score, precision_recall_fscore_support
from sklearn.metrics import confusion_matrix as sk_confusion_matrix
from statsmodels.stats.proportion import proportion_confint

from routeplan.competence import (
    MODEL,
    competence_report,
    confusion_matrices,
    expert_accuracy_table,
    per_class_table,
)
DATA = Path(__file__).parent / "data"


def _wilson(k, n):
    """statsmodels' Wilson interval, the reference for every accuracy interval below."""
    return proportion_confint(k, n, method="wilson")


def _agresti_min(b, c, n, z=1.959964):
    """Agresti & Min (Statistics in Medicine 24(5):729-740, 2005), written out from the paper.

    Paired 2x2 table with b pairs "model wrong, expert right" and c "model right, expert
    wrong" out of n: add 1/2 to each of the four cells, then the Wald interval for
    p_b - p_c, truncated to [-1, 1]. Checked against PropCIs' worked example in
    test_saving_interval_matches_propcis_worked_example.
    """
    bt, ct, nt = b + 0.5, c + 0.5, n + 2.0
    p_b, p_c = bt / nt, ct / nt
    half = z * np.sqrt((p_b + p_c - (p_b - p_c) ** 2) / nt)
    return max(p_b - p_c - half, -1.0), min(p_b - p_c + half, 1.0)


# --------------------------------------------------------------------------- fixtures


@pytest.fixture
def tiny():
    """A hand-computable example: 6 cases, experts a and b, a model."""
    truth = np.array([0, 1, 0, 1, -1, 1])
    answers = pd.DataFrame({
        "case": [0, 1, 2, 3, 4, 0, 1, 2, 3, 5],
        "expert": ["a"] * 5 + ["b"] * 5,
        "answer": [0, 1, 1, 1, 0, 0, 0, 0, 1, 1],
        "audit": [True, True, False, False, False, True, False, True, False, True],
    })
    model = np.array([0, 0, 0, 0, 1, 0])
    return answers, truth, model




# --------------------------------------------------------------------------- accuracy table


def test_accuracy_table_hand_example(tiny):
    answers, truth, model = tiny
    table = expert_accuracy_table(
        answers, truth, fees={"a": 0.5, "b": 0.25}, model_pred=model, error_cost=2.0
    ).set_index("expert")
    # hand arithmetic (common practice): a answered 5, 4 with truth, wrong only on case 2
    assert table.loc["a", "n_answered"] == 5 and table.loc["a", "n_scored"] == 4
    assert table.loc["a", "accuracy"] == pytest.approx(0.75)
    # b: right on cases 0, 2, 3, 5, wrong on 1 -> 4/5; the model (always 0) is right on 0, 2
    assert table.loc["b", "accuracy"] == pytest.approx(0.8)
    assert table.loc[MODEL, "n_scored"] == 5 and table.loc[MODEL, "accuracy"] == pytest.approx(0.4)
    # Wilson intervals against statsmodels' proportion_confint(method="wilson")
    for name, k, n in [("a", 3, 4), ("b", 4, 5), (MODEL, 2, 5)]:
        low, high = _wilson(k, n)
        assert table.loc[name, "accuracy_low"] == pytest.approx(low)
        assert table.loc[name, "accuracy_high"] == pytest.approx(high)
    # fee-adjusted value (model error - expert error) * error_cost / fee, hand arithmetic:
    # a: model wrong on cases 1, 3 of 0..3 -> (0.5 - 0.25) * 2 / 0.5 = 1.0
    # b: model wrong on 1, 3, 5 of 0, 1, 2, 3, 5 -> (0.6 - 0.2) * 2 / 0.25 = 3.2
    assert table.loc["a", "model_accuracy"] == pytest.approx(0.5)
    assert table.loc["a", "value_per_fee"] == pytest.approx(1.0)
    assert table.loc["b", "cost_saved_per_case"] == pytest.approx(0.8)
    assert table.loc["b", "value_per_fee"] == pytest.approx(3.2)
    assert np.isnan(table.loc[MODEL, "value_per_fee"])


def test_accuracy_table_kappa_and_value_interval(tiny):
    answers, truth, model = tiny
    table = expert_accuracy_table(answers, truth, model_pred=model, fees={"a": 0.5})
    table = table.set_index("expert")
    scored = answers[truth[answers["case"]] >= 0]
    for name, part in scored.groupby("expert"):
        t, a = truth[part["case"]], part["answer"].to_numpy()
        # Cohen's kappa against sklearn.metrics.cohen_kappa_score
        assert table.loc[name, "kappa"] == pytest.approx(cohen_kappa_score(t, a))
    # a on cases 0..3: the model (always 0) is wrong on 1 and 3 where a is right (b = 2), right
    # on 2 where a is wrong (c = 1): the Agresti-Min interval of the paired difference
    low, high = _agresti_min(2, 1, 4)
    assert table.loc["a", "cost_saved_low"] == pytest.approx(low)
    assert table.loc["a", "cost_saved_high"] == pytest.approx(high)
    assert table.loc["a", "value_high"] == pytest.approx(high / 0.5)
    assert np.isnan(table.loc["b", "value_per_fee"])  # no fee for b
    # the model against itself has nothing to save: no figure rather than 0 [0, 0]
    assert table.loc[MODEL, ["cost_saved_per_case", "cost_saved_low", "cost_saved_high",
                             "audit_cost_saved_per_case", "value_low"]].isna().all()


def _paired_answers(n_b, n_c, n_both_right, n_both_wrong):
    """One expert and the model on two classes; truth is 0 everywhere.

    n_b cases: model wrong, expert right; n_c: model right, expert wrong; then concordant ones.
    """
    model = np.concatenate([np.ones(n_b), np.zeros(n_c), np.zeros(n_both_right), np.ones(n_both_wrong)])
    expert = np.concatenate([np.zeros(n_b), np.ones(n_c), np.zeros(n_both_right), np.ones(n_both_wrong)])
    n = model.size
    answers = pd.DataFrame({"case": np.arange(n), "expert": "e", "answer": expert.astype(int)})
    return answers, np.zeros(n, dtype=int), model.astype(int)


def test_saving_interval_matches_propcis_worked_example():
    # PropCIs::diffpropci.mp(b = 40, c = 20, n = 160): 95% CI -0.21601726 -0.03089632 for c - b
    # (example output, rdrr.io/cran/PropCIs/man/diffpropci.mp.html); here b - c, so the sign flips
    answers, truth, model = _paired_answers(40, 20, 70, 30)
    row = expert_accuracy_table(answers, truth, model_pred=model, n_classes=2,
                                fees={"e": 0.5}, error_cost=2.0).set_index("expert").loc["e"]
    assert row["cost_saved_per_case"] == pytest.approx(2.0 * 20 / 160)  # plain difference
    assert row["cost_saved_low"] == pytest.approx(2.0 * 0.03089632, abs=1e-8)
    assert row["cost_saved_high"] == pytest.approx(2.0 * 0.21601726, abs=1e-8)
    assert row["value_low"] == pytest.approx(2.0 * 0.03089632 / 0.5, abs=1e-7)
    assert _agresti_min(40, 20, 160) == pytest.approx((0.03089632, 0.21601726), abs=5e-9)


@pytest.mark.parametrize("cells", [(0, 0, 3, 0), (0, 0, 2, 2), (2, 0, 0, 0), (0, 3, 0, 0), (1, 0, 0, 0)])
def test_saving_interval_never_zero_width_from_few_answers(cells):
    # the reviewer's "50.0 [50.0, 50.0]" and "0.0 [0.0, 0.0]": a handful of answers that all
    # agree with the model, or all differ one way, gave a normal interval of variance 0
    answers, truth, model = _paired_answers(*cells)
    row = expert_accuracy_table(answers, truth, model_pred=model, n_classes=2,
                                fees={"e": 0.02}).set_index("expert").loc["e"]
    n_b, n_c = cells[0], cells[1]
    low, high = _agresti_min(n_b, n_c, sum(cells))  # Agresti & Min (2005)
    assert row["cost_saved_per_case"] == pytest.approx((n_b - n_c) / sum(cells))
    assert (row["cost_saved_low"], row["cost_saved_high"]) == pytest.approx((low, high))
    assert row["value_high"] - row["value_low"] > 0.1 / 0.02
    assert row["cost_saved_low"] <= row["cost_saved_per_case"] <= row["cost_saved_high"]


def test_audit_basis_hand_example(tiny):
    answers, truth, model = tiny
    table = expert_accuracy_table(answers, truth, model_pred=model).set_index("expert")
    # audit answers: a on cases 0, 1 (both right); b on 0, 2, 5 (all right); the model on
    # the audited cases 0, 1, 2, 5 (right on 0, 2); hand arithmetic
    assert table.loc["a", "audit_n_scored"] == 2 and table.loc["a", "audit_accuracy"] == 1.0
    assert table.loc["b", "audit_n_scored"] == 3 and table.loc["b", "audit_accuracy"] == 1.0
    assert table.loc[MODEL, "audit_accuracy"] == pytest.approx(0.5)
    low, high = _wilson(3, 3)  # statsmodels
    assert table.loc["b", "audit_accuracy_low"] == pytest.approx(low)
    assert not table["audit_weighted"].any()
    # the flag rule: interval wider than max_width (documented in the module)
    width = table["accuracy_high"] - table["accuracy_low"]
    assert (table["too_wide"] == (width > 0.2)).all()
    assert (expert_accuracy_table(answers, truth, max_width=0.7)["too_wide"]
            == (width.to_numpy()[:2] > 0.7)).all()


def test_weighted_audit_is_hajek_with_kish_size():
    rng = np.random.default_rng(21)
    n = 400
    truth = rng.integers(2, size=n)
    answer = np.where(rng.random(n) < 0.8, truth, 1 - truth)
    weight = rng.choice([2.0, 10.0], size=n)
    answers = pd.DataFrame({"case": np.arange(n), "expert": "a", "answer": answer,
                            "audit": True, "weight": weight})
    row = expert_accuracy_table(answers, truth).iloc[0]
    right = (answer == truth).astype(float)
    assert row["audit_weighted"]
    # Hajek estimator: sum w * right / sum w (Horvitz-Thompson ratio form, common practice)
    assert row["audit_accuracy"] == pytest.approx(np.average(right, weights=weight))
    # Kish effective sample size (Kish, Survey Sampling, 1965)
    n_eff = weight.sum() ** 2 / (weight**2).sum()
    assert row["audit_n_effective"] == pytest.approx(n_eff)
    low, _ = _wilson(row["audit_accuracy"] * n_eff, n_eff)
    assert row["audit_accuracy_low"] == pytest.approx(low)
    # the truth basis stays unweighted
    assert row["accuracy"] == pytest.approx(right.mean())
    # counts stay counts (documented rule): the right answers on the scale of n_scored, not the
    # sum of their inverse selection probabilities (the reviewer saw 1972.67 beside 3 scored)
    assert row["audit_n_scored"] == n and row["audit_n_correct"] == int(right.sum())
    assert isinstance(row["audit_n_correct"], (int, np.integer))


def test_weighted_saving_interval_on_kish_effective_counts():
    rng = np.random.default_rng(22)
    n = 60
    truth = rng.integers(2, size=n)
    expert = np.where(rng.random(n) < 0.85, truth, 1 - truth)
    model = np.where(rng.random(n) < 0.7, truth, 1 - truth)
    weight = rng.choice([1.0, 4.0, 9.0], size=n)
    answers = pd.DataFrame({"case": np.arange(n), "expert": "a", "answer": expert,
                            "audit": True, "weight": weight})
    row = expert_accuracy_table(answers, truth, model_pred=model).set_index("expert").loc["a"]
    share_b = np.average((model != truth) & (expert == truth), weights=weight)
    share_c = np.average((model == truth) & (expert != truth), weights=weight)
    n_eff = weight.sum() ** 2 / (weight**2).sum()  # Kish (Survey Sampling, 1965)
    assert row["audit_cost_saved_per_case"] == pytest.approx(share_b - share_c)  # Hajek difference
    low, high = _agresti_min(share_b * n_eff, share_c * n_eff, n_eff)  # Agresti & Min (2005)
    assert row["audit_cost_saved_low"] == pytest.approx(low)
    assert row["audit_cost_saved_high"] == pytest.approx(high)
    # equal weights change nothing: the unweighted interval on plain counts
    flat = expert_accuracy_table(answers.assign(weight=5.0), truth, model_pred=model)
    pd.testing.assert_series_equal(
        flat.filter(like="audit_cost_saved").iloc[0],
        expert_accuracy_table(answers.drop(columns="weight"), truth, model_pred=model)
        .filter(like="audit_cost_saved").iloc[0],
    )


def test_audit_sample_is_unbiased_where_acquisition_is_not():
    # A simple random sample's mean is unbiased for the population mean (Horvitz & Thompson,
    # JASA 1952; Cochran, Sampling Techniques, 1977, ch. 2); a sample chosen by difficulty is
    # not. Seeded simulation with a known pool accuracy: easy cases right 95%, hard ones 60%;
    # the acquisition asked about hard cases only, the audit drew cases uniformly at random
    rng = np.random.default_rng(5)
    n = 20000
    hard = rng.random(n) < 0.5
    truth = rng.integers(3, size=n)
    right = rng.random(n) < np.where(hard, 0.6, 0.95)
    answer = np.where(right, truth, (truth + 1) % 3)
    pool_accuracy = np.mean(np.where(hard, 0.6, 0.95))
    chosen = np.concatenate([rng.choice(np.flatnonzero(hard), 1500, replace=False),
                             rng.choice(n, 600, replace=False)])
    answers = pd.DataFrame({"case": chosen, "expert": "a", "answer": answer[chosen],
                            "audit": np.arange(chosen.size) >= 1500})
    row = expert_accuracy_table(answers, truth).iloc[0]
    assert row["audit_accuracy_low"] <= pool_accuracy <= row["audit_accuracy_high"]
    assert row["accuracy_high"] < pool_accuracy  # the selected answers mislead


def test_tables_by_group_and_region(tiny):
    answers, truth, model = tiny
    group = np.array(["x", "x", "y", "y", "x", "y"])
    t = expert_accuracy_table(
        answers, truth, fees={"a": 0.5, "b": 0.25}, model_pred=model, error_cost=2.0,
        by="group", group=group,
    ).set_index(["expert", "group"])
    # hand arithmetic: a in x answered cases 0, 1, 4 (4 without truth), right on 0 and 1;
    # the model is wrong on 1 of them -> (0.5 - 0) * 2 / 0.5 = 2
    assert t.loc[("a", "x"), "n_answered"] == 3 and t.loc[("a", "x"), "accuracy"] == 1.0
    assert t.loc[("a", "x"), "value_per_fee"] == pytest.approx(2.0)
    # b in y: cases 2, 3, 5 all right; model wrong on 3 and 5 -> (2/3) * 2 / 0.25 = 16/3
    assert t.loc[("b", "y"), "value_per_fee"] == pytest.approx(16 / 3)
    assert t.loc[(MODEL, "y"), "accuracy"] == pytest.approx(1 / 3)
    region = np.array([0, 0, 1, 1, 2, 2])
    r = expert_accuracy_table(answers, truth, by="region", region=region)
    r = r.set_index(["expert", "region"])
    # a: region 0 cases 0, 1 right; region 1 cases 2 (wrong), 3 (right); region 2 case 4 only,
    # without truth -> answered but not scored
    assert r.loc[("a", 1), "accuracy"] == pytest.approx(0.5)
    assert r.loc[("a", 2), "n_answered"] == 1 and r.loc[("a", 2), "n_scored"] == 0
    assert np.isnan(r.loc[("a", 2), "accuracy"])
    assert ("b", 2) in r.index and r.loc[("b", 2), "n_scored"] == 1


def test_by_class_matches_per_class_recall_and_sklearn():
    rng = np.random.default_rng(8)
    n = 600
    truth = rng.integers(3, size=n)
    pred = np.where(rng.random(n) < 0.7, truth, rng.integers(3, size=n))
    answers = pd.DataFrame({"case": np.arange(n), "expert": "a", "answer": pred})
    by_class = expert_accuracy_table(answers, truth, by="class", labels=["p", "q", "r"])
    per_class = per_class_table(answers, truth, labels=["p", "q", "r"])
    # reference: sklearn.metrics.precision_recall_fscore_support
    prec, rec, f1, support = precision_recall_fscore_support(truth, pred, labels=[0, 1, 2])
    np.testing.assert_allclose(by_class["accuracy"], rec)
    np.testing.assert_allclose(per_class["recall"], rec)
    np.testing.assert_allclose(per_class["precision"], prec)
    np.testing.assert_allclose(per_class["f1"], f1)
    np.testing.assert_array_equal(per_class["support"], support)
    low, _ = _wilson(np.diag(sk_confusion_matrix(truth, pred)), support)  # statsmodels
    np.testing.assert_allclose(per_class["recall_low"], low)
    assert list(by_class["class"]) == ["p", "q", "r"]


def test_confusion_matrices_match_sklearn(tiny):
    answers, truth, model = tiny
    mats = confusion_matrices(answers, truth, model_pred=model)
    scored = answers[truth[answers["case"]] >= 0]
    for name, part in scored.groupby("expert"):
        # reference: sklearn.metrics.confusion_matrix
        ref = sk_confusion_matrix(truth[part["case"]], part["answer"], labels=[0, 1])
        np.testing.assert_array_equal(mats[name], ref)
    known = truth >= 0
    np.testing.assert_array_equal(mats[MODEL], sk_confusion_matrix(truth[known], model[known]))


def test_truth_as_series_with_case_ids(tiny):
    answers, truth, model = tiny
    ids = np.array([101, 102, 103, 104, 105, 106])
    by_id = answers.assign(case=ids[answers["case"]])
    left = expert_accuracy_table(by_id, pd.Series(truth, index=ids), model_pred=model)
    right = expert_accuracy_table(answers, truth, model_pred=model)
    pd.testing.assert_frame_equal(left, right)  # common practice: ids and positions agree


def test_validation_errors(tiny):
    answers, truth, model = tiny
    with pytest.raises(ValueError, match="reserved"):
        expert_accuracy_table(answers.assign(expert="model"), truth, model_pred=model)
    with pytest.raises(ValueError, match="outside"):
        expert_accuracy_table(answers.assign(answer=5), truth, n_classes=2)
    with pytest.raises(ValueError, match="lacks"):
        expert_accuracy_table(answers.drop(columns="answer"), truth)
    with pytest.raises(ValueError, match="group"):
        expert_accuracy_table(answers, truth, by="group")
    with pytest.raises(ValueError, match="positions"):
        expert_accuracy_table(answers.assign(case=9), truth)
    with pytest.raises(ValueError, match="error_cost"):
        expert_accuracy_table(answers, truth, error_cost=0)


# --------------------------------------------------------------------------- the report


def test_competence_report_bundles_tables_and_serialises(tiny):
    answers, truth, model = tiny
    report = competence_report(
        answers, truth, labels=["no", "yes"], fees={"a": 0.5, "b": 0.25}, model_pred=model,
        group=["x", "x", "y", "y", "x", "y"], region=[0, 0, 1, 1, 2, 2],
    )
    pd.testing.assert_frame_equal(
        report.accuracy,
        expert_accuracy_table(answers, truth, labels=["no", "yes"], fees={"a": 0.5, "b": 0.25},
                              model_pred=model),
    )
    assert report.by_group is not None and report.by_region is not None
    assert report.latent is not None  # case 4 has no truth, so the latent model ran
    assert report.latent.most_likely[list(report.latent.cases).index(1)] == 1  # known truth kept
    text = json.dumps(report.to_dict(), allow_nan=False)  # nan must become null
    back = json.loads(text)
    assert back["labels"] == ["no", "yes"] and back["accuracy"][0]["expert"] == "a"
    assert [c["case"] for c in back["latent"]["cases"]] == [4]
    quiet = competence_report(answers[answers["case"] != 4], truth)
    assert quiet.latent is None and quiet.by_group is None
