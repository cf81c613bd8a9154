"""The night's checks on a poor one-photon source (a field mixing |0> and |1>).

Outside references: the fringe of a mixed field is the photon-number average of the pure
fringes, so its phase is the angle of ``p0 + p1 a_g(1)`` (docs/physics.md section 5b, evaluated
here directly with numpy complex numbers); the normal tail probabilities from scipy.stats.norm;
the simulated rig's noiseless truth and its one-photon probability for the closed loop.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hold_helpers import DEMO_SLOPE, demo_prior
from scipy import stats

from autotune.analysis.guided import detuning_offset
from autotune.analysis.hold import floor_phase_rad, floor_shift_hz, known_cubic, peak_offset
from autotune.analysis.hold_signal import SignalModel

PI = math.pi


def _measured_error(p1: float, eps: float) -> float:
    """The mixed field's measured phase error against pi: the angle of ``p0 + p1 a_g(1)`` with
    ``a_g(1) = -e^{i eps}`` (docs/physics.md section 5b), the empty fringe's amplitude 1."""
    amplitude = (1.0 - p1) - p1 * np.exp(1j * eps)
    return float(np.angle(amplitude * np.exp(-1j * PI)))


@pytest.mark.parametrize("p1", [0.6, 0.7, 0.85])
@pytest.mark.parametrize("offset_hz", [-12e3, -4e3, 0.0, 2.5e3, 9e3])
def test_a_checks_offset_follows_the_mixture_law(p1, offset_hz):
    """A one-photon curve ``eps = s_e D + c_e D^3`` seen through a mixed field (numpy's angle of
    the photon-number average): the prior stores the measured phase's slope and cubic as a
    calibration's fit of it near the peak would; peak_offset reads D back from the measured
    phase error to 2 % of 12 kHz, the bias of the slope fitted over +-6 kHz (the stored curve's
    own reading misses a 12 kHz offset by a third at p1 = 0.6)."""
    q = (1.0 - p1) / p1
    s_e, c_e = 6.4e-5, -2.0e-15
    # The measured curve's slope and cubic near the peak: numpy's least squares of the measured
    # phase over +-6 kHz (the stored curve, as a lock fit would have it).
    grid = np.linspace(-6e3, 6e3, 41)
    measured = np.array([_measured_error(p1, s_e * d + c_e * d**3) for d in grid])
    slope, cubic = np.linalg.lstsq(np.stack([grid, grid**3], axis=1), measured, rcond=None)[0]
    prior = dataclasses.replace(demo_prior(), slope_rad_per_hz=float(slope),
                                cubic_rad_per_hz3=float(cubic), cubic_stderr_rad_per_hz3=1e-17,
                                mixture_empty_fraction=q)
    psi = _measured_error(p1, s_e * offset_hz + c_e * offset_hz**3)
    read, read_sd = peak_offset(psi, 0.05, prior)
    assert read == pytest.approx(offset_hz, abs=0.02 * 12e3)
    if p1 == 0.6 and offset_hz == -12e3:
        # Why the law: the stored curve's own reading (the pure photon's) misses by a third.
        stored, _ = detuning_offset(psi, 0.05, float(slope), 0.0, known_cubic(prior), 0.0)
        assert abs(stored - offset_hz) > 0.25 * 12e3
    # The error's standard error carried by the law's derivative: at the peak d eps / d psi
    # = 1 - q, so the offset's error is the measured error over the measured slope there.
    if offset_hz == 0.0:
        assert read_sd == pytest.approx(0.05 / abs(slope), rel=0.05)


def test_a_pure_photon_reads_as_before():
    """With no empty fraction, peak_offset is the stored curve's linear reading (q = 0)."""
    prior = demo_prior()
    offset, sd = peak_offset(0.3, 0.1, prior)
    assert offset == pytest.approx(0.3 / DEMO_SLOPE) and sd == pytest.approx(0.1 / DEMO_SLOPE)


@pytest.mark.parametrize("p1", [0.6, 0.75])
def test_the_design_shift_of_a_poor_source_is_the_one_photon_floor(p1):
    """The design shift takes the one-photon phase error to ``2 acos(floor)`` (the inversion's
    ``cos(eps / 2)`` at the floor), read through the measured slope, and floor_phase_rad is its
    measured phase (numpy's angle of the photon-number average)."""
    q = (1.0 - p1) / p1
    measured_slope = DEMO_SLOPE / (1.0 - q)
    shift = floor_shift_hz(0.97, measured_slope, q)
    assert DEMO_SLOPE * shift == pytest.approx(2.0 * math.acos(0.97))
    assert floor_phase_rad(0.97, q) == pytest.approx(_measured_error(p1, 2.0 * math.acos(0.97)))
    assert floor_shift_hz(0.97, DEMO_SLOPE) == pytest.approx(2.0 * math.acos(0.97) / DEMO_SLOPE)


