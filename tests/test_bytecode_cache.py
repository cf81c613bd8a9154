"""The suite's compiled-module cache folder (tests/bytecode_cache.py), against the XDG Base
Directory Specification (freedesktop.org: ``$XDG_CACHE_HOME``, default ``$HOME/.cache``; "All
paths set in these environment variables must be absolute. If an implementation encounters a
relative path in any of these variables it should consider the path invalid and ignore it") and
the standard library's home lookup (pathlib.Path.home raises RuntimeError where neither ``HOME``
nor the user's password entry names a home)."""

from __future__ import annotations

import pwd

import pytest
from bytecode_cache import cache_prefix, suite_prefix


def test_the_cache_sits_below_xdg_cache_home_or_the_home_cache_folder():
    assert cache_prefix({"XDG_CACHE_HOME": "/var/cache/u", "HOME": "/h"}) == "/var/cache/u/autotune-tests/pycache"
    assert cache_prefix({"HOME": "/h"}) == "/h/.cache/autotune-tests/pycache"
    assert cache_prefix({"XDG_CACHE_HOME": "", "HOME": "/h"}) == "/h/.cache/autotune-tests/pycache"


def test_a_relative_xdg_cache_home_is_ignored_and_a_relative_home_gives_no_prefix():
    assert cache_prefix({"XDG_CACHE_HOME": "cache", "HOME": "/h"}) == "/h/.cache/autotune-tests/pycache"
    assert cache_prefix({"XDG_CACHE_HOME": "cache", "HOME": ""}) is None
    assert cache_prefix({"HOME": "relative/home"}) is None


def test_no_home_at_all_gives_no_prefix_instead_of_an_error(monkeypatch):
    """HOME unset and no password entry for the user (a container under an arbitrary user id):
    the standard library cannot name a home; the suite then runs without a prefix."""
    monkeypatch.delenv("HOME", raising=False)

    def no_entry(uid: int) -> pwd.struct_passwd:
        raise KeyError(f"getpwuid(): uid not found: {uid}")

    monkeypatch.setattr(pwd, "getpwuid", no_entry)
    with pytest.raises(RuntimeError):
        __import__("pathlib").Path.home()
    assert cache_prefix({}) is None


def test_the_suite_sets_a_prefix_only_where_bytecode_is_not_written_and_none_was_set():
    """Python writes ``__pycache__`` beside the sources unless ``PYTHONDONTWRITEBYTECODE`` is set,
    and with a prefix "any __pycache__ directories in the source code tree will be ignored" (Python
    documentation, ``sys.pycache_prefix``), the installed libraries' among them: the suite leaves a
    plain environment and a caller's prefix alone."""
    assert suite_prefix({"HOME": "/h"}) is None
    assert suite_prefix({"HOME": "/h", "PYTHONDONTWRITEBYTECODE": ""}) is None
    assert suite_prefix({"HOME": "/h", "PYTHONDONTWRITEBYTECODE": "1"}) == "/h/.cache/autotune-tests/pycache"
    assert suite_prefix({"HOME": "/h", "PYTHONDONTWRITEBYTECODE": "1", "PYTHONPYCACHEPREFIX": "/p"}) is None
    assert suite_prefix({"HOME": "", "PYTHONDONTWRITEBYTECODE": "1"}) is None
