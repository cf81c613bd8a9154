"""DRIVER.toml: which driver ``autotune serve`` loads, where it listens, and the channel map.

Layout (every key is checked; an unknown one is refused)::

    [driver]
    class = "lab_driver.driver:LabDriver"   # module:Class of the driver (autotune.driver)
    python_path = ["."]                     # optional: folders put first on the import path,
                                            # relative to this file
    [driver.options]                        # optional: passed to the class (keyword arguments,
    supply_address = "tcp://10.0.0.7:5025"  # or to its from_config(options, config_dir))

    [server]                                # optional
    bind = "tcp://127.0.0.1:5560"           # default; loopback unless you mean otherwise
    curve_secret_key_file = "keys/server.key_secret"   # optional, both or neither,
    curve_allowed_dir = "keys/allowed"                 # relative to this file
    start_timeout_s = 60.0                  # optional: longest start of the driver (s)
    stop_timeout_s = 30.0                   # optional: longest wait for a driver call at a stop (s)
    safe_on_stop = false                    # optional: call the driver's safe() when serve stops

    [setpoints.velocity]                    # the channel map, see autotune.kit.channels
    ...
    [setpoints.detuning]
    ...

The ``[setpoints]`` tables are checked against the driver's own channel description once the
driver is built (:class:`autotune.kit.served.ServedDriver`); everything else here, at load.
"""

from __future__ import annotations

import dataclasses
import difflib
import importlib
import inspect
import sys
import traceback
import types
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from pydantic import Field, Strict

from autotune.errors import ConfigError, RigError
from autotune.plausible import SERVER_TIMEOUT_S
from autotune.schema import Expect, check, number, problem, read_toml, refuse, table, text

__all__ = ["DEFAULT_BIND", "DEFAULT_START_TIMEOUT_S", "DEFAULT_STOP_TIMEOUT_S",
           "DriverConfig", "DriverStartError", "load_driver_config", "build_driver"]

DEFAULT_BIND = "tcp://127.0.0.1:5560"
"""Where a server listens unless told otherwise: loopback only."""

DEFAULT_START_TIMEOUT_S = 60.0
"""How long a driver may take to start (built, described, its status read) unless told."""

DEFAULT_STOP_TIMEOUT_S = 30.0
"""How long a stopping server waits for a driver call in progress unless told."""


class DriverStartError(RigError, RuntimeError):
    """The driver was found but failed while being built (its hardware, most often): a
    :class:`~autotune.errors.RigError` (``serve`` exits 3), and a RuntimeError as it was."""


@dataclass(frozen=True)
class DriverConfig:
    """A checked DRIVER.toml.

    Attributes
    ----------
    path : Path
        The file read.
    driver_class : str
        ``module:Class`` of the driver.
    python_path : tuple of Path
        Folders put first on the import path before the driver's module is imported.
    options : Mapping[str, Any]
        The ``[driver.options]`` table.
    bind : str
        Endpoint to listen on.
    curve_secret_key_file, curve_allowed_dir : Path or None
        CURVE keys of the server (both or neither).
    start_timeout_s : float
        Longest the driver may take to start (s): built from its options, described and its
        status read; past it, ``serve`` gives up (its hardware is taken as unreachable).
    stop_timeout_s : float
        Longest ``serve`` waits, after SIGINT/SIGTERM, for a driver call in progress (and for
        ``safe_on_stop`` and ``close()``); past it, or at a second signal, it exits at once.
    safe_on_stop : bool
        Whether ``serve`` calls the driver's ``safe`` procedure when it stops (by default it
        leaves the hardware where it is).
    setpoints : Mapping[str, Any]
        The ``[setpoints]`` tables (the channel map), checked when the driver is known.
    """

    path: Path
    driver_class: str
    python_path: tuple[Path, ...]
    options: Mapping[str, Any]
    bind: str
    curve_secret_key_file: Path | None
    curve_allowed_dir: Path | None
    setpoints: Mapping[str, Any]
    start_timeout_s: float = DEFAULT_START_TIMEOUT_S
    stop_timeout_s: float = DEFAULT_STOP_TIMEOUT_S
    safe_on_stop: bool = False


