"""Every op over real sockets between real processes, checked against the same rig in-process.

The server child runs ``SimulatedRig(config, SEED)``; the reference here is a second
``SimulatedRig`` with the same config and seed, driven directly. Any difference is the bus's.
"""

from __future__ import annotations

import math

import pytest
from rig_process import SEED, SIM_CONFIG, spawn_server

from autotune.wire.bus import BusClient

from autotune.wire.protocol import (
    Acquisition,
    Applied,
    Counts,
    Description,
    SetpointLimit,
    Status,
)
from drivers_sim.config import load_sim_config
from drivers_sim.rig import SimulatedRig


#: The tests share one server child and one reference rig (pytest-xdist's loadgroup runs them
#: on one worker): each test sends the same op to both before it compares, so the two stay in
#: step whatever the order, and each op is checked on a rig that has already served others.
pytestmark = pytest.mark.xdist_group("test_bus_roundtrip")


@pytest.fixture(scope="module")
def reference() -> SimulatedRig:
    """The in-process rig the bus results are compared with."""
    return SimulatedRig(load_sim_config(SIM_CONFIG), SEED)


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    """A client of one server child of the same config and seed. Its replies are compared, not
    timed: a generous timeout, since the truth op integrates the model and took over 1 s at a
    load average of 10 on a 2-core machine (the bus timeouts have tests of their own)."""
    server = spawn_server(tmp_path_factory.mktemp("roundtrip"), "rig", seed=SEED)
    try:
        with BusClient(server.endpoint, timeout_s=30.0, retries=3, backoff_s=0.02) as client:
            yield client
    finally:
        server.stop()


def _a_legal_move(reference: SimulatedRig) -> dict[str, float]:
    """A detuning change of half its described max_step (so inside every limit)."""
    limits = reference.describe()["setpoints"]["detuning"]
    now = reference.status()["setpoints"]["detuning"]
    target = now + 0.5 * limits["max_step"]
    return {"detuning": target if target <= limits["max"] else now - 0.5 * limits["max_step"]}


def test_describe_matches_the_rig(client, reference):
    """describe over the bus gives the rig's own description, typed."""
    description = client.describe()
    expected = reference.describe()
    assert isinstance(description, Description)
    assert (description.rig, description.proto, description.simulated) == (
        expected["rig"], expected["proto"], expected["simulated"])
    assert description.fields == tuple(expected["fields"])
    assert description.repetition_rate_hz == expected["repetition_rate_hz"]
    assert dict(description.safe_setpoints) == expected["safe_setpoints"]
    assert dict(description.setpoints) == {
        name: SetpointLimit(**limit) for name, limit in expected["setpoints"].items()}


def test_status_matches_the_rig(client, reference):
    """status over the bus gives the rig's clock, interlock, set-points and shot total."""
    status = client.status()
    expected = reference.status()
    assert isinstance(status, Status)
    assert (status.clock, status.busy, status.interlock, dict(status.setpoints), status.shots_total) == (
        expected["clock"], expected["busy"], expected["interlock"], expected["setpoints"], expected["shots_total"])


def test_apply_matches_the_rig(client, reference):
    """apply over the bus changes the set-point exactly as the rig does directly."""
    client.describe()
    move = _a_legal_move(reference)
    applied = client.apply(move)
    expected = reference.apply(move)
    assert isinstance(applied, Applied)
    assert (dict(applied.setpoints), applied.clock) == (expected["setpoints"], expected["clock"])


def test_acquire_matches_the_rig(client, reference):
    """acquire over the bus returns the very counts of the same seeded rig (nothing lost or re-drawn)."""
    acquisition = client.acquire("one_photon", math.pi / 3, 120)
    expected = reference.acquire("one_photon", math.pi / 3, 120)
    assert isinstance(acquisition, Acquisition)
    assert acquisition.counts == Counts(**expected["counts"])
    assert (acquisition.shots, acquisition.t_start, acquisition.t_end, dict(acquisition.setpoints)) == (
        expected["shots"], expected["t_start"], expected["t_end"], expected["setpoints"])


def test_safe_matches_the_rig(client, reference):
    """safe over the bus moves to the rig's safe set-points."""
    applied = client.safe()
    assert dict(applied.setpoints) == reference.safe()["setpoints"]
    assert applied.clock is None


def test_truth_matches_the_rig(client, reference):
    """truth over the bus returns the rig's exact figures, at the set-points given."""
    where = reference.describe()["safe_setpoints"]
    assert client.truth(where) == reference.truth(where)


def test_truth_defaults_to_setpoints_in_force(client, reference):
    """truth without set-points is evaluated at those in force, as on the rig."""
    assert client.truth() == reference.truth()


def test_advance_matches_the_rig(client, reference):
    """advance over the bus moves the virtual clock as the rig does."""
    assert client.advance(3600.0) == reference.advance(3600.0)


def test_thermal_step_matches_the_rig(client, reference):
    """thermal_step over the bus shifts the cavity as the rig does."""
    assert client.thermal_step(15e3) == reference.thermal_step(15e3)
