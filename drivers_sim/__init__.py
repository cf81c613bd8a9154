"""The bundled simulated rig: physics, state and a server speaking ``autotune.protocol``."""
