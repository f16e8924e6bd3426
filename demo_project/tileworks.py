"""The invented Marrowdene Tileworks: tiles, their hidden grades, and three simulated experts.

Everything here is invented for the demo. Nothing in this module is used by the
``routeplan`` package; ``generate_cases.py`` writes the files a team would bring, and
``play_experts.py`` answers the sheets that ``routeplan round export`` writes, by
playing each expert from the hidden profile stored beside the data.

The hidden world
----------------
Each tile has six measured features and a kiln (k1, k2, k3). A hidden hairline crack
(more likely in damp clay fired hot) damps the tile's tap tone. A badness score adds
squared distances from the nominal firing temperature, weight and glaze thickness,
colour deviation, excess moisture, a large penalty for a crack, and Gaussian noise;
two fixed cut points turn the score into ``first``, ``second`` or ``reject``.

An expert profile is plain data: a base accuracy and an ordered list of rules. A rule
holds one or more conditions on a tile's columns (public or hidden) and the accuracy
that applies when all of them hold; the first matching rule wins. A wrong answer is
one of the other labels, drawn with the profile's ``mistake_weights`` (neighbouring
grades are the likeliest mistakes).
"""

from __future__ import annotations

import json
import zlib
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

LABELS: tuple[str, ...] = ("first", "second", "reject")
KILNS: tuple[str, ...] = ("k1", "k2", "k3")
FEATURES: tuple[str, ...] = (
    "kiln_zone_temp",
    "clay_moisture",
    "weight_dev_g",
    "tap_tone_hz",
    "glaze_um",
    "colour_dev",
)
#: Columns of tiles.csv and new_tiles.csv, in order.
TILE_COLUMNS: tuple[str, ...] = ("case_id", "kiln", *FEATURES)
#: Hidden per-tile columns (in .hidden_tiles.csv) that profiles may refer to.
HIDDEN_COLUMNS: tuple[str, ...] = ("case_id", "truth", "hairline", "tone_dev_hz", "glaze_dev_um", "margin")

PROFILES_FILE = ".profiles.json"
HIDDEN_FILE = ".hidden_tiles.csv"

_NOMINAL_TEMP = 1085.0
_NOMINAL_GLAZE = 180.0
_NOMINAL_TONE = 1150.0
_TONE_PER_GRAM = -0.9
_KILN_SHARE = (0.40, 0.35, 0.25)
_KILN_TEMP_OFFSET = {"k1": 0.0, "k2": 8.0, "k3": -12.0}
_KILN_GLAZE_SD = {"k1": 22.0, "k2": 24.0, "k3": 42.0}
_CUTS = (2.0, 3.7)  # badness below the first cut is `first`, above the second is `reject`

_OPS = {
    "==": np.equal,
    "!=": np.not_equal,
    "<": np.less,
    "<=": np.less_equal,
    ">": np.greater,
    ">=": np.greater_equal,
}


def case_ids(start: int, n: int) -> list[str]:
    """Return tile identifiers ``T000000``-style for ``start .. start+n-1``."""
    return [f"T{i:06d}" for i in range(start, start + n)]


