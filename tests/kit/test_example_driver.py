"""examples/lab_driver: the example driver keeps the interface's contract with its made-up instruments."""

from __future__ import annotations

import pytest
from lab_driver.driver import AOM, ELECTRODE, LabDriver

from autotune.driver import BadRequest, Busy, InterlockSet, OutOfRange, RigDriver
from autotune.kit.served import parse_driver_description


@pytest.fixture
def driver() -> LabDriver:
    """The example driver on fresh made-up instruments."""
    return LabDriver("supply://hv-test", "seq://timing-test", seed=1)


def test_it_is_a_rig_driver(driver):
    """It has the five methods of autotune.driver.RigDriver, and its description is valid."""
    assert isinstance(driver, RigDriver)
    description = parse_driver_description(driver.describe())
    assert description.channels[AOM].unit == "MHz" and description.channels[ELECTRODE].unit == "V"
    assert description.simulated is False


def test_apply_sets_the_instruments(driver):
    """The AOM channel writes the sequencer's register, the electrode channel the supply's HV1 output."""
    driver.apply({AOM: 112.5, ELECTRODE: 3.1234})
    assert driver.sequencer.read_register("AOM_VSEL") == 112.5
    # The supply reads back to its 1 mV resolution.
    assert driver.status()["channels"] == {AOM: 112.5, ELECTRODE: pytest.approx(3.123)}


@pytest.mark.parametrize(("prepare", "channels", "refusal"), [
    (lambda d: d.supply.open_interlock("door open"), {ELECTRODE: 3.1}, InterlockSet),
    (lambda d: None, {ELECTRODE: 12.0}, OutOfRange),
    (lambda d: setattr(d.sequencer, "busy_with", "a manual scan"), {AOM: 110.0}, Busy),
    (lambda d: None, {"STARK:HV9": 1.0}, BadRequest),
])
def test_instrument_errors_become_refusals(driver, prepare, channels, refusal):
    """Interlock, the supply's own range, a busy sequencer and an unknown channel map to the vocabulary."""
    prepare(driver)
    with pytest.raises(refusal):
        driver.apply(channels)


def test_acquire_counts_levels_and_takes_shots_over_rate(driver):
    """Counts come back as e, g, i and take shots / repetition rate of rig time (common practice)."""
    result = driver.acquire("one_photon", 0.0, 300)
    assert set(result["counts"]) == {"e", "g", "i"}
    assert result["t_end"] - result["t_start"] == pytest.approx(300 / 150.0)
    assert driver.status()["shots_total"] == 300


def test_safe_under_interlock_holds_the_supply_and_sets_the_aom(driver):
    """Under interlock the supply cannot move (it holds), the AOM still goes to its safe value."""
    driver.apply({ELECTRODE: 3.2})
    driver.supply.open_interlock("cryostat watchdog")
    driver.safe({AOM: 111.0, ELECTRODE: 3.0})
    assert driver.sequencer.read_register("AOM_VSEL") == 111.0
    assert driver.supply.read_voltage("HV1") == pytest.approx(3.2)


def test_close_releases_the_instruments(driver):
    """close() disconnects the supply."""
    driver.close()
    assert driver.supply.connected is False
