"""Two-stage learning to defer from the command line: the team keeps its own model.

The team's model is scikit-learn's LogisticRegression fitted on a third of scikit-learn's
digits; its class probabilities are imported with ``routeplan scores import``, and only the
routing is learned (two-stage learning to defer: Mao, Mohri & Zhong, NeurIPS 2023). The
expert is the simulated expert of Mozannar & Sontag (ICML 2020). The references: the
imported model's own predictions (temperature scaling never changes an arg-max: Guo, Pleiss,
Sun & Weinberger, ICML 2017), and the published expectation that a deferral system beats
both the classifier alone and the expert alone.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression

from conftest import assert_one_line_error, db_dump, run_cli
from sklearn_workspace import digits_workspace, invoke


@pytest.fixture(scope="module")
def team(tmp_path_factory):
    """Digits workspace (k = 5, every answer), the team's model and its scores file."""
    root = tmp_path_factory.mktemp("two_stage")
    folder = digits_workspace(root, k=5, n_answers=None)
    X, y = load_digits(return_X_y=True)
    own = LogisticRegression(max_iter=2000).fit(X[:600] / 16.0, y[:600])  # the team's model
    P = own.predict_proba(X / 16.0)
    ids = [f"d{i:04d}" for i in range(len(y))]
    scores = pd.DataFrame(P, columns=[f"proba_{c}" for c in range(10)])
    scores.insert(0, "case_id", ids)
    path = root / "own_model.csv"
    scores.to_csv(path, index=False, float_format="%.17g")
    return {"root": root, "ws": folder, "X": X / 16.0, "y": y, "P": P, "ids": np.asarray(ids),
            "scores": path, "own": own}


def test_scores_import_refuses_bad_files_and_changes_nothing(team, tmp_path):
    # bad input: one line naming file and line, exit 2, workspace unchanged (project design)
    ws = team["ws"]
    before = db_dump(ws)
    rows = "case_id," + ",".join(f"proba_{c}" for c in range(10)) + "\n"
    cases = {
        "sum.csv": (rows + "d0000,0.5,0.6,0,0,0,0,0,0,0,0\n", ("sum.csv line 2", "sum to 1.1")),
        "unknown.csv": (rows + "zz,1,0,0,0,0,0,0,0,0,0\n", ("unknown.csv line 2", "unknown case 'zz'")),
        "twice.csv": (rows + "d0000,1,0,0,0,0,0,0,0,0,0\nd0000,1,0,0,0,0,0,0,0,0,0\n",
                      ("twice.csv line 3", "appears again")),
        "cols.csv": ("case_id,proba_0,proba_1\nd0000,0.5,0.5\n", ("cols.csv line 1", "'proba_2'")),
        "negative.csv": (rows + "d0000,1.5,-0.5,0,0,0,0,0,0,0,0\n", ("negative.csv line 2", "proba_0")),
    }
    for name, (text, fragments) in cases.items():
        path = tmp_path / name
        path.write_text(text)
        assert_one_line_error(run_cli(ws, "scores", "import", path), *fragments)
    assert db_dump(ws) == before


def test_fit_keeps_the_team_model_and_beats_model_and_expert(team, tmp_path):
    ws = team["ws"]
    # before every case with truth has scores, --two-stage is refused with a count
    part = pd.read_csv(team["scores"], dtype={"case_id": str}).iloc[:100]
    part.to_csv(tmp_path / "part.csv", index=False, float_format="%.17g")
    invoke(ws, "scores", "import", tmp_path / "part.csv")
    assert_one_line_error(run_cli(ws, "fit", "--two-stage"), "1697 of the 1797")
    result = run_cli(ws, "scores", "import", team["scores"], "--json")
    assert result.exit_code == 0
    report = json.loads(result.stdout)[0]
    assert (report["added"], report["unchanged"]) == (1697, 100)
    # a joint router learns its own classifier: not with the team's model
    assert_one_line_error(run_cli(ws, "fit", "--two-stage", "--router", "softmax-mlp"), "softmax-mlp")

    fit = json.loads(invoke(ws, "fit", "--seed", "0", "--max-epochs", "40", "--json").stdout)
    assert any(note.startswith("two-stage") for note in fit["notes"])
    # the expert of Mozannar & Sontag is right or not by the true class alone (the
    # class-conditional model of Dawid & Skene, 1979): with every answer known, the class
    # offset is clearly better on validation, and fit says the kept router uses it
    assert any("correctness model of oracle_k starts from" in note for note in fit["notes"]), fit["notes"]
    rows = {row["router"]: row for row in fit["table"]}
    assert set(r for r in rows if not r.endswith("alone") and not r.startswith("model alone")) == {
        "plugin-ensemble", "plugin"}
    # the "model alone" row is the team's model: its accuracy on the selection cases is
    # LogisticRegression's own (scikit-learn), untouched by calibration (Guo et al., ICML 2017)
    import sqlite3

    conn = sqlite3.connect(ws / "routeplan.sqlite")
    params = json.loads(conn.execute("SELECT params FROM models WHERE chosen = 1").fetchone()[0])
    conn.close()
    held = np.isin(team["ids"], params["validation_case_ids"])
    lr_accuracy = float((team["own"].predict(team["X"][held]) == team["y"][held]).mean())
    model_row = rows["model alone (yours, imported)"]  # named as the team's model, not a router's
    assert model_row["accuracy"] == pytest.approx(lr_accuracy)
    chosen = rows[fit["chosen"]]
    # Mozannar & Sontag (ICML 2020): the deferral system beats the classifier and the expert alone
    assert chosen["system_cost"] < model_row["system_cost"]
    assert chosen["system_cost"] < rows["oracle_k alone"]["system_cost"]

    # a round's focus scores the candidates with the imported probabilities; without them
    # for some candidate it says why it plans without focus
    from routeplan.rounds import _router_focus
    from routeplan.workspace import Workspace

    with Workspace.open(ws) as opened:
        frame, X = opened.case_frame()
        ids = frame["case_id"].tolist()
        focus, model_id, note = _router_focus(opened, X, ids, ["oracle_k"], 0.1)
        assert note is None and focus.shape == (len(ids), 1) and 0 < focus.mean() < 1
        focus, _, note = _router_focus(opened, X, ids + ["nobody"], ["oracle_k"], 0.1)
        assert focus is None and "1 candidate case(s) have no imported probabilities" in note


