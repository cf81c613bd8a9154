"""How a check reads a thermal step, and what the planner expects of it (autotune.analysis.hold).

The phase error of a 2π crossing bends away from the peak: the law of the 2π sech pulse
(Rosen-Zener), checked against qutip's solver for that pulse and for the Gaussian mode; a check
on the stored slope's line reads a 15 kHz step as about 13 kHz. The planner's chance that the
first check after a step flags it is checked against seeded checks read by the check's own
functions (scipy.stats.norm for the noise), with the step's phase error taken from qutip.
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hold_helpers import demo_prior, hold_settings
from scipy import stats

from autotune.analysis.hold import (
    DriftLock,
    NoiseModel,
    peak_offset,
    plan_checks,
    step_reading,
    two_pi_pulse_phase_rad,
)
from autotune.analysis.lock_fit import mixture_measured_phase

qutip = pytest.importorskip("qutip")


def _phase_error(a_g: complex) -> float:
    """The phase of ``a_g`` from the 2π point's ``-1`` (rad)."""
    return float(np.angle(-a_g))


@pytest.mark.parametrize("detuning_hz", [2e3, 10e3, 15e3, 30e3])
def test_the_two_pi_law_is_the_sech_pulse_solution_from_qutip(detuning_hz):
    """A pulse Omega_0 sech(t / T) of area 2π (Omega_0 T = 2): qutip's sesolve of the
    crossing gives |a_g| = 1 and the phase error 2 atan(Delta T) of the Rosen-Zener solution
    a_g = -(1 - i Delta T) / (1 + i Delta T) (N. Rosen and C. Zener, Phys. Rev. 40, 502 (1932);
    from memory), which is the law of two_pi_pulse_phase_rad at the slope 2 T (per Hz: 4 pi T)."""
    from sim.reference import COUPLING_HZ, WAIST_M, qutip_crossing

    omega = 2.0 * math.pi * COUPLING_HZ
    velocity = omega * WAIST_M / 2.0  # area Omega_0 pi w / v = 2 pi for sech(x)
    transit = WAIST_M / velocity
    a_g, _ = qutip_crossing(velocity, detuning_hz, 1, envelope=lambda x: 1.0 / np.cosh(x),
                            window=(-30.0, 30.0))
    assert abs(a_g) == pytest.approx(1.0, abs=1e-6)
    slope = 4.0 * math.pi * transit
    assert abs(_phase_error(a_g)) == pytest.approx(two_pi_pulse_phase_rad(detuning_hz, slope),
                                                  abs=1e-6)


def test_the_gaussian_mode_bends_as_the_two_pi_law_within_half_a_percent():
    """The Gaussian mode at its 2π velocity (docs/physics.md section 2; qutip's sesolve): the
    phase error at 5 to 20 kHz is the 2π law's at the slope measured at ±200 Hz, within 0.5 %,
    while the straight line misses it by 5 % at 15 kHz."""
    from sim.reference import COUPLING_HZ, WAIST_M, qutip_crossing

    v_2pi = 2.0 * math.pi * COUPLING_HZ * WAIST_M / (2.0 * math.sqrt(math.pi))
    up, _ = qutip_crossing(v_2pi, 200.0, 1)
    down, _ = qutip_crossing(v_2pi, -200.0, 1)
    slope = (_phase_error(up) - _phase_error(down)) / 400.0
    for detuning in (5e3, 15e3, 20e3):
        a_g, _ = qutip_crossing(v_2pi, detuning, 1)
        law = two_pi_pulse_phase_rad(detuning, slope)
        assert _phase_error(a_g) == pytest.approx(law, rel=0.005), detuning
    a_g, _ = qutip_crossing(v_2pi, 15e3, 1)
    assert abs(slope * 15e3 / _phase_error(a_g) - 1.0) > 0.04


