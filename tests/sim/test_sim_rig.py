"""drivers_sim.rig: counts, truth, drift, limits and the operations of the README's wire protocol."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from drivers_sim import physics
from drivers_sim.rig import RigInterlock, SetpointError, SimulatedRig

from .reference import COUPLING_HZ, SEED, WAIST_M, perturbed

# Fixed seeds and a small false-alarm rate: a statistical check can only flip when code changes.
ALPHA = 1e-3
V_2PI = physics.two_pi_velocity(coupling_hz=COUPLING_HZ, waist_m=WAIST_M)


#: The tests that read the module-scoped fixture run on one worker (pytest-xdist's
#: loadgroup), so that it is built once; the others go to any worker.
_SHARES_FIXTURE = pytest.mark.xdist_group("test_sim_rig")


@pytest.fixture(scope="module")
def still_config(demo_config):
    """The demo rig with the cavity drift switched off (probabilities constant in time)."""
    return perturbed(demo_config, drift={"ramp_hz_per_s": 0.0, "random_walk_hz_per_sqrt_s": 0.0})


@pytest.fixture(scope="module")
def demo_truth(demo_config):
    """Truth of a fresh demo rig (computed once: the best-set-point search takes about a second)."""
    return SimulatedRig(demo_config, SEED).truth()


def _walk(rig, target):
    """Apply set-points in steps no larger than max_step."""
    limits = rig.describe()["setpoints"]
    while True:
        now = rig.status()["setpoints"]
        step = {}
        for name, value in target.items():
            delta = value - now[name]
            bound = limits[name]["max_step"]
            step[name] = now[name] + max(-bound, min(bound, delta))
        rig.apply(step)
        if all(rig.status()["setpoints"][k] == v for k, v in target.items()):
            return


# ---------------------------------------------------------------------------------- counts


@_SHARES_FIXTURE
@pytest.mark.parametrize("field, phase", [("empty", 0.0), ("empty", 2.2), ("one_photon", 0.0),
                                          ("one_photon", 4.0)])
def test_counts_follow_noiseless_probabilities(still_config, field, phase):
    """Aggregated counts pass chi-square and exact Poisson tests against the rig's own truth."""
    # Reference: scipy.stats.chisquare (multinomial split given the total), an exact two-sided
    # Poisson test of the total, and a chi-square dispersion test of each outcome (Poisson
    # thinning: counts are independent Poisson(shots mu eta p_x)).
    rig = SimulatedRig(still_config, SEED)
    rig.apply({"velocity": 510.0, "detuning": 2e3})
    truth = rig.truth()
    row = np.array([1.0, math.cos(phase), math.sin(phase)])
    p = np.array([np.array(truth["fringes"][field][x]) @ row for x in "egi"])
    runs, shots = 120, 2000
    counts = np.array([[rig.acquire(field, phase, shots)["counts"][x] for x in "egi"]
                       for _ in range(runs)])
    rate = shots * still_config.rig.atoms_per_sample * still_config.detection.efficiency
    total = counts.sum()
    keep = p > 0
    assert scipy.stats.chisquare(counts.sum(axis=0)[keep], total * p[keep]).pvalue > ALPHA
    mean_total = runs * rate
    poisson_p = 2 * min(scipy.stats.poisson.cdf(total, mean_total),
                        scipy.stats.poisson.sf(total - 1, mean_total))
    assert poisson_p > ALPHA
    for k in np.flatnonzero(p * rate > 5):
        dispersion = ((counts[:, k] - rate * p[k]) ** 2 / (rate * p[k])).sum()
        tail = scipy.stats.chi2.sf(dispersion, runs)
        assert ALPHA / 2 < tail < 1 - ALPHA / 2


def test_same_seed_same_counts_and_different_seed_different_counts(demo_config):
    """Two rigs with one seed and one call sequence give identical counts; another seed does not."""
    # Source: the README's wire protocol / DEVELOPERS.md habit 10 (reproducible from the seed).
    def run(seed):
        rig = SimulatedRig(demo_config, seed)
        rig.apply({"velocity": 520.0})
        out = [rig.acquire("one_photon", 0.5 * k, 500)["counts"] for k in range(6)]
        rig.advance(100.0)
        out.append(rig.acquire("empty", 1.0, 500)["counts"])
        return out, rig.status()["clock"]

    assert run(SEED) == run(SEED)
    assert run(SEED)[0] != run(SEED + 1)[0]


