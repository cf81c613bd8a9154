"""The lab kit: what a lab's control-system team touches to put its rig behind the protocol.

What lives here:

- :mod:`~autotune.kit.driver`: the rig-driver contract a lab implements (its public path is
  :mod:`autotune.driver`, which re-exports it);
- :mod:`~autotune.kit.driver_config`: ``DRIVER.toml`` -> ``DriverConfig``; finds and builds the
  driver;
- :mod:`~autotune.kit.channels`: the channel map, set-points <-> a control system's channels
  (pure);
- :mod:`~autotune.kit.served`: a driver behind the protocol's ops, checks in both units,
  read-backs;
- :mod:`~autotune.kit.server`: ``RigServer`` (ZeroMQ transport, replay cache, lease, CURVE,
  faults) and ``LocalRig`` (the same handler in process);
- :mod:`~autotune.kit.lease`: the rig's lease book, who may move it and until when (pure);
- :mod:`~autotune.kit.probe`: the conformance probe (``autotune probe``), with its rules, findings
  and link to the rig in :mod:`~autotune.kit.probe_rules`.

What it may import: the foundation modules (:mod:`autotune.errors`, :mod:`autotune.plausible`,
:mod:`autotune.progress`, :mod:`autotune.schema`, :mod:`autotune.config`), the wire
(:mod:`autotune.wire`) and itself; nothing of the analysis, a run, the report, the study or the
command line (tests/test_layout.py holds this). ``drivers_sim`` imports
:mod:`autotune.driver`.
"""

__all__ = ["channels", "driver", "driver_config", "lease", "probe", "probe_rules", "served", "server"]
