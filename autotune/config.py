"""Run configuration: TOML -> frozen dataclasses, checked once at the boundary.

Every value is checked here and nowhere else. Each table's annotations declare its keys' types
and bounds, checked by :mod:`autotune.schema` (the range a lab could mean, from
:mod:`autotune.plausible`, in the same pass); the rules joining keys sit in the tables (a
``model_validator``, which ``dataclasses.replace`` does not run: studies shrink budgets that
way) and in :func:`_two_pi_velocity_problems`. A wrong value raises
:class:`autotune.errors.ConfigErrors` naming, for every problem of the file at once, the file,
the dotted key, what was expected and what was found; unknown keys are refused (with the nearest
known name) so that a typo never silently falls back to a default.

The file layout (see ``configs/calibrate.toml`` for a commented example)::

    [bus]            endpoint, timeout_s, retries, backoff_s, optional [bus.curve] key files
    [setpoints.NAME] one table per searched set-point: unit, search_min, search_max,
                     limit_min, limit_max, max_step (in the set-point's unit)
    [measurement]    shots_per_phase, ramsey_phases, confidence, resamples, verification_shots_per_phase
    [search]         strategy, seed, budgets, convergence thresholds, hand-strategy settings
    [nominal]        coupling_hz, waist_m (the first design's 2*pi velocity; not the rig's truth)
    [acceptance]     min_inversion, on_reject, max_shortfall
    [calibration]    store (where the last good calibration is kept)
    [retune]         still_good_fraction, half widths of the narrowed box, budgets
    [recovery]       retries of a failed step, interlock waits
    [lock]           the phase-lock strategy's settings (all optional)
    [track]          holding the condition through the night (all optional)
"""

from __future__ import annotations

import dataclasses
import functools
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Any, Literal, get_args

from pydantic import BeforeValidator, Strict, model_validator
from pydantic_core import PydanticCustomError

from autotune import plausible
from autotune.errors import ConfigError, ConfigErrors
# The packaged configurations (what a command reads by default) live in the light
# autotune.packaged, re-exported here: `autotune rig` needs their path, not these models.
from autotune.packaged import PACKAGED_CONFIGS, packaged_config
from autotune.schema import (
    Expect,
    collect,
    integer,
    number,
    read_toml,
    refuse,
    refuse_each,
    table,
    text,
)

__all__ = [
    "BusConfig",
    "CurveConfig",
    "SetpointConfig",
    "MeasurementConfig",
    "SearchConfig",
    "NominalConfig",
    "RetuneConfig",
    "RecoveryConfig",
    "LockConfig",
    "TrackConfig",
    "StopAction",
    "RejectAction",
    "RunConfig",
    "StrategyKind",
    "load_config",
    "config_from_dict",
    "nominal_two_pi_velocity",
    "PACKAGED_CONFIGS",
    "packaged_config",
]

StrategyKind = Literal["phase_lock", "bayesian", "grid", "coordinate", "random"]
#: Where ``autotune track`` leaves the rig when the night stops.
StopAction = Literal["safe", "last_good"]
#: Where a calibration or retune that is not accepted leaves the rig.
RejectAction = Literal["safe", "verified"]


def nominal_two_pi_velocity(coupling_hz: float, waist_m: float) -> float:
    """Velocity (m/s) at which one photon gives a resonant 2*pi vacuum Rabi rotation.

    For the Gaussian mode the pulse area is ``A = Omega_0 sqrt(pi) w / v``; ``A = 2 pi`` gives
    ``v = Omega_0 w / (2 sqrt(pi))`` with ``Omega_0 = 2 pi coupling_hz``.

    Parameters
    ----------
    coupling_hz : float
        Vacuum Rabi frequency Omega_0 / 2pi at the mode centre (Hz).
    waist_m : float
        Mode waist w (m).
    """
    return 2.0 * math.pi * coupling_hz * waist_m / (2.0 * math.sqrt(math.pi))


