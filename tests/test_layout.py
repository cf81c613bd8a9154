"""The layout of the package (DEVELOPERS.md, Layout): each package imports only what its
``__init__`` docstring allows, the packages import each other without a circle, and no module of
the packages built by concern imports another module's private name.

Outside reference: the files of this repository, read with the standard library's parser
(:mod:`ast`); an import inside a function or under ``TYPE_CHECKING`` counts like any other,
because it is an arrow all the same.
"""

from __future__ import annotations

import ast
from pathlib import Path

from rig_process import REPO

AUTOTUNE = REPO / "autotune"

#: The foundation: top-level modules every package may import (the exceptions, the plausible
#: ranges, the progress data and its units, the validation library, the run configuration, the
#: packaged configuration files' paths).
FOUNDATION = frozenset({"autotune", "errors", "plausible", "progress", "schema", "config",
                        "packaged"})

#: What each unit may import besides itself, as its ``__init__`` docstring says.
ALLOWED: dict[str, frozenset[str]] = {
    "errors": frozenset(),
    "plausible": frozenset(),
    "progress": frozenset(),
    "schema": frozenset({"errors", "plausible"}),
    "packaged": frozenset({"errors"}),
    "config": frozenset({"errors", "plausible", "schema", "packaged"}),
    "autotune": frozenset({"errors"}),
    "analysis": FOUNDATION | {"wire"},  # of the wire, only WIRE_FOR_ANALYSIS
    "wire": FOUNDATION,
    "kit": FOUNDATION | {"wire"},
    "run": FOUNDATION | {"analysis", "wire"},
    "report": FOUNDATION | {"analysis", "wire", "run"},
    "cli": FOUNDATION | {"analysis", "wire", "kit", "run", "report", "drivers_sim"},
    "bench": FOUNDATION | {"analysis", "wire", "kit", "run", "report", "drivers_sim"},
}

#: What the pure analysis may import of the wire: the module that says what a measurement costs
#: (``measurement_shots``, the one place for ``2 * phases * shots``), which imports nothing but
#: the wire's vocabulary (``autotune.wire.terms``).
WIRE_FOR_ANALYSIS = frozenset({"autotune.wire.rig"})

#: The packages built by concern, where no module imports another's private name.
BY_CONCERN = ("analysis", "wire", "kit", "run", "bench", "cli", "report")

#: Private names still imported across modules, each with why it is left (none today: a name
#: another module needs is public in its own, listed in its ``__all__``).
PRIVATE_IMPORTS_LEFT: dict[tuple[str, str], set[str]] = {}


def _unit(path: Path) -> str:
    """The package (or foundation module) a file of autotune belongs to."""
    parts = path.relative_to(AUTOTUNE).parts
    if len(parts) > 1:
        return parts[0]
    name = path.stem
    if name == "__init__":
        return "autotune"
    # The lab's public path to the driver contract re-exports the kit's module.
    return "kit" if name == "driver" else name


def _target(module: str) -> str | None:
    """The unit an imported module belongs to, or None outside autotune and drivers_sim."""
    parts = module.split(".")
    if parts[0] == "drivers_sim":
        return "drivers_sim"
    if parts[0] != "autotune":
        return None
    if len(parts) == 1:
        return "autotune"
    return "kit" if parts[1] == "driver" else parts[1]


def _imports(path: Path) -> list[ast.ImportFrom | ast.Import]:
    return [node for node in ast.walk(ast.parse(path.read_text(encoding="utf-8")))
            if isinstance(node, (ast.Import, ast.ImportFrom))]


def _modules(node: ast.ImportFrom | ast.Import) -> list[str]:
    if isinstance(node, ast.Import):
        return [alias.name for alias in node.names]
    if node.level:
        raise AssertionError("relative import: autotune spells its imports in full")
    # ``from autotune import x`` imports the module autotune.x when x is one.
    if node.module == "autotune":
        return [f"autotune.{alias.name}" if (AUTOTUNE / f"{alias.name}.py").is_file()
                or (AUTOTUNE / alias.name).is_dir() else "autotune" for alias in node.names]
    return [node.module or ""]


def _graph() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {}
    for path in AUTOTUNE.rglob("*.py"):
        unit = _unit(path)
        for node in _imports(path):
            for module in _modules(node):
                target = _target(module)
                if target is not None and target != unit:
                    graph.setdefault(unit, set()).add(target)
    return graph


