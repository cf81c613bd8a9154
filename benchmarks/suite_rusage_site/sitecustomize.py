"""Per-process records for ``benchmarks/suite_rusage.py``: put this folder on PYTHONPATH (with
SUITE_RUSAGE_DIR set) and every Python process the suite starts, the workers and the
``autotune`` processes the tests start, appends one JSON line at exit to
``$SUITE_RUSAGE_DIR/processes.ndjson``: its command, its own CPU (user + sys) and which of the
heavy libraries it imported. A process killed by a signal it does not catch writes nothing.
Without SUITE_RUSAGE_DIR it does nothing."""

import os

if os.environ.get("SUITE_RUSAGE_DIR"):
    import atexit
    import json
    import resource
    import sys

    HEAVY = ("numpy", "scipy", "scipy.stats", "scipy.optimize", "scipy.linalg", "scipy.special",
             "scipy.constants", "skopt", "sklearn", "matplotlib", "structlog", "pydantic",
             "msgspec", "zmq", "dask", "qutip", "autotune.search", "autotune.analysis.search")

    def _record() -> None:
        usage = resource.getrusage(resource.RUSAGE_SELF)
        line = {"argv": sys.argv[:6], "orig": getattr(sys, "orig_argv", [])[:8],
                "pid": os.getpid(), "cpu": usage.ru_utime + usage.ru_stime,
                "heavy": [name for name in HEAVY if name in sys.modules]}
        try:
            with open(os.path.join(os.environ["SUITE_RUSAGE_DIR"], "processes.ndjson"), "a",
                      encoding="utf-8") as out:
                out.write(json.dumps(line) + "\n")
        except OSError:
            pass

    atexit.register(_record)