def test_acquire_takes_shots_over_repetition_rate(demo_config):
    """An acquisition advances the clock by shots / repetition_rate and counts its shots."""
    # Source: docs/physics.md section 4 (time) and the README's wire protocol acquire result.
    rig = SimulatedRig(demo_config, SEED)
    before = rig.status()["clock"]
    result = rig.acquire("empty", 0.0, 1500)
    assert result["t_start"] == before
    assert result["t_end"] - result["t_start"] == pytest.approx(1500 / 150.0)
    assert rig.status()["shots_total"] == 1500
    assert result["setpoints"] == rig.status()["setpoints"]


@pytest.mark.parametrize("args, key", [(("full", 0.0, 10), "field"), (("empty", math.nan, 10), "ramsey_phase"),
                                       (("empty", 0.0, 0), "shots"), (("empty", 0.0, 2.5), "shots"),
                                       (("empty", 0.0, True), "shots"), (("empty", 0.0, 10**9), "shots")])
def test_acquire_refuses_bad_arguments(demo_config, args, key):
    """A bad field, phase or shot count is a ValueError naming the argument."""
    # Source: the README's wire protocol (fields, shots an int) and README, Configuration (errors name what was wrong).
    rig = SimulatedRig(demo_config, SEED)
    with pytest.raises(ValueError, match=key):
        rig.acquire(*args)


# ---------------------------------------------------------------------------------- truth


def test_flawless_rig_inverts_fringe_at_two_pi_point(flawless_config):
    """Without flaws, at v_2pi and zero detuning the one-photon fringe is the empty one shifted by pi."""
    # Source: common practice (a 2 pi vacuum Rabi rotation flips the sign of the g amplitude,
    # so P_g(phi | one photon) = P_g(phi + pi | empty)); docs/physics.md sections 1 and 3.
    rig = SimulatedRig(flawless_config, SEED)
    truth = rig.truth({"velocity": V_2PI, "detuning": 0.0})
    empty, one = np.array(truth["fringes"]["empty"]["g"]), np.array(truth["fringes"]["one_photon"]["g"])
    np.testing.assert_allclose(one, empty * [1.0, -1.0, -1.0], atol=1e-6)
    assert truth["phase_shift"] == pytest.approx(math.pi, abs=1e-5)
    assert truth["inversion"] == pytest.approx(1.0, abs=1e-6)
    assert truth["absorption"] == pytest.approx(0.0, abs=1e-6)


def test_flawless_rig_best_is_two_pi_velocity_plus_bias(flawless_config):
    """With only a velocity bias, the best set-point is v_2pi minus the bias (509.7 m/s) at zero detuning."""
    # Source: docs/physics.md section 2 (2 pi condition) and section 6 (v_2pi = 503.7 m/s, bias -6 m/s).
    rig = SimulatedRig(perturbed(flawless_config, beam={"velocity_bias_m_per_s": -6.0}), SEED)
    best = rig.truth()["best"]
    assert best["setpoints"]["velocity"] == pytest.approx(509.7, abs=0.3)
    assert best["setpoints"]["detuning"] == pytest.approx(0.0, abs=100.0)
    assert best["inversion"] == pytest.approx(1.0, abs=1e-3)


@_SHARES_FIXTURE
def test_demo_best_is_near_bias_corrected_two_pi_point(demo_truth):
    """The demo's true optimum is a little above 509.7 m/s and at a true detuning near zero."""
    # Source: docs/physics.md sections 2 and 6. Two effects pull toward faster atoms: the two-photon
    # part of the field (a_g(2) gains from a smaller area) and the one-photon decay during the
    # flight (faster atoms arrive sooner); both are percent-level, so within 2 % of 509.7.
    best = demo_truth["best"]
    assert 509.7 <= best["setpoints"]["velocity"] <= 509.7 * 1.02
    assert demo_truth["hidden"]["best_true_detuning_hz"] == pytest.approx(0.0, abs=1e3)
    assert 0.5 < best["inversion"] < 1.0