def _choice(kind: Any) -> Any:
    """One of the strings of a ``Literal``, named as a person types them."""
    return Annotated[kind, Expect("one of " + ", ".join(get_args(kind)))]


def _file_name(value: object) -> object:
    if not isinstance(value, str) or not value.strip():
        raise PydanticCustomError("file_name", "a file name")
    return value


#: A file named in the config, relative to the config's folder (resolved by config_from_dict).
_FILE = Annotated[Path, BeforeValidator(_file_name),
                  Expect("a non-empty string (a file, relative to the config's folder)")]
_FLAG = Annotated[bool, Strict(), Expect("true or false")]
_ENDPOINT = text("a ZeroMQ endpoint such as tcp://127.0.0.1:5560 (or - for none)",
                 pattern=r"^(-$|tcp://|ipc://|inproc://)")
_LOCAL_TIME = text('a local time of day "HH:MM" (00:00 to 23:59)',
                   pattern=r"^([01][0-9]|2[0-3]):[0-5][0-9]$")
_FRACTION = number(0.0, 1.0, low_open=True)
_SHOTS_PER_PHASE = integer(1, 100_000_000)
_SHOTS_WHY = "1e9 shots are 77 days of beam at 150 shots per second: no budget a lab means"
_RIG_TIME_WHY = "30 days: no budget a lab means"
_SHOT_BUDGET = integer(1, plausible.MAX_SHOTS, why=_SHOTS_WHY)
_RIG_TIME = number(0.0, plausible.MAX_RIG_TIME_S, why=_RIG_TIME_WHY)
_DETUNING_STEP = number(0.0, low_open=True, plausible=plausible.DETUNING_STEP_HZ)
_DRIFT = number(0.0, 1e4, low_open=True)


@table
class CurveConfig:
    """``[bus.curve]``: CURVE key files of the client: its own secret key and the rig server's
    public key (relative to the config's folder in the file, resolved once read)."""

    client_secret_key_file: _FILE
    server_public_key_file: _FILE


@table
class BusConfig:
    """``[bus]``: where the rig listens and how long to wait for it."""

    endpoint: _ENDPOINT
    timeout_s: number(0.0, 600.0, low_open=True)
    retries: integer(0, 100)
    backoff_s: number(0.0, 60.0)
    curve: CurveConfig | None = None


@dataclass(frozen=True)
class SetpointConfig:
    """One searched set-point: its search box and its hard limits, in the rig's unit."""

    name: str
    unit: str
    search_min: float
    search_max: float
    limit_min: float
    limit_max: float
    max_step: float


def _setpoint_rules(self: Any) -> None:
    """The rules joining the keys of one ``[setpoints.NAME]`` table (the first that fails)."""
    if self.limit_max <= self.limit_min:
        refuse("limit_max", f"a value > limit_min = {self.limit_min:g}", self.limit_max)
    for key in ("search_min", "search_max"):
        value = getattr(self, key)
        if not self.limit_min <= value <= self.limit_max:
            refuse(key, f"a value within the limits [{self.limit_min:g}, {self.limit_max:g}]",
                   value)
    if self.search_max <= self.search_min:
        refuse("search_max", f"a value > search_min = {self.search_min:g}", self.search_max)


#: The ranges a lab could mean for each set-point of the protocol: (value, step); a set-point
#: of another name is held to the catch-all of any channel.
_SETPOINT_RANGES: dict[str, tuple[plausible.Plausible, plausible.Plausible]] = {
    "velocity": (plausible.VELOCITY_M_PER_S, plausible.VELOCITY_STEP_M_PER_S),
    "detuning": (plausible.DETUNING_HZ, plausible.DETUNING_STEP_HZ),
}
_ANY_SETPOINT = (plausible.CHANNEL_VALUE, plausible.CHANNEL_VALUE)
#: The set-points every config searches, first and in this order.
_REQUIRED_SETPOINTS = ("velocity", "detuning")


