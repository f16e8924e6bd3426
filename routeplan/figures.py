"""Matplotlib figures (Agg backend, written to PNG files)."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["competence_heatmap", "competence_heatmap_writer", "rehearsal_plot", "plot_formats", "check_plot_path"]

#: Formats matplotlib can write that need more than matplotlib itself (pgf runs LaTeX).
_NEEDS_MORE = frozenset({"pgf"})


def plot_formats() -> list[str]:
    """The file extensions a plot may have: what matplotlib's Agg canvas writes, sorted.

    Returns
    -------
    list of str
        Lower-case extensions without the dot (``png``, ``pdf``, ``svg``...).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    return sorted(set(FigureCanvasAgg.get_supported_filetypes()) - _NEEDS_MORE)


def check_plot_path(path: str | Path, option: str = "--plot") -> str:
    """Refuse a plot path whose extension does not name a format matplotlib can write.

    Matplotlib picks the format from the extension and adds ``.png`` to a name without
    one, so a path without an extension would be written under another name.

    Parameters
    ----------
    path : str or Path
        Where the plot is to go.
    option : str, default="--plot"
        The option that gave the path, for the message.

    Returns
    -------
    str
        The format (the extension, lower case, without the dot).

    Raises
    ------
    InputError
        No extension, or one matplotlib cannot write.
    """
    from .errors import InputError

    suffix = Path(path).suffix
    formats = plot_formats()
    if suffix.lower().lstrip(".") in formats:
        return suffix.lower().lstrip(".")
    problem = f"{option} needs a file extension" if not suffix else f"{option}: {suffix!r} is not an image format matplotlib writes"
    raise InputError(f"{problem}; use .png (or one of .{', .'.join(f for f in formats if f != 'png')})", source=str(path))


def _save(fig: Any, path: Path) -> Path:
    """Write ``fig`` to ``path`` atomically (:func:`routeplan.files.write_atomically`), then close it."""
    import matplotlib.pyplot as plt

    from .files import write_atomically

    fmt = check_plot_path(path)  # the format named, so the temporary name does not matter
    try:
        write_atomically(path, lambda tmp: fig.savefig(tmp, format=fmt))
    finally:
        plt.close(fig)
    return path


def competence_heatmap(frame: pd.DataFrame, level: str, path: str | Path, *, accuracy_column: str = "accuracy") -> Path:
    """Heatmap of accuracy per expert (rows) x class or region (columns).

    Parameters
    ----------
    frame : pandas.DataFrame
        A ``by=level`` table of :func:`routeplan.competence.expert_accuracy_table`.
    level : str
        The column holding the class, group or region.
    path : str or Path
        Where to write the PNG.
    accuracy_column : str, default="accuracy"

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        The file could not be written (it is written atomically: ``path`` is left as it was).
    """
    from .files import write_atomically

    path = Path(path)
    write_atomically(path, competence_heatmap_writer(frame, level, path, accuracy_column=accuracy_column))
    return path


def competence_heatmap_writer(frame: pd.DataFrame, level: str, path: str | Path, *,
                              accuracy_column: str = "accuracy") -> Callable[[str], Any]:
    """The heatmap of :func:`competence_heatmap`, drawn now and written later.

    For writing the heatmap together with other files, all or none
    (:func:`routeplan.files.write_all_or_none`, :func:`routeplan.files.write_csvs`).

    Parameters
    ----------
    frame, level, accuracy_column
        As in :func:`competence_heatmap`.
    path : str or Path
        Where the image is to go; its extension chooses the format.

    Returns
    -------
    callable
        Writes the whole image, in the format of ``path``, to the path it is given.

    Raises
    ------
    InputError
        ``path`` has no extension, or one matplotlib cannot write.
    """
    fmt = check_plot_path(path)  # the format named, so the temporary name does not matter
    fig = _competence_figure(frame, level, accuracy_column)
    return lambda tmp: fig.savefig(tmp, format=fmt)


def _competence_figure(frame: pd.DataFrame, level: str, accuracy_column: str) -> Any:
    """Draw the heatmap on a figure outside pyplot (freed with its last reference, nothing to close)."""
    from matplotlib.figure import Figure

    grid = frame.pivot_table(index="expert", columns=level, values=accuracy_column, aggfunc="first")
    counts = frame.pivot_table(index="expert", columns=level, values="n_scored", aggfunc="first")
    fig = Figure(figsize=(1.2 + 0.9 * grid.shape[1], 1.0 + 0.5 * grid.shape[0]), dpi=120)
    ax = fig.subplots()
    image = ax.imshow(grid.to_numpy(dtype=float), vmin=0.0, vmax=1.0, cmap="viridis", aspect="auto")
    ax.set_xticks(range(grid.shape[1]), [str(c) for c in grid.columns], rotation=30, ha="right")
    ax.set_yticks(range(grid.shape[0]), [str(r) for r in grid.index])
    for i in range(grid.shape[0]):
        for j in range(grid.shape[1]):
            value = grid.iat[i, j]
            if np.isfinite(value):
                n = counts.iat[i, j]
                ax.text(j, i, f"{value:.2f}\nn={int(n) if np.isfinite(n) else 0}", ha="center", va="center",
                        fontsize=7, color="white" if value < 0.6 else "black")
    ax.set_xlabel(level)
    ax.set_title(f"Accuracy per expert and {level}")
    fig.colorbar(image, ax=ax, fraction=0.04, label="accuracy")
    fig.tight_layout()
    return fig


def rehearsal_plot(curves: pd.DataFrame, path: str | Path, *, bayes_cost: float | None,
                   full_information_cost: float) -> Path:
    """System cost against cumulative spend, one line per strategy, with the references.

    Parameters
    ----------
    curves : pandas.DataFrame
        :attr:`routeplan.rehearse.Rehearsal.curves`.
    path : str or Path
    bayes_cost : float or None
        Drawn unless None (a scenario whose truth model is the truth itself).
    full_information_cost : float

    Returns
    -------
    Path

    Raises
    ------
    OutputError
        The file could not be written (it is written atomically: ``path`` is left as it was).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(6.4, 4.0), dpi=120)
    for strategy, rows in curves.groupby("strategy", sort=False):
        ax.plot(rows["spend"], rows["system_cost"], marker="o", label=str(strategy))
    ax.axhline(full_information_cost, linestyle="--", color="grey", label="all answers known")
    if bayes_cost is not None:
        ax.axhline(bayes_cost, linestyle=":", color="black", label="Bayes-optimal")
    ax.set_xlabel("cumulative fees spent")
    ax.set_ylabel("system cost per case (exact, held-out)")
    ax.set_title("Rehearsal: system cost against budget")
    ax.legend(frameon=False)
    fig.tight_layout()
    return _save(fig, Path(path))
