"""The configuration files shipped inside the package (``autotune/data``): what a command reads
by default, so that an installed ``autotune`` runs from any folder. The repository's
``configs/`` holds identical copies (tests/test_packaging.py keeps them so).

A foundation module apart from :mod:`autotune.config` so that the commands that only need a
packaged file's path (``autotune rig``'s default ``--config``) do not build the run
configuration's models at start; :mod:`autotune.config` re-exports both names.
"""

from __future__ import annotations

from pathlib import Path

from autotune.errors import ValueRefused

__all__ = ["PACKAGED_CONFIGS", "packaged_config"]

PACKAGED_CONFIGS = ("dry-run.toml", "sim-rig.toml", "sim-driver.toml", "calibrate.toml")

_DATA_DIR = Path(__file__).resolve().parent / "data"


def packaged_config(name: str) -> Path:
    """Path of a configuration file shipped with the package.

    Parameters
    ----------
    name : str
        One of :data:`PACKAGED_CONFIGS` (e.g. ``"dry-run.toml"``).

    Raises
    ------
    ValueRefused
        ``name`` is not a packaged configuration (a ValueError too).
    """
    if name not in PACKAGED_CONFIGS:
        raise ValueRefused(f"name: expected one of {', '.join(PACKAGED_CONFIGS)}, got {name!r}")
    return _DATA_DIR / name
