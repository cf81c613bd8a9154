"""drivers_sim.physics against outside references: qutip, closed forms, CODATA worked values."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants
import scipy.integrate

from drivers_sim import physics

from .reference import COUPLING_HZ, SEED, WAIST_M, qutip_crossing

MODE = {"coupling_hz": COUPLING_HZ, "waist_m": WAIST_M}


def _random_points(count):
    rng = np.random.default_rng(SEED)
    velocity = rng.uniform(300.0, 700.0, count)
    detuning = rng.uniform(-150e3, 150e3, count)
    photons = rng.integers(1, 5, count)
    return list(zip(velocity, detuning, photons))


@pytest.mark.parametrize("velocity, detuning_hz, photons", _random_points(24))
def test_crossing_matches_qutip_sesolve(velocity, detuning_hz, photons):
    """The vectorised crossing agrees with qutip's sesolve of the Jaynes-Cummings model to 1e-6."""
    # Reference: qutip 5 sesolve on atom x Fock space, a wider window (+-6 w/v), tight tolerances.
    ref_g, ref_e = qutip_crossing(velocity, detuning_hz, photons)
    a_g, a_e = physics.crossing_amplitudes(velocity, detuning_hz, photons, **MODE)
    assert abs(a_g - ref_g) < 1e-6
    assert abs(a_e - ref_e) < 1e-6


def test_crossing_vectorised_matches_scalar_calls():
    """One array call gives the same amplitudes as qutip point by point, broadcasting (v, delta, n)."""
    # Reference: qutip sesolve at each grid point (docs/physics.md section 2 Hamiltonian).
    velocity = np.array([350.0, 620.0])[:, None, None]
    detuning = np.array([-40e3, 25e3])[None, :, None]
    photons = np.array([1, 3])[None, None, :]
    a_g, a_e = physics.crossing_amplitudes(velocity, detuning, photons, **MODE)
    assert a_g.shape == (2, 2, 2)
    for i, j, k in np.ndindex(2, 2, 2):
        ref_g, ref_e = qutip_crossing(velocity[i, 0, 0], detuning[0, j, 0], photons[0, 0, k])
        assert abs(a_g[i, j, k] - ref_g) < 1e-6 and abs(a_e[i, j, k] - ref_e) < 1e-6


def test_vacuum_is_not_coupled():
    """Photon number 0 gives a_g = 1 and a_e = 0 at any velocity and detuning."""
    # Source: docs/physics.md section 2, |g,0> is not coupled (Jaynes-Cummings model).
    a_g, a_e = physics.crossing_amplitudes([300.0, 700.0], [-1e5, 3e4], 0, **MODE)
    np.testing.assert_allclose(a_g, 1.0, atol=1e-12)
    np.testing.assert_allclose(a_e, 0.0, atol=1e-12)


def test_resonant_crossing_follows_pulse_area():
    """At zero detuning a_g = cos(A/2), a_e = -i sin(A/2) with A = Omega_0 sqrt(n) sqrt(pi) w / v."""
    # Source: pulse-area result for a resonant two-level system (Allen & Eberly, Optical
    # Resonance and Two-Level Atoms, 1975); Gaussian area sqrt(pi) w / v computed here by hand.
    velocity = np.linspace(250.0, 900.0, 27)[:, None]
    photons = np.arange(1, 5)[None, :]
    area = 2 * math.pi * COUPLING_HZ * np.sqrt(photons) * math.sqrt(math.pi) * WAIST_M / velocity
    a_g, a_e = physics.crossing_amplitudes(velocity, 0.0, photons, **MODE)
    np.testing.assert_allclose(a_g, np.cos(area / 2), atol=1e-6)
    np.testing.assert_allclose(a_e, -1j * np.sin(area / 2), atol=1e-6)


