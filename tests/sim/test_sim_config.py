"""drivers_sim.config: the shipped scenario and the refusal of every bad value."""

from __future__ import annotations

import dataclasses
import math

import pytest

from drivers_sim.config import SimConfigError, load_sim_config, sim_config_from_dict

from .reference import DEMO_CONFIG


def test_shipped_scenario_matches_demo_values(demo_config):
    """configs/sim-rig.toml carries the Bench 2 design values."""
    # Source: docs/physics.md section 6 (invented demo scenario) and the task brief's limits.
    c = demo_config
    assert c.rig.name == "bench-2-sim"
    assert (c.cavity.frequency_hz, c.cavity.coupling_hz, c.cavity.waist_m) == (48.6e9, 49e3, 5.8e-3)
    assert (c.beam.velocity_spread_m_per_s, c.beam.velocity_bias_m_per_s) == (3.0, -6.0)
    assert (c.cavity.temperature_k, c.cavity.damping_time_s) == (0.7, 0.025)
    assert (c.field.one_photon_probability, c.detection.efficiency) == (0.88, 0.55)
    assert (c.detection.g_read_as_i, c.detection.i_read_as_g) == (0.04, 0.04)
    assert (c.rig.atoms_per_sample, c.rig.repetition_rate_hz) == (0.2, 150.0)
    assert c.drift.ramp_hz_per_s * 3600.0 == pytest.approx(4e3)
    assert c.drift.thermal_step_hz == 15e3
    # -250 kHz per (V/cm)^2 (docs/physics.md section 4); 1 (V/cm)^2 = 1e4 (V/m)^2.
    assert c.stark.coefficient_hz_m2_per_v2 * 100.0**2 == pytest.approx(-250e3)
    assert c.limits["velocity"].max_step == 40.0 and c.limits["detuning"].max_step == 20e3
    assert c.faults == {}


def test_every_key_of_shipped_file_has_unit_and_comment():
    """Every key line of the shipped TOML ends in a unit suffix or is dimensionless, with a comment."""
    # Source: the project's configuration rules (README, Configuration: unit in every key name,
    # one-line comment per key).
    units = ("_hz", "_m", "_s", "_k", "_rad", "_m_per_s", "_v_per_m", "_hz_per_s", "_hz_per_sqrt_s",
             "_hz_m2_per_v2")
    dimensionless = {"name", "default_seed", "atoms_per_sample", "max_shots_per_acquisition",
                     "one_photon_probability", "coefficient_error", "efficiency", "e_read_as_g",
                     "g_read_as_e", "g_read_as_i", "i_read_as_g", "velocity_nodes", "max_photons",
                     "crossing_steps", "stencil_points", "mode_profile", "super_gaussian_order",
                     "waist_asymmetry"}
    for line in DEMO_CONFIG.read_text(encoding="utf-8").splitlines():
        if "=" not in line or line.lstrip().startswith(("#", "[")):
            continue
        key = line.split("=")[0].strip()
        assert "#" in line.split("=", 1)[1], key
        assert key in dimensionless or key.endswith(units), key


def test_round_trip_through_dict_is_lossless(demo_config):
    """to_dict then sim_config_from_dict gives the same configuration."""
    # Source: task brief (dict building for tests and perturbation studies).
    again = sim_config_from_dict(demo_config.to_dict())
    assert dataclasses.replace(again, source=demo_config.source) == demo_config


def _data(demo_config):
    return demo_config.to_dict()