def make_tiles(n: int, rng: np.random.Generator, *, start: int = 0) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Draw ``n`` tiles and their hidden grades.

    Parameters
    ----------
    n : int
        Number of tiles.
    rng : numpy.random.Generator
        Source of randomness.
    start : int, default=0
        Number of the first tile (for ``case_id``).

    Returns
    -------
    public : pandas.DataFrame
        Columns ``TILE_COLUMNS``: what the works measures on each tile.
    hidden : pandas.DataFrame
        Columns ``HIDDEN_COLUMNS``: the grade and the latent facts behind it.
    """
    kiln = rng.choice(np.array(KILNS), size=n, p=_KILN_SHARE)
    temp_offset = np.vectorize(_KILN_TEMP_OFFSET.get)(kiln) if n else np.zeros(0)
    glaze_sd = np.vectorize(_KILN_GLAZE_SD.get)(kiln) if n else np.zeros(0)
    temp = _NOMINAL_TEMP + temp_offset + rng.normal(0.0, 22.0, n)
    moisture = np.clip(rng.normal(6.5, 1.6, n), 2.0, 13.0)
    weight = rng.normal(0.0, 35.0, n)
    glaze = np.clip(_NOMINAL_GLAZE + rng.normal(0.0, 1.0, n) * glaze_sd, 60.0, None)
    colour = rng.gamma(2.0, 0.6, n) + 0.015 * np.abs(temp - _NOMINAL_TEMP)
    crack_logit = -3.4 + 0.7 * (moisture - 6.5) + 0.05 * np.maximum(temp - 1095.0, 0.0)
    hairline = rng.random(n) < 1.0 / (1.0 + np.exp(-crack_logit))
    damping = np.where(hairline, rng.uniform(20.0, 90.0, n), 0.0)
    tone = _NOMINAL_TONE + _TONE_PER_GRAM * weight + rng.normal(0.0, 10.0, n) - damping
    tone_dev = np.abs(tone - (_NOMINAL_TONE + _TONE_PER_GRAM * weight))
    badness = (
        ((temp - _NOMINAL_TEMP) / 30.0) ** 2
        + 0.7 * np.maximum(moisture - 8.0, 0.0)
        + (weight / 45.0) ** 2
        + 0.45 * colour
        + ((glaze - _NOMINAL_GLAZE) / 40.0) ** 2
        + 3.0 * hairline
        + rng.normal(0.0, 0.35, n)
    )
    grade = np.digitize(badness, _CUTS)
    margin = np.min(np.abs(badness[:, None] - np.asarray(_CUTS)[None, :]), axis=1) if n else np.zeros(0)
    ids = case_ids(start, n)
    public = pd.DataFrame(
        {
            "case_id": ids,
            "kiln": kiln,
            "kiln_zone_temp": np.round(temp, 1),
            "clay_moisture": np.round(moisture, 2),
            "weight_dev_g": np.round(weight, 1),
            "tap_tone_hz": np.round(tone, 1),
            "glaze_um": np.round(glaze, 1),
            "colour_dev": np.round(colour, 3),
        }
    )
    hidden = pd.DataFrame(
        {
            "case_id": ids,
            "truth": np.asarray(LABELS)[grade],
            "hairline": hairline.astype(int),
            "tone_dev_hz": np.round(tone_dev, 1),
            "glaze_dev_um": np.round(np.abs(glaze - _NOMINAL_GLAZE), 1),
            "margin": np.round(margin, 3),
        }
    )
    return public, hidden


def default_experts() -> pd.DataFrame:
    """Return the works' three experts: name, fee per tile, capacity share."""
    return pd.DataFrame(
        {
            "name": ["apprentice", "kiln_master", "tone_lab"],
            "fee": [0.02, 0.08, 0.20],
            "capacity": [0.5, 0.2, 0.1],
        }
    )


def assumed_profiles() -> pd.DataFrame:
    """Return the works' own rough guess of each expert's accuracy, per grade (for a rehearsal).

    Invented beliefs, coarser than the hidden profiles: the team knows the apprentice misses
    cracks (so is weaker on rejects), trusts the kiln master, and rates the tone lab as fair.
    """
    rows = [
        ("apprentice", "", 0.85), ("apprentice", "reject", 0.6),
        ("kiln_master", "", 0.93),
        ("tone_lab", "", 0.75), ("tone_lab", "reject", 0.9),
    ]
    return pd.DataFrame(rows, columns=["expert", "label", "accuracy"])


def default_profiles() -> dict[str, Any]:
    """Return the hidden competence profiles of the three experts (plain JSON-ready data)."""
    return {
        "labels": list(LABELS),
        "mistake_weights": {
            "first": {"second": 0.85, "reject": 0.15},
            "second": {"first": 0.5, "reject": 0.5},
            "reject": {"second": 0.8, "first": 0.2},
        },
        "experts": {
            "apprentice": {
                "note": "reliable on clear tiles; cannot hear hairline cracks, unsure of odd tones and uneven glaze",
                "base_accuracy": 0.97,
                "rules": [
                    {"when": [["hairline", "==", 1]], "accuracy": 0.30},
                    {"when": [["tone_dev_hz", ">", 20.0]], "accuracy": 0.50},
                    {"when": [["glaze_dev_um", ">", 35.0]], "accuracy": 0.55},
                ],
            },
            "kiln_master": {
                "note": "good nearly everywhere; weak on uneven glaze from kiln k3",
                "base_accuracy": 0.97,
                "rules": [
                    {"when": [["kiln", "==", "k3"], ["glaze_dev_um", ">", 30.0]], "accuracy": 0.55},
                    {"when": [["hairline", "==", 1]], "accuracy": 0.80},
                ],
            },
            "tone_lab": {
                "note": "outside tap-tone testing; near-perfect on hidden cracks and odd tones, mediocre elsewhere",
                "base_accuracy": 0.70,
                "rules": [
                    {"when": [["hairline", "==", 1]], "accuracy": 0.99},
                    {"when": [["tone_dev_hz", ">", 20.0]], "accuracy": 0.97},
                ],
            },
        },
    }


