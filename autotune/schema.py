"""One way to check what a person writes: a TOML file (or its dict) against typed dataclasses.

A file's layout is declared once, as frozen dataclasses (:func:`table`) whose annotations carry
each key's type and bounds (:func:`number`, :func:`integer`, :func:`text`, ``Literal[...]`` for
a choice, a nested table for a table, a default for an optional key). pydantic (v2) validates
the whole dict against them in one pass, strictly (a bool or a string is not a number, no NaN
or infinity), refusing unknown keys; :func:`check` turns every problem found into a
:class:`~autotune.errors.ConfigError` of the project's own shape and raises them all at once::

    sim-rig.toml: cavity.waist_m: expected a finite number > 0 and <= 1, got -0.0058
    sim-rig.toml: cavity.waist: expected one of the keys [...], got 'an unknown key': did you
    mean 'waist_m'?

A physical number is also held to the range a lab could mean (``number(..., plausible=...)``,
:mod:`autotune.plausible`) in the same pass. The rules a schema cannot state sit beside it: a
rule of one table in its ``__post_init__`` or, where ``dataclasses.replace`` must not run it, a
pydantic ``model_validator(mode="after")`` (:func:`refuse`, reported with the other problems),
a rule joining tables in ``check(..., rules=...)``, run once every key is right.

The dataclasses stay plain ``dataclasses`` (``replace`` does not re-check, ``asdict`` and
equality as before): pydantic only reads their annotations.
"""

from __future__ import annotations

import dataclasses
import difflib
import functools
import numbers
import tomllib
import types
import typing
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Annotated, Any, Literal, NoReturn, TypeVar

from pydantic import AfterValidator, ConfigDict, Field, Strict, TypeAdapter, ValidationError
from pydantic.fields import FieldInfo
from pydantic_core import PydanticCustomError

from autotune.errors import ConfigError, FileErrors
from autotune.plausible import Plausible

__all__ = ["table", "number", "integer", "text", "Expect", "refuse", "refuse_each", "check", "collect",
           "problem", "read_toml", "is_number"]

T = TypeVar("T")

#: The error type of a problem this module (or a schema's own rule) words itself.
_WORDED = "worded"


def is_number(value: object) -> bool:
    """A real number and not a bool (``True`` is an ``int`` to Python, never a number here);
    numpy's scalars count (they register as :class:`numbers.Real`)."""
    return isinstance(value, numbers.Real) and not isinstance(value, bool)


@dataclasses.dataclass(frozen=True)
class Expect:
    """What a key expects, in words, as the last item of its ``Annotated[...]`` (read back
    for every problem of the key; :func:`number` and the others add their own)."""

    words: str


def _bounds(low: float | None, high: float | None, low_open: bool, high_open: bool) -> str:
    def show(bound: float) -> str:  # a count in full, a number as %g
        return str(bound) if isinstance(bound, int) else f"{bound:g}"
    parts = []
    if low is not None:
        parts.append(f"{'>' if low_open else '>='} {show(low)}")
    if high is not None:
        parts.append(f"{'<' if high_open else '<='} {show(high)}")
    return (" " + " and ".join(parts)) if parts else ""


def _limits(low: float | None, high: float | None, low_open: bool, high_open: bool
            ) -> dict[str, float]:
    found: dict[str, float] = {}
    if low is not None:
        found["gt" if low_open else "ge"] = low
    if high is not None:
        found["lt" if high_open else "le"] = high
    return found


def _plausible(spec: Plausible) -> AfterValidator:
    def check(value: float) -> float:
        found = spec.problem(float(value))
        if found is not None:
            raise PydanticCustomError(_WORDED, "{expected}",
                                      {"expected": found[0], "hint": found[1]})
        return value
    return AfterValidator(check)


def number(low: float | None = None, high: float | None = None, *, low_open: bool = False,
           high_open: bool = False, plausible: Plausible | None = None,
           expected: str = "", why: str = "") -> Any:
    """A finite number (an integer is taken as a float) within ``[low, high]`` (ends open where
    said), and within the plausible range when one is given. ``expected`` replaces the words
    ``a finite number >= low and <= high``; ``why`` says where the bounds come from."""
    words = expected or "a finite number" + _bounds(low, high, low_open, high_open) + \
        (f" ({why})" if why else "")
    extra = (_plausible(plausible),) if plausible is not None else ()
    return Annotated[float, Strict(), Field(allow_inf_nan=False,
                                            **_limits(low, high, low_open, high_open)),
                     *extra, Expect(words)]


def integer(low: int | None = None, high: int | None = None, *, why: str = "") -> Any:
    """An integer (not a bool, not a float) within ``[low, high]``; ``why`` says where the
    bounds come from."""
    return Annotated[int, Strict(), Field(**_limits(low, high, False, False)),
                     Expect("an integer" + _bounds(low, high, False, False)
                            + (f" ({why})" if why else ""))]


