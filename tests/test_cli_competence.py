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


# --------------------------------------------------------------------------- output paths and refusals


def _refused(folder: Path, *args: str):
    """Run ``competence`` expecting a refusal: exit code 2 and one line on stderr."""
    from click.testing import CliRunner
    from conftest import assert_one_line_error
    from routeplan.cli import cli

    result = CliRunner().invoke(cli, ["--workspace", str(folder), "competence", *map(str, args)])
    return assert_one_line_error(result)


def _digest(path: Path) -> str:
    import hashlib

    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("option", ["--csv", "--plot"])
def test_outputs_onto_the_workspace_database_are_refused(iris_workspace, tmp_path, option):
    # Writing over an open SQLite database or its -wal/-shm/-journal file damages it (common
    # practice: sqlite.org, "How To Corrupt An SQLite Database File"), --overwrite or not.
    import shutil

    from routeplan.workspace import DB_NAME

    folder = shutil.copytree(iris_workspace[0], tmp_path / "ws")
    before = _digest(folder / DB_NAME)
    link = tmp_path / "innocent.csv"
    link.symlink_to(folder / DB_NAME)
    names = [folder / (DB_NAME + suffix) for suffix in ("", "-wal", "-shm", "-journal")]
    for path in names + [link, tmp_path / "ws" / ".." / "ws" / DB_NAME]:
        line = _refused(folder, option, path, "--overwrite")
        assert f"{option} would overwrite the workspace database" in line
        assert _digest(folder / DB_NAME) == before
    assert not (folder / (DB_NAME + "-journal")).exists()  # a WAL workspace never has one: nothing wrote it
    assert invoke(folder, "competence", "--json").exit_code == 0  # still a workspace


def test_by_group_without_a_group_column_is_refused_before_writing(stocked_ws, tmp_path):
    # A breakdown that cannot be made is refused rather than silently replaced by another
    # table (common practice: refuse rather than ignore an option).
    expected = ("Error: --by group: no group column was imported; name one when importing cases "
                "('routeplan cases import FILE --group-column COLUMN')")
    for extra in ([], ["--csv", tmp_path / "t.csv"], ["--plot", tmp_path / "p.png"]):
        assert _refused(stocked_ws, "--by", "group", *extra) == expected
    assert list(tmp_path.glob("*.csv")) == [] and list(tmp_path.glob("*.png")) == []


def test_plot_paths_are_checked_before_anything_is_written(iris_workspace, tmp_path):
    # Matplotlib infers the format from the extension and appends .png to a name without one
    # (matplotlib documentation of Figure.savefig), so such names are refused up front.
    folder = iris_workspace[0]
    table = tmp_path / "table.csv"
    line = _refused(folder, "--csv", table, "--plot", tmp_path / "heat.xyz")
    assert "--plot: '.xyz' is not an image format matplotlib writes; use .png" in line and ".svg" in line
    line = _refused(folder, "--csv", table, "--plot", tmp_path / "noext")
    assert "--plot needs a file extension; use .png" in line
    line = _refused(folder, "--csv", table, "--plot", table)
    assert "--csv and --plot name the same file" in line
    assert not table.exists() and not (tmp_path / "noext").exists() and not (tmp_path / "noext.png").exists()
    assert list(tmp_path.iterdir()) == []
    # another format matplotlib writes is accepted, under exactly the name given
    invoke(folder, "competence", "--plot", tmp_path / "heat.svg")
    assert (tmp_path / "heat.svg").read_text(encoding="utf-8").lstrip().startswith("<?xml")
    assert [p.name for p in tmp_path.iterdir()] == ["heat.svg"]


def test_audit_heatmap_without_audit_answers_is_refused(iris_workspace, tmp_path):
    # Every answer of this workspace is historical (no round asked for it), so the audit
    # basis has nothing to show; an empty heatmap is refused, the truth basis still plots.
    folder = iris_workspace[0]
    line = _refused(folder, "--basis", "audit", "--plot", tmp_path / "audit.png")
    assert "--basis audit --plot: no audit answer on a case with known truth yet" in line
    assert not (tmp_path / "audit.png").exists()
    invoke(folder, "competence", "--plot", tmp_path / "truth.png")
    assert (tmp_path / "truth.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_a_plot_on_a_full_disk_is_exit_2_and_leaves_no_file(iris_workspace, tmp_path, monkeypatch):
    # A full disk (ENOSPC, POSIX.1-2017 <errno.h>) is the user's to fix: exit 2 with one line
    # naming the plot and the system's reason; the plot is written atomically (temporary file
    # and rename, common practice), so no half image or temporary file stays behind.
    import errno
    import os

    import matplotlib.figure

    def half_then_full(self, fname, **kwargs):
        Path(fname).write_bytes(b"\x89PNG half")
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", half_then_full)
    png = tmp_path / "heat.png"
    line = _refused(iris_workspace[0], "--plot", png)
    assert line == f"Error: {png}: cannot write the file (No space left on device); check that the folder is " \
                   "writable and has free space, or choose another path"
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("earlier", [False, True])
def test_csv_and_plot_are_written_all_or_none(iris_workspace, tmp_path, monkeypatch, earlier):
    # --csv and --plot are one output (routeplan.files.write_all_or_none): when the plot cannot be
    # put in place after the table was, neither new file stays and files already there keep their
    # content. rename(2) may fail with ENOSPC when the folder cannot grow (POSIX.1-2017, rename).
    import errno
    import os

    table, png = tmp_path / "table.csv", tmp_path / "heat.png"
    if earlier:
        table.write_text("old table\n", encoding="utf-8")
        png.write_bytes(b"old image")
    real = os.replace

    def plot_cannot_move(src, dst, **kwargs):
        if Path(dst) == png:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(src, dst, **kwargs)

    monkeypatch.setattr(os, "replace", plot_cannot_move)
    line = _refused(iris_workspace[0], "--csv", table, "--plot", png, "--overwrite")
    assert line.startswith(f"Error: {png}: cannot write the file (No space left on device)")
    if earlier:
        assert table.read_text(encoding="utf-8") == "old table\n" and png.read_bytes() == b"old image"
    assert sorted(p.name for p in tmp_path.iterdir()) == (["heat.png", "table.csv"] if earlier else [])
