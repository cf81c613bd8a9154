"""Tests of the wire protocol, the bus client and the simulated rig server."""
