"""A check's detuning reading, read with its own noise on a poor one-photon source.

Outside references: the fringe of a mixed field ``p0 |0> + p1 |1>`` is the photon-number
average of the pure fringes, so its amplitude is ``p0 - p1 e^{i eps}`` (docs/physics.md section
5b, evaluated here directly with numpy complex numbers); the counts are numpy's seeded binomial
draws at six Ramsey phases, fitted by the check's own estimator
(:func:`autotune.analysis.fringe.fit_fringe`, the point fit of ``estimate_inversion``, the phase
shift the one-photon fringe's phase minus the empty one's); a standardized statistic has unit
variance when its stated standard error is right (the delta method: G. Casella and R. L.
Berger, Statistical Inference, 2nd ed. (2002), section 5.5.4), which is what the charts'
thresholds assume (common practice); the variance's sampling error of ``sqrt(2 / n)`` for
normal draws (common practice).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from hold_helpers import DEMO_SLOPE, demo_prior, hold_settings

from autotune.analysis.fringe import FringeData, fit_fringe
from autotune.analysis.hold import (
    CheckPlan,
    DriftLock,
    NoiseModel,
    SequentialTest,
    assess_check,
    peak_offset,
    reading_phase_sd,
)
from autotune.analysis.lock_fit import mixture_measured_phase, mixture_phase_gain
from autotune.analysis.search_types import PointResult

PHASES = np.linspace(0.0, 2.0 * math.pi, 6, endpoint=False)
ATOMS = 300  # detected atoms per phase and field
SHOTS = 2 * PHASES.size * ATOMS
CONTRAST = 0.8  # the empty fringe's


def _draws(rng: np.random.Generator, q: float, eps: float, k: int) -> list[PointResult]:
    """``k`` checks of a field with empty fraction ``q = p0 / p1`` whose one-photon phase error is
    ``eps``: binomial g counts at each phase, both fringes fitted by the check's estimator."""
    p1 = 1.0 / (1.0 + q)
    amplitudes = (CONTRAST + 0j, CONTRAST * ((1.0 - p1) - p1 * np.exp(1j * eps)))
    out = []
    for _ in range(k):
        fits = []
        for a in amplitudes:
            p = 0.5 + 0.5 * np.real(a * np.exp(-1j * PHASES))  # P_g peaks at arg(a)
            g = rng.binomial(ATOMS, p)
            fits.append(fit_fringe(FringeData.from_counts(PHASES, np.zeros(6, int), g, ATOMS - g)))
        shift = float(np.mod(fits[1].phase - fits[0].phase, 2.0 * math.pi))
        out.append(PointResult(inversion=0.5, inversion_stderr=0.05, phase_shift=shift,
                               phase_shift_stderr=0.1, absorption=0.015, absorption_stderr=0.004,
                               contrast_empty=fits[0].contrast, contrast_empty_stderr=0.03,
                               contrast_one_photon=fits[1].contrast,
                               contrast_one_photon_stderr=0.03, identified=True, clock_s=600.0,
                               shots=SHOTS))
    return out


def _plan() -> CheckPlan:
    test = SequentialTest(1.0, 3.5, 1.75, 0.4, 6.0, 3.0)
    return CheckPlan(interval_s=600.0, shots_per_phase=ATOMS, check_s=24.0, check_share=0.04,
                     detuning_stderr_hz=3000.0, design_shift_hz=5400.0, test=test,
                     expected_delay_s=600.0, step_delay_s=400.0, false_alarm_interval_h=80.0,
                     tracking_error_hz=800.0, reason="test", inputs={})


def _prior(q: float):
    return dataclasses.replace(demo_prior(), slope_rad_per_hz=DEMO_SLOPE / (1.0 - q),
                               mixture_empty_fraction=q)


def _error(r: PointResult) -> float:
    """The measured phase error against the prior's phase at the peak, pi."""
    return (r.phase_shift - math.pi + math.pi) % (2.0 * math.pi) - math.pi


def _z(results: list[PointResult], q: float, noise: NoiseModel) -> np.ndarray:
    """The innovation's z of each check through assess_check, held at 0 Hz, against a lock that
    knows to 1 Hz the peak where the checks' readings put it on average (their mean offset by
    the check's own peak_offset): z is then each reading's deviation over its stated standard
    error, the statistic whose unit variance the charts' thresholds assume."""
    prior = _prior(q)
    mean_offset = float(np.mean([peak_offset(_error(r), 1.0, prior)[0] for r in results]))
    settings = hold_settings()
    lock = DriftLock.start(600.0, -mean_offset, 1.0, 0.0, 1e-6, 0.0)
    z = []
    for r in results:
        a = assess_check(settings, result=r, detuning_hz=0.0, lock=lock, prior=prior,
                         plan=_plan(), upper=0.0, lower=0.0, inversion=0.0,
                         reference_inversion=0.5, reference_stderr=0.02, next_interval_s=600.0,
                         noise=noise)
        if a.usable:  # else gated out of the lock (the capture range), the check repeated
            z.append(a.innovation.z)
    assert len(z) >= 0.99 * len(results)
    return np.asarray(z)


