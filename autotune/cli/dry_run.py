"""``autotune dry-run``: the simulated rig started, a calibration, a thermal step, a retune,
and the result compared with the rig's truth."""

from __future__ import annotations

import argparse
import dataclasses
import logging
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any


from autotune.config import RunConfig, load_config, packaged_config
from autotune.errors import (
    ConfigError,
    JournalError,
    RigError,
)
from autotune.run.journal import RESULT_NAME, utc_now, write_json_atomic
from autotune.run.runlock import HOLDER_NAME, LOCK_NAME, hold_run_folder
from autotune.progress import setpoints_text
from autotune.cli.common import (CAUTION, EXIT_BAD_INPUT, EXIT_BELOW_ACCEPTANCE, EXIT_OK, claim_rig,
                                 connect, default_run_dir, guarded, install_stop_handlers)
from autotune.cli.console import log_to_run_folder, progress_display
from autotune.cli.stages import stage_summary


def _wait_for_ready(process: subprocess.Popen[bytes], ready: Path, log: Path,
                    timeout_s: float) -> str:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if ready.exists():
            endpoint = ready.read_text(encoding="utf-8").strip()
            if endpoint:
                return endpoint
        if process.poll() is not None:
            err = log.read_text(encoding="utf-8", errors="replace")
            raise RigError(f"the simulated rig exited with code {process.returncode} before "
                           f"listening: {err[-2000:]}")
        time.sleep(0.05)
    raise RigError(f"the simulated rig did not start listening within {timeout_s:g} s")


def _truth_block(rig: Any, chosen: dict[str, float]) -> dict[str, Any]:
    truth = rig.truth(chosen)
    return {
        "inversion_at_chosen": float(truth["inversion"]),
        "best_inversion": float(truth["best"]["inversion"]),
        "best_setpoints": {k: float(v) for k, v in truth["best"]["setpoints"].items()},
    }


def cmd_dry_run(ns: argparse.Namespace) -> int:
    def body() -> int:
        config_path = Path(ns.config) if ns.config else packaged_config("dry-run.toml")
        rig_config = Path(ns.rig_config) if ns.rig_config else packaged_config("sim-rig.toml")
        for path, flag in ((config_path, "--config"), (rig_config, "--rig-config")):
            if not path.is_file():
                raise ConfigError(str(path), "<file>", f"an existing file (pass {flag})",
                                  "no such file")
        config = load_config(config_path)
        # The rig's own config is read again by the rig process; a bad one must be refused
        # here, naming the file, before the run folder exists.
        from drivers_sim.config import SimConfigError, load_sim_config
        try:
            load_sim_config(rig_config)
        except SimConfigError as exc:
            print(f"autotune: {exc}", file=sys.stderr)
            return EXIT_BAD_INPUT
        if ns.seed is not None:
            config = dataclasses.replace(
                config, search=dataclasses.replace(config.search, seed=ns.seed))
        out = Path(ns.out) if ns.out else default_run_dir("dry-run")
        with hold_run_folder(out, "dry-run"):
            if any(p.name not in (LOCK_NAME, HOLDER_NAME) for p in out.iterdir()):
                raise JournalError(f"{out} is not empty; choose another --out")
            return _dry_run_in(ns, config, config_path, rig_config, out)

    return guarded(body)


def _dry_run_in(ns: argparse.Namespace, config: RunConfig, config_path: Path, rig_config: Path,
                out: Path) -> int:
    """The body of ``dry-run`` once this process holds the lock of its folder ``out``."""
    from autotune.run import runner

    rig_process: list[subprocess.Popen[bytes]] = []

    def at_once() -> str:
        for process in rig_process:  # its own session: no signal of ours reaches it
            process.kill()
        return " The simulated rig was stopped."

    stop = install_stop_handlers(at_once)
    seed = config.search.seed
    print("dry run on the bundled SIMULATED rig: no hardware is touched. On a real rig, "
          "calibrate/retune act on hardware:\n" + CAUTION, file=sys.stderr)
    with tempfile.TemporaryDirectory() as tmp:
        ready = Path(tmp) / "endpoint"
        command = [sys.executable, "-m", "autotune.cli", "rig", "--config", str(rig_config),
                   "--bind", "tcp://127.0.0.1:0", "--seed", str(seed), "--ready-file",
                   str(ready), "--log-level", "warning"]
        # The rig's log goes to a file: an unread pipe could fill and stall the rig. Its own
        # session keeps a Ctrl-C at the terminal from stopping it before our safe request.
        rig_log = (out / "rig.log").open("wb")
        process = subprocess.Popen(command, stdin=subprocess.DEVNULL,
                                   stdout=subprocess.DEVNULL, stderr=rig_log,
                                   start_new_session=True)
        rig_process.append(process)
        try:
            endpoint = _wait_for_ready(process, ready, out / "rig.log", timeout_s=60.0)
            config = dataclasses.replace(
                config, bus=dataclasses.replace(config.bus, endpoint=endpoint))
            return _dry_run_stages(ns, config, out, endpoint, stop, runner)
        finally:
            process.terminate()
            try:
                process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=10)
            rig_log.close()


