"""``routeplan fit`` end to end on scikit-learn's digits with the published simulated expert.

Source of the protocol: Mozannar & Sontag, "Consistent Estimators for Learning to Defer to an
Expert", ICML 2020: an expert always right on classes 0..k-1 and uniformly random on the
others. A good deferral system beats both the classifier alone and the expert alone
(Mozannar & Sontag report this of their estimator on CIFAR-10, section 7; from memory).
"""

from __future__ import annotations

import json
import sqlite3

import pytest

from routeplan.workspace import DB_NAME
from sklearn_workspace import digits_workspace, invoke


@pytest.fixture(scope="module")
def digits5(tmp_path_factory):
    return digits_workspace(tmp_path_factory.mktemp("fit"), k=5, n_answers=None)


@pytest.mark.slow
def test_fit_beats_model_alone_and_expert_alone_on_digits(digits5):
    # Two fit seeds: the held-out split has 449 cases, so one or two errors either way are
    # noise (common practice: read a comparison over more than one seed); the chosen system
    # must never be worse than the model alone and better on average.
    costs = {"chosen": [], "model": [], "expert": []}
    for seed in ("0", "1"):
        result = invoke(digits5, "fit", "--seed", seed, "--max-epochs", "60", "--json")
        report = json.loads(result.stdout)
        rows = {row["router"]: row for row in report["table"]}
        chosen = rows[report["chosen"]]
        costs["chosen"].append(chosen["system_cost"])
        costs["expert"].append(next(r for n, r in rows.items() if n.startswith("oracle_k"))["system_cost"])
        costs["model"].append(next(r for n, r in rows.items() if n.startswith("model alone"))["system_cost"])
        # It defers mostly on the expert's classes 0..k-1, so it neither decides everything nor defers everything.
        assert 0.0 < chosen["coverage"] < 1.0
        assert report["answers_per_expert"] == {"oracle_k": 1797}
        # historical answers all weigh 1, so Kish's effective size is the count (Kish 1965, 11.7)
        assert report["effective_answers"]["oracle_k"] == pytest.approx(1797)
    # Mozannar & Sontag (ICML 2020): the deferral system beats both the classifier and the expert alone.
    assert all(c <= m for c, m in zip(costs["chosen"], costs["model"]))
    assert sum(costs["chosen"]) < sum(costs["model"])
    assert all(c < e for c, e in zip(costs["chosen"], costs["expert"]))


@pytest.mark.slow
def test_fit_stores_every_candidate_and_marks_one_chosen(digits5):
    invoke(digits5, "fit", "--seed", "1", "--max-epochs", "5", "--router", "plugin", "--router", "softmax-mlp")
    conn = sqlite3.connect(digits5 / DB_NAME)
    kinds = conn.execute("SELECT kind, chosen FROM models ORDER BY model_id DESC LIMIT 2").fetchall()
    arrays = conn.execute("SELECT COUNT(*) FROM model_arrays WHERE model_id = (SELECT MAX(model_id) FROM models)").fetchone()[0]
    journal = conn.execute("SELECT command FROM journal WHERE command = 'fit'").fetchall()
    conn.close()
    assert sorted(k for k, _ in kinds) == ["plugin", "softmax-mlp"]
    assert sum(c for _, c in kinds) == 1  # exactly one of them is kept (common practice: one active version)
    assert arrays > 0  # weights stored as arrays, not pickled
    assert len(journal) >= 1


def test_fit_refuses_unknown_router(tmp_path):
    from click.testing import CliRunner
    from routeplan.cli import cli

    invoke(tmp_path / "w", "init", "--labels", "a,b")
    result = CliRunner().invoke(cli, ["--workspace", str(tmp_path / "w"), "fit", "--router", "nonsense"])
    assert result.exit_code == 2
    assert "nonsense" in result.stderr and "Traceback" not in result.stderr


def test_uneven_weights_get_a_note():
    from routeplan.fitting import uneven_weight_notes

    # Kish (1965): effective size well under the count means a few answers carry the weight
    notes = uneven_weight_notes({"e1": 300, "e2": 300, "e3": 10}, {"e1": 290.0, "e2": 60.0, "e3": 1.0})
    assert len(notes) == 1 and notes[0].startswith("e2's 300 answers count as about 60")