def test_two_pi_velocity_of_demo_flips_sign():
    """At v_2pi = Omega_0 w / (2 sqrt(pi)) = 503.7 m/s one photon gives a_g = -1, a_e = 0."""
    # Source: common practice (a 2 pi rotation flips the amplitude's sign); 503.7 m/s from
    # docs/physics.md section 6 for Omega_0/2pi = 49 kHz and w = 5.8 mm.
    v_2pi = physics.two_pi_velocity(**MODE)
    assert v_2pi == pytest.approx(503.7, abs=0.05)
    a_g, a_e = physics.crossing_amplitudes(v_2pi, 0.0, 1, **MODE)
    assert abs(a_g - (-1.0)) < 1e-6
    assert abs(a_e) < 1e-6


def test_two_photons_are_not_seen_as_one():
    """At v_2pi two photons give a_g = cos(pi sqrt 2), not -1."""
    # Source: docs/physics.md section 2 (sqrt(n) scaling of the Jaynes-Cummings model).
    a_g, _ = physics.crossing_amplitudes(physics.two_pi_velocity(**MODE), 0.0, 2, **MODE)
    assert a_g.real == pytest.approx(math.cos(math.pi * math.sqrt(2.0)), abs=1e-6)


@pytest.mark.parametrize("detuning_hz, coupling_hz", [(0.0, 49e3), (30e3, 49e3), (-120e3, 20e3)])
def test_constant_coupling_follows_rabi_formula(detuning_hz, coupling_hz):
    """With constant coupling P_e(t) = Omega^2/(Omega^2+delta^2) sin^2(sqrt(Omega^2+delta^2) t/2)."""
    # Source: the Rabi formula (Scully & Zubairy, Quantum Optics, 1997).
    t = np.linspace(1e-6, 60e-6, 13)
    omega, delta = 2 * math.pi * coupling_hz, 2 * math.pi * detuning_hz
    general = math.hypot(omega, delta)
    expected = omega**2 / general**2 * np.sin(general * t / 2) ** 2
    _, c_e = physics.two_level_evolution(detuning_hz, coupling_hz, t, steps=16)
    np.testing.assert_allclose(np.abs(c_e) ** 2, expected, atol=1e-12)


@pytest.mark.parametrize("detuning_hz", [1.0e6, -1.5e6, 2.5e6])
@pytest.mark.parametrize("photons", [1, 2])
def test_large_detuning_gives_dispersive_phase(detuning_hz, photons):
    """For |delta| >> Omega_0, arg a_g = n Omega_0^2 w sqrt(pi/2) / (4 delta v) to 1 %, no absorption."""
    # Source: dispersive (second-order) light shift integrated over the Gaussian mode,
    # docs/physics.md section 2; the neglected terms are of relative order (Omega_0 / delta)^2.
    velocity = 450.0
    omega0, delta = 2 * math.pi * COUPLING_HZ, 2 * math.pi * detuning_hz
    expected = photons * omega0**2 * WAIST_M * math.sqrt(math.pi / 2) / (4 * delta * velocity)
    a_g, a_e = physics.crossing_amplitudes(velocity, detuning_hz, photons, **MODE)
    assert np.angle(a_g) == pytest.approx(expected, rel=0.01)
    assert abs(a_e) < 0.01


def test_ten_khz_detuning_near_two_pi_gives_about_077_pi():
    """Near v_2pi a 10 kHz detuning turns the one-photon phase to about 0.77 pi (qutip recomputed)."""
    # Source: docs/physics.md section 2 states ~0.77 pi; recomputed here with qutip's sesolve.
    v_2pi = physics.two_pi_velocity(**MODE)
    ref_g, _ = qutip_crossing(v_2pi, 10e3, 1)
    assert abs(np.angle(ref_g)) / math.pi == pytest.approx(0.77, abs=0.01)
    a_g, _ = physics.crossing_amplitudes(v_2pi, 10e3, 1, **MODE)
    assert abs(a_g - ref_g) < 1e-6