@_SHARES_FIXTURE
@pytest.mark.parametrize("velocity", [350.0, 400.0])
def test_slow_atoms_on_detuned_ridge_are_worse(demo_config, demo_truth, velocity):
    """Slower atoms find their best inversion at a compensating detuning, and it is below the optimum."""
    # Source: docs/physics.md section 2 (the curved ridge of slower atoms with a compensating detuning).
    rig = SimulatedRig(demo_config, SEED)
    scan = [rig.truth({"velocity": velocity, "detuning": d}) for d in np.arange(-45e3, 45e3, 1e3)]
    top = max(scan, key=lambda t: t["inversion"])
    assert abs(top["hidden"]["true_detuning_hz"]) > 10e3
    assert top["inversion"] < demo_truth["best"]["inversion"] - 0.03


@_SHARES_FIXTURE
def test_truth_best_beats_a_dense_scan(demo_config, demo_truth):
    """No point of an independent dense scan around the optimum beats the reported best."""
    # Reference: brute-force evaluation on a 1 m/s x 250 Hz grid (the global maximum's basin).
    rig = SimulatedRig(demo_config, SEED)
    best = demo_truth["best"]
    v0, d0 = best["setpoints"]["velocity"], best["setpoints"]["detuning"]
    values = [rig.truth({"velocity": v0 + dv, "detuning": d0 + dd})["inversion"]
              for dv in (-2.0, -1.0, 0.0, 1.0, 2.0) for dd in (-500.0, -250.0, 0.0, 250.0, 500.0)]
    assert max(values) <= best["inversion"] + 1e-7
    assert rig.truth(best["setpoints"])["inversion"] == pytest.approx(best["inversion"], abs=1e-9)


def test_night_of_ramp_drift_moves_best_detuning(demo_config):
    """Over 8 h of pure ramp the best detuning set-point moves by -ramp * 8 h / (1 + Stark error)."""
    # Source: the configured drift (4 kHz per hour, configs/sim-rig.toml) and Stark error.
    config = perturbed(demo_config, drift={"random_walk_hz_per_sqrt_s": 0.0})
    rig = SimulatedRig(config, SEED)
    before = rig.truth()["best"]
    rig.advance(8 * 3600.0)
    after = rig.truth()
    shift = -config.drift.ramp_hz_per_s * 8 * 3600.0 / (1 + config.stark.coefficient_error)
    assert shift == pytest.approx(-32e3 / 1.015, rel=1e-6)
    moved = after["best"]["setpoints"]["detuning"] - before["setpoints"]["detuning"]
    assert moved == pytest.approx(shift, abs=1.0)
    assert after["best"]["setpoints"]["velocity"] == pytest.approx(before["setpoints"]["velocity"], abs=1e-9)
    # The landscape only slides: the old optimum, shifted, is as good as before.
    shifted = {"velocity": before["setpoints"]["velocity"], "detuning": before["setpoints"]["detuning"] + shift}
    assert rig.truth(shifted)["inversion"] == pytest.approx(before["inversion"], abs=1e-9)


def test_random_walk_spread_grows_as_square_root_of_time(demo_config):
    """Without ramp the offset after time t has standard deviation sigma sqrt(t)."""
    # Reference: Wiener process variance sigma^2 t (common practice), chi-square test of the
    # sample variance (scipy.stats.chi2) over seeded rigs.
    config = perturbed(demo_config, drift={"ramp_hz_per_s": 0.0})
    sigma = config.drift.random_walk_hz_per_sqrt_s
    offsets = []
    for seed in range(300):
        rig = SimulatedRig(config, seed)
        for _ in range(4):
            rig.advance(900.0)
        offsets.append(rig.thermal_step(0.0)["cavity_offset_hz"] - config.cavity.initial_offset_hz)
    statistic = np.sum(np.square(offsets)) / (sigma**2 * 3600.0)
    tail = scipy.stats.chi2.sf(statistic, len(offsets))
    assert ALPHA / 2 < tail < 1 - ALPHA / 2


