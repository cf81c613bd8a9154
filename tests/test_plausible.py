"""Tests of autotune.plausible and of the bounds each reader holds a file to: every range holds
the demo's values, refuses the same value typed in the unit a person slips into, and says which
unit that was; every number has an upper bound (issue 18 item 4, issue 23 item 6)."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import pytest

from autotune import plausible
from autotune.kit.channels import ChannelInfo, channel_map_from_table
from autotune.cli import main
from autotune.config import config_from_dict, load_config, nominal_two_pi_velocity
from autotune.kit.driver_config import load_driver_config
from autotune.errors import ConfigError
from drivers_sim.config import SimConfigError, load_sim_config, sim_config_from_dict

CONFIGS = Path(__file__).resolve().parent.parent / "configs"

# (range, a value the trade uses, the same value in the unit a person slips into, the hint).
# The in-range values are the demo scenario's (docs/physics.md section 6) unless said otherwise.
SLIPS = [
    # Vacuum Rabi frequency of circular Rydberg atoms in a microwave cavity: tens of kHz
    # (from memory); 49 kHz typed as 49.
    (plausible.COUPLING_HZ, 49e3, 49, "did you mean 49 kHz = 49000?"),
    # Mode waist: mm, about the wavelength (6.2 mm at 48.6 GHz, scipy.constants.c / f).
    (plausible.WAIST_M, 5.8e-3, 5.8, "did you mean 5.8 mm = 0.0058?"),
    # Thermal beam velocities: hundreds of m/s (sqrt(8kT/(pi m)), checked below).
    (plausible.VELOCITY_M_PER_S, 503.7, 0.5037, "did you mean 0.5037 km/s = 503.7?"),
    (plausible.VELOCITY_M_PER_S, 503.7, 503700.0, "did you mean 503700 mm/s = 503.7?"),
    (plausible.VELOCITY_STEP_M_PER_S, 40.0, 40000.0, "did you mean 40000 mm/s = 40?"),
    # A thermal step of the cavity: kHz to tens of kHz (the demo's 15 kHz).
    (plausible.THERMAL_STEP_HZ, 15e3, 15, "did you mean 15 kHz = 15000?"),
    (plausible.THERMAL_STEP_HZ, -15e3, -15, "did you mean -15 kHz = -15000?"),
    # Cavity frequency: tens of GHz for circular Rydberg transitions near n = 50.
    (plausible.CAVITY_FREQUENCY_HZ, 48.6e9, 48.6, "did you mean 48.6 GHz = 4.86e+10?"),
    # Photon storage time: ms to 0.1 s (from memory); 25 ms typed as 25.
    (plausible.DAMPING_TIME_S, 0.025, 25, "did you mean 25 ms = 0.025?"),
    # Mode temperature in a cryostat: 0.7 K typed in mK.
    (plausible.TEMPERATURE_K, 0.7, 700, "did you mean 700 mK = 0.7?"),
    # Flight distance and Ramsey arm: tens of cm and cm.
    (plausible.FLIGHT_DISTANCE_M, 0.5, 500, "did you mean 500 mm = 0.5 or 500 cm = 5?"),
    (plausible.ZONE_SEPARATION_M, 0.06, 60, "did you mean 60 mm = 0.06 or 60 cm = 0.6?"),
    # Stark coefficient: -250 kHz per (V/cm)^2 = -25 Hz per (V/m)^2 (docs/physics.md section 4),
    # typed per (V/cm)^2.
    (plausible.STARK_COEFFICIENT_HZ_M2_PER_V2, -25.0, -250e3,
     "did you mean -250000 Hz per (V/cm)^2 = -25?"),
    (plausible.ELECTRODE_GAP_M, 0.02, 2, "did you mean 2 mm = 0.002 or 2 cm = 0.02?"),
]


@pytest.mark.parametrize(("spec", "good", "slipped", "hint"), SLIPS)
def test_a_value_in_a_slipped_unit_is_refused_with_the_likely_unit(spec, good, slipped, hint):
    """The trade's value passes; the same value typed in a unit 1000 times off (or per (V/cm)^2
    for per (V/m)^2) is refused and the hint names that unit and the value it means."""
    assert spec.problem(good) is None
    expected, said = spec.problem(slipped)
    assert said == hint
    assert spec.unit in expected and "(" in expected  # the range, its unit and its reason


@pytest.mark.parametrize("spec", [plausible.COUPLING_HZ, plausible.WAIST_M,
                                  plausible.VELOCITY_M_PER_S, plausible.CAVITY_FREQUENCY_HZ])
def test_the_nominal_ranges_are_narrower_than_a_factor_of_1000(spec):
    """A value and 1000 times it never both pass the ranges of the nominal physics and the
    velocity: a kHz typed for Hz, a mm for m, a km/s for m/s is always caught (design of
    autotune.plausible)."""
    assert spec.high / spec.low <= 1000


def test_the_velocity_range_holds_a_thermal_beam():
    """A thermal rubidium beam's mean speed sqrt(8 k T / (pi m)) at 450 K (330 m/s; kinetic
    theory, scipy.constants) and the demo's 2π velocity both lie in the velocity range."""
    import scipy.constants as const

    mass = 85.4678 * const.atomic_mass  # rubidium, standard atomic weight (from memory)
    mean = math.sqrt(8 * const.k * 450.0 / (math.pi * mass))
    assert mean == pytest.approx(333, abs=2)
    assert plausible.VELOCITY_M_PER_S.problem(mean) is None
    assert plausible.VELOCITY_M_PER_S.problem(nominal_two_pi_velocity(49e3, 5.8e-3)) is None