def test_ramsey_rotation_matches_stated_matrix_and_is_unitary():
    """U(theta, phi) is the stated (g, i) rotation; two pi/2 pulses of equal phase make a pi pulse."""
    # Source: docs/physics.md section 3 matrix; rotations about one axis add (common practice).
    theta, phi = 0.7, -1.3
    u = physics.ramsey_rotation(theta, phi)
    c, s = math.cos(theta / 2), math.sin(theta / 2)
    expected = np.array([[c, -1j * np.exp(-1j * phi) * s], [-1j * np.exp(1j * phi) * s, c]])
    np.testing.assert_allclose(u, expected, atol=1e-15)
    np.testing.assert_allclose(u @ u.conj().T, np.eye(2), atol=1e-15)
    half = physics.ramsey_rotation(math.pi / 2, phi)
    np.testing.assert_allclose(half @ half, physics.ramsey_rotation(math.pi, phi), atol=1e-15)


def test_ramsey_assembly_matches_ideal_fringe_formula():
    """With ideal pi/2 zones and a Fock state, P_g = (1 + |a|^2 - 2|a| cos(chi + phi))/4, P_e = |a_e|^2/2."""
    # Source: docs/physics.md section 3 (ideal pi/2 pulses; the matrices of ramsey_rotation applied
    # here by hand, independently of the coefficient code).
    model = physics.AtomCavityModel(
        coupling_hz=COUPLING_HZ, waist_m=WAIST_M, cavity_frequency_hz=48.6e9, temperature_k=0.0,
        damping_time_s=1.0, one_photon_probability=1.0, preparation_to_cavity_m=0.0,
        velocity_bias_m_per_s=0.0, velocity_spread_m_per_s=0.0, velocity_nodes=1,
    )
    velocity, detuning = 430.0, 7e3
    a_g, a_e = physics.crossing_amplitudes(velocity, detuning, 1, **MODE)
    coefficients = physics.outcome_coefficients(model, velocity, detuning)[1]
    for phi in np.linspace(0.0, 2 * math.pi, 7):
        state = physics.ramsey_rotation(math.pi / 2, 0.0) @ np.array([1.0, 0.0])
        state = np.array([state[0] * a_g, state[1]])
        final = physics.ramsey_rotation(math.pi / 2, phi) @ state
        formula = (1 + abs(a_g) ** 2 - 2 * abs(a_g) * math.cos(np.angle(a_g) + phi)) / 4
        row = np.array([1.0, math.cos(phi), math.sin(phi)])
        assert coefficients[1] @ row == pytest.approx(formula, abs=1e-12)
        assert coefficients[1] @ row == pytest.approx(abs(final[0]) ** 2, abs=1e-12)
        assert coefficients[2] @ row == pytest.approx(abs(final[1]) ** 2, abs=1e-12)
        assert coefficients[0] @ row == pytest.approx(abs(a_e) ** 2 / 2, abs=1e-12)


