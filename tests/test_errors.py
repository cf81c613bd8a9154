"""The one error tree: every error a user can cause is an AutotuneError whose ``exit_code`` is
what the command it stops exits with (README "Exit codes": 2 bad input, 3 the rig, 130 a
signal), and the values refused in code are ValueRefused (a ValueError too, as they were)."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

from autotune import cli, errors
from autotune.cli.common import guarded
from autotune.analysis.lock_settings import LockSettings
from autotune.analysis.search import Dimension
from autotune.kit.channels import ChannelMap, LinearLaw, StarkLaw
from autotune.config import packaged_config
from autotune.kit.driver_config import DriverStartError
from drivers_sim.config import SimConfigError

_PROBLEM = errors.ConfigError("c.toml", "bus.timeout_s", "a finite number > 0", -1.0)

#: One instance of every class of the tree (and of those defined beside their modules).
INSTANCES = [
    errors.AutotuneError("x"),
    errors.ValueRefused("x"),
    _PROBLEM,
    errors.ConfigErrors([_PROBLEM]),
    errors.FileErrors([_PROBLEM]),
    SimConfigError([_PROBLEM]),
    errors.LimitError("x"),
    errors.EstimationError("x"),
    errors.JournalError("x"),
    errors.RunAlreadyEnded("x", "accepted", None),
    errors.RunFolderInUse("x", None),
    errors.Interrupted("x"),
    errors.RigError("x"),
    errors.RigTimeout("x"),
    errors.RigRefused("busy", "x"),
    errors.RigLeased("x"),
    errors.ProtocolError("x"),
    errors.RigMismatch("x"),
    errors.RigRestarted("x"),
    DriverStartError("x"),
]


def test_every_class_of_the_tree_is_covered():
    """No class of errors.py is left out of the check below."""
    tree = {getattr(errors, name) for name in errors.__all__
            if isinstance(getattr(errors, name), type)
            and issubclass(getattr(errors, name), errors.AutotuneError)}
    assert tree <= {type(error) for error in INSTANCES}


@pytest.mark.parametrize("error", INSTANCES, ids=lambda e: type(e).__name__)
def test_the_command_exits_with_the_errors_own_code(error, capsys):
    """autotune's commands map an error to the code the error carries (cli.common.guarded, the
    wrapper of calibrate, retune, track and dry-run)."""
    def fail() -> int:
        raise error
    assert guarded(fail) == error.exit_code
    assert error.exit_code in (cli.EXIT_BAD_INPUT, cli.EXIT_RIG, cli.EXIT_INTERRUPTED)
    assert (error.exit_code == cli.EXIT_RIG) == isinstance(error, errors.RigError)
    assert capsys.readouterr().err.startswith("autotune: ")


@pytest.mark.parametrize(("build", "words"), [
    (lambda: LockSettings(target_shortfall=2.0), "LockSettings.target_shortfall: expected a number in"),
    (lambda: Dimension("velocity", 500.0, 400.0), "expected low < high"),
    (lambda: LinearLaw(0.0), "scale: expected a finite non-zero number, got 0.0"),
    (lambda: StarkLaw(0.0, 0.0, 1e-2), "coefficient_hz_m2_per_v2: expected a finite non-zero"),
    (lambda: StarkLaw(-1.0, 0.0, 1e-2).to_channel(10.0), "beyond the Stark law's reach"),
    (lambda: ChannelMap({}), "a channel map needs at least one set-point"),
    (lambda: packaged_config("nowhere.toml"), "name: expected one of dry-run.toml"),
])
def test_values_refused_in_code_are_the_trees_own(build, words):
    """A wrong value given in code is a ValueRefused (exit 2), still a ValueError."""
    with pytest.raises(errors.ValueRefused, match=words) as info:
        build()
    assert isinstance(info.value, ValueError) and info.value.exit_code == cli.EXIT_BAD_INPUT


def test_the_core_raises_no_bare_value_error():
    """Every ``raise ValueError(...)`` of the package is a ValueRefused (a subclass, so callers
    that catch ValueError still do): an error a caller can cause carries its exit code."""
    found = []
    for path in sorted((Path(errors.__file__).parent).rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Raise) and isinstance(node.exc, ast.Call) \
                    and isinstance(node.exc.func, ast.Name) and node.exc.func.id == "ValueError":
                found.append(f"{path.name}:{node.lineno}")
    assert not found, found