def _not_blank(value: str) -> str:
    if not value.strip():
        raise PydanticCustomError("blank", "a blank string")
    return value


def text(expected: str = "a non-empty string", *, pattern: str | None = None) -> Any:
    """A string with something besides white space in it (matching ``pattern`` if given,
    anywhere unless anchored); ``expected`` says what it is."""
    return Annotated[str, Strict(), Field(pattern=pattern), AfterValidator(_not_blank),
                     Expect(expected)]


def refuse(key: str, expected: str, got: object) -> NoReturn:
    """Refuse a value from a table's ``__post_init__`` (a rule joining keys of one table):
    reported as ``TABLE.key: expected ..., got ...`` with the other problems of the file."""
    raise PydanticCustomError(_WORDED, "{expected}", {"key": key, "expected": expected, "got": got})


def refuse_each(found: list[tuple[str, str, object]]) -> None:
    """Refuse every ``(key, expected, got)`` a rule joining keys found wrong, all at once (one
    problem line each, with the file's other problems); nothing when ``found`` is empty."""
    if len(found) == 1:
        refuse(*found[0])
    if found:
        raise PydanticCustomError(_WORDED, "{expected}",
                                  {"each": list(found),
                                   "expected": "; ".join(words for _, words, _ in found)})


def problem(file: str, key: str, expected: str, got: object, hint: str = "") -> ConfigError:
    """One problem found by a rule beside a schema (for :func:`check`'s ``rules``)."""
    return ConfigError(file, key, expected, got, hint=hint)


@typing.dataclass_transform(frozen_default=True)
def table(cls: type[T] | None = None, *, kw_only: bool = False,
          extra: Literal["forbid", "ignore"] = "forbid") -> Any:
    """A frozen dataclass that :func:`check` validates, unknown keys refused (``@table``;
    ``kw_only=True`` for a base whose subclasses add required keys; ``extra="ignore"`` where
    unknown keys are allowed, as in a rig's results, which newer rigs may extend)."""
    def make(cls: type[T]) -> type[T]:
        cls = dataclasses.dataclass(frozen=True, kw_only=kw_only)(cls)
        cls.__pydantic_config__ = ConfigDict(extra=extra)  # type: ignore[attr-defined]
        return cls
    return make if cls is None else make(cls)


@functools.cache
def _adapter(cls: type) -> TypeAdapter:
    return TypeAdapter(cls)


def _strip(kind: Any) -> tuple[Any, list[Any]]:
    """The bare type of an annotation and its metadata (through ``X | None``)."""
    metadata: list[Any] = []
    while True:
        if typing.get_origin(kind) is Annotated:
            # Inner first, so that the outermost word on a key is the last (as Python orders
            # a flattened Annotated[Annotated[...], ...]).
            metadata = list(kind.__metadata__) + metadata
            kind = kind.__origin__
        elif isinstance(kind, types.UnionType) or typing.get_origin(kind) is typing.Union:
            options = [a for a in typing.get_args(kind) if a is not type(None)]
            if len(options) != 1:
                return kind, metadata
            kind = options[0]
        else:
            return kind, metadata


def _fields(cls: Any) -> dict[str, Any]:
    """The keys of a table (a field's alias where it has one: ``class``) and their types."""
    hints = typing.get_type_hints(cls, include_extras=True)
    keys = {}
    for field in dataclasses.fields(cls):
        aliases = [m.alias for m in _strip(hints[field.name])[1] if isinstance(m, FieldInfo)
                   and m.alias]
        keys[aliases[0] if aliases else field.name] = hints[field.name]
    return keys


def _walk(root: type, loc: Sequence[Any]) -> tuple[Any, list[Any], Any]:
    """The annotation at ``loc`` (bare type, metadata) and the table type that holds it."""
    kind, metadata, parent = root, [], None
    for part in loc:
        kind, _ = _strip(kind)
        if dataclasses.is_dataclass(kind):
            fields = _fields(kind)
            if part not in fields:
                return None, [], kind
            parent, (kind, metadata) = kind, _strip(fields[part])
        elif typing.get_origin(kind) in (dict, Mapping):
            parent, (kind, metadata) = kind, _strip(typing.get_args(kind)[1])
        elif typing.get_origin(kind) in (list, tuple):
            parent, (kind, metadata) = kind, _strip(typing.get_args(kind)[0])
        else:
            return None, [], parent
    return kind, metadata, parent


def _words(kind: Any, metadata: list[Any]) -> str:
    for item in reversed(metadata):
        if isinstance(item, Expect):
            return item.words
    if dataclasses.is_dataclass(kind) or typing.get_origin(kind) in (dict, Mapping) or \
            kind in (dict, Mapping):
        return "a table"
    if typing.get_origin(kind) is Literal:
        return "one of " + ", ".join(repr(c) for c in typing.get_args(kind))
    if kind is bool:
        return "true or false"
    return {str: "a string", int: "an integer", float: "a finite number"}.get(kind, "a value")