def test_zero_and_sign_follow_the_range():
    """A thermal step of 0 (none) passes, as does a negative one; a temperature below 0 K
    does not; a value 1000 times off with no common unit gets no hint."""
    assert plausible.THERMAL_STEP_HZ.problem(0.0) is None
    assert plausible.THERMAL_STEP_HZ.problem(-15e3) is None
    assert plausible.TEMPERATURE_K.problem(-0.7) is not None
    assert plausible.ATOMS_PER_SAMPLE.hint(200.0) == ""


def _demo() -> dict:
    return tomllib.loads((CONFIGS / "calibrate.toml").read_text(encoding="utf-8"))


def _problems(data: dict) -> dict[str, ConfigError]:
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, source="c.toml")
    problems = getattr(info.value, "problems", [info.value])
    return {problem.key: problem for problem in problems}


def test_the_nominal_coupling_in_khz_names_both_keys_and_the_velocity():
    """coupling_hz = 49 is refused with its hint, and its 2π velocity 0.5037 m/s (Ω0 w/(2√π),
    docs/physics.md section 2) outside the box names both nominal keys and the unit that fixes it."""
    data = _demo()
    data["nominal"]["coupling_hz"] = 49
    problems = _problems(data)
    assert problems["nominal.coupling_hz"].hint == "did you mean 49 kHz = 49000?"
    both = str(problems["nominal.coupling_hz/waist_m"])
    assert "within the velocity search box [430, 590] m/s" in both
    assert "got 0.5037 m/s: the 2π velocity of coupling_hz = 49 Hz and waist_m = 0.0058 m" in both
    assert "did you mean coupling_hz = 49 kHz = 49000 (giving 503.7 m/s)?" in both


def test_a_waist_in_mm_names_the_unit_that_puts_the_velocity_in_the_box():
    """waist_m = 5.8 gives 503.7 km/s; the refusal points at 5.8 mm."""
    data = _demo()
    data["nominal"]["waist_m"] = 5.8
    problems = _problems(data)
    assert problems["nominal.waist_m"].hint == "did you mean 5.8 mm = 0.0058?"
    assert "did you mean waist_m = 5.8 mm = 0.0058 (giving 503.7 m/s)?" in \
        str(problems["nominal.coupling_hz/waist_m"])


@pytest.mark.parametrize(("coupling_hz", "waist_m", "inside"), [
    (49e3, 5.8e-3, True),     # 503.7 m/s, the demo (docs/physics.md section 6)
    (42e3, 5.8e-3, True),     # 431.8 m/s, just inside [430, 590]
    (41e3, 5.8e-3, False),    # 421.5 m/s, below
    (49e3, 6.9e-3, False),    # 599.2 m/s, above
])
def test_the_two_pi_velocity_must_lie_in_the_search_box(coupling_hz, waist_m, inside):
    """Plausible values each, the pair is refused exactly when Ω0 w / (2√π) leaves the box."""
    data = _demo()
    data["nominal"].update(coupling_hz=coupling_hz, waist_m=waist_m)
    velocity = nominal_two_pi_velocity(coupling_hz, waist_m)
    # Independent form: the resonant pulse area Omega_0 sqrt(pi) w / v is 2 pi there.
    assert 2 * math.pi * coupling_hz * math.sqrt(math.pi) * waist_m / velocity == \
        pytest.approx(2 * math.pi)
    if inside:
        config_from_dict(data, source="c.toml")
    else:
        assert "nominal.coupling_hz/waist_m" in _problems(data)