def _made_table(name: str, fields: list[tuple[str, Any]], **namespace: Any) -> type:
    """A :func:`autotune.schema.table` whose keys are known only once the file is read (the
    names of its set-points)."""
    return table(dataclasses.make_dataclass(name, fields, namespace=namespace))


@functools.cache
def _setpoint_table(name: str) -> type:
    """The ``[setpoints.NAME]`` table: the ranges a lab could mean depend on the set-point."""
    value, step = _SETPOINT_RANGES.get(name, _ANY_SETPOINT)
    keys = [("unit", text())] + [(key, number(plausible=value)) for key in
                                 ("search_min", "search_max", "limit_min", "limit_max")]
    keys.append(("max_step", number(0.0, low_open=True, plausible=step)))
    return _made_table(f"Setpoint_{name}", keys, __post_init__=_setpoint_rules)


@functools.cache
def _setpoints_table(names: tuple[str, ...]) -> type:
    """``[setpoints]``: one table per set-point, velocity and detuning required."""
    return _made_table("Setpoints", [(name, _setpoint_table(name)) for name in names])


@functools.cache
def _half_widths_table(names: tuple[str, ...]) -> type:
    """``[retune.half_widths]``: one half width per set-point, in the set-point's unit."""
    return _made_table("HalfWidths", [
        (name, number(0.0, low_open=True, plausible=_SETPOINT_RANGES.get(name, _ANY_SETPOINT)[1]))
        for name in names])


@table(kw_only=True)
class MeasurementConfig:
    """``[measurement]``: how one point is measured: a fringe of each field state."""

    shots_per_phase: integer(1, 10_000_000)
    ramsey_phases: integer(3, 256)
    confidence: number(0.5, 0.999) = 0.95
    resamples: integer(100, 100_000) = 2000
    verification_shots_per_phase: _SHOTS_PER_PHASE


@table(kw_only=True)
class SearchConfig:
    """``[search]``: the search strategy and when it stops."""

    strategy: _choice(StrategyKind) = "phase_lock"
    seed: integer(0, 2**32 - 1) = 0
    max_points: integer(1, 10_000)
    max_shots: _SHOT_BUDGET
    max_rig_time_s: number(0.0, plausible.MAX_RIG_TIME_S, low_open=True, why=_RIG_TIME_WHY)
    n_initial_points: integer(1, 1000) = 8
    min_points: integer(1, 10_000) = 12
    grid_points_per_dimension: integer(2, 200) = 9
    coordinate_points_per_dimension: integer(3, 200) = 9
    coordinate_rounds: integer(1, 50) = 3
    exploration: number(0.0, 1.0) = 0.01
    drift_compensation: _FLAG = False
    max_drift_hz_per_s: _DRIFT = 3.0
    refine_points: integer(0, 50) = 7
    refine_half_width_hz: _DETUNING_STEP = 9e3

    @model_validator(mode="after")
    def _related(self) -> SearchConfig:
        refuse_each([(key, f"a value <= search.max_points = {self.max_points}", getattr(self, key))
                     for key in ("min_points", "n_initial_points")
                     if getattr(self, key) > self.max_points])
        return self


@table
class NominalConfig:
    """``[nominal]``: nominal physics of the apparatus, used only for the first design."""

    coupling_hz: number(plausible=plausible.COUPLING_HZ)
    waist_m: number(plausible=plausible.WAIST_M)

    @property
    def two_pi_velocity(self) -> float:
        """The nominal 2*pi velocity (m/s)."""
        return nominal_two_pi_velocity(self.coupling_hz, self.waist_m)


@table(kw_only=True)
class RetuneConfig:
    """``[retune]``: how a retune decides and how far it looks (``half_widths``: set-point
    name to the half width of the retune's box, in its unit)."""

    still_good_fraction: _FRACTION
    half_widths: Mapping[str, Any]
    max_points: integer(1, 10_000)
    max_shots: _SHOT_BUDGET
    n_initial_points: integer(1, 1000) = 4
    check_shots_per_phase: _SHOTS_PER_PHASE

    @model_validator(mode="after")
    def _related(self) -> RetuneConfig:
        if self.n_initial_points > self.max_points:
            refuse("n_initial_points", f"a value <= retune.max_points = {self.max_points}",
                   self.n_initial_points)
        return self