@pytest.mark.parametrize("velocity", [440.0, 480.0, 500.0, 530.0, 575.0])
def test_zones_set_at_one_velocity_scale_both_fringes_by_the_rabi_formula(velocity):
    """Zones whose power was set once at 500 m/s give an atom of velocity v the pulse area theta =
    (pi / 2) 500 / v, and both fringes (empty and one photon) have sin^2 theta of the contrast that
    pi/2 zones give; zones set at the set velocity are the default rig."""
    # Source: the resonant two-level Rabi formula, a pulse of area theta transfers p = sin^2(theta
    # / 2) (I. I. Rabi, Phys. Rev. 51, 652 (1937); from memory), the area proportional to the
    # transit time, so to L / v, at fixed power (common practice); two equal pulses give a fringe
    # of peak-to-peak contrast 4 p (1 - p) (docs/physics.md section 3, our derivation).
    common = dict(coupling_hz=COUPLING_HZ, waist_m=WAIST_M, cavity_frequency_hz=48.6e9,
                  temperature_k=0.0, damping_time_s=1.0, one_photon_probability=1.0,
                  preparation_to_cavity_m=0.0, velocity_bias_m_per_s=0.0,
                  velocity_spread_m_per_s=0.0, velocity_nodes=1)

    def figures(**zones):
        model = physics.AtomCavityModel(**common, **zones)
        detected = physics.detected_coefficients(
            physics.outcome_coefficients(model, velocity, 12e3), model.confusion)
        return physics.fringe_figures(detected)

    rescaled, fixed = figures(), figures(zone_power_velocity_m_per_s=500.0)
    p = math.sin(0.5 * (math.pi / 2) * 500.0 / velocity) ** 2
    assert fixed["contrast_empty"] == pytest.approx(4 * p * (1 - p), abs=1e-12)
    assert rescaled["contrast_empty"] == pytest.approx(1.0, abs=1e-12)
    assert fixed["contrast_one_photon"] == pytest.approx(
        4 * p * (1 - p) * rescaled["contrast_one_photon"], abs=1e-12)
    at_set = figures(zone_power_velocity_m_per_s=velocity)
    for key in rescaled:
        assert at_set[key] == pytest.approx(rescaled[key], abs=1e-12)


def test_velocity_spread_washes_out_fringe_as_stated():
    """A Gaussian spread cuts the empty contrast by exp(-(2 pi Delta_R L sigma_v / v^2)^2 / 2)."""
    # Source: docs/physics.md section 3 (average of the fringe over a Gaussian, to first order in
    # sigma_v / v); the zone-area change across the spread (0.4 %) is of second order.
    model = physics.AtomCavityModel(
        coupling_hz=COUPLING_HZ, waist_m=WAIST_M, cavity_frequency_hz=48.6e9, temperature_k=0.0,
        damping_time_s=1.0, one_photon_probability=1.0, preparation_to_cavity_m=0.0,
        velocity_bias_m_per_s=0.0, velocity_spread_m_per_s=2.0, ramsey_detuning_hz=200e3,
        zone_separation_m=0.05, velocity_nodes=31,
    )
    velocity = 500.0
    width = 2 * math.pi * 200e3 * 0.05 * 2.0 / velocity**2
    detected = physics.detected_coefficients(physics.outcome_coefficients(model, velocity, 0.0),
                                             model.confusion)
    contrast = physics.fringe_figures(detected)["contrast_empty"]
    assert contrast == pytest.approx(math.exp(-(width**2) / 2), rel=0.01)


def test_velocity_nodes_reproduce_gaussian_moments():
    """Gauss-Hermite nodes reproduce the mean, variance and fourth moment of the Gaussian."""
    # Source: Gaussian moments (common practice): E[x-m]^2 = s^2, E[x-m]^4 = 3 s^4.
    v, w = physics.velocity_nodes(500.0, 3.0, 9)
    assert w.sum() == pytest.approx(1.0, abs=1e-14)
    assert w @ v == pytest.approx(500.0, abs=1e-10)
    assert w @ (v - 500.0) ** 2 == pytest.approx(9.0, rel=1e-10)
    assert w @ (v - 500.0) ** 4 == pytest.approx(3 * 81.0, rel=1e-10)


@pytest.mark.parametrize("frequency_hz, temperature_k, expected",
                         [(51.1e9, 0.8, 0.04891), (48.6e9, 0.7, 0.03704)])
def test_thermal_photon_number_worked_values(frequency_hz, temperature_k, expected):
    """n_th matches the worked values of docs/physics.md section 5 and Bose-Einstein with CODATA."""
    # Source: docs/physics.md section 5 worked values (CODATA 2022 via scipy.constants); the
    # Bose-Einstein law written out here with scipy.constants.
    got = physics.thermal_photon_number(frequency_hz, temperature_k)
    assert got == pytest.approx(expected, abs=5e-6)
    x = scipy.constants.h * frequency_hz / (scipy.constants.k * temperature_k)
    assert got == pytest.approx(1.0 / (math.exp(x) - 1.0), rel=1e-12)