def correct_probability(profile: dict[str, Any], tiles: pd.DataFrame) -> np.ndarray:
    """Probability that the expert grades each tile correctly.

    Parameters
    ----------
    profile : dict
        One expert's profile: ``base_accuracy`` and ordered ``rules``, each with a list
        ``when`` of ``[column, op, value]`` conditions and an ``accuracy``.
    tiles : pandas.DataFrame
        Public and hidden columns of the tiles, one row per tile.

    Returns
    -------
    numpy.ndarray of shape (n_tiles,)
        The accuracy of the first rule whose conditions all hold, else the base accuracy.
    """
    p = np.full(len(tiles), float(profile["base_accuracy"]))
    decided = np.zeros(len(tiles), dtype=bool)
    for rule in profile.get("rules", []):
        hit = ~decided
        for column, op, value in rule["when"]:
            if op not in _OPS:
                raise ValueError(f"unknown operator {op!r} in a profile rule")
            hit &= _OPS[op](tiles[column].to_numpy(), value)
        p[hit] = float(rule["accuracy"])
        decided |= hit
    return p


def _expert_stream(seed: int, expert: str, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Two uniform draws per tile, fixed by the seed, the expert's name and the tile's row."""
    rng = np.random.default_rng([int(seed), zlib.crc32(expert.encode("utf-8"))])
    draws = rng.random((n, 2))  # row i is the same whatever n is, so pool rows agree with pool+new
    return draws[:, 0], draws[:, 1]


def play_expert(
    expert: str,
    profiles: dict[str, Any],
    world: pd.DataFrame,
    positions: np.ndarray,
    seed: int,
) -> np.ndarray:
    """Simulate one expert's answers for some tiles of the world.

    Parameters
    ----------
    expert : str
        Name of an expert in ``profiles["experts"]``.
    profiles : dict
        The hidden profiles (see :func:`default_profiles`).
    world : pandas.DataFrame
        Every tile (pool and new), public and hidden columns, in a fixed order.
    positions : numpy.ndarray of int
        Row positions in ``world`` of the tiles to answer.
    seed : int
        Seed; an expert's answer to a tile depends only on the seed, the expert and
        the tile, not on which other tiles share its sheet.

    Returns
    -------
    numpy.ndarray of str, shape (len(positions),)
        The expert's answers.
    """
    labels = list(profiles["labels"])
    u_right, u_which = _expert_stream(seed, expert, len(world))
    u_right, u_which = u_right[positions], u_which[positions]
    tiles = world.iloc[positions]
    p = correct_probability(profiles["experts"][expert], tiles)
    truth = tiles["truth"].to_numpy()
    answers = truth.astype(object).copy()
    for label in labels:
        wrong = (truth == label) & (u_right >= p)
        if not wrong.any():
            continue
        weights = profiles["mistake_weights"][label]
        others = [lab for lab in labels if lab != label]
        cum = np.cumsum([float(weights.get(lab, 1.0)) for lab in others])
        pick = np.searchsorted(cum / cum[-1], u_which[wrong], side="right")
        answers[wrong] = np.asarray(others, dtype=object)[np.minimum(pick, len(others) - 1)]
    return answers.astype(str)


def load_world(data_dir: str | Path) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Read every tile (pool and new) with its hidden columns, and the hidden profiles.

    Parameters
    ----------
    data_dir : str or Path
        A folder written by ``generate_cases.py``.

    Returns
    -------
    world : pandas.DataFrame
        Public and hidden columns, pool tiles first, then new tiles.
    profiles : dict
        The hidden expert profiles.
    """
    data_dir = Path(data_dir)
    profiles = json.loads((data_dir / PROFILES_FILE).read_text(encoding="utf-8"))
    public = pd.concat(
        [pd.read_csv(data_dir / "tiles.csv"), pd.read_csv(data_dir / "new_tiles.csv")],
        ignore_index=True,
    )
    hidden = pd.read_csv(data_dir / HIDDEN_FILE)
    world = public.merge(hidden, on="case_id", how="left", validate="one_to_one")
    if world["truth"].isna().any():
        raise ValueError(f"{data_dir / HIDDEN_FILE} lacks the hidden grade of some tiles")
    return world, profiles
