"""autotune: closed-loop calibration of a Ramsey-cavity single-photon QND detector.

The plugin sends set-points (selected atomic velocity, atom-cavity detuning) to a rig over a
ZeroMQ bus, reads back detection counts, estimates the fringe inversion between the empty and the
one-photon field with its uncertainty, and searches for the best setting with Bayesian
optimisation.

A package per concern (DEVELOPERS.md, Layout): the foundation at the top level
(:mod:`autotune.errors`, :mod:`autotune.plausible`, :mod:`autotune.progress`,
:mod:`autotune.schema`, :mod:`autotune.config`, :mod:`autotune.packaged`); the pure analysis
(:mod:`autotune.analysis`); the wire (:mod:`autotune.wire`); the lab kit (:mod:`autotune.kit`,
with the driver contract at its public path :mod:`autotune.driver`); running a stage and a
night (:mod:`autotune.run`); the morning report (:mod:`autotune.report`); the command line
(:mod:`autotune.cli`); the study (:mod:`autotune.bench`).
"""

from __future__ import annotations

from autotune.errors import (
    AutotuneError,
    ConfigError,
    EstimationError,
    JournalError,
    LimitError,
    ProtocolError,
    RigError,
    RigLeased,
    RigRefused,
    RigTimeout,
    RunFolderInUse,
)

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "AutotuneError",
    "ConfigError",
    "EstimationError",
    "JournalError",
    "LimitError",
    "ProtocolError",
    "RigError",
    "RigLeased",
    "RigRefused",
    "RigTimeout",
    "RunFolderInUse",
]
