"""Time to the first line of a command whose rig does not answer: deferred imports vs eager.

``autotune calibrate`` (and ``retune``, ``track``) against an endpoint nobody serves: the time
from starting the process to its first line on the terminal (the ``connect`` line naming the
endpoint). Measured side by side, in alternating rounds so that machine noise hits both alike:

- **deferred**: the command as users run it (``python -m autotune.cli ...``): the run's modules,
  with scipy, scikit-optimize and matplotlib, are imported after the first line;
- **eager**: the same command in a process that imports the run's module first
  (``autotune.run.runner`` for calibrate, ``autotune.run.track`` for track), as the command did
  before its imports were deferred.

Each trial starts a fresh interpreter (cold imports, warm file cache) and is killed (SIGKILL,
the child of this script only) once its first line is read. Prints the median of each, the
ratio eager / deferred, and the first line itself. Target: under a second, deferred.

Run: ``python benchmarks/first_line.py [--rounds 7]``
"""

from __future__ import annotations

import argparse
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "configs" / "calibrate.toml"

_EAGER = """
import importlib, sys
importlib.import_module(sys.argv[1])
from autotune.cli import main
sys.exit(main(sys.argv[2:]))
"""

#: The module each command imported before its first line, before the imports were deferred.
_RUN_MODULE = {"calibrate": "autotune.run.runner", "track": "autotune.run.track"}


def _unserved_endpoint() -> str:
    """A loopback TCP port free a moment ago: nobody serves it."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return f"tcp://127.0.0.1:{probe.getsockname()[1]}"


def _config(folder: Path, endpoint: str) -> Path:
    text = CONFIG.read_text(encoding="utf-8")
    old = tomllib.loads(text)["bus"]["endpoint"]
    path = folder / "unreachable.toml"
    path.write_text(text.replace(f'"{old}"', f'"{endpoint}"', 1), encoding="utf-8")
    return path


def _first_line(argv: list[str]) -> tuple[float, str]:
    """Seconds from the start of ``argv`` to its first line (stdout or stderr), and the line."""
    start = time.perf_counter()
    process = subprocess.Popen(argv, cwd=REPO, stdin=subprocess.DEVNULL, stdout=subprocess.PIPE,
                               stderr=subprocess.STDOUT, text=True)
    try:
        assert process.stdout is not None
        line = process.stdout.readline()
        elapsed = time.perf_counter() - start
        if not line:
            raise SystemExit(f"no first line from {argv}")
        return elapsed, line.rstrip()
    finally:
        process.kill()
        process.communicate(timeout=30)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--rounds", type=int, default=7, help="trials of each way (default 7)")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        config = _config(folder, _unserved_endpoint())
        print(f"{'command':<10} {'deferred (s)':>13} {'eager (s)':>10} {'eager/deferred':>15}")
        for command, module in _RUN_MODULE.items():
            times: dict[str, list[float]] = {"deferred": [], "eager": []}
            line = ""
            for k in range(args.rounds):
                for way in ("deferred", "eager") if k % 2 == 0 else ("eager", "deferred"):
                    cli = [command, "--config", str(config), "--out",
                           str(folder / f"{command}-{way}-{k}")]
                    argv = ([sys.executable, "-m", "autotune.cli", *cli] if way == "deferred"
                            else [sys.executable, "-c", _EAGER, module, *cli])
                    elapsed, first = _first_line(argv)
                    times[way].append(elapsed)
                    line = first if way == "deferred" else line
            deferred = statistics.median(times["deferred"])
            eager = statistics.median(times["eager"])
            print(f"{command:<10} {deferred:>13.2f} {eager:>10.2f} {eager / deferred:>15.1f}")
            print(f"  first line: {line}")


if __name__ == "__main__":
    main()