def test_the_rigs_planck_and_boltzmann_constants_are_the_si_exact_values():
    """The rig writes h and k out (no scipy.constants import at start-up): they are the SI's
    exact values, which scipy.constants carries (CODATA 2018 onwards)."""
    # Source: scipy.constants; BIPM, The International System of Units, 9th ed. (2019), table 1.
    assert physics.PLANCK_J_S == scipy.constants.h == 6.62607015e-34
    assert physics.BOLTZMANN_J_PER_K == scipy.constants.k == 1.380649e-23


def test_thermal_photon_number_at_zero_temperature_is_zero():
    """At 0 K the mode holds no thermal photon (and no overflow warning is raised)."""
    # Source: Bose-Einstein law, limit T -> 0 (common practice).
    assert physics.thermal_photon_number(48.6e9, 0.0) == 0.0


def test_thermal_distribution_is_geometric_with_right_mean():
    """The thermal distribution is Bose-Einstein: p_{n+1}/p_n = m/(1+m) and mean m."""
    # Source: thermal (geometric) photon statistics, common practice.
    mean = 0.3
    p = physics.thermal_distribution(mean, 40)
    np.testing.assert_allclose(p[1:] / p[:-1], mean / (1 + mean), rtol=1e-12)
    assert p @ np.arange(41) == pytest.approx(mean, rel=1e-6)


def test_one_photon_decays_with_damping_time_at_zero_temperature():
    """At 0 K the one-photon population decays as p1 exp(-t / T_c) and feeds the vacuum."""
    # Source: energy damping of a mode at zero temperature (common practice).
    delays = np.array([0.0, 1e-3, 10e-3, 50e-3])
    p = physics.one_photon_distribution(0.88, 0.0, 4, delays, 25e-3)
    np.testing.assert_allclose(p[:, 1], 0.88 * np.exp(-delays / 25e-3), rtol=1e-12)
    np.testing.assert_allclose(p[:, 0], 1 - 0.88 * np.exp(-delays / 25e-3), rtol=1e-12)


def test_one_photon_relaxes_to_thermal_equilibrium():
    """After many damping times the prepared field is the thermal field, and mean numbers relax."""
    # Source: damped mode at temperature T: <n>(t) = n_th + (<n>(0) - n_th) exp(-t/T_c)
    # (common practice).
    n_th = 0.2
    delays = np.array([0.0, 0.01, 0.03, 2.0])
    p = physics.one_photon_distribution(0.88, n_th, 12, delays, 25e-3)
    mean = p @ np.arange(13)
    start = 0.88 + n_th
    np.testing.assert_allclose(mean, n_th + (start - n_th) * np.exp(-delays / 25e-3), rtol=1e-6)
    np.testing.assert_allclose(p[-1], physics.thermal_distribution(n_th, 12), atol=1e-9)


def test_confusion_matrix_columns_are_distributions():
    """The confusion matrix moves the stated fractions and keeps each column a distribution."""
    # Source: definition of a detector confusion matrix (common practice).
    m = physics.confusion_matrix(g_read_as_i=0.04, i_read_as_g=0.03, e_read_as_g=0.02)
    np.testing.assert_allclose(m.sum(axis=0), 1.0)
    np.testing.assert_allclose(m @ [0.0, 1.0, 0.0], [0.0, 0.96, 0.04])
    np.testing.assert_allclose(m @ [1.0, 0.0, 0.0], [0.98, 0.02, 0.0])