@_SHARES_FIXTURE
def test_thermal_step_moves_offset_and_best(demo_config, demo_truth):
    """A 15 kHz thermal step moves the offset by 15 kHz and the best detuning set-point by -15 kHz/(1+err)."""
    # Source: docs/physics.md section 6 (15 kHz thermal step) and the Stark error of the config.
    rig = SimulatedRig(perturbed(demo_config, drift={"random_walk_hz_per_sqrt_s": 0.0,
                                                     "ramp_hz_per_s": 0.0}), SEED)
    before = rig.thermal_step(0.0)["cavity_offset_hz"]
    step = rig.thermal_step()
    assert step["cavity_offset_hz"] - before == pytest.approx(15e3)
    best = rig.truth()["best"]["setpoints"]["detuning"]
    assert best - demo_truth["best"]["setpoints"]["detuning"] == pytest.approx(-15e3 / 1.015, abs=1.0)


def test_stark_error_makes_applied_detuning_differ(demo_config):
    """The true detuning is (1 + Stark error) times the set-point plus the cavity offset."""
    # Source: quadratic Stark law of docs/physics.md section 4 with the configured hidden error.
    rig = SimulatedRig(demo_config, SEED)
    truth = rig.truth({"detuning": 40e3})
    hidden = truth["hidden"]
    assert hidden["true_detuning_hz"] == pytest.approx(40e3 * 1.015 + hidden["cavity_offset_hz"], rel=1e-9)
    # Field from delta = k (E^2 - E_b^2): E^2 = 150^2 + 40e3 / -25 (V/m)^2; voltage = E * 2 cm.
    assert hidden["electrode_voltage_v"] == pytest.approx(math.sqrt(150.0**2 - 1600.0) * 0.02, rel=1e-12)


def _stark_closed_form(setpoint_hz, *, error, field_error_v_per_m, k=-25.0, bias=150.0):
    """delta = k_true (E_seen^2 - E_bias^2), E_seen = E + field error, E from the nominal law."""
    # Source: quadratic Stark law of docs/physics.md section 4, delta/2pi = k (E^2 - E_bias^2),
    # written out by hand: the nominal law commands E = sqrt(E_bias^2 + set-point / k).
    field = math.sqrt(bias**2 + setpoint_hz / k)
    return k * (1.0 + error) * ((field + field_error_v_per_m) ** 2 - bias**2)


@pytest.mark.parametrize("error, field_error", [(-0.15, 0.0), (0.15, 0.0), (0.15, 1.5),
                                                (-0.12, -2.0)])
def test_large_hidden_stark_errors_hold_across_the_detuning_limits(demo_config, error, field_error):
    """With a 15 % coefficient error and a stray field the rig follows the closed-form Stark law
    from limit to limit, and its best set-point maps back to its best true detuning."""
    # Source: quadratic Stark law of docs/physics.md section 4 (closed form written out above).
    config = perturbed(demo_config, stark={"coefficient_error": error,
                                           "bias_field_error_v_per_m": field_error},
                       drift={"ramp_hz_per_s": 0.0, "random_walk_hz_per_sqrt_s": 0.0})
    rig = SimulatedRig(config, SEED)
    offset = config.cavity.initial_offset_hz
    limit = config.limits["detuning"]
    for setpoint in (limit.min, -60e3, 0.0, 25e3, limit.max):
        _walk(rig, {"detuning": setpoint})
        counts = rig.acquire("one_photon", 0.0, 1000)["counts"]
        assert sum(counts.values()) > 0
        hidden = rig.truth()["hidden"]
        expected = _stark_closed_form(setpoint, error=error, field_error_v_per_m=field_error)
        assert hidden["true_detuning_hz"] == pytest.approx(expected + offset, rel=1e-12, abs=1e-6)
        assert hidden["stark_bias_field_error_v_per_m"] == field_error
    truth = rig.truth()
    best = truth["best"]["setpoints"]
    assert limit.min <= best["detuning"] <= limit.max
    at_best = rig.truth(best)["hidden"]["true_detuning_hz"]
    assert at_best == pytest.approx(truth["hidden"]["best_true_detuning_hz"], abs=1e-6)