def _dry_run_stages(ns: argparse.Namespace, config: RunConfig, out: Path, endpoint: str,
                    stop: threading.Event, runner: Any) -> int:
    store = out / "last-good.json"
    rows = []
    exit_code = EXIT_OK
    with connect(config, stop) as rig:
        claim_rig(rig, "dry-run", 0.0, config, stop)
        description = runner.opening_call("describe", rig.describe, config, rig, stop)
        print(f"simulated rig {description.rig!r} listening on {endpoint} "
              f"(seed {config.search.seed})")
        stages = ["calibrate"] if ns.no_retune else ["calibrate", "retune"]
        thermal: dict[str, Any] = {}
        for name in stages:
            if name == "retune":
                if not rows[-1][1]["accepted"]:
                    print("retune skipped: the calibration was not accepted, so there is no "
                          "last good setting to retune from")
                    break
                step = rig.thermal_step(ns.thermal_step_hz)
                # In the retune's manifest, so that its report marks when the cavity jumped.
                thermal = {"thermal_step": {"shift_hz": ns.thermal_step_hz,
                                            "clock": step["clock"], "t_wall": utc_now(),
                                            "cavity_offset_hz": step["cavity_offset_hz"]}}
                print(f"thermal step of {ns.thermal_step_hz / 1e3:+.1f} kHz applied to the "
                      f"simulated cavity (offset now {step['cavity_offset_hz'] / 1e3:+.2f} kHz)")
            run_dir = out / name
            wall = time.monotonic()
            # Each stage's folder has its lock too: a resume of it meanwhile is refused.
            with hold_run_folder(run_dir, "dry-run"):
                prepared = runner.prepare(name, rig, config, run_dir, store=store, stop=stop)
                handler = log_to_run_folder(run_dir)
                try:
                    with progress_display(ns) as progress:
                        result = runner.execute(prepared, rig, stop=stop, progress=progress,
                                                extra={"dry_run": {"endpoint": endpoint, **thermal}})
                finally:
                    logging.getLogger().removeHandler(handler)
                    handler.close()
            result["truth"] = _truth_block(rig, result["setpoints"])
            write_json_atomic(run_dir / RESULT_NAME, result)
            rows.append((name, result, time.monotonic() - wall))
            print(stage_summary(result))
            if not result["accepted"]:
                exit_code = EXIT_BELOW_ACCEPTANCE
    print()
    print(_truth_table(rows))
    print(f"\nrun folders under {out}")
    return exit_code


def _truth_table(rows: Sequence[tuple[str, dict[str, Any], float]]) -> str:
    header = (f"{'stage':<10} {'status':<17} {'measured':>9} {'true@chosen':>11} "
              f"{'true best':>9} {'ratio':>6} {'points':>6} {'shots':>9} {'rig time':>9} "
              f"{'wall':>7}")
    lines = [header, "-" * len(header)]
    for name, result, wall in rows:
        truth = result["truth"]
        ratio = truth["inversion_at_chosen"] / truth["best_inversion"]
        lines.append(
            f"{name:<10} {result['status']:<17} {result['inversion']:>9.3f} "
            f"{truth['inversion_at_chosen']:>11.3f} {truth['best_inversion']:>9.3f} "
            f"{ratio:>6.3f} {result['points']:>6d} {result['shots']:>9d} "
            f"{result['rig_time_s'] / 60:>7.1f} m {wall:>6.1f}s")
    for name, result, _ in rows:
        best = result["truth"]["best_setpoints"]
        lines.append(f"{name}: chosen {setpoints_text(result['setpoints'])}; "
                     f"true best {setpoints_text(best)}")
    return "\n".join(lines)
