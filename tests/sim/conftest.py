"""Fixtures of the simulated-rig tests: the demo and the flawless configurations."""

from __future__ import annotations

import pytest

from drivers_sim.config import SimRigConfig, load_sim_config

from .reference import DEMO_CONFIG, perturbed


@pytest.fixture(scope="session")
def demo_config() -> SimRigConfig:
    """The shipped demo scenario."""
    return load_sim_config(DEMO_CONFIG)


@pytest.fixture(scope="session")
def flawless_config(demo_config: SimRigConfig) -> SimRigConfig:
    """Demo coupling and waist with every imperfection of the rig switched off."""
    return perturbed(
        demo_config,
        cavity={"temperature_k": 0.0, "initial_offset_hz": 0.0},
        beam={"velocity_bias_m_per_s": 0.0, "velocity_spread_m_per_s": 0.0,
              "preparation_to_cavity_m": 0.0},
        field={"one_photon_probability": 1.0},
        ramsey={"detuning_hz": 0.0},
        stark={"coefficient_error": 0.0},
        detection={"g_read_as_i": 0.0, "i_read_as_g": 0.0},
        drift={"ramp_hz_per_s": 0.0, "random_walk_hz_per_sqrt_s": 0.0},
    )
