"""The shots of a lock step follow the information that the detuning term needs.

Outside references: the delta method for the standard error of a function of an estimate
(G. Casella and R. L. Berger, *Statistical Inference*, 2nd ed., 2002, section 5.5.4), checked
here by a seeded numpy Monte Carlo of the measured phase pushed through the mixture's law; the
mixture's law itself is the photon-number average of the pure fringes (docs/physics.md section
5b), checked in tests/test_mixture_lock.py; a binomial estimate's variance falls as one over the
shots (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from autotune.analysis.guided import LockSettings, PhaseLockSearch
from autotune.analysis.lock_fit import mixture_phase_error
from autotune.analysis.search import Dimension, PointResult, SearchSpace
from autotune.wire.rig import measurement_shots

PI = math.pi
SETTINGS = LockSettings(bracket_step_hz=49e3 / 5)
BOX = SearchSpace((Dimension("velocity", 460.0, 560.0), Dimension("detuning", -60e3, 60e3)))
PHASE_SD = 0.2  # rad, of each point below, measured with 12,000 shots


def _lock_on_source(p1: float, amplitude: float) -> PhaseLockSearch:
    """Three lock points at the peak of a field p0 |0> + p1 |1> with |a_g(1)| = |a|: contrast
    ratio |p0 - p1 |a||, absorption p1 (1 - |a|^2) / 2 (docs/physics.md section 5b)."""
    lock = PhaseLockSearch(BOX, seed=1, start={"velocity": 503.7, "detuning": 0.0}, settings=SETTINGS)
    ratio = abs((1.0 - p1) - p1 * amplitude)
    absorption = p1 * (1.0 - amplitude**2) / 2.0
    for k in range(3):
        result = PointResult(inversion=0.4, inversion_stderr=0.03, phase_shift=PI, phase_shift_stderr=PHASE_SD,
                             absorption=absorption, absorption_stderr=1e-6, contrast_empty=0.6,
                             contrast_empty_stderr=1e-6, contrast_one_photon=0.6 * ratio,
                             contrast_one_photon_stderr=1e-6, identified=True, clock_s=10.0 * k, shots=12_000)
        lock.observe({"velocity": 503.7, "detuning": 100.0 * k}, result, purpose="lock")
    return lock


def _one_photon_phase_sd(lock: PhaseLockSearch, rng: np.random.Generator) -> float:
    """Monte Carlo: the measured phase error of a lock step at the peak, normal with the points'
    error per shot over the step's shots, pushed through the mixture's law at the lock's q."""
    shots = measurement_shots(SETTINGS.ramsey_phases, lock.step_shots("lock"))
    measured_sd = PHASE_SD * math.sqrt(12_000 / shots)
    psi = rng.normal(0.0, measured_sd, size=400_000)
    return float(np.std(mixture_phase_error(psi, lock._mixture_low())))


@pytest.mark.parametrize("p1, amplitude", [(0.65, 0.98), (0.66, 0.99)])
def test_a_poor_sources_lock_step_gives_the_one_photon_phase_its_target_error(p1, amplitude):
    """A poor source read through the mixture's law (q about 0.5-0.55): the lock step takes (1 - q)^2
    of the shots the measured phase alone would need (the law's gain at the peak, delta method),
    and the one-photon phase error behind the measured one then has a standard error within 10 %
    of step_phase_stderr_rad by Monte Carlo (the law's gain grows off the peak: with the measured
    phase's sd near 0.33 rad the second-order term adds about 7 %)."""
    lock = _lock_on_source(p1, amplitude)
    q = lock._mixture_low()
    assert q > 0.4
    sd = _one_photon_phase_sd(lock, np.random.default_rng(5))
    assert SETTINGS.step_phase_stderr_rad * 0.97 <= sd <= SETTINGS.step_phase_stderr_rad * 1.10
    pure_shots = PHASE_SD**2 * 12_000 / SETTINGS.step_phase_stderr_rad**2
    assert measurement_shots(SETTINGS.ramsey_phases, lock.step_shots("lock")) == pytest.approx(
        (1.0 - q) ** 2 * pure_shots, rel=0.02)


def test_a_good_sources_lock_step_gives_the_measured_phase_its_target_error():
    """A good source (p1 = 0.9: contrast ratio above min_contrast_ratio, the pure photon's law,
    q = 0): the one-photon phase error is the measured one, sized to step_phase_stderr_rad."""
    lock = _lock_on_source(0.9, 0.99)
    assert lock._mixture_low() == 0.0
    sd = _one_photon_phase_sd(lock, np.random.default_rng(6))
    assert SETTINGS.step_phase_stderr_rad * 0.97 <= sd <= SETTINGS.step_phase_stderr_rad * 1.01
