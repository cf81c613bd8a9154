"""autotune.kit.driver_config: DRIVER.toml is checked once, and the driver class is found and built."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from autotune.kit.driver_config import DEFAULT_BIND, DriverStartError, build_driver, load_driver_config
from autotune.errors import ConfigError

from .conftest import EXAMPLE_DRIVER_TOML

MINIMAL = """
[driver]
class = "{target}"
python_path = ["."]
{options}
[setpoints.velocity]
unit = "m/s"
channel = "V"
channel_unit = "m/s"
law = "linear"
scale = 1.0
"""


@pytest.fixture(autouse=True)
def _restore_import_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """build_driver puts python_path folders on sys.path: give each test its own copy."""
    monkeypatch.setattr(sys, "path", list(sys.path))


def _write(folder: Path, text: str) -> Path:
    path = folder / "DRIVER.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_example_file_loads_with_loopback_default(tmp_path: Path):
    """The example DRIVER.toml loads; its options and relative python_path are resolved against its folder."""
    config = load_driver_config(EXAMPLE_DRIVER_TOML)
    assert config.driver_class == "lab_driver.driver:LabDriver"
    assert config.python_path == (EXAMPLE_DRIVER_TOML.parent.parent.resolve(),)
    assert config.bind == "tcp://127.0.0.1:5560" == DEFAULT_BIND
    assert config.start_timeout_s == 60.0
    assert set(config.setpoints) == {"velocity", "detuning"}


@pytest.mark.parametrize(("text", "key"), [
    (MINIMAL.format(target="no_colon", options=""), "driver.class"),
    (MINIMAL.format(target="a:B", options="") + "\n[extra]\n", "extra"),
    (MINIMAL.format(target="a:B", options="") + "\n[server]\nbind = \"127.0.0.1\"\n", "server.bind"),
    (MINIMAL.format(target="a:B", options="")
     + "\n[server]\ncurve_secret_key_file = \"k\"\n", "server.curve_secret_key_file"),
    (MINIMAL.format(target="a:B", options="") + "\n[server]\nstart_timeout_s = 0\n",
     "server.start_timeout_s"),
    (MINIMAL.format(target="a:B", options="") + "\n[server]\nstart_timeout_s = \"60\"\n",
     "server.start_timeout_s"),
    (MINIMAL.format(target="a:B", options="").replace('["."]', '["missing"]'), "driver.python_path"),
    ("[driver]\nclass = \"a:B\"\n", "setpoints"),
    ("[driver\n", "<file>"),
])
def test_bad_files_name_the_key(tmp_path: Path, text: str, key: str):
    """Every wrong value is a ConfigError naming file and key, before anything is imported or built."""
    with pytest.raises(ConfigError) as info:
        load_driver_config(_write(tmp_path, text))
    assert info.value.key == key


def test_missing_file_is_named(tmp_path: Path):
    """A DRIVER.toml that does not exist is a ConfigError naming it."""
    with pytest.raises(ConfigError, match="no such file"):
        load_driver_config(tmp_path / "absent.toml")


def test_unimportable_module_is_a_config_error(tmp_path: Path):
    """A module that is not on the path: ConfigError on driver.class mentioning python_path."""
    config = load_driver_config(_write(tmp_path, MINIMAL.format(target="nowhere_module_x:Driver", options="")))
    with pytest.raises(ConfigError, match="python_path") as info:
        build_driver(config)
    assert info.value.key == "driver.class"


def test_wrong_options_are_a_config_error(tmp_path: Path):
    """Options the class does not take (TypeError) are a ConfigError on driver.options."""
    (tmp_path / "kit_opts_driver.py").write_text("class Driver:\n    def __init__(self, address):\n        pass\n")
    text = MINIMAL.format(target="kit_opts_driver:Driver", options="[driver.options]\nadress = \"x\"\n")
    with pytest.raises(ConfigError) as info:
        build_driver(load_driver_config(_write(tmp_path, text)))
    assert info.value.key == "driver.options"
    assert "unknown option 'adress' (did you mean 'address'?); missing option 'address'" \
        in str(info.value)


def test_a_module_that_fails_at_import_is_a_config_error_naming_the_line(tmp_path: Path):
    """A driver module with a syntax error is the driver's code, not its hardware: a
    ConfigError on driver.class (exit 2) with the file and line."""
    (tmp_path / "kit_broken_driver.py").write_text("class Driver\n    pass\n")
    text = MINIMAL.format(target="kit_broken_driver:Driver", options="")
    with pytest.raises(ConfigError) as info:
        build_driver(load_driver_config(_write(tmp_path, text)))
    assert info.value.key == "driver.class"
    assert "SyntaxError" in str(info.value) and "kit_broken_driver.py:1" in str(info.value)


def test_a_reply_the_constructor_cannot_read_is_a_start_error_naming_where(tmp_path: Path):
    """A ValueError raised inside the constructor while reading an instrument's reply is a
    failure to start (exit 3), not an options error; the message says where it was raised."""
    (tmp_path / "kit_parse_driver.py").write_text(
        "class Driver:\n    def __init__(self, address='supply://a'):\n"
        "        self.volts = float('ERR -113,Undefined header')\n")
    text = MINIMAL.format(target="kit_parse_driver:Driver", options="")
    with pytest.raises(DriverStartError) as info:
        build_driver(load_driver_config(_write(tmp_path, text)))
    assert "could not convert string to float" in str(info.value)
    assert "raised at kit_parse_driver.py:3 in __init__" in str(info.value)


def test_a_misspelled_required_channel_key_is_named(tmp_path: Path):
    """'chanel_unit' for 'channel_unit': the message names the misspelling that is there."""
    from autotune.kit.channels import channel_map_from_table

    table = {"velocity": {"unit": "m/s", "channel": "V", "chanel_unit": "m/s", "law": "linear",
                          "scale": 1.0}}
    with pytest.raises(ConfigError) as info:
        channel_map_from_table(table, {}, file="DRIVER.toml")
    assert info.value.key == "setpoints.velocity.channel_unit"
    assert "there is 'chanel_unit': a misspelling?" in str(info.value)


def test_driver_failing_to_connect_is_a_start_error(tmp_path: Path):
    """A constructor that cannot reach its hardware (ConnectionRefusedError) is a DriverStartError, cause chained."""
    (tmp_path / "kit_down_driver.py").write_text(
        "class Driver:\n    def __init__(self):\n        raise ConnectionRefusedError('supply at 10.0.0.7 refused')\n")
    with pytest.raises(DriverStartError, match="supply at 10.0.0.7 refused") as info:
        build_driver(load_driver_config(_write(tmp_path, MINIMAL.format(target="kit_down_driver:Driver",
                                                                             options=""))))
    assert isinstance(info.value.__cause__, ConnectionRefusedError)


def test_options_refused_by_from_config_are_a_config_error(tmp_path: Path):
    """A class built by from_config has no signature to check: the TypeError from_config
    raises itself for an option it does not take is a driver.options error (exit 2, README:
    options the driver class does not take), as drivers_sim's from_config documents; a
    TypeError from deeper down (its hardware library) stays a failure to start (exit 3)."""
    (tmp_path / "kit_factory_driver.py").write_text(
        "def connect(address):\n    return address + 1\n\n"
        "class Driver:\n    @classmethod\n    def from_config(cls, options, config_dir):\n"
        "        unknown = set(options) - {'address'}\n"
        "        if unknown:\n            raise TypeError(f'unknown option {sorted(unknown)[0]!r}')\n"
        "        connect(options['address'])\n        return cls()\n")
    text = MINIMAL.format(target="kit_factory_driver:Driver",
                          options="[driver.options]\ncolour = 1\n")
    with pytest.raises(ConfigError) as info:
        build_driver(load_driver_config(_write(tmp_path, text)))
    assert info.value.key == "driver.options" and "unknown option 'colour'" in str(info.value)
    text = MINIMAL.format(target="kit_factory_driver:Driver",
                          options="[driver.options]\naddress = \"gpib0\"\n")
    with pytest.raises(DriverStartError) as started:
        build_driver(load_driver_config(_write(tmp_path, text)))
    assert "raised at kit_factory_driver.py:2 in connect" in str(started.value)


def test_the_simulated_driver_refuses_an_unknown_option_as_a_config_error(tmp_path: Path):
    """configs/sim-driver.toml with an option SimulatedDriver.from_config does not take."""
    from .conftest import SIM_DRIVER_TOML

    text = SIM_DRIVER_TOML.read_text().replace("seed = 2", "seed = 2\ncolour = 1")
    text = text.replace('config = "sim-rig.toml"', f'config = "{SIM_DRIVER_TOML.parent / "sim-rig.toml"}"')
    with pytest.raises(ConfigError) as info:
        build_driver(load_driver_config(_write(tmp_path, text)))
    assert info.value.key == "driver.options" and "colour" in str(info.value)