def test_stray_field_alone_shifts_the_zero_set_point(demo_config):
    """A stray field e moves set-point 0 to the true detuning k (1 + err)((E_b + e)^2 - E_b^2)."""
    # Source: quadratic Stark law of docs/physics.md section 4; arithmetic by hand for e = 1 V/m:
    # -25 * 1.015 * (151^2 - 150^2) = -25 * 1.015 * 301 = -7637.875 Hz.
    config = perturbed(demo_config, stark={"bias_field_error_v_per_m": 1.0})
    rig = SimulatedRig(config, SEED)
    hidden = rig.truth({"detuning": 0.0})["hidden"]
    assert hidden["true_detuning_hz"] - hidden["cavity_offset_hz"] == pytest.approx(-7637.875,
                                                                                   rel=1e-12)


@pytest.mark.parametrize("cavity, area", [
    ({"mode_profile": "super_gaussian", "super_gaussian_order": 4.0}, 2 * math.gamma(1.25)),
    ({"mode_profile": "asymmetric", "waist_asymmetry": 0.3}, math.sqrt(math.pi)),
])
def test_rig_with_another_mode_profile_peaks_at_its_own_two_pi_velocity(demo_config, cavity, area):
    """The truth's best velocity follows the profile's own 2 pi velocity, Omega_0 w S / (2 pi) - bias."""
    # Source: pulse-area result (Allen & Eberly 1975): area 2 pi at v = coupling_hz * w * S with
    # S = integral of f (2 Gamma(1 + 1/p) for exp(-|x|^p), sqrt(pi) for two half-Gaussians of
    # mean waist w; from memory). The 2 % margin above it is that of the demo test above.
    config = perturbed(demo_config, cavity=cavity)
    truth = SimulatedRig(config, SEED).truth()
    v_2pi = COUPLING_HZ * WAIST_M * area - config.beam.velocity_bias_m_per_s
    assert v_2pi <= truth["best"]["setpoints"]["velocity"] <= v_2pi * 1.02
    assert truth["hidden"]["mode_profile"]["kind"] == cavity["mode_profile"]


def test_rig_whose_zones_were_set_below_the_best_velocity_peaks_lower_and_lower(demo_config,
                                                                               demo_truth):
    """Zones set once at 460 m/s, below the demo's best: the truth's best inversion falls (both
    fringes lose sin^2 theta away from 460 m/s) and its best velocity moves towards 460 m/s."""
    # Source: docs/physics.md section 3 (the contrast of two equal pulses of area theta is sin^2
    # theta; the area scales as 1 / v at fixed power, common practice).
    config = perturbed(demo_config, ramsey={"power_set_velocity_m_per_s": 460.0})
    truth = SimulatedRig(config, SEED).truth()
    assert truth["best"]["inversion"] < demo_truth["best"]["inversion"]
    assert truth["best"]["setpoints"]["velocity"] < demo_truth["best"]["setpoints"]["velocity"]


# ---------------------------------------------------------------------------------- limits


def test_out_of_range_setpoint_is_refused_naming_limit(demo_config):
    """A velocity above max is refused naming the set-point, the limit and the value; nothing moves."""
    # Source: the README's wire protocol limits and docs/physics.md section 7 (never outside the configured limits).
    rig = SimulatedRig(demo_config, SEED)
    _walk(rig, {"velocity": 700.0})
    before = rig.status()
    with pytest.raises(SetpointError, match=r"velocity.*max 700.*701"):
        rig.apply({"velocity": 701.0, "detuning": 1e3})
    assert rig.status()["setpoints"] == before["setpoints"]


