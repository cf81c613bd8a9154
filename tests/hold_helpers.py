"""Hold settings shared by the hold tests: the demo's values, each test changing what it studies."""

from __future__ import annotations

import math

from autotune.analysis.guided import LockPrior, LockSettings
from autotune.analysis.hold import HoldSettings


#: A lock slope of the order of the demo rig's, rad/Hz (docs/physics.md section 5b).
DEMO_SLOPE = 6.4e-5


def demo_prior() -> LockPrior:
    """A calibration's lock prior of the demo rig's order: 510 m/s, the peak at 0 Hz, slope
    ``DEMO_SLOPE``, the phase at the peak pi, inversion 0.72."""
    return LockPrior(velocity_m_per_s=510.0, velocity_stderr_m_per_s=3.0, detuning_hz=0.0,
                     slope_rad_per_hz=DEMO_SLOPE, slope_stderr_rad_per_hz=1e-5, cubic_rad_per_hz3=0.0,
                     cubic_stderr_rad_per_hz3=1e-14, phase_at_peak_rad=math.pi,
                     phase_at_peak_stderr_rad=0.03, absorption_min=0.015,
                     absorption_min_stderr=0.002, absorption_curvature=5.0,
                     absorption_curvature_stderr=1.0, inversion=0.72)


def hold_settings(**changes) -> HoldSettings:
    """The demo night's hold settings (configs/dry-run.toml's [track]) with ``changes``."""
    base = dict(floor=0.97, budget_fraction=0.05, false_alarm_interval_s=288_000.0, max_gain=0.7,
                max_correction_hz=5000.0, min_correction_hz=100.0, min_shots_per_phase=100,
                max_shots_per_phase=100_000, max_interval_s=1800.0, walk_hz_per_sqrt_s=20.0,
                inversion_drop=0.25, ramsey_phases=6, repetition_rate_hz=150.0,
                lock=LockSettings())
    base.update(changes)
    return HoldSettings(**base)
