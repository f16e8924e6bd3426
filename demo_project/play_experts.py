"""Answer the tileworks experts' sheets by playing each expert from its hidden profile.

Usage::

    python play_experts.py SHEETS_DIR --out ANSWERS_DIR --data DATA_DIR [--seed 0]

Every ``SHEETS_DIR/<expert>.csv`` (as ``routeplan round export`` writes them: the
column ``case_id`` first, perhaps display columns after) gets an answer file
``ANSWERS_DIR/<expert>.csv`` with columns ``case_id, expert, answer``. Each answer is
right with the probability the expert's hidden profile gives for that tile (see
``tileworks.correct_probability``); a wrong answer is another label. A sheet whose
name is no expert of the profiles is skipped with a message, and so are case ids the
data folder does not know. The same seed gives the same answers; an expert's answer to
a tile does not depend on which other tiles share the sheet.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

import tileworks


def read_sheet(path: str | Path) -> list[str]:
    """Return the case ids of a sheet; its first column must be ``case_id``.

    Parameters
    ----------
    path : str or Path
        A CSV sheet.

    Returns
    -------
    list of str
        Case ids in sheet order (blank rows dropped).
    """
    sheet = pd.read_csv(path, dtype=str, keep_default_na=False)
    if len(sheet.columns) == 0 or sheet.columns[0].strip() != "case_id":
        raise ValueError(f"{path}: the first column must be case_id")
    return [value.strip() for value in sheet.iloc[:, 0] if value.strip()]


def answer_sheet(expert: str, ids: list[str], world: pd.DataFrame, profiles: dict[str, Any], seed: int) -> tuple[pd.DataFrame, list[str]]:
    """Play ``expert`` on the tiles ``ids``.

    Parameters
    ----------
    expert : str
        An expert named in ``profiles["experts"]``.
    ids : list of str
        Case ids to answer.
    world : pandas.DataFrame
        Every tile with its hidden columns, as :func:`tileworks.load_world` returns it.
    profiles : dict
        The hidden profiles.
    seed : int
        Seed of the simulation.

    Returns
    -------
    answers : pandas.DataFrame
        Columns ``case_id, expert, answer`` for the known case ids, in sheet order.
    unknown : list of str
        Case ids the world does not hold (not answered).
    """
    row_of = pd.Series(np.arange(len(world)), index=world["case_id"].to_numpy())
    known = [case for case in ids if case in row_of.index]
    unknown = [case for case in ids if case not in row_of.index]
    positions = row_of.loc[known].to_numpy(dtype=int)
    answers = tileworks.play_expert(expert, profiles, world, positions, seed)
    return pd.DataFrame({"case_id": known, "expert": expert, "answer": answers}), unknown


def play_folder(sheets_dir: str | Path, out_dir: str | Path, data_dir: str | Path, seed: int, *, log=print) -> dict[str, Path]:
    """Answer every sheet in ``sheets_dir``; write one answer file per known expert.

    Parameters
    ----------
    sheets_dir : str or Path
        Folder of ``<expert>.csv`` sheets.
    out_dir : str or Path
        Folder for the answer files (created if missing).
    data_dir : str or Path
        Folder written by ``generate_cases.py`` (holds the hidden profiles).
    seed : int
        Seed of the simulation.
    log : callable, default=print
        Receives one line per sheet.

    Returns
    -------
    dict of str to Path
        The answer file written for each expert.
    """
    world, profiles = tileworks.load_world(data_dir)
    sheets = sorted(Path(sheets_dir).glob("*.csv"))
    if not sheets:
        raise ValueError(f"{sheets_dir}: no sheets (*.csv) found")
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    written = {}
    for sheet in sheets:
        expert = sheet.stem
        if expert not in profiles["experts"]:
            log(f"skipped {sheet.name}: no expert named {expert!r} in the hidden profiles")
            continue
        answers, unknown = answer_sheet(expert, read_sheet(sheet), world, profiles, seed)
        if unknown:
            log(f"{sheet.name}: skipped {len(unknown)} unknown case ids (first: {unknown[0]})")
        answers.to_csv(out_dir / sheet.name, index=False, lineterminator="\n")
        written[expert] = out_dir / sheet.name
        log(f"{expert}: answered {len(answers)} tiles -> {out_dir / sheet.name}")
    return written


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit code."""
    parser = argparse.ArgumentParser(description="Answer the tileworks experts' sheets from their hidden profiles.")
    parser.add_argument("sheets_dir", help="folder of <expert>.csv sheets (routeplan round export)")
    parser.add_argument("--out", required=True, help="folder for the answer files")
    parser.add_argument("--data", required=True, help="folder written by generate_cases.py")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    args = parser.parse_args(argv)
    try:
        play_folder(args.sheets_dir, args.out, args.data, args.seed)
    except (OSError, ValueError, KeyError) as exc:
        print(f"play_experts.py: {exc}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