def test_fit_names_silent_experts_marks_imputed_costs_and_honours_quiet(tmp_path):
    # scikit-learn's iris; expert "ann" answers a third of the cases (right on most), "bo" none.
    # The routers' data warning must reach the user as a note naming "bo" (not as a Python
    # warning with its source line), rows resting on estimated costs must say so, and
    # --quiet must print nothing on success (common practice of command-line tools).
    from click.testing import CliRunner
    from sklearn.datasets import load_iris

    from routeplan.cli import cli

    X, y = load_iris(return_X_y=True)
    names = ["setosa", "versicolor", "virginica"]
    cases = tmp_path / "cases.csv"
    cases.write_text("case_id,a,b,c,d,truth\n" + "".join(
        f"i{i},{','.join(f'{v:g}' for v in row)},{names[t]}\n" for i, (row, t) in enumerate(zip(X, y))))
    answers = tmp_path / "answers.csv"
    answers.write_text("case_id,expert,answer\n" + "".join(
        f"i{i},ann,{names[y[i]] if i % 5 else names[(y[i] + 1) % 3]}\n" for i in range(0, 150, 3)))
    ws = tmp_path / "ws"
    invoke(ws, "init", "--labels", ",".join(names))
    invoke(ws, "cases", "import", cases)
    invoke(ws, "experts", "add", "ann", "--fee", "0.05")
    invoke(ws, "experts", "add", "bo", "--fee", "0.1")
    invoke(ws, "answers", "import", answers)
    runner = CliRunner()
    result = runner.invoke(cli, ["--workspace", str(ws), "fit", "--router", "plugin", "--max-epochs", "3"])
    assert result.exit_code == 0, result.stderr
    assert "no answer yet from bo" in " ".join(result.stdout.split())
    assert "imputed" in result.stdout
    assert "UserWarning" not in result.stderr and "warnings.warn" not in result.stderr
    quiet = runner.invoke(cli, ["--workspace", str(ws), "--quiet", "fit", "--router", "plugin", "--max-epochs", "3"])
    assert quiet.exit_code == 0 and quiet.stdout == ""


def test_data_notes_name_every_expert_a_router_saw_no_answer_from():
    # an expert with answers that all fell in a router's validation split is named too, not
    # hidden behind the note about experts with no answer at all (common practice: name names)
    import warnings

    from routeplan.errors import ExpertsWithoutAnswers
    from routeplan.fitting import _data_notes

    caught = [warnings.WarningMessage(ExpertsWithoutAnswers("columns 0, 1", [0, 1]), ExpertsWithoutAnswers,
                                      "x.py", 1)] * 2
    notes = _data_notes(caught, {"ann": 0, "bo": 4, "cy": 9})
    assert len(notes) == 2 and "no answer yet from ann" in notes[0]
    assert notes[1].startswith("bo had no answer in a router's training split")
    assert _data_notes(caught[:1], {"ann": 0, "bo": 0, "cy": 9}) == [notes[0].replace("ann", "ann, bo")]


@pytest.mark.parametrize("width", [80, 100, 200])
def test_fit_table_never_folds_a_figure(width):
    # the fit table as printed on a console of this width: every figure whole on its row, and
    # the per-expert shares kept (in a second table where one does not fit); common practice
    # for terminal tools: 80 columns is the narrowest usual terminal
    import pandas as pd
    from rich.console import Console

    from routeplan.fitting import FitReport
    from routeplan.report import render_fit

    experts = ["apprentice_grader", "senior_reviewer", "outside_laboratory"]
    rows = []
    for name, cost, coverage in (("plugin-ensemble", 0.1234, 0.6), ("model alone (plugin-ensemble)", 0.4412, 1.0),
                                 *((f"{e} alone", 0.2 + 0.1 * i, 0.0) for i, e in enumerate(experts))):
        row = {"router": name, "kind": "router" if name == "plugin-ensemble" else "baseline",
               "system_cost": cost, "ci_low": cost - 0.02, "ci_high": cost + 0.02, "accuracy": 0.9061,
               "coverage": coverage, "imputed_share": 0.34}
        row.update({f"share_{e}": (1 - coverage) / 3 for e in experts})
        rows.append(row)
    report = FitReport(chosen="plugin-ensemble", model_ids={"plugin-ensemble": 1}, table=pd.DataFrame(rows),
                       notes=[], answers_per_expert={e: 10 for e in experts}, n_train=900, n_selection=300)
    console = Console(record=True, width=width, color_system=None)
    console.print(render_fit(report))
    text = console.export_text()
    assert "…" not in text  # no header or cell cut short
    for row in rows:
        assert f"{row['system_cost']:.3f} [{row['ci_low']:.3f}, {row['ci_high']:.3f}]" in text
    assert text.count("0.906") == len(rows) and text.count("34%") == len(rows)
    for e in experts:
        assert e in text  # each expert's share column is shown
    assert text.count("13%") == len(experts)  # the kept router's share per expert, (1 - 0.6) / 3
    assert max(len(line) for line in text.splitlines()) <= width