def test_freeze_and_route_need_the_proba_columns(team, tmp_path):
    ws = team["ws"]
    if not json.loads(invoke(ws, "status", "--json").stdout).get("models"):
        invoke(ws, "scores", "import", team["scores"])
        invoke(ws, "fit", "--seed", "0", "--max-epochs", "20", "--router", "plugin")
    policy = tmp_path / "policy.json"
    invoke(ws, "freeze", "--out", policy)
    manifest = json.loads(policy.read_text())["manifest"]
    assert manifest["router"]["class_proba_columns"] == [f"proba_{c}" for c in range(10)]
    assert "proba_0" in (tmp_path / "policy.md").read_text()

    new = pd.DataFrame(team["X"][:300], columns=[f"px{i}" for i in range(64)])
    new.insert(0, "case_id", [f"n{i}" for i in range(300)])
    plain = tmp_path / "new_plain.csv"
    new.to_csv(plain, index=False)
    assert_one_line_error(run_cli(ws, "route", "--policy", policy, plain, "--out", tmp_path / "d0.csv"),
                          "new_plain.csv", "proba_0")
    for c in range(10):
        new[f"proba_{c}"] = team["P"][:300, c]
    cases = tmp_path / "new.csv"
    new.to_csv(cases, index=False, float_format="%.17g")
    invoke(ws, "route", "--policy", policy, cases, "--out", tmp_path / "d.csv")
    decisions = pd.read_csv(tmp_path / "d.csv", dtype={"label": str}, keep_default_na=False)
    by_model = (decisions["route"] == "model").to_numpy()
    assert by_model.any() and (~by_model).any()
    # where the model decides, the label is the team's model's own prediction (scikit-learn)
    np.testing.assert_array_equal(decisions["label"][by_model].astype(int),
                                  team["own"].predict(team["X"][:300])[by_model])
    # the pure routing function (for distributed engines) reads the same columns and, with
    # no capacity binding (the expert's capacity is 1), decides the same
    from routeplan.deploy import route_frame
    from routeplan.policy import read_policy

    frame_manifest, arrays = read_policy(policy)
    by_frame = route_frame(new, frame_manifest, arrays)
    np.testing.assert_array_equal(by_frame["route"].to_numpy(), decisions["route"].to_numpy())
    # probabilities that do not sum to 1 are refused, naming the file, its line (header
    # first, so row 7 is line 9) and the case (common practice: errors point at the line)
    new.loc[7, "proba_0"] += 0.5
    new.to_csv(cases, index=False, float_format="%.17g")
    assert_one_line_error(run_cli(ws, "route", "--policy", policy, cases, "--out", tmp_path / "d2.csv"),
                          "new.csv line 9", "'n7'", "sum to 1")