@table
class LockConfig:
    """Settings of the phase-lock strategy (``[lock]``, every key optional), SI units.

    Attributes
    ----------
    target_shortfall : float
        Stop when the predicted shortfall of the recommendation below the best is below this
        fraction at ``measurement.confidence``.
    still_good_shortfall : float
        A retune's check keeps the last good set-points while its predicted shortfall stays
        below this fraction.
    lock_shots_per_phase, velocity_shots_per_phase : int
        Shots per field and phase of a lock step and of a velocity step.
    capture_phase_error_rad : float
        Largest phase error (rad) where the phase shift still steers the detuning.
    min_contrast_ratio : float
        Smallest one-photon contrast, relative to the empty one, where the phase is trusted.
    bracket_step_hz : float
        First detuning step when the slope is unknown (Hz; default: the nominal coupling / 5,
        filled in by :func:`config_from_dict`).
    velocity_step_fraction : float
        Velocity step of the absorption scan, as a fraction of the velocity.
    phase_at_peak_rad, phase_at_peak_prior_rad : float
        Prior of the phase shift at the peak (rad): pi, the sign flip of a 2 pi rotation.
    drift_prior_hz_per_s : float
        Width of the prior on the cavity's drift during a calibration (Hz/s).
    max_corrections : int
        Most re-verifications after a verification whose own phase shows a shortfall.
    """

    target_shortfall: number(0.0, 0.5, low_open=True) = 0.01
    still_good_shortfall: number(0.0, 0.5, low_open=True) = 0.02
    lock_shots_per_phase: integer(1, 10_000_000) = 500
    velocity_shots_per_phase: integer(1, 10_000_000) = 500
    capture_phase_error_rad: number(0.0, math.pi, low_open=True) = 0.6 * math.pi
    min_contrast_ratio: number(0.0, 1.0) = 0.35
    bracket_step_hz: _DETUNING_STEP = None
    velocity_step_fraction: number(0.0, 0.5, low_open=True) = 0.05
    phase_at_peak_rad: number(0.0, 2 * math.pi) = math.pi
    phase_at_peak_prior_rad: number(0.0, math.pi, low_open=True) = 0.02 * math.pi
    drift_prior_hz_per_s: _DRIFT = 3.0
    max_corrections: integer(0, 20) = 2