@pytest.mark.parametrize(("section", "key", "value", "bound"), [
    ("search", "max_shots", 99999999999999999999999999, "<= 1000000000 (1e9 shots are 77 days"),
    ("retune", "max_shots", 10**10, "<= 1000000000"),
    ("search", "max_rig_time_s", 1e12, "<= 2.592e+06 (30 days"),
    ("track", "max_wall_time_s", 1e9, "<= 2.592e+06 (30 days"),
    ("lock", "bracket_step_hz", 1e308, "at most 1e+08 Hz"),
    ("track", "max_correction_hz", 1e10, "at most 1e+08 Hz"),
    ("search", "refine_half_width_hz", 1e9, "at most 1e+08 Hz"),
    ("track", "walk_hz_per_sqrt_s", 1e5, "to 10000 Hz/s^0.5"),
])
def test_every_budget_and_width_has_an_upper_bound(section, key, value, bound):
    """Numbers a lab never means are refused naming the key, the bound and why."""
    data = _demo()
    data.setdefault(section, {})[key] = value
    message = str(_problems(data)[f"{section}.{key}"])
    assert bound in message and repr(value) in message


@pytest.mark.parametrize(("name", "key", "value", "hint"), [
    ("velocity", "limit_max", 0.7, "did you mean 0.7 km/s = 700?"),
    ("velocity", "max_step", 40000.0, "did you mean 40000 mm/s = 40?"),
    ("detuning", "limit_max", 1.5e308, ""),
])
def test_set_point_limits_of_the_run_config_are_plausible(name, key, value, hint):
    """Set-point limits and steps out of the velocity and detuning ranges are refused."""
    data = _demo()
    data["setpoints"][name][key] = value
    with pytest.raises(ConfigError) as info:
        config_from_dict(data, source="c.toml")
    mine = [p for p in info.value.problems if p.key == f"setpoints.{name}.{key}"]
    assert mine and mine[0].hint == hint and mine[0].expected.startswith("a value")


def test_an_unknown_key_names_the_nearest_one():
    """A misspelt key is refused with the nearest known key."""
    data = _demo()
    data["nominal"]["waist"] = 5.8e-3
    assert _problems(data)["nominal.waist"].hint == "did you mean 'waist_m'?"


def test_a_run_config_that_is_not_utf8_names_the_file(tmp_path):
    """Binary garbage is a ConfigError naming the file, not a UnicodeDecodeError."""
    path = tmp_path / "garbage.toml"
    path.write_bytes(b"\x00\xff\xfe\x81garbage")
    with pytest.raises(ConfigError, match="garbage.toml: <file>: expected a TOML file"):
        load_config(path)


def _sim() -> dict:
    return tomllib.loads((CONFIGS / "sim-rig.toml").read_text(encoding="utf-8"))


def test_the_sim_rig_config_reports_every_slip_at_once():
    """Four slipped units in the simulated rig's config: one error naming all four, with their
    hints."""
    data = _sim()
    data["cavity"]["damping_time_s"] = 25
    data["cavity"]["temperature_k"] = 700
    data["drift"]["thermal_step_hz"] = 15
    data["limits"]["velocity"]["max_m_per_s"] = 0.7
    with pytest.raises(SimConfigError) as info:
        sim_config_from_dict(data, source="sim.toml")
    message = str(info.value)
    assert message.startswith("sim.toml: 4 problems:")
    for fragment in ("cavity.damping_time_s", "25 ms = 0.025", "cavity.temperature_k",
                     "700 mK = 0.7", "drift.thermal_step_hz", "15 kHz = 15000",
                     "limits.velocity.max_m_per_s", "0.7 km/s = 700"):
        assert fragment in message


def test_a_sim_rig_config_that_is_not_utf8_names_the_file(tmp_path):
    """Binary garbage is a SimConfigError naming the file."""
    path = tmp_path / "sim.toml"
    path.write_bytes(b"\xff\xfe\x00")
    with pytest.raises(SimConfigError, match=r"sim\.toml: <file>: expected a TOML file \(UTF-8 text\)"):
        load_sim_config(path)


