"""Checks of the demo's data generator and expert player (demo_project/).

The demo's data are invented; these tests check the demo's machinery, not routeplan.
"""

from __future__ import annotations

import json
import re
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

DEMO = Path(__file__).resolve().parents[1] / "demo_project"
sys.path.insert(0, str(DEMO))

import generate_cases  # noqa: E402
import play_experts  # noqa: E402
import tileworks  # noqa: E402

PUBLIC_FILES = ("tiles.csv", "new_tiles.csv", "truth.csv", "experts.csv", "history.csv", "assumed_profiles.csv")


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small generated data set shared by the player tests."""
    out = tmp_path_factory.mktemp("tiles")
    generate_cases.generate(out, n=3000, n_new=200, n_history=120, seed=11)
    return out


def test_generator_is_deterministic_and_writes_documented_columns(tmp_path: Path) -> None:
    first, second, other = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    for folder, seed in ((first, 5), (second, 5), (other, 6)):
        generate_cases.generate(folder, n=400, n_new=60, truth_share=0.75, n_history=50, seed=seed)
    hidden = (tileworks.HIDDEN_FILE, tileworks.PROFILES_FILE)
    for name in (*PUBLIC_FILES, *hidden):
        assert (first / name).read_bytes() == (second / name).read_bytes(), name
    assert (first / "tiles.csv").read_bytes() != (other / "tiles.csv").read_bytes()

    frames = {name: pd.read_csv(first / name, dtype=str) for name in PUBLIC_FILES}
    for name, frame in frames.items():
        assert tuple(frame.columns) == generate_cases.FILE_COLUMNS[name], name
    tiles, new, truth = frames["tiles.csv"], frames["new_tiles.csv"], frames["truth.csv"]
    assert "truth" not in tiles.columns and "truth" not in new.columns
    assert len(tiles) == 400 and len(new) == 60
    assert len(truth) == round(0.75 * 400)
    assert all(re.fullmatch(r"T\d{6}", case) for case in pd.concat([tiles["case_id"], new["case_id"]]))
    assert not set(tiles["case_id"]) & set(new["case_id"])
    assert set(truth["case_id"]) <= set(tiles["case_id"])
    assert set(truth["truth"]) <= set(tileworks.LABELS)
    assert set(tiles["kiln"]) <= set(tileworks.KILNS)
    history = frames["history.csv"]
    assert set(history["expert"]) <= set(frames["experts.csv"]["name"])
    assert set(history["answer"]) <= set(tileworks.LABELS)
    assert set(history["case_id"]) <= set(tiles["case_id"])
    profiles = json.loads((first / tileworks.PROFILES_FILE).read_text())
    assert set(profiles["experts"]) == set(frames["experts.csv"]["name"])
    # the team's guess reads as routeplan's profiles file, one accuracy per expert and grade
    from routeplan.ingest import read_profiles

    guess = read_profiles(first / "assumed_profiles.csv", list(tileworks.LABELS), list(frames["experts.csv"]["name"]))
    assert guess.shape == (3, len(tileworks.LABELS)) and ((guess > 0) & (guess < 1)).all()


def test_correct_probability_takes_the_first_matching_rule() -> None:
    # Hand-worked example: rules are tried in order; a tile takes the first that matches.
    profile = {
        "base_accuracy": 0.9,
        "rules": [
            {"when": [["kiln", "==", "k3"], ["glaze_dev_um", ">", 30.0]], "accuracy": 0.6},
            {"when": [["hairline", "==", 1]], "accuracy": 0.3},
        ],
    }
    tiles = pd.DataFrame(
        {"kiln": ["k3", "k3", "k1", "k3"], "glaze_dev_um": [40.0, 10.0, 40.0, 50.0], "hairline": [0, 1, 0, 1]}
    )
    np.testing.assert_allclose(tileworks.correct_probability(profile, tiles), [0.6, 0.3, 0.9, 0.6])


def test_player_answers_a_hand_made_sheet(data_dir: Path, tmp_path: Path) -> None:
    sheets = tmp_path / "sheets"
    sheets.mkdir()
    ids = ["T000010", "T000003", "T002999", "T003100", "T000042"]  # T003100 is a new tile
    pd.DataFrame({"case_id": ids, "kiln": "k1", "note": ""}).to_csv(sheets / "tone_lab.csv", index=False)
    pd.DataFrame({"case_id": ids[:2]}).to_csv(sheets / "nobody.csv", index=False)
    messages: list[str] = []
    out_a = play_experts.play_folder(sheets, tmp_path / "a", data_dir, seed=3, log=messages.append)
    out_b = play_experts.play_folder(sheets, tmp_path / "b", data_dir, seed=3, log=lambda _: None)
    assert set(out_a) == {"tone_lab"}
    assert any("nobody.csv" in line for line in messages)
    assert not (tmp_path / "a" / "nobody.csv").exists()
    answers = pd.read_csv(out_a["tone_lab"], dtype=str)
    assert list(answers.columns) == ["case_id", "expert", "answer"]
    assert list(answers["case_id"]) == ids
    assert set(answers["expert"]) == {"tone_lab"}
    assert set(answers["answer"]) <= set(tileworks.LABELS)
    assert out_a["tone_lab"].read_bytes() == out_b["tone_lab"].read_bytes()


def test_player_rejects_a_sheet_without_case_id_first(data_dir: Path, tmp_path: Path) -> None:
    sheets = tmp_path / "sheets"
    sheets.mkdir()
    pd.DataFrame({"kiln": ["k1"], "case_id": ["T000001"]}).to_csv(sheets / "apprentice.csv", index=False)
    code = play_experts.main([str(sheets), "--out", str(tmp_path / "out"), "--data", str(data_dir)])
    assert code == 2


def test_an_answer_does_not_depend_on_the_rest_of_the_sheet(data_dir: Path) -> None:
    world, profiles = tileworks.load_world(data_dir)
    everything = np.arange(len(world))
    some = np.array([7, 2, 1500, 3100])
    full = tileworks.play_expert("apprentice", profiles, world, everything, seed=9)
    part = tileworks.play_expert("apprentice", profiles, world, some, seed=9)
    assert list(part) == list(full[some])
    other_seed = tileworks.play_expert("apprentice", profiles, world, everything, seed=10)
    assert (other_seed != full).any()


@pytest.mark.parametrize("expert", ["apprentice", "kiln_master", "tone_lab"])
def test_simulated_accuracy_matches_the_hidden_profile(data_dir: Path, expert: str) -> None:
    world, profiles = tileworks.load_world(data_dir)
    profile = profiles["experts"][expert]
    answers = tileworks.play_expert(expert, profiles, world, np.arange(len(world)), seed=21)
    right = answers == world["truth"].to_numpy()
    assert set(answers) <= set(tileworks.LABELS)
    p = tileworks.correct_probability(profile, world)
    # Binomial standard-error bound, common practice: a sum of independent Bernoulli(p_i)
    # has variance sum p_i (1 - p_i) <= n * pbar * (1 - pbar); allow 4 standard errors.
    p_bar, n = p.mean(), len(p)
    assert abs(right.mean() - p_bar) <= 4.0 * np.sqrt(p_bar * (1.0 - p_bar) / n)
    # The same bound on the tiles of the profile's first rule, where accuracy is constant.
    region = p == profile["rules"][0]["accuracy"]
    assert region.sum() >= 30
    q = profile["rules"][0]["accuracy"]
    assert abs(right[region].mean() - q) <= 4.0 * np.sqrt(q * (1.0 - q) / region.sum())


def test_closing_check_counts_wrong_grades_and_fees(data_dir: Path) -> None:
    import run_demo  # the demo's closing check; importing it runs nothing

    world, profiles = tileworks.load_world(data_dir)
    new = world.iloc[3000:3010]  # ten new tiles
    truth = new["truth"].to_numpy()
    wrong = np.where(truth == "first", "second", "first")
    # Hand-worked: the first four go to the model (two right, two wrong), the rest to the
    # kiln master, whose answers are the player's and whose fee is 0.08 a tile.
    routed = pd.DataFrame({
        "case_id": new["case_id"].to_numpy(),
        "route": ["model"] * 4 + ["kiln_master"] * 6,
        "label": [truth[0], truth[1], wrong[2], wrong[3]] + [""] * 6,
    })
    played = tileworks.play_expert("kiln_master", profiles, world, np.arange(3004, 3010), seed=5)
    n_wrong = 2 + int((played != truth[4:]).sum())
    check = run_demo.check_routed(routed, data_dir, seed=5)
    assert check["n"] == 10 and check["routes"] == {"model": 4, "kiln_master": 6}
    assert check["n_wrong"] == n_wrong
    assert check["fees"] == pytest.approx(6 * 0.08)
    assert check["cost_per_tile"] == pytest.approx((n_wrong + 6 * 0.08) / 10)
    assert check["tile_cost"][:4].tolist() == [0.0, 0.0, 1.0, 1.0]
