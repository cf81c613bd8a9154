"""The README works as written: every command line in its code blocks (and in the benchmark
page it links) is run, or its command's --help is, or the test that runs it is named here, or
the reason it is not run here is; every option it names exists; every configuration key that
autotune/config.py reads is documented in its Configuration section, and nothing else is."""

from __future__ import annotations

import argparse
import functools
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest
from cli_helpers import README_DRY_RUN, DryRun
from rig_process import REPO, spawn_server

from autotune import config
from autotune.cli import parser as cli_parser

README = REPO / "README.md"
BENCHMARKS = REPO / "benchmarks" / "README.md"

#: How each command line of the documents is checked. "run": exactly as written, from a folder
#: of its own (the quick start's with its my-rig.toml); "run in the repository": exactly as
#: written, from the repository's root; "help": its command's --help runs and
#: lists every option of the line; "elsewhere": the named test file runs it as written (it
#: must contain the line); "slow": run as written by the slow test below; "not here": why.
HOW = {
    "python3 -m pip install -e .": ("not here", "installing would change the environment of "
                                    "this very test run; CI's .ci/run installs the same way, "
                                    "and tests/test_packaging.py installs into a fresh venv"),
    "autotune dry-run": ("run", ""),
    'python3 -m pip install -e ".[test]"': ("not here", "as above"),
    "python3 -m pytest -q": ("not here", "it is this suite; .ci/run must call exactly it "
                             "(test_ci_runs_exactly_the_readme_test_command)"),
    "python3 -m pytest -q -m slow": ("not here", "the slow suite itself, tens of minutes on 2 "
                                     "cores; .ci/run runs its kill and resume matrices "
                                     "and two studies"),
    "autotune calibrate --config my-rig.toml --out runs/first-calibration": ("run", ""),
    "autotune report runs/first-calibration": ("run", ""),
    "autotune retune --config my-rig.toml --out runs/retune-1": ("run", ""),
    "autotune track --config my-rig.toml --out runs/night-1": ("run", ""),
    "autotune track --config F [--out DIR | --resume DIR]": ("help", "a synopsis: the quick "
                                                             "start runs a whole night"),
    "autotune serve --config examples/lab_driver/DRIVER.toml --bind tcp://127.0.0.1:PORT":
        ("elsewhere", "tests/kit/test_readme_kit.py"),
    "autotune probe tcp://127.0.0.1:PORT --yes": ("elsewhere", "tests/kit/test_readme_kit.py"),
    "autotune serve --config configs/sim-driver.toml --bind tcp://127.0.0.1:PORT":
        ("elsewhere", "tests/kit/test_readme_kit.py"),
    "autotune probe tcp://127.0.0.1:PORT": ("elsewhere", "tests/kit/test_readme_kit.py"),
    "python3 benchmarks/bench_sim.py": ("slow", "a benchmark (about 10 s of timing loops)"),
    "python3 benchmarks/bench_bus.py": ("slow", "a benchmark (about 10 s of round trips)"),
    "python3 benchmarks/phase_design.py": ("help", "a study of minutes on 2 cores"),
    "python3 benchmarks/velocity_breakdown.py": ("help", "24 calibrations, minutes on 2 cores"),
    "python3 benchmarks/first_line.py": ("slow", "a benchmark (20 process starts, about a "
                                         "minute on a quiet machine)"),
    "python3 -m autotune.bench": ("help", "the study takes minutes on 2 cores"),
    "python3 -m autotune.bench --quick": ("help", "the study takes minutes on 2 cores"),
    "python3 -m autotune.bench --calibration-only --strategies phase_lock --scenarios 8 "
    "--out benchmarks/results/calibration.json": ("help", "the calibration study takes about "
                                                  "30 minutes on 2 cores"),
    "python3 -m autotune.bench --night": ("help", "the night study takes minutes on 2 cores"),
    "python3 -m autotune.bench --night --night-families main,held_out,mismatch,velocity_physics,"
    "velocity_physics_held_out,zones_set_once,zones_set_once_held_out --scenarios 2 --workers 2 "
    "--no-schedules --out benchmarks/results/night.json": ("help", "the small night study of "
                                                           "issue 22, minutes"),
    "python3 -m autotune.bench --show benchmarks/results/latest.json":
        ("run in the repository", "its path is relative to the repository"),
    "python -m autotune.bench --tiny --calibration-only --strategies phase_lock --families "
    "main,mismatch --serial --quiet --out benchmarks/results/quick-check.json":
        ("elsewhere", "tests/test_stored_results.py"),
}


