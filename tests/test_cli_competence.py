"""``routeplan competence`` end to end, checked against reference libraries and published data."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import cohen_kappa_score, confusion_matrix
from statsmodels.stats.proportion import proportion_confint

from sklearn_workspace import invoke

DATA = Path(__file__).parent / "data"


@pytest.fixture(scope="module")
def iris_workspace(tmp_path_factory):
    """scikit-learn's iris (truth = species) with two simulated annotators (seeded).

    The answers are random draws; the checks compare routeplan's arithmetic on them with
    statsmodels and scikit-learn, not with hand-picked numbers.
    """
    from sklearn.datasets import load_iris

    root = tmp_path_factory.mktemp("iris")
    iris = load_iris(as_frame=True)
    frame = iris.data.copy()
    frame.columns = ["sepal_length", "sepal_width", "petal_length", "petal_width"]
    names = list(iris.target_names)
    frame.insert(0, "case_id", [f"i{i:03d}" for i in range(len(frame))])
    frame["truth"] = [names[t] for t in iris.target]
    frame["site"] = np.where(np.arange(len(frame)) % 2 == 0, "north", "south")
    frame.to_csv(root / "iris.csv", index=False)
    folder = root / "ws"
    invoke(folder, "init", "--labels", ",".join(names))
    invoke(folder, "cases", "import", root / "iris.csv", "--group-column", "site")
    rng = np.random.default_rng(11)
    rows = []
    for expert, p_right, share in (("ann", 0.85, 0.8), ("ben", 0.7, 0.6)):
        invoke(folder, "experts", "add", expert, "--fee", "0.1")
        for i in np.flatnonzero(rng.random(len(frame)) < share):
            t = iris.target[i]
            answer = t if rng.random() < p_right else (t + rng.integers(1, 3)) % 3
            rows.append((frame["case_id"][i], expert, names[answer]))
    pd.DataFrame(rows, columns=["case_id", "expert", "answer"]).to_csv(root / "answers.csv", index=False)
    invoke(folder, "answers", "import", root / "answers.csv")
    return folder, frame, pd.DataFrame(rows, columns=["case_id", "expert", "answer"])


def test_accuracy_interval_and_kappa_match_reference_libraries(iris_workspace):
    folder, frame, answers = iris_workspace
    report = json.loads(invoke(folder, "competence", "--json").stdout)
    rows = {row["expert"]: row for row in report["accuracy"]}
    truth = dict(zip(frame["case_id"], frame["truth"]))
    for expert in ("ann", "ben"):
        mine = answers[answers["expert"] == expert]
        right = int((mine["answer"] == mine["case_id"].map(truth)).sum())
        n = len(mine)
        low, high = proportion_confint(right, n, alpha=0.05, method="wilson")  # statsmodels reference
        assert rows[expert]["n_answered"] == n
        assert rows[expert]["accuracy"] == pytest.approx(right / n)
        assert rows[expert]["accuracy_low"] == pytest.approx(low, abs=1e-9)
        assert rows[expert]["accuracy_high"] == pytest.approx(high, abs=1e-9)
        kappa = cohen_kappa_score(mine["case_id"].map(truth), mine["answer"])  # scikit-learn reference
        assert rows[expert]["kappa"] == pytest.approx(kappa, abs=1e-9)
        labels = ["setosa", "versicolor", "virginica"]
        expected = confusion_matrix(mine["case_id"].map(truth), mine["answer"], labels=labels)  # scikit-learn
        np.testing.assert_array_equal(np.array(report["confusion"][expert]), expected)


def test_group_breakdown_table_csv_and_plot(iris_workspace, tmp_path):
    folder, frame, answers = iris_workspace
    out = tmp_path / "by_group.csv"
    png = tmp_path / "heat.png"
    result = invoke(folder, "competence", "--by", "group", "--csv", str(out), "--plot", str(png))
    table = pd.read_csv(out)
    assert set(table["group"]) == {"north", "south"}
    # The per-group counts add up to the overall count (common practice).
    assert table.groupby("expert")["n_answered"].sum().to_dict() == answers["expert"].value_counts().to_dict()
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "Competence by group" in result.stdout
    assert "Confusion of ann" in result.stdout
    # a second run does not replace the files unless told to (common practice)
    out.write_text("keep me\n")
    from click.testing import CliRunner
    from routeplan.cli import cli

    again = CliRunner().invoke(cli, ["--workspace", str(folder), "competence", "--csv", str(out)])
    assert again.exit_code == 2 and "--overwrite" in again.stderr and out.read_text() == "keep me\n"
    assert invoke(folder, "competence", "--csv", str(out), "--overwrite").exit_code == 0
    assert out.read_text() != "keep me\n"


def test_narrow_terminal_without_colour(iris_workspace):
    from click.testing import CliRunner
    from routeplan.cli import cli

    folder, _, _ = iris_workspace
    result = CliRunner().invoke(cli, ["--workspace", str(folder), "competence"], env={"NO_COLOR": "1", "COLUMNS": "60"})
    assert result.exit_code == 0
    assert "\x1b[" not in result.stdout  # no colour codes with NO_COLOR (https://no-color.org)
    assert max(len(line) for line in result.stdout.splitlines()) <= 60


def test_dawid_skene_through_the_cli_on_the_published_anaesthesia_data(tmp_path):
    """Dawid & Skene (Applied Statistics, 1979): 45 patients, 5 observers, no truth.

    The workspace keeps one answer per (case, expert), so observer 1 contributes only the
    first of its three ratings here. The class proportions are compared with the published
    ones, which are recalled from memory (tests/data/SOURCES_competence.md): about
    0.40, 0.42, 0.11, 0.07; the tolerance is loose (0.08) for both reasons.
    """
    data = pd.read_csv(DATA / "dawid_skene_1979_anaesthesia.csv")
    first = data.drop_duplicates(subset=["patient", "observer"], keep="first")
    cases = pd.DataFrame({"case_id": [f"p{p}" for p in sorted(first["patient"].unique())]})
    cases["intercept"] = 1.0  # no features in the published data: one constant column
    cases.to_csv(tmp_path / "patients.csv", index=False)
    folder = tmp_path / "ws"
    invoke(folder, "init", "--labels", "1,2,3,4")
    invoke(folder, "cases", "import", tmp_path / "patients.csv")
    for observer in range(1, 6):
        invoke(folder, "experts", "add", f"observer{observer}", "--fee", "1")
    answers = pd.DataFrame({"case_id": "p" + first["patient"].astype(str),
                            "expert": "observer" + first["observer"].astype(str),
                            "answer": first["rating"].astype(str)})
    answers.to_csv(tmp_path / "ratings.csv", index=False)
    invoke(folder, "answers", "import", tmp_path / "ratings.csv")
    report = json.loads(invoke(folder, "competence", "--json", "--regions", "1").stdout)
    prior = np.array(report["latent"]["class_prior"])
    np.testing.assert_allclose(prior, [0.40, 0.42, 0.11, 0.07], atol=0.08)