def test_changing_stored_scores_needs_replace(team, tmp_path):
    ws = team["ws"]
    invoke(ws, "scores", "import", team["scores"])  # stored already, or stored now
    frame = pd.read_csv(team["scores"], dtype={"case_id": str}).iloc[:3]
    frame.loc[1, "proba_0"] = 0.25
    frame.loc[1, "proba_1"] = 1.0 - frame.loc[1, ["proba_0"] + [f"proba_{c}" for c in range(2, 10)]].sum()
    path = tmp_path / "changed.csv"
    frame.to_csv(path, index=False, float_format="%.17g")
    before = db_dump(ws)
    assert_one_line_error(run_cli(ws, "scores", "import", path), "changed.csv line 3", "--replace")
    assert db_dump(ws) == before
    report = json.loads(invoke(ws, "scores", "import", path, "--replace", "--json").stdout)[0]
    assert (report["added"], report["unchanged"], report["replaced"]) == (0, 2, 1)
    from routeplan.workspace import Workspace

    with Workspace.open(ws) as opened:
        assert opened.score_matrix(["d0001"])[0, 0] == pytest.approx(0.25)
    # going back to the first file with --replace stores its values again, although the
    # same bytes were imported before (common practice: an explicit replace is never a no-op)
    original = pd.read_csv(team["scores"], dtype={"case_id": str}).set_index("case_id")
    report = json.loads(invoke(ws, "scores", "import", team["scores"], "--replace", "--json").stdout)[0]
    assert report["replaced"] == 1
    with Workspace.open(ws) as opened:
        assert opened.score_matrix(["d0001"])[0, 0] == pytest.approx(original.loc["d0001", "proba_0"])


def test_partly_imported_scores_are_not_used_silently(team, tmp_path):
    # common practice: when the tool quietly falls back (here: learning its own classifier
    # because some cases lack the team's probabilities), it says so
    ws = digits_workspace(tmp_path, k=5, n_answers=None)  # no scores yet (the module's may have them)
    part = pd.read_csv(team["scores"]).iloc[:100]
    path = tmp_path / "part.csv"
    part.to_csv(path, index=False, float_format="%.17g")
    invoke(ws, "scores", "import", path)
    report = json.loads(invoke(ws, "fit", "--router", "plugin", "--max-epochs", "2", "--json").stdout)
    assert any(note.startswith("not two-stage: 1697 of the 1797") for note in report["notes"])


def test_freeze_says_when_the_scores_changed_after_the_fit(tmp_path, team):
    # common practice: a frozen artefact must not silently rest on inputs replaced since
    ws = digits_workspace(tmp_path, k=5, n_answers=None)
    invoke(ws, "scores", "import", team["scores"])
    invoke(ws, "fit", "--router", "plugin", "--max-epochs", "2")
    first = json.loads(invoke(ws, "freeze", "--out", tmp_path / "a.json", "--json").stdout)
    assert not any("replaced after model" in n for n in first["notes"])
    frame = pd.read_csv(team["scores"], dtype={"case_id": str}).iloc[:2]
    frame.loc[1, "proba_0"] = 0.25
    frame.loc[1, "proba_1"] = 1.0 - frame.loc[1, ["proba_0"] + [f"proba_{c}" for c in range(2, 10)]].sum()
    path = tmp_path / "changed.csv"
    frame.to_csv(path, index=False, float_format="%.17g")
    invoke(ws, "scores", "import", path, "--replace")
    again = json.loads(invoke(ws, "freeze", "--out", tmp_path / "b.json", "--json").stdout)
    assert any("replaced after model" in n and "fit again" in n for n in again["notes"])


def test_class_offset_switch_of_fit(tmp_path, team):
    # --class-offset passes PluginRouter's class_offset through: "never" keeps the plain
    # network for every expert, "always" uses the offset for every one (the kept router's
    # stored arrays say which; a fit note names them), and without two-stage it is refused
    import sqlite3

    ws = digits_workspace(tmp_path, k=5, n_answers=None)
    invoke(ws, "scores", "import", team["scores"])

    def fit_with(choice: str) -> tuple[list[str], np.ndarray]:
        report = json.loads(invoke(ws, "fit", "--router", "plugin", "--max-epochs", "3", "--class-offset",
                                   choice, "--json").stdout)
        from routeplan.fitting import load_router
        from routeplan.workspace import Workspace

        with Workspace.open(ws) as opened:
            router = load_router(opened, report["model_ids"]["plugin"])[1]
        return report["notes"], router.offset_experts_

    notes, used = fit_with("never")
    assert not used.any() and not any("starts from each one's accuracy" in n for n in notes)
    notes, used = fit_with("always")
    assert used.all() and any("correctness model of oracle_k starts from" in n for n in notes)
    conn = sqlite3.connect(ws / "routeplan.sqlite")
    detail = json.loads(conn.execute("SELECT detail FROM journal WHERE command = 'fit' "
                                     "ORDER BY entry_id DESC LIMIT 1").fetchone()[0])
    conn.close()
    assert detail["class_offset"] == "always"

    plain = digits_workspace(tmp_path / "plain", k=5, n_answers=None)  # no imported scores
    before = db_dump(plain)
    assert_one_line_error(run_cli(plain, "fit", "--class-offset", "never"), "--class-offset applies to two-stage")
    assert db_dump(plain) == before