def _command_lines(path: Path) -> list[str]:
    """Command lines of a Markdown file's indented code blocks, comments and `&&` split off."""
    found = []
    for raw in path.read_text(encoding="utf-8").splitlines():
        if not raw.startswith("    "):
            continue
        line = raw.strip()
        words = line.split()
        if not words or words[0] not in ("autotune", "python3", "python"):
            continue
        if words[0] == "autotune" and len(words) > 1 and words[1] not in _subcommands():
            continue  # a line of output that starts with the word, not a command
        line = line.split("  #", 1)[0].strip()
        found.extend(part.strip() for part in line.split("&&"))
    return found


def _argv(line: str) -> list[str]:
    """A documented line as argv, with this interpreter and this work tree's autotune."""
    words = shlex.split(line)
    if words[0] == "autotune":
        return [sys.executable, "-m", "autotune.cli", *words[1:]]
    assert words[0] in ("python3", "python"), line
    return [sys.executable, *words[1:]]


def _options(text: str) -> set[str]:
    return set(re.findall(r"(?<![\w-])--[a-z][a-z0-9-]*", text))


def _subcommands() -> dict[str, argparse.ArgumentParser]:
    parser = cli_parser._parser()
    action = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(action.choices)


def _run(argv: list[str], cwd: Path, timeout: float = 600) -> subprocess.CompletedProcess[str]:
    return subprocess.run(argv, cwd=cwd, capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL)


def test_every_documented_command_line_is_accounted_for() -> None:
    """The documents' command lines are exactly those classified in HOW (a new one needs a way
    to be checked), and those run elsewhere appear in that test file as written."""
    lines = _command_lines(README) + _command_lines(BENCHMARKS)
    assert set(lines) == set(HOW), (set(lines) ^ set(HOW))
    for line, (how, where) in HOW.items():
        assert how in ("run", "run in the repository", "help", "elsewhere", "slow", "not here")
        if how == "elsewhere":
            assert line in (REPO / where).read_text(encoding="utf-8"), (line, where)
        if how in ("not here", "slow", "help"):
            assert where, f"{line}: say why it is not run here"


def _normalised(text: str) -> list[str]:
    """Output lines with every number, path and port replaced by one token, and the width of
    the columns ignored."""
    text = re.sub(r"tcp://\S+", "ENDPOINT", text)
    text = re.sub(r"under \S+", "under FOLDER", text)
    # A column widens with its numbers (a stage's wall time of 10 s or more on a loaded
    # machine): runs of spaces count as one.
    return [re.sub(r" +", " ", re.sub(r"[-+]?\d[\d.,]*", "N", line)).rstrip()
            for line in text.splitlines()]


def test_readme_dry_run_runs_as_written_and_prints_what_it_shows(readme_dry_run: DryRun) -> None:
    """`autotune dry-run` from an empty folder: exit 0, and stdout has the README's lines, up to
    the numbers (which vary with the seed and the machine)."""
    # The session's one run of the line (conftest.py's readme_dry_run), as written.
    assert README_DRY_RUN == "autotune dry-run" and HOW[README_DRY_RUN][0] == "run"
    done = readme_dry_run
    assert done.returncode == 0, done.stderr[-3000:]
    text = README.read_text(encoding="utf-8")
    start = text.index("Output of `autotune dry-run` on this machine")
    after = text[start:].split("\n\n", 1)[1].splitlines()
    block = []
    for line in after:
        if line and not line.startswith("    "):
            break
        block.append(line[4:])
    shown = "\n".join(block).strip("\n")
    assert _normalised(done.stdout) == _normalised(shown)
    folder = done.folder
    assert folder is not None and folder.name.startswith("dry-run-")
    assert {p.name for p in folder.iterdir()} >= {"calibrate", "retune", "last-good.json"}