@table
class TrackConfig:
    """Holding the 2π condition through the night (``[track]``, every key optional), SI units.

    Attributes
    ----------
    budget_fraction : float
        Largest share of the night's beam (rig) time that holding may take: checks, retunes
        and calibrations (half of it is planned for the checks, the rest kept for retunes).
    floor : float
        The condition held: the inversion at least this fraction of the best. Sets the shift
        the sequential test is designed for.
    false_alarm_interval_s : float
        Mean rig time between false alarms the sequential test is designed for (s).
    max_gain : float
        Largest gain of the lock's correction (0, 1].
    max_correction_hz, min_correction_hz : float
        Largest detuning correction of one check, and the smallest one worth a move (Hz).
    min_shots_per_phase : int
        Fewest shots per field and Ramsey phase of a check.
    max_interval_s : float
        Longest rig time between checks (s).
    walk_hz_per_sqrt_s : float
        Random walk of the cavity the lock assumes (Hz/s^0.5).
    inversion_drop : float
        Drop of the inversion (fraction of its reference) the inversion watch is designed for.
    retune_shots_per_phase : int
        Shots per field and phase of the check and the verification of a retune in the night.
    max_consecutive_failures : int
        Stop after this many recoveries in a row (retune, then calibration) not accepted.
    max_rig_time_s, max_wall_time_s : float
        Stop this long after the night started, in rig time or wall time (0: no such end).
    end_at_local_time : str
        Stop at this local time of day, ``"HH:MM"`` (empty: no such end).
    on_stop : {"safe", "last_good"}
        Where the rig is left when the night stops: its safe set-points, or the set-points
        held last (on a signal, only if the rig is already there; otherwise safe).
    """

    budget_fraction: _FRACTION = 0.05
    floor: _FRACTION = 0.97
    false_alarm_interval_s: number(60.0, 1e9) = 288_000.0
    max_gain: _FRACTION = 0.7
    max_correction_hz: _DETUNING_STEP = 5000.0
    min_correction_hz: number(0.0, plausible.DETUNING_STEP_HZ.high) = 100.0
    min_shots_per_phase: integer(1, 10_000_000) = 100
    max_interval_s: number(60.0, 86400.0) = 1800.0
    walk_hz_per_sqrt_s: number(plausible=plausible.RANDOM_WALK_HZ_PER_SQRT_S) = 20.0
    inversion_drop: _FRACTION = 0.25
    retune_shots_per_phase: _SHOTS_PER_PHASE = 1500
    max_consecutive_failures: integer(1, 1000) = 3
    max_rig_time_s: _RIG_TIME = 0.0
    max_wall_time_s: _RIG_TIME = 0.0
    end_at_local_time: _LOCAL_TIME = ""
    on_stop: _choice(StopAction) = "safe"

    @model_validator(mode="after")
    def _related(self) -> TrackConfig:
        if self.min_correction_hz >= self.max_correction_hz:
            refuse("min_correction_hz", f"a value < track.max_correction_hz = "
                   f"{self.max_correction_hz:g}", self.min_correction_hz)
        return self

    @property
    def end_at_minutes(self) -> int | None:
        """Minutes after midnight of ``end_at_local_time`` (None when empty)."""
        if not self.end_at_local_time:
            return None
        hours, minutes = self.end_at_local_time.split(":")
        return int(hours) * 60 + int(minutes)


@table
class RecoveryConfig:
    """``[recovery]`` (optional): bounded recovery from rig faults."""

    step_retries: integer(0, 100) = 3
    retry_wait_s: number(0.0, 3600.0) = 1.0
    interlock_poll_s: number(0.0, 3600.0, low_open=True) = 5.0
    interlock_max_wait_s: number(0.0, 86400.0) = 600.0
    safe_on_stop_s: number(0.0, 600.0, low_open=True) = 10.0


@table
class _Acceptance:
    """``[acceptance]``: when a stage is accepted and where one that is not leaves the rig."""

    min_inversion: number(-1.0, 1.0)
    on_reject: _choice(RejectAction) = "safe"
    max_shortfall: number(0.0, 1.0, low_open=True) = None


@table
class _Calibration:
    """``[calibration]``: where the last good calibration is kept."""

    store: _FILE


@table
class _RunFile:
    """The whole file, as written; :func:`config_from_dict` turns it into a :class:`RunConfig`
    (the set-points' and half widths' tables, named by set-point, are read in a second pass)."""

    bus: BusConfig
    setpoints: Mapping[str, Any]
    measurement: MeasurementConfig
    search: SearchConfig
    nominal: NominalConfig
    acceptance: _Acceptance
    calibration: _Calibration
    retune: RetuneConfig
    recovery: RecoveryConfig = RecoveryConfig()
    lock: LockConfig = LockConfig()
    track: TrackConfig = TrackConfig()