def test_fringe_figures_match_contract_definitions():
    """Inversion is the maximum over phi of the fringe difference; phase shift, contrast as defined."""
    # Source: docs/physics.md section 5 definitions, checked by brute force over a dense phase grid.
    rng = np.random.default_rng(SEED)
    detected = np.zeros((2, 3, 3))
    detected[:, 1, :] = rng.uniform(-0.2, 0.2, (2, 3)) + [0.5, 0.0, 0.0]
    figures = physics.fringe_figures(detected)
    phi = np.linspace(0, 2 * math.pi, 200001)
    rows = np.stack([np.ones_like(phi), np.cos(phi), np.sin(phi)])
    difference = detected[1, 1] @ rows - detected[0, 1] @ rows
    assert figures["inversion"] == pytest.approx(difference.max(), abs=1e-9)
    peaks = [phi[np.argmax(detected[f, 1] @ rows)] for f in (0, 1)]
    assert figures["phase_shift"] == pytest.approx((peaks[1] - peaks[0]) % (2 * math.pi), abs=1e-4)
    assert figures["contrast_empty"] == pytest.approx(np.ptp(detected[0, 1] @ rows), abs=1e-9)


def test_stark_law_matches_hydrogenic_quadratic_shift():
    """-250 kHz per (V/cm)^2: 1.5 -> 2.0 V/cm shifts the detuning by -437.5 kHz, and back."""
    # Source: quadratic Stark shift coefficient of docs/physics.md section 4 (Gallagher, Rydberg
    # Atoms, 1994; our own evaluation); arithmetic by hand: -250e3 * (2.0^2 - 1.5^2).
    kw = {"coefficient_hz_m2_per_v2": -25.0, "bias_field_v_per_m": 150.0}
    assert physics.stark_detuning(200.0, **kw) == pytest.approx(-437.5e3, rel=1e-12)
    assert physics.stark_field_for_detuning(-437.5e3, **kw) == pytest.approx(200.0, rel=1e-12)
    assert physics.stark_field_for_detuning(0.0, **kw) == pytest.approx(150.0, rel=1e-12)


def test_stark_law_refuses_unreachable_detuning():
    """A detuning that would need a negative squared field is refused with a clear message."""
    # Source: E^2 >= 0 for the quadratic law of docs/physics.md section 4.
    with pytest.raises(ValueError, match="detuning_hz"):
        physics.stark_field_for_detuning(1e6, coefficient_hz_m2_per_v2=-25.0, bias_field_v_per_m=150.0)


# --------------------------------------------------------------------------- other mode profiles

# Each profile written out here by hand, independently of drivers_sim.physics.ModeProfile:
# f(x) for x = v t / w, with the waists of the asymmetric mode w (1 - a) before and w (1 + a)
# after the centre. The windows of the reference are wider than the model's (truncation tested).
def _super_gaussian(order):
    return lambda x: math.exp(-abs(x) ** order)


def _asymmetric(asymmetry):
    return lambda x: math.exp(-((x / (1.0 - asymmetry if x < 0 else 1.0 + asymmetry)) ** 2))


PROFILES = [
    pytest.param(physics.ModeProfile("super_gaussian", order=2.5), _super_gaussian(2.5),
                 (-4.5, 4.5), id="super_gaussian-2.5"),
    pytest.param(physics.ModeProfile("super_gaussian", order=4.0), _super_gaussian(4.0),
                 (-3.0, 3.0), id="super_gaussian-4"),
    pytest.param(physics.ModeProfile("super_gaussian", order=7.0), _super_gaussian(7.0),
                 (-2.5, 2.5), id="super_gaussian-7"),
    pytest.param(physics.ModeProfile("super_gaussian", order=10.0), _super_gaussian(10.0),
                 (-2.0, 2.0), id="super_gaussian-10"),
    pytest.param(physics.ModeProfile("asymmetric", asymmetry=0.3), _asymmetric(0.3),
                 (-6 * 0.7, 6 * 1.3), id="asymmetric+0.3"),
    pytest.param(physics.ModeProfile("asymmetric", asymmetry=-0.5), _asymmetric(-0.5),
                 (-6 * 1.5, 6 * 0.5), id="asymmetric-0.5"),
    pytest.param(physics.ModeProfile("asymmetric", asymmetry=0.5), _asymmetric(0.5),
                 (-6 * 0.5, 6 * 1.5), id="asymmetric+0.5"),
]