BAD_VALUES = [
    ("rig.name", ""),
    ("rig.default_seed", -1),
    ("rig.default_seed", 1.5),
    ("rig.repetition_rate_hz", 0.0),
    ("rig.repetition_rate_hz", "150"),
    ("rig.atoms_per_sample", -0.1),
    ("rig.settle_time_s", math.nan),
    ("rig.max_shots_per_acquisition", 0),
    ("rig.max_shots_per_acquisition", True),
    ("cavity.frequency_hz", math.inf),
    ("cavity.coupling_hz", 0.0),
    ("cavity.waist_m", -5.8e-3),
    ("cavity.damping_time_s", 0.0),
    ("cavity.temperature_k", -0.7),
    ("cavity.initial_offset_hz", math.nan),
    ("beam.velocity_spread_m_per_s", -3.0),
    ("beam.velocity_bias_m_per_s", [1.0]),
    ("beam.preparation_to_cavity_m", -0.5),
    ("field.one_photon_probability", 1.2),
    ("ramsey.detuning_hz", -math.inf),
    ("ramsey.zone_separation_m", -1.0),
    ("ramsey.area_at_set_velocity_rad", 7.0),
    ("ramsey.power_set_velocity_m_per_s", 0.0),
    ("ramsey.power_set_velocity_m_per_s", "500"),
    ("stark.coefficient_hz_m2_per_v2", 0.0),
    ("stark.coefficient_error", 0.9),
    ("stark.bias_field_v_per_m", 0.0),
    ("stark.bias_field_v_per_m", 10.0),
    ("stark.electrode_gap_m", 0.0),
    ("stark.bias_field_error_v_per_m", math.inf),
    ("stark.bias_field_error_v_per_m", "1 V/m"),
    ("stark.bias_field_error_v_per_m", 130.0),
    ("stark.bias_field_error_v_per_m", -130.0),
    ("cavity.mode_profile", "top_hat"),
    ("cavity.mode_profile", 2),
    ("cavity.super_gaussian_order", 4.0),
    ("cavity.waist_asymmetry", 0.2),
    ("detection.efficiency", 0.0),
    ("detection.g_read_as_i", 1.5),
    ("detection.i_read_as_g", -0.01),
    ("drift.random_walk_hz_per_sqrt_s", -1.0),
    ("drift.ramp_hz_per_s", "fast"),
    ("model.velocity_nodes", 0),
    ("model.crossing_steps", 2.0),
    ("model.stencil_points", 2),
    ("limits.velocity.min_m_per_s", 0.0),
    ("limits.velocity.max_m_per_s", 250.0),
    ("limits.velocity.max_step_m_per_s", 0.0),
    ("limits.velocity.safe_m_per_s", 800.0),
    ("limits.detuning.safe_hz", math.nan),
    ("limits.detuning.max_step_hz", -1.0),
]


def _set(data, dotted, value):
    *path, last = dotted.split(".")
    table = data
    for part in path:
        table = table[part]
    table[last] = value


@pytest.mark.parametrize("dotted, value", BAD_VALUES)
def test_bad_value_is_refused_naming_file_key_expected_got(demo_config, dotted, value):
    """Each bad value is a SimConfigError naming the file, a dotted key, what was expected and got."""
    # Source: DEVELOPERS.md habit 5 and README, Configuration (check input once; name key, expected, got).
    data = _data(demo_config)
    _set(data, dotted, value)
    with pytest.raises(SimConfigError) as caught:
        sim_config_from_dict(data, source="bench.toml")
    message = str(caught.value)
    assert message.startswith("bench.toml: ")
    assert "expected" in message and "got" in message
    assert f": {dotted}: " in message
    assert repr(value) in message or repr(float(value)) in message


@pytest.mark.parametrize("dotted", ["cavity.colour_hz", "rig.extra", "limits.velocity.min_hz",
                                    "limits.power", "calibration"])
def test_unknown_key_is_refused(demo_config, dotted):
    """An unknown key anywhere is refused, naming it."""
    # Source: task brief (unknown keys refused).
    data = _data(demo_config)
    if dotted.count(".") == 0:
        data[dotted] = {}
    else:
        _set(data, dotted, 1.0)
    with pytest.raises(SimConfigError, match=dotted.replace(".", r"\.") + ": expected one of the keys"):
        sim_config_from_dict(data)


def test_missing_key_is_refused(demo_config):
    """A missing required key is refused, naming it and 'nothing'."""
    # Source: README, Configuration (clear error naming what was wrong).
    data = _data(demo_config)
    del data["cavity"]["waist_m"]
    with pytest.raises(SimConfigError, match=r"cavity\.waist_m: expected .*got 'nothing'"):
        sim_config_from_dict(data)


def test_model_table_is_optional(demo_config):
    """Without [model] the numerical defaults apply."""
    # Source: drivers_sim.config documentation ([model] optional).
    data = _data(demo_config)
    del data["model"]
    assert sim_config_from_dict(data).model == demo_config.model


def test_faults_table_is_kept_unvalidated(demo_config):
    """The [faults] table is kept as a plain dict for the server to check."""
    # Source: task brief ([faults] reserved for the server, autotune/kit/server.py).
    data = _data(demo_config)
    data["faults"] = {"drop_reply_probability": 0.1, "anything": "kept"}
    assert sim_config_from_dict(data).faults == {"drop_reply_probability": 0.1, "anything": "kept"}


