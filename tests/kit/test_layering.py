"""The direction of the arrows (DEVELOPERS.md, Habits): drivers_sim knows only the protocol and the
driver interface; autotune imports drivers_sim only where the simulated rig is started."""

from __future__ import annotations

import ast
from pathlib import Path

from rig_process import REPO

# Where autotune may start the simulated rig: the rig and dry-run commands, and the study.
ALLOWED_IN_AUTOTUNE = {"cli", "bench"}


def _imports(path: Path) -> set[str]:
    found = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.add(node.module)
    return found


def test_drivers_sim_imports_only_the_protocol_and_the_driver_interface():
    """Every autotune module drivers_sim imports is autotune.wire.protocol, autotune.driver, the
    error tree they raise from (autotune.errors), or a pure leaf that reads a file the way the
    client reads its own: the table of plausible physical ranges (autotune.plausible, which
    imports nothing of autotune) and the validation library (autotune.schema, which imports
    only those two)."""
    used = {name for path in (REPO / "drivers_sim").glob("*.py") for name in _imports(path)
            if name == "autotune" or name.startswith("autotune.")}
    assert used <= {"autotune.wire.protocol", "autotune.driver", "autotune.errors",
                    "autotune.plausible", "autotune.schema"}, used
    assert not {name for name in _imports(REPO / "autotune" / "plausible.py")
                if name.startswith("autotune")}
    assert not {name for name in _imports(REPO / "autotune" / "errors.py")
                if name.startswith("autotune")}
    assert {name for name in _imports(REPO / "autotune" / "schema.py")
            if name.startswith("autotune")} <= {"autotune.errors", "autotune.plausible"}


def test_autotune_imports_drivers_sim_only_where_it_starts_the_simulated_rig():
    """drivers_sim appears only in the command line (rig, dry-run) and the benchmark study."""
    users = {path.relative_to(REPO / "autotune").parts[0] for path in (REPO / "autotune").rglob("*.py")
             if any(name.split(".")[0] == "drivers_sim" for name in _imports(path))}
    assert users <= ALLOWED_IN_AUTOTUNE, users
