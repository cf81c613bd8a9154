"""A pytest plugin that records, per test, the wall time and the CPU of the test's process
and of the children it waited for (``resource.getrusage`` deltas around setup, call and
teardown), and when each test started and ended on which worker.

    SUITE_RUSAGE_DIR=/tmp/prof PYTHONPATH=benchmarks python -m pytest -q -p suite_rusage

writes one JSON line per test to ``$SUITE_RUSAGE_DIR/<worker>.jsonl`` (each xdist worker loads
the plugin too). ``python benchmarks/suite_rusage.py DIR [DIR2]`` prints the sums, the busy
workers over time and the costliest tests (side by side when given two folders).
"""

from __future__ import annotations

import json
import os
import resource
import sys
import time
from collections import defaultdict
from pathlib import Path

import pytest

_STARTED: list[list[str]] = []


def pytest_configure(config):  # type: ignore[no-untyped-def]
    """Count the processes each test starts (subprocess.Popen, asyncio's included)."""
    import subprocess
    if not os.environ.get("SUITE_RUSAGE_DIR") or getattr(subprocess.Popen, "_suite_counted", False):
        return
    original = subprocess.Popen.__init__

    def counted(self, args, *rest, **kwargs):  # type: ignore[no-untyped-def]
        _STARTED.append([str(a) for a in args][:6] if isinstance(args, (list, tuple)) else [str(args)])
        original(self, args, *rest, **kwargs)

    subprocess.Popen.__init__ = counted  # type: ignore[method-assign]
    subprocess.Popen._suite_counted = True  # type: ignore[attr-defined]


def _cpu(who: int) -> float:
    usage = resource.getrusage(who)
    return usage.ru_utime + usage.ru_stime


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_protocol(item, nextitem):  # type: ignore[no-untyped-def]
    folder = os.environ.get("SUITE_RUSAGE_DIR")
    if not folder:
        yield
        return
    worker = os.environ.get("PYTEST_XDIST_WORKER", "main")
    _STARTED.clear()
    start, self0, children0 = time.time(), _cpu(resource.RUSAGE_SELF), _cpu(resource.RUSAGE_CHILDREN)
    yield
    end = time.time()
    record = {"nodeid": item.nodeid, "worker": worker, "start": start, "end": end,
              "self": _cpu(resource.RUSAGE_SELF) - self0,
              "children": _cpu(resource.RUSAGE_CHILDREN) - children0,
              "started": [_command(args) for args in _STARTED]}
    with open(Path(folder) / f"{worker}.jsonl", "a", encoding="utf-8") as out:
        out.write(json.dumps(record) + "\n")


def _command(args: list[str]) -> str:
    """The `autotune` command a process runs (`rig`, `calibrate`, ...), else its program."""
    for i, arg in enumerate(args):
        if arg in ("autotune", "autotune.cli", "autotune.__main__") or arg.endswith("/autotune"):
            rest = [a for a in args[i + 1:] if not a.startswith("-")]
            return "autotune " + (rest[0] if rest else "")
    return Path(args[0]).name if args else "?"


def _load(folder: str) -> list[dict]:
    return [json.loads(line) for path in sorted(Path(folder).glob("*.jsonl"))
            for line in path.read_text(encoding="utf-8").splitlines()]


def _summary(records: list[dict]) -> dict:
    first = min(r["start"] for r in records)
    last = max(r["end"] for r in records)
    by_worker: dict[str, list[dict]] = defaultdict(list)
    for r in records:
        by_worker[r["worker"]].append(r)
    return {"tests": len(records), "span": last - first,
            "self": sum(r["self"] for r in records), "children": sum(r["children"] for r in records),
            "wall_sum": sum(r["end"] - r["start"] for r in records),
            "worker_end": {w: max(r["end"] for r in rs) - first for w, rs in sorted(by_worker.items())}}


def _files(records: list[dict]) -> dict[str, tuple[float, float]]:
    sums: dict[str, list[float]] = defaultdict(lambda: [0.0, 0.0])
    for r in records:
        name = r["nodeid"].split("::")[0]
        sums[name][0] += r["end"] - r["start"]
        sums[name][1] += r["self"] + r["children"]
    return {k: (v[0], v[1]) for k, v in sums.items()}


def main(folders: list[str]) -> None:
    if not folders:
        sys.exit("usage: python3 benchmarks/suite_rusage.py FOLDER [FOLDER]: the folders of "
                 "SUITE_RUSAGE_DIR runs (see the module's docstring)")
    runs = [_load(folder) for folder in folders]
    for folder, records in zip(folders, runs):
        if not records:
            sys.exit(f"suite_rusage: {folder}: no test records (*.jsonl); was the suite run "
                     f"with -p suite_rusage and SUITE_RUSAGE_DIR={folder}?")
    for folder, records in zip(folders, runs):
        s = _summary(records)
        print(f"{folder}: {s['tests']} tests, first start to last end {s['span']:.0f} s, "
              f"CPU {s['self'] + s['children']:.1f} s (workers {s['self']:.1f} + children "
              f"{s['children']:.1f}), test wall sum {s['wall_sum']:.0f} s")
        print("  each worker's last end (s):", {w: round(t) for w, t in s["worker_end"].items()})
    files = [_files(records) for records in runs]
    names = sorted(set().union(*files), key=lambda n: -files[0].get(n, (0, 0))[0])
    print(f"{'file':58s}" + "".join(f"{'wall':>9s}{'cpu':>8s}" for _ in runs))
    for name in names[:40]:
        print(f"{name:58s}" + "".join(f"{f.get(name, (0, 0))[0]:9.1f}{f.get(name, (0, 0))[1]:8.1f}"
                                      for f in files))
    for label, key in (("wall", lambda r: r["end"] - r["start"]),
                       ("CPU", lambda r: r["self"] + r["children"])):
        for folder, records in zip(folders, runs):
            print(f"top {label} ({folder}):")
            for r in sorted(records, key=key, reverse=True)[:15]:
                print(f"  {r['end'] - r['start']:7.1f} s wall {r['self'] + r['children']:6.1f} s CPU"
                      f"  {r['worker']:4s} {r['nodeid']}")


if __name__ == "__main__":
    main(sys.argv[1:])