def _area_by_quad(envelope):
    """Integral of f over the whole line, split at the centre where f may have a kink."""
    # Reference: scipy.integrate.quad (QUADPACK) on each half-line.
    left, _ = scipy.integrate.quad(envelope, -np.inf, 0.0, epsabs=1e-13, epsrel=1e-13)
    right, _ = scipy.integrate.quad(envelope, 0.0, np.inf, epsabs=1e-13, epsrel=1e-13)
    return left + right


@pytest.mark.parametrize("profile, envelope, window", PROFILES)
def test_profile_envelope_and_area_match_their_definitions(profile, envelope, window):
    """Each profile's f(x) is its stated formula, with f(0) = 1, and its area is the quad integral."""
    # Reference: the formulas written out above; scipy.integrate.quad for the area, which for the
    # super-Gaussian is 2 Gamma(1 + 1/p) (integral of exp(-|x|^p), from memory).
    x = np.linspace(*window, 101)
    np.testing.assert_allclose(profile.envelope(x), [envelope(xi) for xi in x], rtol=1e-13,
                               atol=1e-15)
    assert profile.envelope(0.0) == 1.0
    assert profile.area == pytest.approx(_area_by_quad(envelope), rel=1e-10)
    if profile.kind == "super_gaussian":
        assert profile.area == pytest.approx(2 * math.gamma(1 + 1 / profile.order), rel=1e-14)


@pytest.mark.parametrize("profile, envelope, window", PROFILES)
def test_resonant_crossing_follows_pulse_area_for_any_profile(profile, envelope, window):
    """At zero detuning a_g = cos(A/2), a_e = -i sin(A/2), A = integral of Omega dt by quad."""
    # Source: pulse-area result for a resonant two-level system and any real pulse shape
    # (Allen & Eberly, Optical Resonance and Two-Level Atoms, 1975; docs/physics.md section 2), with
    # A = Omega_0 sqrt(n) (w / v) * integral of f(x) dx computed by scipy.integrate.quad.
    velocity = np.linspace(250.0, 900.0, 27)[:, None]
    photons = np.arange(1, 5)[None, :]
    area = 2 * math.pi * COUPLING_HZ * np.sqrt(photons) * WAIST_M / velocity * _area_by_quad(envelope)
    a_g, a_e = physics.crossing_amplitudes(velocity, 0.0, photons, profile=profile, **MODE)
    np.testing.assert_allclose(a_g, np.cos(area / 2), atol=1e-6)
    np.testing.assert_allclose(a_e, -1j * np.sin(area / 2), atol=1e-6)
    np.testing.assert_allclose(physics.pulse_area(velocity, photons=photons, profile=profile, **MODE),
                               area, rtol=1e-9)


@pytest.mark.parametrize("profile, envelope, window", PROFILES)
def test_two_pi_velocity_of_any_profile_flips_sign(profile, envelope, window):
    """At the profile's v_2pi (area 2 pi by quad) one photon gives a_g = -1, a_e = 0."""
    # Source: common practice (a 2 pi rotation flips the amplitude's sign); the pulse-area
    # result (Allen & Eberly 1975) with the area by scipy.integrate.quad.
    v_2pi = physics.two_pi_velocity(profile=profile, **MODE)
    assert v_2pi == pytest.approx(COUPLING_HZ * WAIST_M * _area_by_quad(envelope), rel=1e-10)
    a_g, a_e = physics.crossing_amplitudes(v_2pi, 0.0, 1, profile=profile, **MODE)
    assert abs(a_g - (-1.0)) < 1e-6
    assert abs(a_e) < 1e-6


