"""The package as a user installs it: the configurations a command defaults to ship inside it,
and a non-editable install runs ``autotune dry-run`` from a folder outside the repository."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest
from rig_process import REPO

from autotune.config import PACKAGED_CONFIGS, packaged_config

_SOURCES = ("pyproject.toml", "README.md", "autotune", "drivers_sim")


def _source_copy(tmp_path: Path) -> Path:
    """The files a build reads, copied: a build leaves nothing in the work tree."""
    source = tmp_path / "source"
    source.mkdir()
    for name in _SOURCES:
        path = REPO / name
        if path.is_dir():
            shutil.copytree(path, source / name,
                            ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        else:
            shutil.copy2(path, source / name)
    return source


def _environment_without_the_work_tree() -> dict[str, str]:
    env = dict(os.environ)
    env.pop("PYTHONPATH", None)
    return env


@pytest.mark.parametrize("name", PACKAGED_CONFIGS)
def test_repository_configs_equal_the_packaged_ones(name: str) -> None:
    """configs/NAME (the path the README documents) is byte for byte the packaged copy."""
    assert (REPO / "configs" / name).read_bytes() == packaged_config(name).read_bytes()


def test_packaged_config_refuses_an_unknown_name() -> None:
    """Asking for a file that is not shipped names the ones that are."""
    with pytest.raises(ValueError, match="dry-run.toml"):
        packaged_config("nothing.toml")


def test_the_wheel_holds_every_default_config(tmp_path: Path) -> None:
    """A wheel built from the sources contains autotune/data/*.toml, identical to configs/."""
    source = _source_copy(tmp_path)
    done = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps",
                           "--no-build-isolation", "--quiet", "-w", str(tmp_path / "dist"),
                           str(source)], capture_output=True, text=True, timeout=300,
                          cwd=tmp_path, stdin=subprocess.DEVNULL)
    assert done.returncode == 0, done.stderr[-3000:]
    (wheel,) = (tmp_path / "dist").glob("autotune-*.whl")
    with zipfile.ZipFile(wheel) as archive:
        for name in PACKAGED_CONFIGS:
            assert archive.read(f"autotune/data/{name}") == (REPO / "configs" / name).read_bytes()


def _site_folders_of_this_environment() -> list[str]:
    """The folders this interpreter imports installed packages from (its venv's and, for a
    venv made with --system-site-packages, the base's): the test environment's packages."""
    folders = [entry for entry in sys.path
               if Path(entry).name in ("site-packages", "dist-packages") and Path(entry).is_dir()]
    return list(dict.fromkeys(folders))


def _venv_seeing_this_environment(venv: Path) -> Path:
    """A fresh venv whose interpreter imports the test environment's packages (pip, setuptools,
    numpy, ...) after its own, whether the suite runs in a venv or in a base interpreter.

    ``venv --system-site-packages`` is not used: from inside a venv it exposes the *base*
    interpreter's packages, not the test environment's (a base setuptools 65 then refused the
    project's SPDX licence). The folders are listed as plain paths in a .pth file, so the
    test environment's own editable install of autotune (a .pth in those folders) is not
    processed, and the venv's non-editable autotune is the one imported."""
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True,
                   timeout=120)
    python = venv / "bin" / "python"
    purelib = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                             capture_output=True, text=True, check=True, timeout=60).stdout.strip()
    Path(purelib, "_test_environment.pth").write_text(
        "\n".join(_site_folders_of_this_environment()) + "\n", encoding="utf-8")
    return python


def test_a_non_editable_install_runs_dry_run_from_any_folder(tmp_path: Path) -> None:
    """pip install (not editable) into a fresh venv, then `autotune dry-run --out TMP` from a
    folder outside the repository: exit 0, both stages' results written."""
    venv = tmp_path / "venv"
    python = _venv_seeing_this_environment(venv)
    env = _environment_without_the_work_tree()
    done = subprocess.run([str(python), "-m", "pip", "install", "--no-deps",
                           "--no-build-isolation", "--quiet", str(_source_copy(tmp_path))],
                          capture_output=True, text=True, timeout=300, cwd=tmp_path, env=env,
                          stdin=subprocess.DEVNULL)
    assert done.returncode == 0, done.stderr[-3000:]
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    where = subprocess.run([str(python), "-c", "import autotune; print(autotune.__file__)"],
                           capture_output=True, text=True, timeout=60, cwd=elsewhere, env=env)
    assert Path(where.stdout.strip()).is_relative_to(venv), where.stdout + where.stderr
    out = tmp_path / "out"
    run = subprocess.run([str(venv / "bin" / "autotune"), "dry-run", "--out", str(out)],
                         capture_output=True, text=True, timeout=600, cwd=elsewhere, env=env,
                         stdin=subprocess.DEVNULL)
    assert run.returncode == 0, run.stderr[-3000:]
    assert (out / "calibrate" / "result.json").is_file()
    assert (out / "retune" / "result.json").is_file()
    assert not any(elsewhere.iterdir())