_SECONDS = number(0.0, SERVER_TIMEOUT_S, low_open=True, expected=(
    f"a finite number of seconds > 0 and at most {SERVER_TIMEOUT_S:g} s (a driver that takes "
    f"longer is taken as hung)"))
_PATH = text("a path (relative to this file)")


@table
class _DriverTable:
    target: Annotated[text("'module:Class', e.g. 'lab_driver.driver:LabDriver'",
                           pattern=r"^[^\W\d]\w*(\.[^\W\d]\w*)*:[^\W\d]\w*(\.[^\W\d]\w*)*$"),
                      Field(alias="class")]
    python_path: Annotated[list[text("a folder (relative to this file)")],
                           Expect("a list of folders (strings)")] = dataclasses.field(
        default_factory=list)
    options: dict[str, Any] = dataclasses.field(default_factory=dict)


@table
class _ServerTable:
    bind: text("an endpoint such as 'tcp://127.0.0.1:5560'", pattern="://") = DEFAULT_BIND
    curve_secret_key_file: _PATH | None = None
    curve_allowed_dir: _PATH | None = None
    start_timeout_s: _SECONDS = DEFAULT_START_TIMEOUT_S
    stop_timeout_s: _SECONDS = DEFAULT_STOP_TIMEOUT_S
    safe_on_stop: Annotated[bool, Strict()] = False

    def __post_init__(self) -> None:
        if (self.curve_secret_key_file is None) != (self.curve_allowed_dir is None):
            refuse("curve_secret_key_file", "both curve_secret_key_file and curve_allowed_dir, "
                   "or neither", {"curve_secret_key_file": self.curve_secret_key_file,
                                  "curve_allowed_dir": self.curve_allowed_dir})


@table
class _DriverFile:
    driver: _DriverTable
    setpoints: dict[str, Any]
    server: _ServerTable = _ServerTable()


def load_driver_config(path: str | Path) -> DriverConfig:
    """Read and check a DRIVER.toml (all but the channel map's fit to the driver).

    Raises
    ------
    ConfigError
        Naming the file, the key, what was expected and what was found (a
        :class:`~autotune.errors.FileErrors` with every problem of the file).
    """
    path = Path(path)
    base = path.resolve().parent

    def folders(found: _DriverFile) -> list[ConfigError]:
        return [problem(str(path), "driver.python_path", "existing folders (relative to this "
                        "file)", str((base / folder).resolve()))
                for folder in found.driver.python_path if not (base / folder).is_dir()]

    found = check(_DriverFile, read_toml(path, what="DRIVER.toml"), file=str(path),
                  rules=folders)
    server = found.server
    return DriverConfig(
        path=path, driver_class=found.driver.target,
        python_path=tuple((base / folder).resolve() for folder in found.driver.python_path),
        options=types.MappingProxyType(dict(found.driver.options)), bind=server.bind,
        curve_secret_key_file=None if server.curve_secret_key_file is None
        else base / server.curve_secret_key_file,
        curve_allowed_dir=None if server.curve_allowed_dir is None
        else base / server.curve_allowed_dir,
        setpoints=types.MappingProxyType(dict(found.setpoints)),
        start_timeout_s=server.start_timeout_s, stop_timeout_s=server.stop_timeout_s,
        safe_on_stop=server.safe_on_stop)


