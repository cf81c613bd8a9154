"""``autotune report``: the morning report of run folders (reads only)."""

from __future__ import annotations

import argparse
from pathlib import Path


from autotune.cli.common import EXIT_OK, guarded


def cmd_report(ns: argparse.Namespace) -> int:
    from autotune import report

    def body() -> int:
        text = report.write_report(Path(ns.run_dir), plot=not ns.no_plot,
                                   out=Path(ns.out) if ns.out is not None else None)
        print(text)
        return EXIT_OK

    return guarded(body)
