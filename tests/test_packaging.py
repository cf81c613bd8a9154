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


def test_a_non_editable_install_runs_dry_run_from_any_folder(tmp_path: Path) -> None:
    """pip install (not editable) into a fresh venv, then `autotune dry-run --out TMP` from a
    folder outside the repository: exit 0, both stages' results written."""
    venv = tmp_path / "venv"
    # The venv sees the installed dependencies (and pip) of this interpreter; autotune itself
    # is installed into the venv, whose site-packages comes first.
    subprocess.run([sys.executable, "-m", "venv", "--system-site-packages", "--without-pip",
                    str(venv)], check=True, timeout=120)
    python = venv / "bin" / "python"
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