def test_a_poor_sources_check_is_sized_for_the_wrap_gate():
    """Below the contrast gate the least readable check keeps the one-photon contrast z of its
    standard deviations above the contrast at which the phase's own standard error would fail
    the wrap gate (scipy.stats.norm: the chance of a check failing it is at most the one-sided
    tail at z); without the wrap gate no size is readable (None)."""
    signal = SignalModel(detected_per_shot_empty=0.25, detected_per_shot_one_photon=0.25,
                         contrast_empty=0.9, contrast_one_photon=0.09, dispersion=1.0,
                         measurements=3)
    z, w, room = 2.0, 3.0, PI - 0.9
    assert signal.usable_shots(ratio=0.35, phase_margin_rad=1.0, z=z) is None
    shots = signal.usable_shots(ratio=0.35, phase_margin_rad=1.0, z=z, wrap_sigmas=w,
                                wrap_margin_rad=room)
    assert shots is not None
    contrast, sd_one = signal.contrast_margin_sd(2, 0.0)
    contrast_sd = sd_one * math.sqrt(2.0 / shots)
    phase_sd = math.sqrt(signal.phase_variance_shots / shots)
    # The check's own phase error scales as 1 / measured contrast: it fails the gate below
    # C1 w sigma / room.
    failing_below = contrast * w * phase_sd / room
    assert stats.norm.cdf(failing_below, loc=contrast, scale=contrast_sd) <= stats.norm.sf(z) + 1e-9
    smaller = shots * 0.8
    assert stats.norm.cdf(contrast * w * math.sqrt(signal.phase_variance_shots / smaller) / room,
                          loc=contrast, scale=sd_one * math.sqrt(2.0 / smaller)) > stats.norm.sf(z)


def test_a_quiet_night_on_a_poor_source_holds_without_a_false_alarm(tmp_path):
    """The demo rig with a one-photon probability of 0.6 and no ramp (contrast ratio about 0.2
    near the best, below the fixed gate of 0.35): after a calibration, six hours of rig time are
    held at >= 0.97 of the simulator's noiseless best (sampled every minute and at every
    operation) with no alarm and no retune beyond the night's opening one (the fixed gate read every check as unusable and
    raised an alarm at the second), every check read by the lock, within the beam budget."""
    from rig_process import REPO

    from autotune.bench import night_rig
    from autotune.bench.scenarios import local_rig, rig_data
    from autotune.config import load_config
    from autotune.run import runner, track
    from autotune.run.journal import JOURNAL_NAME, read_journal

    rig = local_rig(rig_data(REPO / "configs" / "sim-rig.toml"),
                    {"field": {"one_photon_probability": 0.6}, "drift": {"ramp_hz_per_s": 0.0}}, 61)
    config = load_config(REPO / "configs" / "dry-run.toml")
    # This source's best inversion is about 0.5 (2 p1 - 1 of the photon's phase flip, a rig
    # fact), at the default floor of the acceptance: a lower floor, so that the night starts.
    config = dataclasses.replace(
        config, min_inversion=0.4, measurement=dataclasses.replace(config.measurement, resamples=300),
        track=dataclasses.replace(config.track, max_rig_time_s=6 * 3600.0, on_stop="last_good"))
    store = tmp_path / "good.json"
    calibration = runner.calibrate(rig, config, tmp_path / "calibrate", store=store)
    assert calibration["accepted"]
    watched = night_rig._NightRig(rig, [], 60.0)
    watched.watching = True
    result = track.track(watched, config, tmp_path / "night", store=store)
    watched._tick()
    holds = [r for r in read_journal(tmp_path / "night" / JOURNAL_NAME) if r["type"] == "hold"]
    assert result["status"] == "ended" and result["alarms"] == 0 and result["retunes"] <= 1
    assert len(holds) >= 2 and all(h["numbers"]["usable"] for h in holds)
    assert result["holding_share"] <= result["budget_fraction"]
    assert min(ratio for _, ratio in watched.samples) >= 0.97