@dataclass(frozen=True)
class RunConfig:
    """A whole calibrate/retune configuration, checked."""

    source: str
    bus: BusConfig
    setpoints: tuple[SetpointConfig, ...]
    measurement: MeasurementConfig
    search: SearchConfig
    nominal: NominalConfig
    min_inversion: float
    calibration_store: Path
    retune: RetuneConfig
    recovery: RecoveryConfig
    lock: LockConfig
    track: TrackConfig = field(default_factory=TrackConfig)
    #: ``[acceptance] on_reject``: where a stage not accepted leaves the rig.
    on_reject: RejectAction = "safe"
    #: ``[acceptance] max_shortfall``: the largest predicted-shortfall bound a phase-lock stage
    #: is accepted with (None: ``[lock] still_good_shortfall``; 1: no bound required).
    max_shortfall: float | None = None
    raw: Mapping[str, Any] = field(repr=False, compare=False, default_factory=dict)

    def setpoint(self, name: str) -> SetpointConfig:
        """The set-point table called ``name``."""
        for sp in self.setpoints:
            if sp.name == name:
                return sp
        raise KeyError(name)


class _MetresPerSecond(float):
    """A velocity that shows its unit in a message (``503.7 m/s``)."""

    def __repr__(self) -> str:
        return f"{float(self):.4g} m/s"


