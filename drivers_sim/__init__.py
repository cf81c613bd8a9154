"""The bundled simulated rig: physics, state, configuration and its rig driver.

Modules: :mod:`drivers_sim.physics` (the pure, vectorised atom-cavity-Ramsey model),
:mod:`drivers_sim.config` (its checked TOML configuration), :mod:`drivers_sim.rig` (set-points,
virtual clock, drift, detection noise, truth) and :mod:`drivers_sim.driver` (the rig behind the
rig-driver interface of :mod:`autotune.driver`, served by ``autotune rig`` and ``autotune
serve`` like any lab's driver). It imports only :mod:`autotune.wire.protocol` and
:mod:`autotune.driver` of the plugin.
"""

from __future__ import annotations

from drivers_sim.config import SimConfigError, SimRigConfig, load_sim_config, sim_config_from_dict
from drivers_sim.driver import SimulatedDriver
from drivers_sim.rig import RigInterlock, SetpointError, SimulatedRig

__all__ = [
    "SimulatedRig",
    "SimulatedDriver",
    "SimRigConfig",
    "SimConfigError",
    "SetpointError",
    "RigInterlock",
    "load_sim_config",
    "sim_config_from_dict",
]
