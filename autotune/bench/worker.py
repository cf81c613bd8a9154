"""What a worker runs: a job (plain JSON) by its kind, in this process or on a dask worker."""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping
from typing import Any


from autotune.bench.jobs import calibration_job, jsonable, oracle_job, quiet_logging
from autotune.bench.memory import night_job
from autotune.bench.night_rig import hold_night_job
from autotune.errors import ValueRefused


_JOBS: dict[str, Callable[[Mapping[str, Any]], dict[str, Any]]] = {
    "calibration": calibration_job, "oracle": oracle_job, "night": night_job,
    "hold_night": hold_night_job}


def run_job(job_json: str, quiet: bool = False) -> str:
    """Run one job given as JSON text and return its result as JSON text.

    The same function runs in this process and on a dask worker, with one BLAS thread (so
    that a result does not depend on where it ran, nor two workers fight over two cores).

    Parameters
    ----------
    job_json : str
        ``{"kind": "calibration" | "oracle" | "night", ...}`` as built by :func:`run_study`.
    quiet : bool
        Configure structlog to warnings only (in a worker process, which has no CLI).
    """
    from threadpoolctl import threadpool_limits

    if quiet:
        quiet_logging()
    job = json.loads(job_json)
    kind = job["kind"]
    if kind not in _JOBS:
        raise ValueRefused(f"job kind: expected one of {sorted(_JOBS)}, got {kind!r}")
    with threadpool_limits(limits=1):
        result = _JOBS[kind](job)
    return json.dumps(jsonable(result), allow_nan=False)