def _positive(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and \
        math.isfinite(value) and value > 0


def _two_pi_velocity_problems(source: str, nominal: object, box: Any) -> list[ConfigError]:
    """The nominal 2π velocity must lie in the velocity search box: the search starts there,
    and a nominal outside it is a unit slipped in ``coupling_hz`` or ``waist_m`` (or a box
    around another rig). The velocity comes from :func:`nominal_two_pi_velocity`; the refusal
    names the units that would put it inside. Checked on the file's own numbers as soon as both
    are positive (beside their own refusal as implausible) and the velocity box is right
    (``box``, else None)."""
    if box is None or not isinstance(nominal, Mapping):
        return []
    coupling_hz, waist_m = nominal.get("coupling_hz"), nominal.get("waist_m")
    if not (_positive(coupling_hz) and _positive(waist_m)):
        return []
    velocity = nominal_two_pi_velocity(coupling_hz, waist_m)
    if box.search_min <= velocity <= box.search_max:
        return []
    guesses = []
    for key, spec in (("coupling_hz", plausible.COUPLING_HZ), ("waist_m", plausible.WAIST_M)):
        for factor, unit in plausible.unit_slips(spec.unit):
            values = {"coupling_hz": coupling_hz, "waist_m": waist_m, key: nominal[key] * factor}
            other = nominal_two_pi_velocity(**values)
            if box.search_min <= other <= box.search_max:
                guesses.append(f"{key} = {nominal[key]:g} {unit} = {values[key]:g} "
                               f"(giving {other:.1f} m/s)")
    return [ConfigError(
        source, "nominal.coupling_hz/waist_m",
        f"a nominal 2π velocity Ω0 w / (2 √π), Ω0 = 2π coupling_hz, within the velocity search "
        f"box [{box.search_min:g}, {box.search_max:g}] m/s (setpoints.velocity)",
        _MetresPerSecond(velocity),
        hint=f"the 2π velocity of coupling_hz = {coupling_hz:g} Hz and waist_m = {waist_m:g} m"
        + (f"; did you mean {' or '.join(guesses)}?" if guesses else "; check both and the box"))]


def _setpoint_names(data: Mapping[str, Any]) -> tuple[str, ...]:
    """The set-points a file names: velocity and detuning (always), then any other, sorted."""
    table_ = data.get("setpoints")
    others = sorted(table_) if isinstance(table_, Mapping) else []
    return _REQUIRED_SETPOINTS + tuple(str(n) for n in others if n not in _REQUIRED_SETPOINTS)


def config_from_dict(data: Mapping[str, Any], source: str = "<memory>",
                     base_dir: Path | None = None) -> RunConfig:
    """Check a parsed configuration and turn it into a :class:`RunConfig`.

    Parameters
    ----------
    data : Mapping
        The parsed TOML document.
    source : str
        Name of the file it came from, for error messages.
    base_dir : Path, optional
        Folder against which relative paths in the file are resolved (the file's folder).

    Raises
    ------
    ConfigErrors
        Every wrong, missing or unknown value of the file at once.
    """
    base = base_dir if base_dir is not None else Path.cwd()
    if not isinstance(data, Mapping):
        raise ConfigErrors([ConfigError(source, "<top level>", "a table", data)])
    names = _setpoint_names(data)
    run, problems = collect(_RunFile, data, file=source)
    # The set-points' tables are read in a second pass, named by set-point (the first saw a
    # table of tables), and so are the half widths of a retune's box.
    tables = data.get("setpoints")
    setpoints, found = collect(_setpoints_table(names), tables, file=source,
                               prefix="setpoints") if isinstance(tables, Mapping) else (None, [])
    retune = data.get("retune")
    widths = retune.get("half_widths") if isinstance(retune, Mapping) else None
    half_widths, more = collect(_half_widths_table(names), widths, file=source,
                                prefix="retune.half_widths") if isinstance(widths, Mapping) \
        else (None, [])
    problems += found + more
    velocity = setpoints.velocity if setpoints is not None else _valid_setpoint(data, source)
    problems += _two_pi_velocity_problems(source, data.get("nominal"), velocity)
    if problems or run is None or setpoints is None or half_widths is None:
        raise ConfigErrors(problems)
    lock = run.lock if run.lock.bracket_step_hz is not None else dataclasses.replace(
        run.lock, bracket_step_hz=run.nominal.coupling_hz / 5.0)
    curve = run.bus.curve
    bus = run.bus if curve is None else dataclasses.replace(run.bus, curve=CurveConfig(
        base / curve.client_secret_key_file, base / curve.server_public_key_file))
    return RunConfig(
        source=source,
        bus=bus,
        setpoints=tuple(SetpointConfig(name, **dataclasses.asdict(getattr(setpoints, name)))
                        for name in names),
        measurement=run.measurement,
        search=run.search,
        nominal=run.nominal,
        min_inversion=run.acceptance.min_inversion,
        calibration_store=base / run.calibration.store,
        retune=dataclasses.replace(run.retune, half_widths=dataclasses.asdict(half_widths)),
        recovery=run.recovery,
        lock=lock,
        track=run.track,
        on_reject=run.acceptance.on_reject,
        max_shortfall=run.acceptance.max_shortfall,
        raw=dict(data),
    )


def _valid_setpoint(data: Mapping[str, Any], source: str) -> Any:
    """The velocity's table when it alone is right (another set-point's table is wrong)."""
    table_ = data.get("setpoints")
    if not isinstance(table_, Mapping):
        return None
    return collect(_setpoint_table("velocity"), table_.get("velocity"), file=source)[0]


def file_keys(setpoint_names: tuple[str, ...] = _REQUIRED_SETPOINTS) -> set[tuple[str, str]]:
    """(table, key) of every key a run config may hold, for the README's list of keys."""
    tables: dict[str, type] = {
        "bus": BusConfig, "bus.curve": CurveConfig, "measurement": MeasurementConfig,
        "search": SearchConfig, "nominal": NominalConfig, "acceptance": _Acceptance,
        "calibration": _Calibration, "retune": RetuneConfig,
        "retune.half_widths": _half_widths_table(setpoint_names), "recovery": RecoveryConfig,
        "lock": LockConfig, "track": TrackConfig}
    tables |= {f"setpoints.{name}": _setpoint_table(name) for name in setpoint_names}
    return {(path, item.name) for path, cls in tables.items()
            for item in dataclasses.fields(cls) if f"{path}.{item.name}" not in tables}


def load_config(path: str | Path) -> RunConfig:
    """Read and check a calibrate/retune TOML file.

    Raises
    ------
    ConfigError
        The file is missing, is not UTF-8 TOML, or holds a wrong, missing or unknown value
        (every problem of the file at once).
    """
    path = Path(path)
    data = read_toml(path, error=ConfigErrors)
    return config_from_dict(data, source=str(path), base_dir=path.parent)
