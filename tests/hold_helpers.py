"""Hold settings shared by the hold tests: the demo's values, each test changing what it studies."""

from __future__ import annotations

from autotune.analysis.guided import LockSettings
from autotune.analysis.hold import HoldSettings


def hold_settings(**changes) -> HoldSettings:
    """The demo night's hold settings (configs/dry-run.toml's [track]) with ``changes``."""
    base = dict(floor=0.97, budget_fraction=0.05, false_alarm_interval_s=288_000.0, max_gain=0.7,
                max_correction_hz=5000.0, min_correction_hz=100.0, min_shots_per_phase=100,
                max_shots_per_phase=100_000, max_interval_s=1800.0, walk_hz_per_sqrt_s=20.0,
                inversion_drop=0.25, ramsey_phases=6, repetition_rate_hz=150.0,
                lock=LockSettings())
    base.update(changes)
    return HoldSettings(**base)
