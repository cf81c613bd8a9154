"""What a night is given: the night checked and ready to run (:class:`PreparedNight`), the
hold's settings from the config and the rig, and the size and expected beam of a night's
stage."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from autotune.config import RunConfig
from autotune.analysis.hold import HoldSettings, StageSize, expected_stage_beam_s
from autotune.run.guided_stage import lock_settings
from autotune.wire.rig import measurement_shots

__all__ = ["PreparedNight", "hold_settings", "planned_stage", "expected_stage_s",
           "EXPECTED_RETUNE_STEPS"]

# Lock steps a retune is expected to take besides its check and verification (the prior of
# its cost before the night has measured its own retunes): a recovery starts at the peak the
# checks measured, so one step corrects what is left of that estimate's error.
EXPECTED_RETUNE_STEPS = 1

@dataclass
class PreparedNight:
    """A night checked and ready to run (nothing written yet).

    Attributes
    ----------
    config : RunConfig
    description : Description
        The rig's describe reply.
    run_dir : Path
    resume : bool
    store : Path
        The last good calibration (read at the start, replaced after accepted recoveries).
    last_good : dict or None
        The last good calibration the night starts from (None: it starts with a calibration).
    changes : list of (key, old, new)
        Configuration changes a resume accepted.
    """

    config: RunConfig
    description: Any
    run_dir: Path
    resume: bool
    store: Path
    last_good: dict[str, Any] | None = None
    changes: list[tuple[str, Any, Any]] = field(default_factory=list)


def hold_settings(config: RunConfig, description: Any) -> HoldSettings:
    """The pure side's settings from ``[track]``, ``[lock]``, ``[measurement]`` and the rig."""
    t = config.track
    box = {sp.name: (sp.search_min, sp.search_max) for sp in config.setpoints}
    most = int(getattr(description, "max_shots_per_acquisition", 0) or 0) or 10_000_000
    return HoldSettings(
        floor=t.floor, budget_fraction=t.budget_fraction,
        false_alarm_interval_s=t.false_alarm_interval_s, max_gain=t.max_gain,
        max_correction_hz=t.max_correction_hz, min_correction_hz=t.min_correction_hz,
        min_shots_per_phase=t.min_shots_per_phase, max_shots_per_phase=most,
        max_interval_s=t.max_interval_s, walk_hz_per_sqrt_s=t.walk_hz_per_sqrt_s,
        inversion_drop=t.inversion_drop, ramsey_phases=config.measurement.ramsey_phases,
        repetition_rate_hz=float(description.repetition_rate_hz),
        lock=lock_settings(config, box))


def planned_stage(config: RunConfig, kind: str) -> StageSize:
    """A stage of the night (``"retune"`` or ``"calibrate"``) at its configured size."""
    if kind == "retune":
        return StageSize("retune", config.track.retune_shots_per_phase,
                         config.track.retune_shots_per_phase, config.lock.max_corrections,
                         config.retune.max_shots, config.retune.max_points)
    return StageSize("calibrate", 0, config.measurement.verification_shots_per_phase,
                     config.lock.max_corrections, config.search.max_shots,
                     config.search.max_points)


def expected_stage_s(config: RunConfig, spent: Sequence[float], kind: str,
                     repetition_rate_hz: float) -> float:
    """Beam a recovery of ``kind`` is expected to take (:func:`autotune.analysis.hold.expected_stage_beam_s`)
    from the night's recoveries so far (``spent``) and a prior (a retune: its check,
    verification and one lock step; a calibration: its least points and verification)."""
    size = planned_stage(config, kind)
    per_phase = size.check_shots_per_phase + size.verification_shots_per_phase + \
        (EXPECTED_RETUNE_STEPS if kind == "retune" else config.search.min_points) * \
        config.lock.lock_shots_per_phase
    prior = measurement_shots(config.measurement.ramsey_phases, per_phase) / repetition_rate_hz
    return expected_stage_beam_s(prior, spent)
