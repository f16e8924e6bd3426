"""Write the invented Marrowdene Tileworks data set.

Usage::

    python generate_cases.py --out DIR [--n 4000] [--n-new 1000] [--truth-share 0.75]
                             [--n-history 60] [--seed 7]

Files written to DIR (the same seed always gives the same bytes):

``tiles.csv``
    The pool of past tiles: ``case_id, kiln, kiln_zone_temp, clay_moisture,
    weight_dev_g, tap_tone_hz, glaze_um, colour_dev``. No grade.
``truth.csv``
    ``case_id, truth`` for the share of pool tiles whose grade was verified.
``new_tiles.csv``
    Fresh tiles to route later, same columns as ``tiles.csv``.
``experts.csv``
    ``name, fee, capacity``: fee per tile (in units of one wrong grade) and the
    share of tiles each expert can take.
``history.csv``
    ``case_id, expert, answer``: the team's past grades of a few dozen pool tiles.
``assumed_profiles.csv``
    ``expert, label, accuracy``: the team's own rough guess of each expert's accuracy per
    grade, for ``routeplan rehearse --profiles`` (coarser than the hidden profiles).
``.profiles.json`` and ``.hidden_tiles.csv``
    Hidden: each expert's competence profile and every tile's grade and latent facts.
    Only ``play_experts.py`` (and the demo's closing check) read them.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

import tileworks

#: Columns each public file has, in order.
FILE_COLUMNS: dict[str, tuple[str, ...]] = {
    "tiles.csv": tileworks.TILE_COLUMNS,
    "new_tiles.csv": tileworks.TILE_COLUMNS,
    "truth.csv": ("case_id", "truth"),
    "experts.csv": ("name", "fee", "capacity"),
    "history.csv": ("case_id", "expert", "answer"),
    "assumed_profiles.csv": ("expert", "label", "accuracy"),
}

# Share of historical tiles each expert graded (the apprentice saw them all).
_HISTORY_SHARE = {"apprentice": 1.0, "kiln_master": 0.4, "tone_lab": 0.12}


def _history(pool: pd.DataFrame, hidden: pd.DataFrame, profiles: dict, n: int, rng: np.random.Generator, seed: int) -> pd.DataFrame:
    """Past answers: ``n`` random pool tiles, graded by some experts each."""
    world = pool.merge(hidden, on="case_id", how="left")
    chosen = np.sort(rng.choice(len(pool), size=min(n, len(pool)), replace=False))
    parts = []
    for expert, share in _HISTORY_SHARE.items():
        take = chosen[rng.random(len(chosen)) < share]
        answers = tileworks.play_expert(expert, profiles, world, take, seed)
        parts.append(pd.DataFrame({"case_id": world["case_id"].to_numpy()[take], "expert": expert, "answer": answers}))
    return pd.concat(parts, ignore_index=True).sort_values(["case_id", "expert"], kind="stable", ignore_index=True)


def generate(out: str | Path, *, n: int = 4000, n_new: int = 1000, truth_share: float = 0.75, n_history: int = 60, seed: int = 7) -> dict[str, Path]:
    """Write the demo data set into ``out``.

    Parameters
    ----------
    out : str or Path
        Folder to write into (created if missing).
    n : int, default=4000
        Number of pool tiles.
    n_new : int, default=1000
        Number of fresh tiles to route later.
    truth_share : float, default=0.75
        Share of pool tiles whose verified grade goes into ``truth.csv``.
    n_history : int, default=60
        Number of pool tiles with historical answers.
    seed : int, default=7
        Seed; the same seed writes the same files.

    Returns
    -------
    dict of str to Path
        The path of each file written, by file name.
    """
    if n < 1 or n_new < 0 or n_history < 0:
        raise ValueError("--n must be at least 1, --n-new and --n-history at least 0")
    if not 0.0 <= truth_share <= 1.0:
        raise ValueError("--truth-share must lie in [0, 1]")
    rng = np.random.default_rng(seed)
    pool, pool_hidden = tileworks.make_tiles(n, rng)
    new, new_hidden = tileworks.make_tiles(n_new, rng, start=n)
    profiles = tileworks.default_profiles()
    verified = np.sort(rng.choice(n, size=int(round(truth_share * n)), replace=False))
    frames = {
        "tiles.csv": pool,
        "new_tiles.csv": new,
        "truth.csv": pool_hidden.iloc[verified][["case_id", "truth"]],
        "experts.csv": tileworks.default_experts(),
        "history.csv": _history(pool, pool_hidden, profiles, n_history, rng, seed),
        "assumed_profiles.csv": tileworks.assumed_profiles(),
        tileworks.HIDDEN_FILE: pd.concat([pool_hidden, new_hidden], ignore_index=True),
    }
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    written = {}
    for name, frame in frames.items():
        frame.to_csv(out / name, index=False, lineterminator="\n")
        written[name] = out / name
    (out / tileworks.PROFILES_FILE).write_text(json.dumps(profiles, indent=2) + "\n", encoding="utf-8")
    written[tileworks.PROFILES_FILE] = out / tileworks.PROFILES_FILE
    return written


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    parser = argparse.ArgumentParser(description="Write the invented Marrowdene Tileworks data set.")
    parser.add_argument("--out", required=True, help="folder to write into")
    parser.add_argument("--n", type=int, default=4000, help="pool tiles (default 4000)")
    parser.add_argument("--n-new", type=int, default=1000, help="fresh tiles to route later (default 1000)")
    parser.add_argument("--truth-share", type=float, default=0.75, help="share of pool tiles with a verified grade (default 0.75)")
    parser.add_argument("--n-history", type=int, default=60, help="pool tiles with historical answers (default 60)")
    parser.add_argument("--seed", type=int, default=7, help="random seed (default 7)")
    args = parser.parse_args(argv)
    try:
        written = generate(args.out, n=args.n, n_new=args.n_new, truth_share=args.truth_share, n_history=args.n_history, seed=args.seed)
    except ValueError as exc:
        print(f"generate_cases.py: {exc}", file=sys.stderr)
        return 2
    public = [name for name in written if not name.startswith(".")]
    print(f"Wrote {', '.join(public)} (and hidden expert profiles) to {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
