"""The command line's parser (every command, option, help text) and ``main``."""

from __future__ import annotations

import argparse
import difflib
import importlib
import math
import re
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any


from autotune import __version__
from autotune.plausible import SEED_MAX, SERVER_TIMEOUT_S, THERMAL_STEP_HZ, Plausible
from autotune.cli.common import CAUTION, STAGE_EXITS
from autotune.cli.console import configure_logging, console_level
from autotune.cli.rig_side import SIM_RIG_CONFIG, add_server_arguments, cmd_probe, cmd_rig, cmd_serve


def _command(module: str, name: str) -> Callable[..., int]:
    """A command's function, imported from ``autotune.cli.<module>`` when the command runs: the
    stages, the dry run and the report load the run configuration's and the journal's models
    (pydantic, built at import), which ``rig``, ``serve``, ``probe`` and ``--help`` never need."""
    def run(*args: Any) -> int:
        return int(getattr(importlib.import_module(f"autotune.cli.{module}"), name)(*args))
    return run


cmd_stage = _command("stages", "cmd_stage")
cmd_track = _command("stages", "cmd_track")
cmd_dry_run = _command("dry_run", "cmd_dry_run")
cmd_report = _command("report_command", "cmd_report")


# -- parser ------------------------------------------------------------------------------

def _at_least_one(text: str) -> int:
    value = int(text)
    if not 1 <= value <= 10_000_000:
        raise argparse.ArgumentTypeError(f"expected an integer from 1 to 10000000 (the most "
                                         f"shots per phase a config takes), got {text!r}")
    return value


def _positive_seconds(text: str) -> float:
    value = float(text)
    if not (value > 0.0 and value <= SERVER_TIMEOUT_S):
        raise argparse.ArgumentTypeError(f"expected a number of seconds > 0 and at most "
                                         f"{SERVER_TIMEOUT_S:g} (an hour), got {text!r}")
    return value


def _seed(text: str) -> int:
    """A seed flag: an integer the configs take as a seed (``[search] seed``)."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None
    if not 0 <= value <= SEED_MAX:
        raise argparse.ArgumentTypeError(f"expected an integer from 0 to {SEED_MAX} (a seed, "
                                         f"as [search] seed), got {text!r}")
    return value


def _physical(spec: Plausible) -> Callable[[str], float]:
    """A flag holding a physical value: a finite number within the range a lab could mean of
    its kind (autotune.plausible), refused with a hint at a slipped unit."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number in {spec.unit}, got "
                                             f"{text!r}") from None
        if not math.isfinite(value):
            raise argparse.ArgumentTypeError(f"expected a finite number in {spec.unit}, got "
                                             f"{text!r}")
        if (found := spec.problem(value)) is not None:
            expected, hint = found
            raise argparse.ArgumentTypeError(f"expected {expected}, got {text}"
                                             + (f": {hint}" if hint else ""))
        return value
    return parse


def _non_negative_seconds(text: str) -> float:
    value = float(text)
    if not (value >= 0.0 and value < float("inf")):
        raise argparse.ArgumentTypeError(f"expected a finite number of seconds >= 0, got {text!r}")
    return value