def test_a_step_reads_smaller_on_the_checks_line_and_as_the_mixture_reads_it():
    """step_reading: on a pure photon's line a 15 kHz step reads (2 / s) atan(s D / 2), the
    same for either sign, with the line's noise; a poor source (q = 0.5) reads the same offset
    (the mixture's law is inverted exactly) with the noise peak_offset gives at its measured
    phase, larger than at the peak."""
    prior = demo_prior()
    s = prior.slope_rad_per_hz
    offset, scale = step_reading(15e3, prior)
    assert offset == pytest.approx(2.0 / s * math.atan(s * 15e3 / 2.0), rel=1e-12)
    assert offset < 15e3 and scale == pytest.approx(1.0)
    assert step_reading(-15e3, prior)[0] == pytest.approx(-offset)
    q = 0.5
    poor = dataclasses.replace(prior, slope_rad_per_hz=s / (1.0 - q), mixture_empty_fraction=q)
    read, spread = step_reading(15e3, poor)
    assert read == pytest.approx(offset, rel=1e-9)
    measured = float(mixture_measured_phase(two_pi_pulse_phase_rad(15e3, s), q))
    assert spread == pytest.approx(peak_offset(measured, 1.0, poor)[1]
                                   / peak_offset(0.0, 1.0, poor)[1])
    assert spread > 1.0


def test_the_planned_first_check_flag_matches_checks_read_by_the_checks_own_functions():
    """A 15 kHz step, its phase error from qutip's Gaussian crossing (the prior's slope is the
    crossing's own at ±200 Hz): seeded checks (the plan's phase noise per check, drawn with
    scipy.stats.norm) read by peak_offset, their innovations over the plan's deviation, each
    added to an in-control chart (seeded N(0, 1) charts at their stationary state). The share
    that reaches the warning level is the plan's step_read_flag within four binomial standard
    errors (plus 0.01); the flag on the step's full 15 kHz (step_flag, what the plan is still
    chosen on: benchmarks/README.md, session 8) is not."""
    from sim.reference import COUPLING_HZ, WAIST_M, qutip_crossing

    v_2pi = 2.0 * math.pi * COUPLING_HZ * WAIST_M / (2.0 * math.sqrt(math.pi))
    up, _ = qutip_crossing(v_2pi, 200.0, 1)
    down, _ = qutip_crossing(v_2pi, -200.0, 1)
    slope = (_phase_error(up) - _phase_error(down)) / 400.0
    step_phase = _phase_error(qutip_crossing(v_2pi, 15e3, 1)[0])
    prior = dataclasses.replace(demo_prior(), slope_rad_per_hz=slope)
    lock = DriftLock.start(0.0, 0.0, 1000.0, 0.0, 0.5, 20.0)
    noise = NoiseModel(18000 * 0.10**2, 18000 * 0.03**2, 6)
    plan = plan_checks(hold_settings(), noise=noise, prior=prior, lock=lock,
                       reference_inversion=0.72, reference_stderr=0.02, check_share=0.025)
    t = plan.test
    k, w = t.reference, t.warning
    innovation_sd = plan.inputs["innovation_sd_hz"]
    shots = 12 * plan.shots_per_phase
    phase_sd = math.sqrt(noise.phase_variance_shots / shots)
    # The lock's prior spread of the peak: what the innovation's deviation adds to the check's.
    prior_var = innovation_sd**2 - (phase_sd / abs(slope)) ** 2
    rng = np.random.default_rng(20261205)
    trials = 20000
    s = np.zeros(trials)
    for _ in range(300):
        s = np.maximum(0.0, s + stats.norm.rvs(size=trials, random_state=rng) - k)
        s[s > t.threshold] = 0.0
    phases = step_phase + stats.norm.rvs(scale=phase_sd, size=trials, random_state=rng)
    peak_error = stats.norm.rvs(scale=math.sqrt(prior_var), size=trials, random_state=rng)
    z = np.empty(trials)
    for i, (phase, e) in enumerate(zip(phases, peak_error)):
        offset, offset_sd = peak_offset(float(phase), phase_sd, prior)
        # The set-point 15 kHz above the peak: the innovation is the offset read plus the
        # lock's own error of the peak (the chart that watches this side; the other is its mirror).
        z[i] = (offset + e) / math.sqrt(prior_var + offset_sd**2)
    share = float(np.mean(np.maximum(0.0, s + z - k) >= w))
    se = math.sqrt(share * (1.0 - share) / trials)
    assert abs(share - plan.inputs["step_read_flag"]) < 4.0 * se + 0.01, (share, plan.inputs)
    assert plan.inputs["step_read_hz"] < 15e3
    assert plan.inputs["step_read_z"] < plan.inputs["step_z"]
    old = float(np.mean(np.maximum(0.0, s + stats.norm.rvs(
        loc=15e3 / innovation_sd, size=trials, random_state=rng) - k) >= w))
    assert abs(share - old) > 8.0 * se, (share, old)