def test_unreadable_and_invalid_files_are_refused(tmp_path):
    """A missing file and a broken TOML file are SimConfigErrors naming the file."""
    # Source: README, Configuration (errors name the file).
    missing = tmp_path / "absent.toml"
    with pytest.raises(SimConfigError, match="absent.toml"):
        load_sim_config(missing)
    broken = tmp_path / "broken.toml"
    broken.write_text("[rig\nname = 1\n", encoding="utf-8")
    with pytest.raises(SimConfigError, match="broken.toml: <file>: expected valid TOML"):
        load_sim_config(broken)


def test_file_errors_name_the_file(tmp_path):
    """A bad value in a file names the file path and the dotted key."""
    # Source: README, Configuration (errors name file, key, expected, got).
    text = DEMO_CONFIG.read_text(encoding="utf-8").replace("waist_m = 5.8e-3", "waist_m = -5.8e-3")
    path = tmp_path / "sim.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(SimConfigError, match=r"sim\.toml: cavity\.waist_m: expected a finite number > 0"):
        load_sim_config(path)


@pytest.mark.parametrize("profile, key, value", [
    ("super_gaussian", "super_gaussian_order", 1.5),
    ("super_gaussian", "super_gaussian_order", 12.0),
    ("super_gaussian", "super_gaussian_order", math.nan),
    ("super_gaussian", "super_gaussian_order", "4"),
    ("asymmetric", "waist_asymmetry", 0.6),
    ("asymmetric", "waist_asymmetry", -0.7),
    ("asymmetric", "waist_asymmetry", None),
])
def test_bad_profile_parameter_is_refused(demo_config, profile, key, value):
    """A profile's parameter outside its checked range, or missing, names the key, expected, got."""
    # Source: DEVELOPERS.md habit 5 (check input once; name key, expected, got); the ranges are those
    # over which tests/sim/test_sim_physics.py checks the crossing against qutip.
    data = _data(demo_config)
    data["cavity"]["mode_profile"] = profile
    if value is not None:
        data["cavity"][key] = value
    with pytest.raises(SimConfigError) as caught:
        sim_config_from_dict(data, source="bench.toml")
    message = str(caught.value)
    assert message.startswith(f"bench.toml: cavity.{key}: expected ")
    assert (repr(value) if value is not None else "'nothing'") in message


@pytest.mark.parametrize("cavity", [
    {"mode_profile": "super_gaussian", "super_gaussian_order": 4.0},
    {"mode_profile": "asymmetric", "waist_asymmetry": -0.25},
    {"mode_profile": "gaussian"},
])
def test_profiles_round_trip_through_dict(demo_config, cavity):
    """Every mode profile with its parameter survives to_dict and back, and the file's keys only."""
    # Source: drivers_sim.config documentation (round trip for perturbation studies).
    data = _data(demo_config)
    data["cavity"].update(cavity)
    data["stark"]["bias_field_error_v_per_m"] = 0.8
    config = sim_config_from_dict(data)
    again = sim_config_from_dict(config.to_dict())
    assert again == config
    assert set(config.to_dict()["cavity"]) == set(demo_config.to_dict()["cavity"]) | set(cavity)


def test_defaults_of_the_new_keys_keep_the_demo(demo_config):
    """Without mode_profile and bias_field_error_v_per_m the rig is the Gaussian, error-free one."""
    # Source: docs/physics.md section 2 (the Gaussian mode is the demo's) and section 6.
    data = _data(demo_config)
    del data["cavity"]["mode_profile"]
    del data["stark"]["bias_field_error_v_per_m"]
    config = sim_config_from_dict(data)
    assert config.cavity.mode_profile == "gaussian" and config.cavity.profile.kind == "gaussian"
    assert config.stark.bias_field_error_v_per_m == 0.0
    assert dataclasses.replace(config, source=demo_config.source) == demo_config


def test_zones_power_set_at_one_velocity_is_optional_and_round_trips(demo_config):
    """Without ramsey.power_set_velocity_m_per_s (the shipped file) the power follows the set
    velocity and the key stays out of to_dict, so every stored configuration is unchanged; with it,
    the value survives to_dict and back."""
    # Source: drivers_sim.config documentation (optional keys left out of the file; round trip for
    # perturbation studies).
    assert demo_config.ramsey.power_set_velocity_m_per_s is None
    assert "power_set_velocity_m_per_s" not in demo_config.to_dict()["ramsey"]
    data = _data(demo_config)
    data["ramsey"]["power_set_velocity_m_per_s"] = 480.0
    config = sim_config_from_dict(data)
    assert config.ramsey.power_set_velocity_m_per_s == 480.0
    assert sim_config_from_dict(config.to_dict()) == config