class _Parser(argparse.ArgumentParser):
    """argparse's parser, whose refusal of an unknown command or choice names the nearest one."""

    def error(self, message: str) -> Any:
        found = re.search(r"invalid choice: '([^']*)' \(choose from (.*)\)", message)
        if found:
            choices = re.findall(r"'([^']*)'", found.group(2))
            near = difflib.get_close_matches(found.group(1), choices, n=1, cutoff=0.6)
            if near:
                message += f"; did you mean '{near[0]}'?"
        return super().error(message)


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(
        prog="autotune",
        description="Closed-loop calibration of a Ramsey-cavity single-photon detector. "
                    "calibrate, retune, track, serve and probe act on a real rig: their --help "
                    "carries the caution (the lab's interlocks and safety rules come first); "
                    "rig, dry-run and report touch no hardware.",
    )
    parser.add_argument("--version", action="version", version=f"autotune {__version__}")
    _add_output_options(parser, log_level=True, default=None)
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    rig = sub.add_parser("rig", help="serve the bundled simulated rig over the bus",
                         description="Serve the bundled simulated rig (no hardware) over the bus "
                                     "until SIGINT/SIGTERM. Exit 0 after a clean stop, 1 if the "
                                     "endpoint cannot be bound, 2 for a bad configuration, flag "
                                     "or key file.")
    rig.add_argument("--config", type=Path, default=SIM_RIG_CONFIG,
                     help="simulated rig TOML (default: the packaged copy of "
                          "configs/sim-rig.toml)")
    add_server_arguments(rig, bind_default="tcp://127.0.0.1:5560")
    rig.add_argument("--seed", type=_seed, default=None,
                     help="seed of the rig's noise and of the faults (default: the config's "
                          "rig.default_seed)")
    faults = rig.add_argument_group("fault injection (to test clients)")
    faults.add_argument("--drop-probability", type=float, default=None,
                        help="probability of dropping a reply")
    faults.add_argument("--delay-s", type=float, default=None, help="delay of each fresh reply, s")
    faults.add_argument("--corrupt-probability", type=float, default=None,
                        help="probability of corrupting a reply")
    faults.add_argument("--exit-after", type=int, default=None,
                        help="stop after N messages (0: never)")
    rig.set_defaults(handler=cmd_rig)

    serve = sub.add_parser("serve", help="serve a lab's rig driver over the bus (acts on hardware)",
                           description="Serve the rig driver named in DRIVER.toml over the bus "
                                       "until SIGINT/SIGTERM. " + CAUTION + " Exit 0 after a clean "
                                       "stop, 1 if the endpoint cannot be bound, 2 for a bad "
                                       "DRIVER.toml, flag, key file or driver class, 3 if the "
                                       "driver fails while starting.")
    serve.add_argument("--config", type=Path, required=True, help="the DRIVER.toml to serve")
    add_server_arguments(serve, bind_default=None)
    serve.set_defaults(handler=cmd_serve)

    probe = sub.add_parser("probe", help="check a rig server against the wire protocol "
                                         "(moves the rig, after asking)",
                           description="Check the rig server at ENDPOINT against the wire "
                                       "protocol, one line per rule. Moves a rig that is not "
                                       "simulated only after asking (or with --yes); with no "
                                       "terminal and no --yes it does not move it. " + CAUTION
                                       + " Exit 0 when every rule passes, 1 when a rule fails, "
                                       "2 for bad input, 3 if the rig does not answer, 5 when "
                                       "some rules were not run, 130 on SIGINT.")
    probe.add_argument("endpoint", metavar="ENDPOINT", help="the rig server, e.g. tcp://127.0.0.1:5560")
    probe.add_argument("--yes", action="store_true",
                       help="move the rig without asking (the rules that move it stay within "
                            "the described limits and steps)")
    probe.add_argument("--timeout-s", type=_positive_seconds, default=10.0,
                       help="longest wait for one reply, s (default 10; an acquisition must fit)")
    probe.add_argument("--shots", type=_at_least_one, default=20,
                       help="shots per acquisition (default 20)")
    probe.add_argument("--curve-client-secret-key", type=Path, default=None,
                       help="this client's CURVE secret key file (zmq.auth .key_secret)")
    probe.add_argument("--curve-server-public-key", type=Path, default=None,
                       help="the rig server's CURVE public key file (.key)")
    probe.set_defaults(handler=cmd_probe)

    for name, text in (("calibrate", "full calibration of a rig (acts on hardware)"),
                       ("retune", "check the last good setting and retune if needed "
                                  "(acts on hardware)")):
        p = sub.add_parser(name, help=text, description=text + ". " + CAUTION + STAGE_EXITS)
        p.add_argument("--config", required=True, help="calibrate/retune TOML file")
        group = p.add_mutually_exclusive_group()
        group.add_argument("--out", help="new run folder (default runs/<command>-<UTC time>)")
        group.add_argument("--resume", metavar="RUN_DIR", help="continue a killed run")
        _add_wait_lease(p)
        p.set_defaults(handler=lambda ns, n=name: cmd_stage(ns, n))

    dry = sub.add_parser("dry-run", help="calibrate and retune the bundled simulated rig and "
                                         "compare with its truth",
                         description="Start the bundled simulated rig (no hardware), calibrate "
                                     "it, apply a thermal step to its cavity, retune, and compare "
                                     "each stage's choice with the simulator's truth; one run "
                                     "folder per stage under --out, then 'autotune report' on "
                                     "that folder. Exit 0 when both stages are accepted, 4 when "
                                     "one is below min_inversion, 2 for bad input, 3 if the "
                                     "simulated rig fails, 130 on SIGINT.")
    dry.add_argument("--config", help="calibrate/retune TOML (default: the packaged copy of "
                                       "configs/dry-run.toml)")
    dry.add_argument("--rig-config", help="simulated rig TOML (default: the packaged copy of "
                                           "configs/sim-rig.toml)")
    dry.add_argument("--seed", type=_seed, help="seed of the rig and the search")
    dry.add_argument("--out", help="folder for the stages' run folders")
    dry.add_argument("--thermal-step-hz", type=_physical(THERMAL_STEP_HZ), default=15e3,
                     help="cavity frequency step before the retune (Hz, default 15000)")
    dry.add_argument("--no-retune", action="store_true", help="stop after the calibration")
    dry.set_defaults(handler=cmd_dry_run)

    track_text = ("hold the 2π condition through the night: checks at a planned cadence, a lock "
                  "on the photon phase shift, a sequential test for when to retune; one run "
                  "folder for the night (acts on hardware)")
    track = sub.add_parser("track", help=track_text, description=track_text + ". " + CAUTION +
                           " Exit 0 when the night reached its end, 4 when it stopped after "
                           "[track] max_consecutive_failures failed recoveries, 130 on "
                           "SIGINT/SIGTERM (continue with the printed --resume command).")
    track.add_argument("--config", required=True, help="calibrate/retune TOML file with [track]")
    track_out = track.add_mutually_exclusive_group()
    track_out.add_argument("--out", help="new run folder (default runs/track-<UTC time>)")
    track_out.add_argument("--resume", metavar="TRACK_DIR",
                           help="continue a stopped night from its journal")
    _add_wait_lease(track)
    # Options of the schedule-based track this command replaced: refused with a message.
    track.add_argument("--interval-s", default=None, help=argparse.SUPPRESS)
    track.add_argument("--cycles", default=None, help=argparse.SUPPRESS)
    track.set_defaults(handler=cmd_track)

    rep = sub.add_parser("report", help="morning report of a run, dry-run or track folder: "
                                        "figures, report.html and a text summary (reads only)",
                         description="Read a run folder, a dry run's folder or a track folder "
                                     "(never a rig) and print what to look at first and each "
                                     "run's summary; write its figures, an overview report.png "
                                     "and a self-contained report.html (images inline) next to "
                                     "the runs or under --out. A run still being written (its "
                                     "holder named) and a damaged journal (shown up to its "
                                     "damaged line) are said first, on the terminal and at the "
                                     "top of the page. Exit 0, or 2 when the folder is not a "
                                     "run folder or its manifest or result file is damaged.")
    rep.add_argument("run_dir", help="a run folder, a dry run's folder or a track folder")
    rep.add_argument("--no-plot", action="store_true", help="text summary only")
    rep.add_argument("--out", metavar="DIR",
                     help="folder for the figures and report.html (default RUN_DIR)")
    rep.set_defaults(handler=cmd_report)
    # Accepted after the command too (`autotune calibrate --config F --quiet`); rig and serve
    # have their own --log-level (their JSON lines).
    for name, command in sub.choices.items():
        _add_output_options(command, log_level=name not in ("rig", "serve"),
                            default=argparse.SUPPRESS,
                            run_folder=name in ("calibrate", "retune", "track", "dry-run"))
    return parser


def _add_wait_lease(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("--wait-lease-s", type=_non_negative_seconds, default=0.0,
                        metavar="SECONDS",
                        help="when another client holds the rig's lease, wait up to SECONDS for "
                             "it to be released or to run out (default 0: exit 3 at once, "
                             "naming the holder)")


def _add_output_options(parser: argparse.ArgumentParser, *, log_level: bool,
                        default: Any, run_folder: bool = True) -> None:
    if log_level:
        parser.add_argument("--log-level", default=default,
                            choices=["debug", "info", "warning", "error"],
                            help="terminal log level (default: info; warning with --quiet)"
                                 + ("; the run folder's log.jsonl keeps every level"
                                    if run_folder else ""))
    parser.add_argument("--quiet", action="store_true",
                        default=False if default is None else default,
                        help=("no progress line, and only" if run_folder else "only")
                        + " warnings and errors in the log; results are still printed")


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``autotune`` console script; returns the exit code."""
    parser = _parser()
    ns = parser.parse_args(argv)
    if getattr(ns, "command", None) not in ("rig", "serve"):
        configure_logging(console_level(ns) if ns.command != "probe" or ns.log_level
                           else "warning")
    return int(ns.handler(ns))
