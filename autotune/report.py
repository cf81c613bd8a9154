"""Summaries and figures from a run folder (reads only; never touches a rig).

:func:`summarise` turns a run folder's journal into a plain-data summary, :func:`format_summary`
into text, and :func:`plot_run` draws ``report.png``: the measured inversion of every point in
order with its error bar, and the points over the (velocity, detuning) plane coloured by their
inversion, with the chosen setting marked.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

from autotune.errors import JournalError
from autotune.journal import (
    JOURNAL_NAME,
    MANIFEST_NAME,
    RESULT_NAME,
    read_journal,
    read_json,
)

__all__ = ["summarise", "format_summary", "plot_run", "write_report", "FIGURE_NAME"]

FIGURE_NAME = "report.png"


def summarise(run_dir: Path) -> dict[str, Any]:
    """Plain-data summary of a run folder: manifest facts, points, decisions, result.

    Raises
    ------
    JournalError
        The folder has no manifest or no readable journal.
    """
    run_dir = Path(run_dir)
    manifest = read_json(run_dir / MANIFEST_NAME)
    records = read_journal(run_dir / JOURNAL_NAME)
    result_path = run_dir / RESULT_NAME
    result = read_json(result_path) if result_path.exists() else None
    points = []
    decisions = []
    shots = 0
    for rec in records:
        if rec["type"] == "estimate":
            est = rec["estimate"]
            points.append({"label": rec["label"], "point": rec["point"],
                           "setpoints": rec["setpoints"], "inversion": est["inversion"],
                           "stderr": est["inversion_stderr"]})
        elif rec["type"] == "decision":
            decisions.append({"what": rec["what"], "reason": rec["reason"]})
        elif rec["type"] == "acquisition":
            shots += int(rec["shots"])
    ended = records[-1]["status"] if records and records[-1]["type"] == "end" else "running or killed"
    return {
        "run_dir": str(run_dir),
        "command": manifest.get("command"),
        "rig": manifest.get("rig", {}).get("rig"),
        "started": manifest.get("started"),
        "seed": manifest.get("seed"),
        "records": len(records),
        "ended": ended,
        "shots": shots,
        "points": points,
        "decisions": decisions,
        "result": result,
    }


def format_summary(summary: dict[str, Any]) -> str:
    """The summary as text for a terminal."""
    lines = [
        f"run {summary['run_dir']}: {summary['command']} on rig {summary['rig']!r}, "
        f"started {summary['started']}, seed {summary['seed']}",
        f"journal: {summary['records']} records, ended: {summary['ended']}, "
        f"shots acquired: {summary['shots']}",
        "",
        f"{'label':<7} {'#':>3} {'velocity m/s':>13} {'detuning kHz':>13} {'inversion':>10} "
        f"{'stderr':>7}",
    ]
    for p in summary["points"]:
        sp = p["setpoints"]
        lines.append(f"{p['label']:<7} {p['point']:>3} {sp.get('velocity', math.nan):>13.2f} "
                     f"{sp.get('detuning', math.nan) / 1e3:>13.3f} {p['inversion']:>10.4f} "
                     f"{p['stderr']:>7.4f}")
    lines.append("")
    lines.append("decisions:")
    lines.extend(f"  {d['what']}: {d['reason']}" for d in summary["decisions"])
    result = summary["result"]
    if result is not None:
        low, high = result["inversion_interval"]
        lines.append("")
        lines.append(f"result: {result['status']}, inversion {result['inversion']:.4f} "
                     f"[{low:.4f}, {high:.4f}] at {result['setpoints']}")
        if "truth" in result:
            t = result["truth"]
            lines.append(f"truth (simulated rig): inversion at chosen {t['inversion_at_chosen']:.4f},"
                         f" best {t['best_inversion']:.4f} at {t['best_setpoints']}")
    return "\n".join(lines)


def plot_run(summary: dict[str, Any], path: Path) -> Path:
    """Draw the run's figure to ``path`` (PNG) and return the path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    points = [p for p in summary["points"] if p["label"] == "point"]
    if not points:
        raise JournalError(f"{summary['run_dir']}: no search point to plot")
    fig, (ax_steps, ax_plane) = plt.subplots(1, 2, figsize=(11, 4.2))
    idx = [p["point"] for p in points]
    inv = [p["inversion"] for p in points]
    err = [p["stderr"] for p in points]
    ax_steps.errorbar(idx, inv, yerr=err, fmt="o", ms=4, capsize=2)
    ax_steps.set_xlabel("search point")
    ax_steps.set_ylabel("fringe inversion")
    ax_steps.set_title("measured inversion per point (1 s.e.)")
    vel = [p["setpoints"].get("velocity", math.nan) for p in points]
    det = [p["setpoints"].get("detuning", math.nan) / 1e3 for p in points]
    sc = ax_plane.scatter(vel, det, c=inv, cmap="viridis", s=28)
    fig.colorbar(sc, ax=ax_plane, label="inversion")
    result = summary["result"]
    if result is not None:
        ax_plane.plot(result["setpoints"]["velocity"], result["setpoints"]["detuning"] / 1e3,
                      marker="*", ms=16, mfc="none", mec="red", label="chosen")
        if "truth" in result:
            best = result["truth"]["best_setpoints"]
            ax_plane.plot(best["velocity"], best["detuning"] / 1e3, marker="+", ms=14,
                          color="black", label="true best (simulated)")
        ax_plane.legend(loc="best", fontsize=8)
    ax_plane.set_xlabel("velocity set-point (m/s)")
    ax_plane.set_ylabel("detuning set-point (kHz)")
    ax_plane.set_title("points searched")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path


def write_report(run_dir: Path, *, plot: bool = True) -> str:
    """Summarise ``run_dir``; with ``plot``, also write its figure. Returns the text."""
    summary = summarise(run_dir)
    text = format_summary(summary)
    if plot and any(p["label"] == "point" for p in summary["points"]):
        figure = plot_run(summary, Path(run_dir) / FIGURE_NAME)
        text += f"\n\nfigure: {figure}"
    return text
