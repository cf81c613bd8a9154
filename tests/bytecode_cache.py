"""Where the suite caches its compiled modules (tests/conftest.py sets ``PYTHONPYCACHEPREFIX``
to it for the suite's workers and every process they start)."""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path


def cache_prefix(environ: Mapping[str, str]) -> str | None:
    """``$XDG_CACHE_HOME/autotune-tests/pycache`` (``~/.cache`` where it is unset), or None where
    no absolute cache folder is known: no home (``HOME`` unset and no password entry for the
    user, as in a container run under an arbitrary user id) or a home that is not absolute. A
    relative ``XDG_CACHE_HOME`` is ignored, as the XDG Base Directory Specification
    (freedesktop.org) asks of every relative path in its variables. With None the suite runs
    as before, without a cache prefix: a relative prefix would write compiled modules below
    each process's working folder, the source tree included."""
    base = environ.get("XDG_CACHE_HOME", "")
    if not os.path.isabs(base):
        home = environ.get("HOME")
        if home is None:
            try:
                home = str(Path.home())
            except (RuntimeError, KeyError):
                return None
        if not os.path.isabs(home):
            return None
        base = os.path.join(home, ".cache")
    return os.path.join(base, "autotune-tests", "pycache")


def suite_prefix(environ: Mapping[str, str]) -> str | None:
    """The prefix the suite sets, or None to leave the environment as it is: only where
    ``PYTHONDONTWRITEBYTECODE`` is set (elsewhere Python caches in ``__pycache__`` already, and a
    prefix would make every process compile the installed libraries again), the caller set no
    ``PYTHONPYCACHEPREFIX`` of its own, and :func:`cache_prefix` knows a folder."""
    if not environ.get("PYTHONDONTWRITEBYTECODE") or environ.get("PYTHONPYCACHEPREFIX"):
        return None
    return cache_prefix(environ)
