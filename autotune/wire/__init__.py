"""The wire: what autotune and a rig say to each other, and the client that says it.

What lives here:

- :mod:`~autotune.wire.protocol`: the protocol's specification (version 1) and its public names,
  implemented by :mod:`~autotune.wire.terms` (version, limits, ops, error kinds),
  :mod:`~autotune.wire.codec` (strict JSON, requests and replies as bytes, an op's arguments
  checked) and :mod:`~autotune.wire.results` (the ops' results read into typed objects);
- :mod:`~autotune.wire.bus`: the ZeroMQ client (bounded waits, retries, reconnect), with its
  CURVE keys in :mod:`~autotune.wire.keys` and its side of the rig's lease (who this client
  is, the thread that renews the lease) in :mod:`~autotune.wire.claim`;
- :mod:`~autotune.wire.rig`: the ``Rig`` interface the loop talks to, which the client and the
  in-process simulated rig both implement.

What it may import: the foundation modules (:mod:`autotune.errors`, :mod:`autotune.plausible`,
:mod:`autotune.progress`, :mod:`autotune.schema`, :mod:`autotune.config`) and itself; nothing of
the analysis, the lab kit, a run, the report, the study or the command line
(tests/test_layout.py holds this). ``drivers_sim`` imports :mod:`autotune.wire.protocol`.
"""

__all__ = ["bus", "claim", "codec", "keys", "protocol", "results", "rig", "terms"]
