"""autotune.schema, the one validation library: what every file it reads can rely on.

Each check is a rule of the project's configuration contract (README, Configuration:
`FILE: KEY: expected ..., got ...`, every problem of a file at once, exit 2), stated on a
small table of its own so that it holds for every file the library reads.
"""

from __future__ import annotations

import math
from typing import Annotated, Literal

import pytest

from autotune import plausible, schema
from autotune.errors import ConfigError, FileErrors
from autotune.schema import Expect, check, integer, number, read_toml, refuse, table, text


@table
class _Inner:
    size_m: number(0.0, low_open=True, plausible=plausible.WAIST_M)
    count: integer(1, 10) = 1

    def __post_init__(self) -> None:
        if self.count > 5 and self.size_m > 0.01:
            refuse("count", "at most 5 with size_m > 0.01", self.count)


@table
class _File:
    name: text()
    kind: Literal["a", "b"]
    inner: _Inner
    note: Annotated[text(), Expect("a note (words)")] = "-"


@table(extra="ignore")
class _Open:
    value: number()


def _problems(data: object) -> dict[str, ConfigError]:
    with pytest.raises(FileErrors) as info:
        check(_File, data, file="f.toml")
    return {problem.key: problem for problem in info.value.problems}


def test_a_good_table_is_read_into_its_dataclass():
    """An integer is taken where a number is asked; defaults fill what is left out."""
    found = check(_File, {"name": "x", "kind": "a", "inner": {"size_m": 5e-3}}, file="f.toml")
    assert found == _File("x", "a", _Inner(0.005, 1), "-")
    assert check(_Open, {"value": 2}, file="f.toml").value == 2.0


def test_every_problem_of_a_file_comes_at_once_naming_file_key_expected_got():
    """Four wrong keys in two tables: one error, one line each, in the project's shape."""
    problems = _problems({"name": " ", "kind": "c", "inner": {"size_m": math.nan, "count": True}})
    assert set(problems) == {"name", "kind", "inner.size_m", "inner.count"}
    assert str(problems["inner.size_m"]) == \
        "f.toml: inner.size_m: expected a finite number > 0, got nan"
    assert str(problems["kind"]) == "f.toml: kind: expected one of 'a', 'b', got 'c'"
    assert str(problems["inner.count"]).endswith("expected an integer >= 1 and <= 10, got True")


@pytest.mark.parametrize("value", [True, "1", math.inf, -math.inf, math.nan, [1.0], None])
def test_a_number_is_strict(value):
    """A bool, a string, infinities, NaN, an array or nothing are not numbers (common practice
    of strict configuration readers: TOML types are kept, never coerced)."""
    assert "inner.size_m" in _problems({"name": "x", "kind": "a", "inner": {"size_m": value}})


def test_an_unknown_key_names_the_nearest_known_one_and_a_missing_one_its_misspelling():
    """'nam' for 'name': the unknown key gets the nearest name, the missing key the stray."""
    problems = _problems({"nam": "x", "kind": "a", "inner": {"size_m": 1e-3}})
    assert problems["nam"].hint == "did you mean 'name'?"
    assert problems["nam"].expected == "one of the keys ['inner', 'kind', 'name', 'note']"
    assert "there is 'nam': a misspelling?" in problems["name"].got


def test_a_slipped_unit_gets_its_hint_and_a_rule_names_its_key():
    """5.8 for 5.8 mm (autotune.plausible's hint, in the same pass), and a rule of one table
    (refuse in __post_init__) reported at the key it names."""
    problems = _problems({"name": "x", "kind": "a", "inner": {"size_m": 5.8}, "note": ""})
    assert problems["inner.size_m"].hint == "did you mean 5.8 mm = 0.0058?"
    assert problems["note"].expected == "a note (words)"  # the outermost words win
    problems = _problems({"name": "x", "kind": "a", "inner": {"size_m": 0.05, "count": 6}})
    assert str(problems["inner.count"]) == \
        "f.toml: inner.count: expected at most 5 with size_m > 0.01, got 6"


def test_rules_joining_tables_run_once_every_key_is_right():
    """check(rules=...) is not run on a table with a wrong key; its problems are raised together."""
    calls = []

    def rules(found):
        calls.append(found)
        return [ConfigError("f.toml", "name", "another name", found.name)]

    with pytest.raises(FileErrors):
        check(_File, {"name": "x", "kind": "z", "inner": {"size_m": 1e-3}}, file="f.toml",
              rules=rules)
    assert not calls
    with pytest.raises(FileErrors, match="f.toml: name: expected another name, got 'x'"):
        check(_File, {"name": "x", "kind": "a", "inner": {"size_m": 1e-3}}, file="f.toml",
              rules=rules)


def test_extra_keys_may_be_allowed_and_a_non_table_is_refused():
    """A rig's result may carry keys a newer rig adds; anything but a table is refused."""
    assert check(_Open, {"value": 1.5, "later": "x"}, file="r").value == 1.5
    with pytest.raises(FileErrors, match="r: <top level>: expected a table, got 3"):
        check(_Open, 3, file="r")


def test_a_file_that_cannot_be_read_is_named(tmp_path):
    """Missing, not UTF-8, not TOML: one problem on the key <file>."""
    with pytest.raises(FileErrors, match=r"absent\.toml: <file>: expected an existing TOML "
                                         r"file, got 'no such file'"):
        read_toml(tmp_path / "absent.toml")
    (tmp_path / "bad.toml").write_bytes(b"\xff\xfe")
    with pytest.raises(FileErrors, match=r"bad\.toml: <file>: expected a TOML file \(UTF-8 text\)"):
        read_toml(tmp_path / "bad.toml")
    (tmp_path / "broken.toml").write_text("[a\n", encoding="utf-8")
    with pytest.raises(FileErrors, match=r"broken\.toml: <file>: expected valid TOML"):
        read_toml(tmp_path / "broken.toml")


def test_is_number_is_the_one_test_of_a_real_number() -> None:
    """One ``is_number`` for the config, the wire, the lock and the server: a bool is an int to
    Python (the ``bool`` subclass of ``int``, Python's documentation of numeric types) and never a
    number here; numpy's scalars are (numpy registers them with ``numbers.Real``)."""
    import numpy as np

    from autotune.analysis import lock_settings
    from autotune.wire import codec

    assert schema.is_number(3) and schema.is_number(2.5) and schema.is_number(np.float64(1.0))
    assert schema.is_number(np.int32(4))
    assert not any(schema.is_number(v) for v in (True, False, "3", None, [1.0], 1j))
    assert codec.is_number is schema.is_number and lock_settings.is_number is schema.is_number
