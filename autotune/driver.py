"""The rig-driver contract a lab implements, at its public path.

A lab's driver imports from here, as the README and ``examples/lab_driver`` show::

    from autotune.driver import BadRequest, Busy, InterlockSet, OutOfRange

The contract itself lives in the lab kit, :mod:`autotune.kit.driver`; this module re-exports its
public names so that this path stays the one a lab's code relies on.
"""

from autotune.kit.driver import (COUNT_STATES, FIELDS, SIMULATED_OPS, BadRequest, Busy,
                                  DriverRefusal, InterlockSet, OutOfRange, RigDriver)

__all__ = ["RigDriver", "DriverRefusal", "OutOfRange", "Busy", "InterlockSet", "BadRequest",
           "COUNT_STATES", "FIELDS", "SIMULATED_OPS"]