def test_too_large_step_is_refused_naming_max_step(demo_config):
    """A detuning step above max_step is refused naming max_step and the value."""
    # Source: docs/physics.md section 7 (bounded steps) and the configured max_step of 20 kHz.
    rig = SimulatedRig(demo_config, SEED)
    with pytest.raises(SetpointError, match=r"detuning.*max_step 20000.*25000"):
        rig.apply({"detuning": 25e3})
    assert rig.apply({"detuning": 20e3})["setpoints"]["detuning"] == 20e3


@pytest.mark.parametrize("setpoints, fragment", [({"power": 1.0}, "power"),
                                                 ({"velocity": math.inf}, "velocity"),
                                                 ({"detuning": "5"}, "detuning"),
                                                 ({"velocity": True}, "velocity")])
def test_bad_setpoint_is_refused(demo_config, setpoints, fragment):
    """Unknown names and non-numbers are refused as SetpointError naming the set-point."""
    # Source: the README's wire protocol set-point names; README, Configuration (errors name the key, expected and got).
    rig = SimulatedRig(demo_config, SEED)
    with pytest.raises(SetpointError, match=fragment):
        rig.apply(setpoints)


def test_safe_returns_to_safe_setpoints_even_under_interlock(demo_config):
    """safe applies the configured safe set-points regardless of steps and interlock."""
    # Source: docs/physics.md section 7 (return to safe set-points on abort) and configs/sim-rig.toml.
    rig = SimulatedRig(demo_config, SEED)
    _walk(rig, {"velocity": 620.0, "detuning": -60e3})
    rig.set_interlock("door open")
    assert rig.safe() == {"setpoints": {"velocity": 500.0, "detuning": 0.0}}


def test_interlock_refuses_apply_and_acquire_until_cleared(demo_config):
    """While the interlock is set apply and acquire raise RigInterlock with the reason; status shows it."""
    # Source: the README's wire protocol (error kind interlock; status.interlock null or str).
    rig = SimulatedRig(demo_config, SEED)
    rig.set_interlock("cryostat warm")
    with pytest.raises(RigInterlock, match="cryostat warm"):
        rig.apply({"velocity": 510.0})
    with pytest.raises(RigInterlock, match="cryostat warm"):
        rig.acquire("empty", 0.0, 10)
    assert rig.status()["interlock"] == "cryostat warm"
    rig.set_interlock(None)
    assert rig.apply({"velocity": 510.0})["setpoints"]["velocity"] == 510.0


# ---------------------------------------------------------------------------------- contract


def test_describe_follows_contract(demo_config):
    """describe carries the contract's keys with the configured limits and rate."""
    # Source: the README's wire protocol describe result; configs/sim-rig.toml values.
    description = SimulatedRig(demo_config, SEED).describe()
    assert description["rig"] == "bench-2-sim"
    assert description["proto"] == 1 and description["simulated"] is True
    assert description["fields"] == ["empty", "one_photon"]
    assert description["repetition_rate_hz"] == 150.0
    assert description["setpoints"]["velocity"] == {"unit": "m/s", "min": 300.0, "max": 700.0, "max_step": 40.0}
    assert description["setpoints"]["detuning"] == {"unit": "Hz", "min": -150e3, "max": 150e3, "max_step": 20e3}
    assert description["safe_setpoints"] == {"velocity": 500.0, "detuning": 0.0}


@_SHARES_FIXTURE
def test_truth_follows_contract(demo_truth):
    """truth carries the contract's keys, three coefficients per outcome, phase shift in [0, 2 pi)."""
    # Source: the README's wire protocol truth result.
    assert set(demo_truth) == {"setpoints", "clock", "fringes", "inversion", "phase_shift", "contrast",
                               "absorption", "best", "hidden"}
    for field in ("empty", "one_photon"):
        assert set(demo_truth["fringes"][field]) == {"e", "g", "i"}
        sums = np.sum([demo_truth["fringes"][field][x] for x in "egi"], axis=0)
        np.testing.assert_allclose(sums, [1.0, 0.0, 0.0], atol=1e-9)
    assert 0.0 <= demo_truth["phase_shift"] < 2 * math.pi
    assert set(demo_truth["best"]["setpoints"]) == {"velocity", "detuning"}
