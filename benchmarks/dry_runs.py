"""The demo rig's dry runs, seed by seed: issue 18's target "`autotune dry-run --seed N` for
N = 1-8 on the demo rig: both stages >= 0.98".

Runs the documented command, ``autotune dry-run --seed N --out DIR``, as a user would (one
process per seed, the bundled simulated rig and configs), then reads each stage's
``result.json``: its status, shots, stated 95 % shortfall bound and the dry run's ``truth``
block (the simulator's exact inversion at the chosen set-points and its exact best at that
moment). Prints one line per stage and a summary: the lowest true ratio per stage, how many
stages were accepted, and how often the stated bound covered the true shortfall
(1 - ratio).

    python3 benchmarks/dry_runs.py            # seeds 1-8
    python3 benchmarks/dry_runs.py --seeds 1 2 3 --keep /tmp/dry
    python3 benchmarks/dry_runs.py --rig-config my-rig.toml   # another simulated rig

A benchmark, not a test: it prints figures and never asserts.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

STAGES = ("calibrate", "retune")


def stage_row(seed: int, stage: str, result: dict) -> dict:
    """One stage's figures from its result.json (the truth block is the dry run's)."""
    truth = result.get("truth") or {}
    best = truth.get("best_inversion")
    at = truth.get("inversion_at_chosen")
    ratio = at / best if at is not None and best else float("nan")
    bound = (result.get("predicted_shortfall") or {}).get("upper")
    return {
        "seed": seed,
        "stage": stage,
        "status": result.get("status"),
        "accepted": bool(result.get("accepted")),
        "points": result.get("points"),
        "shots": result.get("shots"),
        "ratio": ratio,
        "bound": bound,
        "covered": None if bound is None else (1.0 - ratio) <= bound,
    }


def run_seed(seed: int, out: Path, rig_config: Path | None = None) -> list[dict]:
    """Run ``autotune dry-run --seed SEED --out OUT`` (with ``--rig-config`` when given) and
    read its stages' results."""
    extra = [] if rig_config is None else ["--rig-config", str(rig_config)]
    proc = subprocess.run(
        ["autotune", "dry-run", "--seed", str(seed), "--out", str(out), *extra],
        capture_output=True, text=True, check=False,
    )
    rows = []
    for stage in STAGES:
        path = out / stage / "result.json"
        if path.exists():
            rows.append(stage_row(seed, stage, json.loads(path.read_text())))
    if not rows:
        raise SystemExit(f"dry run seed {seed} wrote no result (exit {proc.returncode}):\n"
                         f"{proc.stderr[-2000:]}")
    return rows


def summary_lines(rows: list[dict]) -> list[str]:
    lines = []
    for stage in STAGES:
        mine = [r for r in rows if r["stage"] == stage]
        if not mine:
            continue
        ratios = [r["ratio"] for r in mine]
        stated = [r for r in mine if r["covered"] is not None]
        lines.append(
            f"{stage}: {sum(r['accepted'] for r in mine)} of {len(mine)} accepted, "
            f"true ratio {min(ratios):.3f}-{max(ratios):.3f}, "
            f"{sum(r >= 0.98 for r in ratios)} of {len(mine)} at >= 0.98, "
            f"bound covered the true shortfall in {sum(r['covered'] for r in stated)} "
            f"of {len(stated)}")
    return lines


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=list(range(1, 9)))
    parser.add_argument("--keep", type=Path, help="keep the run folders under this folder")
    parser.add_argument("--rig-config", type=Path,
                        help="simulated rig TOML passed to every dry run (default: the demo rig)")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as scratch:
        base = args.keep or Path(scratch)
        rows = []
        print(f"{'seed':>4} {'stage':<9} {'status':<18} {'points':>6} {'shots':>8} "
              f"{'ratio':>6} {'bound':>7}")
        for seed in args.seeds:
            for row in run_seed(seed, base / f"seed-{seed}", args.rig_config):
                rows.append(row)
                bound = "-" if row["bound"] is None else f"{100 * row['bound']:.2f}%"
                print(f"{row['seed']:>4} {row['stage']:<9} {row['status']:<18} "
                      f"{row['points']:>6} {row['shots']:>8} {row['ratio']:>6.3f} {bound:>7}",
                      flush=True)
    print()
    for line in summary_lines(rows):
        print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