def test_every_file_belongs_to_a_known_unit() -> None:
    """Every module of autotune is in a package by concern or is a foundation module, so a new
    module at the top level is a decision, not an accident."""
    units = {_unit(path) for path in AUTOTUNE.rglob("*.py")}
    assert units <= set(ALLOWED), units - set(ALLOWED)
    for package in ("analysis", "wire", "kit", "run", "report", "bench", "cli"):
        assert (AUTOTUNE / package / "__init__.py").is_file(), package


def test_each_package_imports_only_what_its_docstring_allows() -> None:
    """The arrows between packages point down: foundation <- analysis, wire <- kit, run <-
    report <- cli, bench; drivers_sim only from the command line and the study."""
    wrong = {unit: sorted(targets - ALLOWED[unit]) for unit, targets in _graph().items()
             if targets - ALLOWED[unit]}
    assert not wrong, wrong


def test_each_package_docstring_states_what_it_may_import() -> None:
    """Each package's ``__init__`` says what lives there and what it may import."""
    for package in ("analysis", "wire", "kit", "run", "bench", "cli"):
        doc = ast.get_docstring(ast.parse((AUTOTUNE / package / "__init__.py").read_text(
            encoding="utf-8"))) or ""
        assert "may import" in doc, package
        assert "test_layout.py" in doc, package


def test_the_analysis_takes_of_the_wire_only_a_measurements_shot_count() -> None:
    """The analysis stays pure (no socket): of the wire it imports only
    :data:`WIRE_FOR_ANALYSIS`, and that module imports only the wire's vocabulary at run time."""
    used = {module for path in (AUTOTUNE / "analysis").rglob("*.py") for node in _imports(path)
            for module in _modules(node) if module.startswith("autotune.wire")}
    assert used <= WIRE_FOR_ANALYSIS, used - WIRE_FOR_ANALYSIS
    tree = ast.parse((AUTOTUNE / "wire" / "rig.py").read_text(encoding="utf-8"))
    at_run_time = {module for node in tree.body if isinstance(node, (ast.Import, ast.ImportFrom))
                   for module in _modules(node) if module.startswith("autotune")}
    assert at_run_time <= {"autotune.wire.terms"}, at_run_time
    terms = ast.parse((AUTOTUNE / "wire" / "terms.py").read_text(encoding="utf-8"))
    assert not {module for node in terms.body if isinstance(node, (ast.Import, ast.ImportFrom))
                for module in _modules(node) if module.startswith("autotune")}


def test_no_import_circle_between_packages() -> None:
    """The graph of imports between units is acyclic (depth-first search, common practice)."""
    graph = _graph()
    state: dict[str, int] = {}
    circle: list[str] = []

    def visit(node: str, trail: list[str]) -> bool:
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                circle.extend(trail + [node, nxt])
                return True
            if state.get(nxt) is None and visit(nxt, trail + [node]):
                return True
        state[node] = 2
        return False

    for node in sorted(graph):
        if state.get(node) is None and visit(node, []):
            break
    assert not circle, " -> ".join(circle)


def test_no_private_name_is_imported_across_modules() -> None:
    """A module of the packages by concern imports only public names of another module; the
    few left are listed above with their reason, and the list holds no name no longer used."""
    found: dict[tuple[str, str], set[str]] = {}
    for package in BY_CONCERN:
        for path in (AUTOTUNE / package).rglob("*.py"):
            for node in _imports(path):
                if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("autotune"):
                    private = {alias.name for alias in node.names
                               if alias.name.startswith("_") and not alias.name.startswith("__")}
                    if private:
                        key = (path.relative_to(AUTOTUNE).as_posix(), node.module or "")
                        found.setdefault(key, set()).update(private)
    extra = {key: names - PRIVATE_IMPORTS_LEFT.get(key, set()) for key, names in found.items()
             if names - PRIVATE_IMPORTS_LEFT.get(key, set())}
    assert not extra, extra
    stale = {key: names - found.get(key, set()) for key, names in PRIVATE_IMPORTS_LEFT.items()
             if names - found.get(key, set())}
    assert not stale, f"no longer imported, shrink the list: {stale}"


def test_drivers_sim_sees_the_protocol_and_the_driver_contract_at_their_public_paths() -> None:
    """drivers_sim is served like a lab's driver: it imports the contract at the lab's path
    (autotune.driver, as the README shows) and the protocol's public module."""
    used = {module for path in (REPO / "drivers_sim").glob("*.py")
            for node in _imports(path) for module in _modules(node)
            if module.split(".")[0] == "autotune"}
    assert "autotune.driver" in used and "autotune.wire.protocol" in used, used
    assert not {m for m in used if m.startswith("autotune.kit")}, used
