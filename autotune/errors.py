"""The one exception tree of autotune.

::

    AutotuneError                  everything autotune raises on purpose (exit code: exit_code)
    ├── ValueRefused               a value given to autotune's API in code is outside its domain
    │                              (a channel law's coefficient, a channel map, a Stark law asked
    │                              beyond its reach, a packaged config's name, the settings of the
    │                              lock, the search, the hold or the study; a ValueError too: the
    │                              package raises no bare ValueError, tests/test_errors.py)
    ├── ConfigError                a configuration file or value is wrong (file, key, expected, got)
    │   └── ConfigErrors           several of them, found together before anything moved
    │       └── FileErrors         every problem of one file (autotune.schema)
    │           └── SimConfigError the simulated rig's config (drivers_sim.config; a ValueError too)
    ├── LimitError                 a set-point was refused before it left this process
    │                              (outside the configured or described limits, or too large a step)
    ├── EstimationError            counts cannot give a fringe estimate (inconsistent input)
    ├── JournalError               a run folder or journal cannot be written, read or resumed
    │   ├── RunAlreadyEnded        a resume of a run that already ended with a final status
    │   └── RunFolderInUse         another live process holds the run folder's lock
    ├── Interrupted                the run was stopped by a signal (SIGINT/SIGTERM) and made safe
    └── RigError                   the rig, or the bus to it, failed
        ├── RigTimeout             no reply within the bound, after the capped retries
        ├── RigRefused             the rig answered ``ok: false``; carries its ``kind`` and ``detail``
        │   └── RigLeased          ``leased``: another client holds the rig's lease (names it)
        ├── ProtocolError          a reply (or request) does not follow the wire protocol
        ├── RigMismatch            a reply does not match what this client applied or saw
        │   └── RigRestarted       the rig's identity changed or its clock went back: it restarted
        └── DriverStartError       a lab's driver failed while being built (autotune.kit.driver_config;
                                   a RuntimeError too)

    DriverRefusal                  a rig driver refuses a request (``autotune serve`` answers it
    │                              with the error kind below; nothing was done)
    ├── OutOfRange                 ``out_of_range``: a channel value outside what the rig allows
    ├── Busy                       ``busy``: the rig cannot take the request now (never replayed)
    ├── InterlockSet               ``interlock``: a hardware interlock is set (never replayed)
    └── BadRequest                 ``bad_request``: a value the rig cannot take

Every ``AutotuneError`` carries the exit code of the commands it stops (``exit_code``: 2 for
what the user can correct, 3 for the rig, 130 for a signal; :mod:`autotune.cli` returns the
same, tests/test_errors.py holds them equal). A driver raising anything else is answered
``internal``. The refusals live apart from
``AutotuneError``: they are the vocabulary of code a lab writes (see :mod:`autotune.driver`),
not errors of this program.

Library exceptions (zmq, json, tomllib, OSError) are translated at the module boundary
where they occur and chained with ``raise ... from exc``.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import ClassVar

__all__ = [
    "EXIT_BAD_INPUT",
    "EXIT_RIG",
    "EXIT_INTERRUPTED",
    "AutotuneError",
    "ValueRefused",
    "ConfigError",
    "ConfigErrors",
    "FileErrors",
    "LimitError",
    "EstimationError",
    "JournalError",
    "RunAlreadyEnded",
    "RunFolderInUse",
    "Interrupted",
    "RigError",
    "RigTimeout",
    "RigRefused",
    "RigLeased",
    "ProtocolError",
    "RigMismatch",
    "RigRestarted",
    "DriverRefusal",
    "OutOfRange",
    "Busy",
    "InterlockSet",
    "BadRequest",
]


#: Exit codes of the commands (a contract, README "Exit codes"): bad input, the rig, a signal.
EXIT_BAD_INPUT = 2
EXIT_RIG = 3
EXIT_INTERRUPTED = 130


class AutotuneError(Exception):
    """Base of every error autotune raises on purpose; ``exit_code`` is what a command that
    it stops exits with."""

    exit_code: ClassVar[int] = EXIT_BAD_INPUT


class ValueRefused(AutotuneError, ValueError):
    """A value given to autotune's API in code (not read from a file) is outside its domain:
    a channel law's coefficient, a channel map with no or shared channels, a Stark law asked
    for a detuning beyond its reach, a packaged config's name. A :class:`ValueError` too, as
    these were."""


class ConfigError(AutotuneError):
    """A configuration file or value is wrong.

    Parameters
    ----------
    file : str
        The file that was read (or ``"<memory>"``).
    key : str
        Dotted key path of the offending value (``"search.shots_per_phase"``).
    expected : str
        What was expected, in words.
    got : object
        What was found.
    hint : str, optional
        What the value was probably meant to be (``"did you mean 49 kHz = 49000?"``), shown
        after it.
    """

    def __init__(self, file: str, key: str, expected: str, got: object, *,
                 hint: str = "") -> None:
        self.file = str(file)
        self.key = key
        self.expected = expected
        self.got = got
        self.hint = hint
        super().__init__(f"{self.file}: {key}: expected {expected}, got {got!r}"
                         + (f": {hint}" if hint else ""))


class ConfigErrors(ConfigError):
    """Several configuration problems, reported together (the first one's fields are kept).

    Parameters
    ----------
    problems : sequence of ConfigError
        Every problem found, in the order found (at least one).
    """

    def __init__(self, problems: Sequence[ConfigError]) -> None:
        if not problems:
            raise ValueRefused("ConfigErrors: expected at least one problem")
        self.problems = list(problems)
        first = self.problems[0]
        super().__init__(first.file, first.key, first.expected, first.got,
                         hint=getattr(first, "hint", ""))
        if len(self.problems) > 1:
            lines = [f"{len(self.problems)} problems, nothing was sent to the rig:"]
            lines += [f"  - {problem}" for problem in self.problems]
            self.args = ("\n".join(lines),)


class FileErrors(ConfigErrors):
    """Every problem of one file, reported together (``FILE: N problems:``, one line each);
    what :mod:`autotune.schema` raises for a file a person wrote.

    Parameters
    ----------
    problems : sequence of ConfigError
        Every problem found, in the order found (at least one).
    """

    def __init__(self, problems: Sequence[ConfigError]) -> None:
        super().__init__(problems)
        if len(self.problems) > 1:
            self.args = (f"{self.file}: {len(self.problems)} problems:\n"
                         + "\n".join(f"  - {problem}" for problem in self.problems),)


class LimitError(AutotuneError):
    """A set-point was refused locally: outside its limits, or a step larger than allowed."""


class EstimationError(AutotuneError, ValueError):
    """Counts cannot give a fringe estimate (shapes differ, negative counts, too few phases)."""


class JournalError(AutotuneError):
    """A run folder or its journal cannot be written, read or resumed."""


class RunAlreadyEnded(JournalError):
    """A resume of a run (or night) whose journal ends with a final status: nothing is left to
    do. ``status`` is that status; ``result`` the run's ``result.json`` (None if it has none),
    so that a resume after a process killed at its very end still reports the outcome."""

    def __init__(self, message: str, status: str, result: dict | None) -> None:
        super().__init__(message)
        self.status = status
        self.result = result


class RunFolderInUse(JournalError):
    """Another live process holds the run folder's lock (see :mod:`autotune.run.runlock`).

    Attributes
    ----------
    holder : dict or None
        What the holder wrote about itself (``pid``, ``host``, ``user``, ``command``,
        ``since``), None when its holder file cannot be read.
    """

    def __init__(self, message: str, holder: dict | None) -> None:
        super().__init__(message)
        self.holder = holder


class Interrupted(AutotuneError):
    """The run was stopped by SIGINT/SIGTERM.

    Attributes
    ----------
    safe : bool or None
        True once the rig confirmed its safe set-points, False if the ``safe`` op failed, None
        while nobody tried (for example a stop between two stages, with no move in progress).
    safe_detail : str
        The rig's error when ``safe`` is False, else an empty string.
    """

    exit_code: ClassVar[int] = EXIT_INTERRUPTED

    def __init__(self, message: str) -> None:
        super().__init__(message)
        self.safe: bool | None = None
        self.safe_detail = ""


class RigError(AutotuneError):
    """The rig, or the bus to it, failed."""

    exit_code: ClassVar[int] = EXIT_RIG


class RigTimeout(RigError):
    """No reply arrived within the configured bound, after the capped number of retries."""


class RigRefused(RigError):
    """The rig answered with an error reply.

    Parameters
    ----------
    kind : str
        The protocol's error kind (``bad_request``, ``unknown_op``, ``out_of_range``,
        ``busy``, ``interlock``, ``internal``, ...).
    detail : str
        The rig's own explanation.
    """

    def __init__(self, kind: str, detail: str) -> None:
        self.kind = kind
        self.detail = detail
        super().__init__(f"rig refused ({kind}): {detail}")


class RigLeased(RigRefused):
    """The rig is leased to another client (error kind ``leased``): nothing was done. The
    detail names the holder and when its lease runs out.

    Attributes
    ----------
    holder : str or None
        The holding client's identity, when the rig said it.
    expires_in_s : float or None
        Seconds until its lease runs out unless renewed, when the rig said it.
    """

    def __init__(self, detail: str, holder: str | None = None,
                 expires_in_s: float | None = None) -> None:
        super().__init__("leased", detail)
        self.holder = holder
        self.expires_in_s = expires_in_s


class ProtocolError(RigError):
    """A message does not follow the wire protocol (bad JSON, wrong version, missing key)."""


class RigMismatch(RigError):
    """A reply contradicts what this client applied or saw: the set-points in force are not
    those it applied, or the rig clock went back. Its data are never filed as measurements.

    Attributes
    ----------
    reply : object or None
        The parsed reply that did not match (an ``Acquisition`` whose shots the rig took), so
        the caller can account for them; None when there was none.
    """

    reply: object | None = None


class RigRestarted(RigMismatch):
    """The rig restarted: its identity (``instance``) changed, or its clock went back to an
    earlier time. Its set-points in force, clock and replay cache are gone."""


class DriverRefusal(Exception):
    """A rig driver refuses a request; the server answers it with :attr:`kind` and the message.

    Raise one of the subclasses from a driver method, with a message that names what was
    wrong, what was expected and what was received. Nothing may have been done when it is
    raised.
    """

    kind = "internal"


class OutOfRange(DriverRefusal):
    """A value is outside what the rig allows (answered ``out_of_range``)."""

    kind = "out_of_range"


class Busy(DriverRefusal):
    """The rig cannot take the request now; the client retries later (answered ``busy``)."""

    kind = "busy"


class InterlockSet(DriverRefusal):
    """A hardware interlock is set; nothing was changed (answered ``interlock``)."""

    kind = "interlock"


class BadRequest(DriverRefusal):
    """A value the rig cannot take, other than a limit (answered ``bad_request``)."""

    kind = "bad_request"