def _profile_points():
    rng = np.random.default_rng(SEED + 1)
    points = [(float(v), float(d), int(n)) for v, d, n in zip(
        rng.uniform(300.0, 700.0, 3), rng.uniform(-150e3, 150e3, 3), rng.integers(1, 5, 3))]
    # A resonant point near the 2 pi velocity, and a detuned one there (the working region).
    return points + [(505.0, 0.0, 1), (505.0, 10e3, 1)]


@pytest.mark.parametrize("profile, envelope, window", PROFILES)
def test_profile_crossing_matches_qutip_sesolve(profile, envelope, window):
    """Every profile's amplitudes agree with qutip's sesolve on the same envelope to 1e-6, detuned and resonant."""
    # Reference: qutip 5 sesolve on atom x Fock space with the envelope written out above, over a
    # wider window, tight tolerances; both pictures with the time origin at the mode centre.
    for velocity, detuning_hz, photons in _profile_points():
        ref_g, ref_e = qutip_crossing(velocity, detuning_hz, photons, envelope=envelope,
                                      window=window)
        a_g, a_e = physics.crossing_amplitudes(velocity, detuning_hz, photons, profile=profile,
                                               **MODE)
        assert abs(a_g - ref_g) < 1e-6, (velocity, detuning_hz, photons)
        assert abs(a_e - ref_e) < 1e-6, (velocity, detuning_hz, photons)


def test_profiles_vectorise_over_velocity_and_detuning():
    """One array call of a non-Gaussian profile equals qutip point by point, broadcasting (v, delta, n)."""
    # Reference: qutip sesolve at each grid point with the super-Gaussian written out above.
    profile = physics.ModeProfile("super_gaussian", order=5.0)
    velocity = np.array([350.0, 620.0])[:, None, None]
    detuning = np.array([-40e3, 25e3])[None, :, None]
    photons = np.array([1, 3])[None, None, :]
    a_g, a_e = physics.crossing_amplitudes(velocity, detuning, photons, profile=profile, **MODE)
    assert a_g.shape == (2, 2, 2)
    for i, j, k in np.ndindex(2, 2, 2):
        ref_g, ref_e = qutip_crossing(velocity[i, 0, 0], detuning[0, j, 0], photons[0, 0, k],
                                      envelope=_super_gaussian(5.0), window=(-2.6, 2.6))
        assert abs(a_g[i, j, k] - ref_g) < 1e-6 and abs(a_e[i, j, k] - ref_e) < 1e-6


def test_asymmetric_mode_turns_the_detuned_phase_differently():
    """With detuning, the asymmetric mode's one-photon phase differs from the Gaussian's of equal area."""
    # Reference: qutip sesolve for both envelopes (equal pulse area, so equal at resonance by
    # the pulse-area result; the detuned phase depends on the shape, docs/physics.md section 2).
    v_2pi = physics.two_pi_velocity(**MODE)
    gaussian, _ = qutip_crossing(v_2pi, 10e3, 1)
    skewed, _ = qutip_crossing(v_2pi, 10e3, 1, envelope=_asymmetric(0.4), window=(-3.6, 8.4))
    a_g, _ = physics.crossing_amplitudes(
        v_2pi, 10e3, 1, profile=physics.ModeProfile("asymmetric", asymmetry=0.4), **MODE)
    assert abs(a_g - skewed) < 1e-6
    assert abs(np.angle(skewed) - np.angle(gaussian)) > 0.01


@pytest.mark.parametrize("kind, changes", [
    ("super_gaussian", {"order": 1.5}), ("super_gaussian", {"order": 11.0}),
    ("asymmetric", {"asymmetry": 0.6}), ("cosine", {}),
])
def test_mode_profile_refuses_parameters_outside_the_checked_range(kind, changes):
    """A profile outside the range the solver is checked for is refused, naming the parameter."""
    # Source: the ranges checked against qutip above (DEVELOPERS.md habit 5: say what was expected).
    with pytest.raises(ValueError, match="expected"):
        physics.ModeProfile(kind, **changes)
