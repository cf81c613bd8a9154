"""The bundled simulated rig: physics, state and a server speaking ``autotune.protocol``.

Modules: :mod:`drivers_sim.physics` (the pure, vectorised atom-cavity-Ramsey model),
:mod:`drivers_sim.config` (its checked TOML configuration), :mod:`drivers_sim.rig` (set-points,
virtual clock, drift, detection noise, truth), :mod:`drivers_sim.server` (the rig over ZeroMQ,
``autotune rig``) and :mod:`drivers_sim.local` (the same protocol in process, for studies).
"""

from __future__ import annotations

from drivers_sim.config import SimConfigError, SimRigConfig, load_sim_config, sim_config_from_dict
from drivers_sim.rig import RigInterlock, SetpointError, SimulatedRig

__all__ = [
    "SimulatedRig",
    "SimRigConfig",
    "SimConfigError",
    "SetpointError",
    "RigInterlock",
    "load_sim_config",
    "sim_config_from_dict",
]