def _dotted(prefix: str, loc: Sequence[Any]) -> str:
    return ".".join([prefix] * bool(prefix) + [str(part) for part in loc]) or "<top level>"


def _problems(cls: type, error: ValidationError, file: str, prefix: str) -> list[ConfigError]:
    found = []
    for item in error.errors(include_url=False):
        loc, kind = item["loc"], item["type"]
        key = _dotted(prefix, loc)
        bare, metadata, parent = _walk(cls, loc)
        ctx = item.get("ctx") or {}
        if loc and loc[-1] == "[key]":  # a name of a table of names (dict[Name, ...])
            names, _, _ = _walk(cls, loc[:-2])
            key, (bare, metadata) = _dotted(prefix, loc[:-2]), _strip(typing.get_args(names)[0])
        if kind in ("unexpected_keyword_argument", "extra_forbidden"):
            allowed = sorted(_fields(parent)) if dataclasses.is_dataclass(parent) else []
            near = difflib.get_close_matches(str(loc[-1]), allowed, n=1)
            found.append(ConfigError(file, key, f"one of the keys {allowed}" if allowed
                                     else "no keys", "an unknown key",
                                     hint=f"did you mean {near[0]!r}?" if near else ""))
        elif kind == "missing":
            # A key of the table that the schema does not know, spelt close to the one missing.
            table = item.get("input")
            strays = [str(k) for k in table if k not in known] if isinstance(table, Mapping) \
                and dataclasses.is_dataclass(parent) and (known := _fields(parent)) else []
            near = difflib.get_close_matches(str(loc[-1]), strays, n=1, cutoff=0.8)
            got = f"nothing (the key is required; there is {near[0]!r}: a misspelling?)" \
                if near else "nothing"
            found.append(ConfigError(file, key, _words(bare, metadata), got))
        elif kind == _WORDED and ctx.get("each"):
            # A rule of a table that found several keys wrong (refuse_each).
            found.extend(ConfigError(file, _dotted(prefix, [*loc, name]), words, got)
                         for name, words, got in ctx["each"])
        elif kind == _WORDED:
            # A rule of a table (its __post_init__) names the key it is about.
            where = _dotted(prefix, [*loc, ctx["key"]]) if ctx.get("key") else key
            found.append(ConfigError(file, where, ctx["expected"], ctx.get("got", item["input"]),
                                     hint=ctx.get("hint", "")))
        else:
            found.append(ConfigError(file, key, _words(bare, metadata), item["input"]))
    return found


def check(cls: type[T], data: Any, *, file: str, prefix: str = "",
          rules: Callable[[T], list[ConfigError]] | None = None,
          error: Callable[[list[ConfigError]], Exception] = FileErrors) -> T:
    """Validate ``data`` (a parsed TOML table) against the dataclass ``cls``.

    Parameters
    ----------
    cls : type
        A dataclass whose annotations declare the table (see the module docstring).
    data : object
        The parsed table.
    file, prefix : str
        The file named in messages, and the dotted key of the table in it ("" at the top).
    rules : callable, optional
        Rules joining several keys, run once every key is right: the problems they find.
    error : callable, optional
        Builds the exception from every problem found (default
        :class:`~autotune.errors.FileErrors`).

    Raises
    ------
    Exception
        ``error(problems)``, with every problem of the table at once.
    """
    value, found = collect(cls, data, file=file, prefix=prefix)
    if not found and rules is not None:
        found = rules(value)
    if found:
        raise error(found)
    return value


def collect(cls: type[T], data: Any, *, file: str, prefix: str = ""
            ) -> tuple[T | None, list[ConfigError]]:
    """Validate ``data`` against ``cls`` as :func:`check` does, without raising: the value (None
    when a problem was found) and every problem, for a file read in several passes."""
    if not isinstance(data, Mapping):
        return None, [ConfigError(file, prefix or "<top level>", "a table", data)]
    try:
        return _adapter(cls).validate_python(dict(data)), []
    except ValidationError as exc:
        return None, _problems(cls, exc, file, prefix)


def read_toml(path: str | Path, *, error: Callable[[list[ConfigError]], Exception] = FileErrors,
              what: str = "TOML file") -> dict[str, Any]:
    """Parse a TOML file; a missing, unreadable, non-UTF-8 or invalid one is ``error`` naming
    the file (key ``<file>``)."""
    file = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise error([ConfigError(file, "<file>", f"an existing {what}", "no such file")]) from None
    except OSError as exc:
        raise error([ConfigError(file, "<file>", "a readable file",
                                 f"{type(exc).__name__}: {exc}")]) from exc
    try:
        return tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise error([ConfigError(file, "<file>", f"a {what} (UTF-8 text)",
                                 f"bytes that are not UTF-8 text ({exc.reason} at byte "
                                 f"{exc.start})")]) from exc
    except tomllib.TOMLDecodeError as exc:
        raise error([ConfigError(file, "<file>", "valid TOML", str(exc))]) from exc
