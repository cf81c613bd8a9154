"""Figure: both Ramsey fringes at the chosen set-points."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from autotune.errors import EstimationError
from autotune.analysis.fringe import FringeData, fit_fringe
from autotune.report.figures.base import errorbar, new_figure, set_title
from autotune.report.flags import fit_p_value
from autotune.report.model import FIELD_NAMES, Run, format_setpoints, level_label
from autotune.wire.rig import FIELDS


def figure_fringes(run: Run) -> tuple[Any, str] | None:
    """Figure 1: both fringes at the chosen set-points, data and refitted curves.

    The data are P_g = g / (e + g + i) at each Ramsey phase with Wilson intervals at the run's
    confidence (``scipy.stats.binomtest(...).proportion_ci``); the curves are
    ``a + b cos phi + c sin phi`` from :func:`autotune.analysis.fringe.fit_fringe` on the journal's
    counts. Without chosen set-points yet (a running run) it shows the latest measurement.
    Returns ``(figure, caption)``, or None before the first estimate.
    """
    m = run.final_measurement()
    which = "the chosen set-points"
    if m is None and run.estimated:
        m = run.estimated[-1]
        which = "the latest measurement (no set-points chosen yet)"
    if m is None or not m.acquisitions:
        return None
    fig = new_figure()
    ax = fig.add_subplot()
    level = run.confidence
    fit_notes = []
    dense = np.linspace(0.0, 2.0 * math.pi, 241)
    for fld, colour in zip(FIELDS, ("tab:blue", "tab:red"), strict=True):
        rows = sorted((j, a) for (f, j), a in m.acquisitions.items() if f == fld)
        if not rows:
            continue
        phase = np.array([a["ramsey_phase"] for _, a in rows])
        e = np.array([a["e"] for _, a in rows], dtype=np.int64)
        g = np.array([a["g"] for _, a in rows], dtype=np.int64)
        i = np.array([a["i"] for _, a in rows], dtype=np.int64)
        n = e + g + i
        keep = n > 0
        p = g[keep] / n[keep]
        from scipy import stats  # scipy.stats loads here, not at import
        cis = [stats.binomtest(int(k), int(t)).proportion_ci(confidence_level=level,
                                                               method="wilson")
               for k, t in zip(g[keep], n[keep], strict=True)]
        low = np.array([c.low for c in cis])
        high = np.array([c.high for c in cis])
        x = np.mod(phase[keep], 2.0 * math.pi)
        errorbar(ax, x, p, yerr=[p - low, high - p], fmt="o", color=colour, capsize=3, ms=5,
                    label=f"{FIELD_NAMES[fld]}: data ({level_label(level)} Wilson)", gid=f"data-{fld}")
        try:
            fit = fit_fringe(FringeData.from_counts(phase, e, g, i))
        except EstimationError as exc:
            fit_notes.append(f"{FIELD_NAMES[fld]}: no fit ({exc})")
            continue
        a, b, c = (float(v) for v in fit.coefficients)
        ax.plot(dense, a + b * np.cos(dense) + c * np.sin(dense), "-", color=colour, lw=1.5,
                label=f"{FIELD_NAMES[fld]}: fit {a:.3f} {b:+.3f} cos φ {c:+.3f} sin φ",
                gid=f"fit-{fld}")
        if fit.dof > 0:
            fit_notes.append(f"{FIELD_NAMES[fld]}: reduced chi2 {fit.chi2 / fit.dof:.2f} "
                             f"({fit.dof} dof, p = {fit_p_value(fit.chi2, fit.dof):.2g})")
    ax.set_xlim(0.0, 2.0 * math.pi)
    ax.set_ylim(-0.02, 1.02)
    ax.set_xticks([0, math.pi / 2, math.pi, 3 * math.pi / 2, 2 * math.pi],
                  ["0", "π/2", "π", "3π/2", "2π"])
    ax.set_xlabel("Ramsey phase φ (rad)")
    ax.set_ylabel("ground-state probability $P_g$ (dimensionless)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    set_title(fig, run, f"fringes at {m.name} ({format_setpoints(m.setpoints)})")
    shots = f", {m.shots_per_phase} shots per phase and field" if m.shots_per_phase else ""
    caption = (f"Ramsey fringes P_g(φ) of the empty and the one-photon field at {which}, "
               f"{m.name}{shots}. "
               f"Points: the fraction of detected atoms found in g, with {level_label(level)} Wilson "
               "intervals (scipy.stats.binomtest); curves: a + b cos φ + c sin φ refitted from "
               "the journal's counts (weighted linear least squares, autotune.analysis.fringe). "
               + "; ".join(fit_notes) + ".")
    return fig, caption


