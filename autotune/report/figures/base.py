"""What every figure of the report shares: the canvas, markers, error bars, titles."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from autotune.report.model import Run

_LABEL_MARKERS = {"point": "o", "check": "s", "verify": "D", "refine": "^", "lock": "v",
                  "relock": "<", "bracket": ">", "velocity": "P", "search": "o", "correct": "X"}
# Above this many runs, the timeline marks where each starts but no longer names it.
NAMED_RUNS_MAX = 12
DPI = 100


def new_figure(width: float = 7.0, height: float = 4.5) -> Any:
    """A new matplotlib figure on the Agg canvas (no display needed), constrained layout.

    Parameters
    ----------
    width, height : float
        Its size in inches (at :data:`DPI` dots per inch).

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def marker_of(label: str) -> str:
    """The matplotlib marker that draws measurements of ``label`` in every figure (``"X"``
    for a label the report does not know).

    Parameters
    ----------
    label : str
        A measurement's label (``point``, ``check``, ``verify``, ``lock``, ...).
    """
    return _LABEL_MARKERS.get(label, "X")


def errorbar(ax: Any, x: Any, y: Any, *, gid: str, **kwargs: Any) -> Any:
    """``ax.errorbar`` with ``gid`` on the data line only (matplotlib would copy it to the bars)."""
    container = ax.errorbar(x, y, **kwargs)
    container.lines[0].set_gid(gid)
    return container


def set_title(fig: Any, run: Run | None, text: str) -> None:
    """Title ``fig`` with ``text``, after the run's name when there is a run.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    run : Run or None
        The run drawn (None: a figure of several runs).
    text : str
        What the figure shows.
    """
    fig.suptitle(f"{run.name}: {text}" if run is not None else text, fontsize=11)




def finish_against_detuning(fig: Any, ax: Any, run: Run, chosen: Mapping[str, float] | None,
                             *, ylabel: str, title: str, gid: str, label: str,
                             legend_size: float) -> None:
    """What every figure against the detuning set-point ends with: the chosen detuning (a
    dashed red line labelled ``label`` and its value in kHz, ``gid`` for tests), the axes'
    labels, the grid, the legend and the title."""
    if chosen is not None and "detuning" in chosen:
        ax.axvline(chosen["detuning"] / 1e3, color="red", lw=1.2, ls="--", zorder=4, gid=gid,
                   label=f"{label} {chosen['detuning'] / 1e3:+.2f} kHz")
    ax.set_xlabel("detuning set-point (kHz)")
    ax.set_ylabel(ylabel)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=legend_size, loc="best")
    set_title(fig, run, title)
