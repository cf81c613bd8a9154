"""Tests of autotune.config: checked TOML, errors that name file, key, expected and got."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import pytest

from autotune.config import config_from_dict, load_config, nominal_two_pi_velocity
from autotune.errors import ConfigError

CONFIGS = Path(__file__).resolve().parent.parent / "configs"


def _demo() -> dict:
    return tomllib.loads((CONFIGS / "calibrate.toml").read_text())


def test_shipped_configs_load() -> None:
    """Every shipped calibrate/dry-run file passes its own checks."""
    for name in ("calibrate.toml", "dry-run.toml"):
        config = load_config(CONFIGS / name)
        assert [sp.name for sp in config.setpoints][:2] == ["velocity", "detuning"]


def test_two_pi_velocity_of_the_demo() -> None:
    """v_2pi = Omega_0 w / (2 sqrt(pi)) gives 503.7 m/s for 49 kHz and 5.8 mm (docs/physics.md s.2, s.6)."""
    assert nominal_two_pi_velocity(49e3, 5.8e-3) == pytest.approx(503.7, abs=0.05)
    # Independent form: pulse area Omega_0 sqrt(pi) w / v equals 2 pi at that velocity.
    v = nominal_two_pi_velocity(49e3, 5.8e-3)
    assert 2 * math.pi * 49e3 * math.sqrt(math.pi) * 5.8e-3 / v == pytest.approx(2 * math.pi)


@pytest.mark.parametrize(
    ("section", "key", "value", "fragment"),
    [
        ("measurement", "shots_per_phase", 0, "measurement.shots_per_phase"),
        ("measurement", "shots_per_phase", 1.5, "an integer"),
        ("measurement", "ramsey_phases", 2, ">= 3"),
        ("bus", "timeout_s", -1.0, "bus.timeout_s"),
        ("bus", "endpoint", "localhost:5560", "ZeroMQ endpoint"),
        ("search", "strategy", "bayes", "one of phase_lock, bayesian, grid, coordinate, random"),
        ("nominal", "coupling_hz", "49 kHz", "a finite number"),
        ("acceptance", "min_inversion", 2.0, "<= 1"),
        ("acceptance", "on_reject", "home", "acceptance.on_reject: expected one of safe, verified"),
        ("acceptance", "max_shortfall", 0.0, "acceptance.max_shortfall: expected a finite number > 0 and <= 1"),
        ("acceptance", "max_shortfall", 1.5, "acceptance.max_shortfall: expected a finite number > 0 and <= 1"),
        ("track", "budget_fraction", 0.0, "track.budget_fraction: expected a finite number > 0"),
        ("track", "floor", 1.5, "track.floor: expected a finite number > 0 and <= 1"),
        ("track", "max_gain", 0.0, "track.max_gain"),
        ("track", "min_shots_per_phase", 2.5, "track.min_shots_per_phase: expected an integer"),
        ("track", "max_interval_s", 10.0, "track.max_interval_s: expected a finite number >= 60"),
        ("track", "on_stop", "home", "track.on_stop: expected one of safe, last_good"),
        ("track", "end_at_local_time", "7:30", 'track.end_at_local_time: expected a local time'),
        ("track", "end_at_local_time", "24:00", '"HH:MM"'),
        ("track", "max_rig_time_s", -1.0, "track.max_rig_time_s: expected a finite number >= 0"),
    ],
)
def test_bad_values_are_refused_with_key_expected_and_got(section: str, key: str, value: object,
                                                          fragment: str) -> None:
    """A wrong value raises ConfigError whose message names the key and what was expected."""
    data = _demo()
    data[section][key] = value
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, source="demo.toml")
    message = str(info.value)
    assert message.startswith("demo.toml: ")
    assert fragment in message
    assert repr(value) in message


def test_unknown_key_is_refused() -> None:
    """A misspelt key is an error, not a silent default."""
    data = _demo()
    data["measurement"]["shots_per_fase"] = 100
    with pytest.raises(ConfigError, match=r"measurement.shots_per_fase: expected one of the keys "
                                          r"\[.*'shots_per_phase'.*\], got 'an unknown key': "
                                          r"did you mean 'shots_per_phase'\?"):
        config_from_dict(data, source="demo.toml")


def test_search_box_outside_limits_is_refused() -> None:
    """The search box must lie within the configured limits."""
    data = _demo()
    data["setpoints"]["velocity"]["search_max"] = 800.0
    with pytest.raises(ConfigError, match="setpoints.velocity.search_max"):
        config_from_dict(data)


def test_missing_setpoint_table_is_refused() -> None:
    """Both velocity and detuning must be configured."""
    data = _demo()
    del data["setpoints"]["detuning"]
    with pytest.raises(ConfigError, match="setpoints.detuning"):
        config_from_dict(data)


def test_missing_file_and_bad_toml(tmp_path: Path) -> None:
    """A missing file or broken TOML is a ConfigError naming the file."""
    with pytest.raises(ConfigError, match="no such file"):
        load_config(tmp_path / "absent.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[bus\nendpoint = 1\n")
    with pytest.raises(ConfigError, match="valid TOML"):
        load_config(bad)


def test_relative_paths_resolve_against_the_file(tmp_path: Path) -> None:
    """The calibration store is relative to the config file's folder, not the working folder."""
    text = (CONFIGS / "calibrate.toml").read_text()
    path = tmp_path / "sub" / "c.toml"
    path.parent.mkdir()
    path.write_text(text)
    config = load_config(path)
    assert config.calibration_store == path.parent / "../calibration/last-good.json"


def test_track_table_is_optional_and_its_keys_related() -> None:
    """Without [track] the night's defaults apply (5 % budget, floor 0.97, safe on stop); a
    smallest correction not below the largest is refused naming both."""
    data = _demo()
    del data["track"]
    config = config_from_dict(data, source="demo.toml")
    assert (config.track.budget_fraction, config.track.floor, config.track.on_stop) == \
        (0.05, 0.97, "safe")
    data["track"] = {"min_correction_hz": 6000.0, "max_correction_hz": 5000.0}
    with pytest.raises(ConfigError, match="track.min_correction_hz: expected a value < "
                                          "track.max_correction_hz = 5000"):
        config_from_dict(data, source="demo.toml")
    data["track"] = {"end_at_local_time": "07:30"}
    assert config_from_dict(data, source="demo.toml").track.end_at_minutes == 450