def test_readme_quick_start_runs_as_written(tmp_path: Path) -> None:
    """The quick start against a simulated rig: calibrate, report, retune exactly as written,
    with my-rig.toml copied from configs/calibrate.toml and its endpoint and store set (the
    keys the quick start says to set)."""
    server = spawn_server(tmp_path, "rig")
    try:
        text = (REPO / "configs" / "calibrate.toml").read_text(encoding="utf-8")
        text = text.replace('endpoint = "tcp://127.0.0.1:5560"', f'endpoint = "{server.endpoint}"')
        text = text.replace('store = "../calibration/last-good.json"',
                            'store = "calibration/last-good.json"')
        # The end of the night (the quick start says to set it): half an hour of rig time.
        text = text.replace("max_rig_time_s = 0.0 ", "max_rig_time_s = 1800.0 ")
        assert server.endpoint in text and '"calibration/last-good.json"' in text
        assert "max_rig_time_s = 1800.0 " in text
        folder = tmp_path / "lab"
        folder.mkdir()
        (folder / "my-rig.toml").write_text(text, encoding="utf-8")
        for line in ("autotune calibrate --config my-rig.toml --out runs/first-calibration",
                     "autotune report runs/first-calibration",
                     "autotune retune --config my-rig.toml --out runs/retune-1",
                     "autotune track --config my-rig.toml --out runs/night-1"):
            assert f"       {line}\n" in README.read_text(encoding="utf-8")
            done = _run(_argv(line), folder)
            assert done.returncode == 0, (line, done.stderr[-3000:])
        assert (folder / "calibration" / "last-good.json").is_file()
        assert (folder / "runs" / "first-calibration" / "report.html").is_file()
        assert (folder / "runs" / "retune-1" / "result.json").is_file()
        assert (folder / "runs" / "night-1" / "result.json").is_file()
    finally:
        server.stop()


@functools.cache
def _bench_help() -> str:
    done = _run([sys.executable, "-m", "autotune.bench", "--help"], REPO, timeout=120)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_commands_too_long_for_the_suite_answer_help_with_their_options() -> None:
    """A documented command that is not run here: its --help works and lists its options."""
    lines = [line for line, (how, _) in HOW.items() if how == "help"]
    assert lines
    for line in lines:
        if line.startswith("python3 benchmarks/"):
            done = _run([*_argv(line), "--help"], REPO, timeout=120)
            assert done.returncode == 0, done.stderr
            assert _options(line) <= _options(done.stdout), line
            continue
        if line.startswith("autotune "):
            done = _run([*_argv(line.split()[0] + " " + line.split()[1]), "--help"], REPO,
                        timeout=120)
            assert done.returncode == 0, done.stderr
            assert _options(line) <= _options(done.stdout), line
            continue
        assert line.startswith("python3 -m autotune.bench"), "a new kind: run its own --help"
        assert _options(line) <= _options(_bench_help()), line


@pytest.mark.parametrize("line", sorted(k for k, (how, _) in HOW.items()
                                        if how == "run in the repository"))
def test_commands_that_read_repository_files_run_as_written(line: str) -> None:
    """Run from the repository's root, as the page that shows them says."""
    done = _run(_argv(line), REPO, timeout=120)
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.strip()


@pytest.mark.slow
@pytest.mark.parametrize("line", sorted(k for k, (how, _) in HOW.items() if how == "slow"))
def test_benchmark_scripts_run_as_written(line: str) -> None:
    """The benchmark scripts of benchmarks/README.md run as written from the repository."""
    done = _run(_argv(line), REPO)
    assert done.returncode == 0, done.stderr[-3000:]


def _command_table() -> list[tuple[str, str]]:
    """(command name, whole row) of every row of the README's Commands table."""
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Commands"):].split("\n## ", 1)[0]
    rows = re.findall(r"^\| `autotune ([a-z-]+)[^`]*`.*\|$", section, flags=re.M)
    lines = [line for line in section.splitlines() if line.startswith("| `autotune ")]
    assert len(rows) == len(lines) == len(_subcommands())
    return list(zip(rows, lines))


def test_commands_table_options_exist_in_each_commands_help() -> None:
    """Every option a row of the Commands table names is in that command's --help."""
    commands = _subcommands()
    for name, row in _command_table():
        assert name in commands, name
        help_text = commands[name].format_help()
        missing = _options(row) - _options(help_text)
        assert not missing, (name, missing)