def _driver_table() -> dict:
    return tomllib.loads((CONFIGS / "sim-driver.toml").read_text(encoding="utf-8"))["setpoints"]


CHANNELS = {"velocity": ChannelInfo("m/s", 300.0, 700.0, 40.0, 500.0),
            "stark_voltage": ChannelInfo("V")}


@pytest.mark.parametrize(("name", "key", "value", "fragment"), [
    ("detuning", "channel_limit_max", 1e308, "within +-100000 V"),
    ("detuning", "channel_max_step", 1e6, "from 0 to 100000 V"),
    ("detuning", "electrode_gap_m", 2.0, "did you mean 2 mm = 0.002 or 2 cm = 0.02?"),
    ("detuning", "coefficient_hz_m2_per_v2", -250e3, "-250000 Hz per (V/cm)^2 = -25?"),
    ("velocity", "limit_max", 0.7, "did you mean 0.7 km/s = 700?"),
    ("velocity", "scale", 1e20, "12 decades"),
])
def test_channel_map_numbers_are_bounded(name, key, value, fragment):
    """DRIVER.toml's channel map: a number beyond what a lab could mean names the key, the
    bound and its reason (+-100 kV for a volt channel: electrode and detector voltages)."""
    table = _driver_table()
    table[name][key] = value
    with pytest.raises(ConfigError) as info:
        channel_map_from_table(table, CHANNELS, file="DRIVER.toml")
    assert f"DRIVER.toml: setpoints.{name}.{key}: expected" in str(info.value)
    assert fragment in str(info.value)


def test_channel_map_reports_every_implausible_number_at_once():
    """Two implausible numbers in two set-point tables: one error with both."""
    table = _driver_table()
    table["detuning"]["channel_limit_max"] = 1e308
    table["velocity"]["max_step"] = 40000.0
    with pytest.raises(ConfigError) as info:
        channel_map_from_table(table, CHANNELS, file="DRIVER.toml")
    assert {p.key for p in info.value.problems} == {"setpoints.detuning.channel_limit_max",
                                                     "setpoints.velocity.max_step"}


def test_server_waits_are_bounded(tmp_path):
    """[server] start_timeout_s of a day is refused: a driver that takes over an hour is hung."""
    path = tmp_path / "DRIVER.toml"
    path.write_text('[driver]\nclass = "a:B"\n[server]\nstart_timeout_s = 86400\n'
                    '[setpoints]\n', encoding="utf-8")
    with pytest.raises(ConfigError, match=r"server\.start_timeout_s: expected a finite number of seconds > 0 and at most 3600 s"):
        load_driver_config(path)


@pytest.mark.parametrize(("argv", "fragment"), [
    (["dry-run", "--thermal-step-hz", "15"], "got 15: did you mean 15 kHz = 15000?"),
    (["dry-run", "--thermal-step-hz", "nan"], "expected a finite number in Hz"),
    (["dry-run", "--seed", "99999999999999999999"], "expected an integer from 0 to 4294967295"),
    (["probe", "tcp://127.0.0.1:9", "--timeout-s", "1e9"], "at most 3600 (an hour)"),
    (["probe", "tcp://127.0.0.1:9", "--shots", "10000000000"], "from 1 to 10000000"),
])
def test_flags_out_of_range_exit_2_with_the_reason(argv, fragment, capsys):
    """Command-line numbers are held to the same ranges: argparse exits 2 with the sentence."""
    with pytest.raises(SystemExit) as info:
        main(argv)
    assert info.value.code == 2
    assert fragment in capsys.readouterr().err


@pytest.mark.parametrize(("text", "fragment"), [
    ('{"setpoints": {"velocity": 500.0, "detuning": NaN}, "inversion": 0.8}',
     "setpoints.detuning: expected a finite number, got nan"),
    ('{"setpoints": {"velocity": 500.0, "detuning": 0.0}, "inversion": Infinity}',
     "inversion: expected a measured inversion from -2 to 2"),
])
def test_a_last_good_store_holds_finite_numbers(tmp_path, text, fragment):
    """JSON readers take NaN and Infinity; a last good store holding them is refused naming
    the file and key."""
    from autotune.run.runner import read_last_good

    store = tmp_path / "good.json"
    store.write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError, match=fragment):
        read_last_good(store)