def build_driver(config: DriverConfig) -> Any:
    """Import the driver class and build it from its options.

    Returns
    -------
    object
        The driver.

    Raises
    ------
    ConfigError
        If the module cannot be imported (missing, or its code fails at import: a syntax
        error, a name error), the class is not found, or the options do not fit the class's
        signature (an unknown or a missing keyword), or the class's ``from_config`` raises
        a TypeError itself (its refusal of the options).
    DriverStartError
        If building the driver fails otherwise (its hardware cannot be reached or answers
        what the driver cannot read, an option value the driver refuses); the message names
        where the driver raised, the cause is chained.
    """
    file = str(config.path)
    for folder in reversed(config.python_path):
        if str(folder) not in sys.path:
            sys.path.insert(0, str(folder))
    module_name, _, class_name = config.driver_class.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise ConfigError(file, "driver.class", f"an importable module {module_name!r} (see driver.python_path)",
                          f"{type(exc).__name__}: {exc}") from exc
    except Exception as exc:  # noqa: BLE001 - the lab's module failed while importing
        raise ConfigError(file, "driver.class", f"a module {module_name!r} that imports without error",
                          f"{type(exc).__name__}: {exc}{_raised_at(exc)}") from exc
    target: Any = module
    for part in class_name.split("."):
        target = getattr(target, part, None)
    if not isinstance(target, type):
        raise ConfigError(file, "driver.class", f"a class {class_name!r} in module {module_name!r}", target)
    options = dict(config.options)
    factory = getattr(target, "from_config", None)
    if not callable(factory):
        try:
            signature = inspect.signature(target)
        except (TypeError, ValueError):  # no signature to read (a class built in C): try it
            signature = None
        problem = None if signature is None else _options_problem(signature, options)
        if problem:
            raise ConfigError(file, "driver.options", f"the keyword arguments of "
                              f"{config.driver_class}{signature}", problem)
    try:
        if callable(factory):
            return factory(options, config.path.resolve().parent)
        return target(**options)
    except TypeError as exc:
        if callable(factory) and _raised_by(exc, factory):
            # from_config has no signature to check its options against: a TypeError it raises
            # itself is its refusal of the options (autotune.driver; drivers_sim's, for one).
            raise ConfigError(file, "driver.options", f"options that {config.driver_class}"
                              f".from_config accepts", f"{type(exc).__name__}: {exc}") from exc
        raise DriverStartError(f"{config.driver_class} failed to start: {type(exc).__name__}: "
                               f"{exc}{_raised_at(exc)}") from exc
    except Exception as exc:  # noqa: BLE001 - any failure of the lab's code while starting
        raise DriverStartError(f"{config.driver_class} failed to start: {type(exc).__name__}: "
                               f"{exc}{_raised_at(exc)}") from exc


def _options_problem(signature: inspect.Signature, options: Mapping[str, Any]) -> str:
    """What keeps ``options`` from binding to ``signature`` ("" when they bind): unknown
    options with the nearest accepted name, then missing required ones."""
    try:
        signature.bind(**options)
        return ""
    except TypeError as exc:
        fallback = str(exc)
    params = signature.parameters
    named = [n for n, p in params.items()
             if p.kind in (p.POSITIONAL_OR_KEYWORD, p.KEYWORD_ONLY)]
    problems = []
    if not any(p.kind == p.VAR_KEYWORD for p in params.values()):
        for name in options:
            if name not in named:
                near = difflib.get_close_matches(name, named, n=1)
                problems.append(f"unknown option {name!r}"
                                + (f" (did you mean {near[0]!r}?)" if near else ""))
    for name in named:
        p = params[name]
        if p.default is p.empty and name not in options:
            problems.append(f"missing option {name!r}")
    return "; ".join(problems) or fallback


def _raised_by(exc: BaseException, function: Any) -> bool:
    """Whether ``exc`` was raised in ``function``'s own frame (not in what it called)."""
    code = getattr(getattr(function, "__func__", function), "__code__", None)
    tb = exc.__traceback__
    while tb is not None and tb.tb_next is not None:
        tb = tb.tb_next
    return code is not None and tb is not None and tb.tb_frame.f_code is code


def _raised_at(exc: BaseException) -> str:
    """`` (raised at FILE:LINE in FUNCTION)`` for the innermost frame of ``exc``, or where a
    syntax error is."""
    if isinstance(exc, SyntaxError) and exc.filename:
        return f" (at {Path(exc.filename).name}:{exc.lineno})"
    frames = traceback.extract_tb(exc.__traceback__)
    if not frames:
        return ""
    last = frames[-1]
    return f" (raised at {Path(last.filename).name}:{last.lineno} in {last.name})"