def test_every_option_the_readme_names_exists() -> None:
    """No option named anywhere in the README is missing from every command's --help (nor
    from the study's); --log-level and --quiet are in every command's."""
    commands = _subcommands()
    known: set[str] = set()
    for parser in commands.values():
        known |= _options(parser.format_help())
    known |= _options(_bench_help()) | _options(cli_parser._parser().format_help())
    # The benchmark scripts the READMEs run (their own argparse --help).
    for script in sorted((REPO / "benchmarks").glob("*.py")):
        if "argparse" in script.read_text(encoding="utf-8"):
            done = _run([sys.executable, str(script), "--help"], REPO, timeout=120)
            assert done.returncode == 0, (script.name, done.stderr)
            known |= _options(done.stdout)
    # Named by the README as removed (refused with exit 2: tests/test_cli.py checks it).
    known |= {"--interval-s", "--cycles"}
    for path in (README, BENCHMARKS):
        missing = _options(path.read_text(encoding="utf-8")) - known
        assert not missing, (path.name, missing)
    for name, parser in commands.items():
        assert {"--log-level", "--quiet"} <= _options(parser.format_help()), name


def test_dry_run_options_sentence_matches_its_help() -> None:
    """The options the dry-run section lists are exactly dry-run's own (besides the output ones)."""
    text = README.read_text(encoding="utf-8")
    sentence = text[text.index("Options: `--config F`"):].split(".\n", 1)[0]
    own = _options(_subcommands()["dry-run"].format_help()) - {"--help", "--log-level", "--quiet"}
    assert _options(sentence) == own


def test_ci_runs_exactly_the_readme_test_command() -> None:
    """.ci/run makes a fresh venv, installs the test extra in it, runs the README's test command
    and then the slow kill and resume matrices, the lock's and the drift search's studies and
    the study's cluster runs."""
    text = README.read_text(encoding="utf-8")
    line = next(line.strip() for line in text.splitlines() if ".[test]" in line)
    install, test = (part.strip() for part in line.split("&&"))
    ci = [line.strip() for line in (REPO / ".ci" / "run").read_text().splitlines()
          if line.strip() and not line.startswith("#")]
    assert test == "python3 -m pytest -q" and ci.count(test) == 1
    suite = ci.index(test)
    venv_made = next(i for i, command in enumerate(ci) if command.startswith("python3 -m venv "))
    activated = next(i for i, command in enumerate(ci) if command.startswith("source ")
                     and command.endswith('/bin/activate"'))
    assert venv_made < activated < suite - 1, "the tests run inside a fresh venv"
    # After the README's suite, the slow kill and resume matrices (every resume path), the
    # studies whose samples the default suite keeps small, and the study's cluster runs.
    assert ci[suite + 1:] == ["python3 -m pytest -q -m slow tests/test_survival.py "
                              "tests/test_resume.py tests/test_track.py tests/test_faults.py "
                              "tests/test_guided.py tests/test_search_drift.py "
                              "tests/test_bench.py"]
    assert any(".[test]" in command and command.startswith("python3 -m pip install")
               for command in ci), install


def _keys_config_reads() -> set[tuple[str, str]]:
    """(table, key) of every key config.py reads from a file (its schema, every optional
    table and key included)."""
    return config.file_keys()


def _keys_readme_documents() -> set[tuple[str, str]]:
    """(table, key) of the key tables under the README's Configuration section."""
    text = README.read_text(encoding="utf-8")
    section = text[text.index("## Configuration"):].split("\n## ", 1)[0]
    documented: set[tuple[str, str]] = set()
    for block in section.split("\n### ")[1:]:
        heading, _, body = block.partition("\n")
        tables = re.findall(r"`\[([a-z_.]+)\]`", heading)
        assert tables, heading
        for row in re.findall(r"^\| (`[^|]+`) \|", body, flags=re.M):
            for key in re.findall(r"`([a-z_]+)`", row):
                if key != "key":
                    documented |= {(table, key) for table in tables}
    return documented


def test_configuration_section_documents_every_key_config_reads() -> None:
    """Both ways: each key config.py reads has a row in its table, and each row is a real key."""
    read = _keys_config_reads()
    assert ("lock", "target_shortfall") in read and ("bus.curve", "client_secret_key_file") in read
    documented = _keys_readme_documents()
    assert read - documented == set(), "keys missing from the README"
    assert documented - read == set(), "README rows that are not keys"