@pytest.mark.parametrize("q", [0.0, 0.6])
def test_a_checks_z_has_unit_variance_at_and_away_from_the_peak(q):
    """Seeded checks at the peak and at one-photon phase errors of 0.5 and 0.8 rad (8 and 13 kHz
    on the 2π pulse's law at the demo slope): the pooled phase noise is measured on checks at
    the peak (the night's NoiseModel), and the z the check states has variance 1 within four
    of its sampling errors at every reading, on a good source and on a poor one (q 0.6). The
    peak's pooled noise carried through the law's gain alone (the reading before) states
    z of variance below 0.5 at 0.8 rad on the poor source: a step seen at a fraction of its z.
    Checks the capture range gates out (at most 1 %) are not read by the lock and not counted."""
    rng = np.random.default_rng(20261205)
    peak = _draws(rng, q, 0.0, 3000)
    pooled = float(np.mean([_error(r) ** 2 for r in peak]))
    noise = NoiseModel(pooled * SHOTS, 0.05**2 * SHOTS, len(peak))
    k = 1500
    for eps in (0.0, 0.5, 0.8):
        results = peak[:k] if eps == 0.0 else _draws(rng, q, eps, k)
        z = _z(results, q, noise)
        assert np.var(z, ddof=1) == pytest.approx(1.0, abs=4.0 * math.sqrt(2.0 / k)), (q, eps)
        if q > 0.0 and eps == 0.8:
            prior = _prior(q)
            psi = [_error(r) for r in results]
            offsets = np.array([peak_offset(p, 1.0, prior)[0] for p in psi])
            before = np.array([peak_offset(p, math.sqrt(pooled), prior)[1] for p in psi])
            assert np.var((offsets - offsets.mean()) / before, ddof=1) < 0.5


def test_a_pure_photon_keeps_the_pooled_noise_exactly():
    """q = 0: the one-photon fringe's amplitude is the same at every phase error, so the reading's
    phase noise is the pooled one to the bit, whatever the check's contrasts."""
    for psi in (-2.0, 0.0, 0.3, 1.4):
        for c0, c1 in ((0.8, 0.7), (0.3, 0.05), (0.9, -0.1)):
            assert reading_phase_sd(0.17, psi, 0.0, c0, c1) == 0.17


def test_the_reading_scale_on_a_poor_source_follows_the_fringes_amplitude():
    """q 0.6, eps 1 rad, the check's contrasts as the mixture's law gives them (the one-photon
    fringe ``|e^{i eps} - q| / (1 - q)`` = 2.11 times its contrast at the peak, numpy): the
    offset's standard error over the peak's is the law's gain ratio 2.63 times the phase noise
    ratio, between 2.63 / 2.11 = 1.25 (the one-photon fringe alone) and 2.63 (the empty alone),
    and here 1.33 by the per-atom variances at the check's contrasts (the empty fringe's 0.8,
the one-photon fringe's ``p1 (1 - q)`` = 0.25 of it at the peak; our arithmetic, numpy below)."""
    q, eps = 0.6, 1.0
    psi = float(mixture_measured_phase(eps, q))
    r = abs(np.exp(1j * eps) - q) / (1.0 - q)
    gain_ratio = mixture_phase_gain(psi, q) / (1.0 - q)
    assert gain_ratio == pytest.approx(2.63, abs=0.01)
    c0, c1_peak = 0.8, 0.8 * 0.25

    def v(c):
        return (2.0 - 0.5 * c * c) / (c * c)

    expected = math.sqrt((v(c0) + v(c1_peak * r)) / (v(c0) + v(c1_peak)))
    phase_ratio = reading_phase_sd(1.0, psi, q, c0, c1_peak * r)
    assert phase_ratio == pytest.approx(expected, rel=1e-12)
    scale = gain_ratio * phase_ratio
    assert 2.63 / r < scale < 2.63
    assert scale == pytest.approx(1.33, abs=0.01)
    # A check whose own one-photon contrast came out near zero keeps the pooled noise (ratio 1).
    assert reading_phase_sd(1.0, psi, q, c0, 0.0) == pytest.approx(1.0, abs=1e-6)
