"""Run configuration: TOML -> frozen dataclasses, checked once at the boundary.

Every value is checked here and nowhere else. A wrong value raises
:class:`autotune.errors.ConfigError` naming the file, the dotted key, what was expected and what
was found; unknown keys are refused so that a typo never silently falls back to a default.

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
import difflib
import math
import tomllib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, get_args

from autotune import plausible
from autotune.errors import ConfigError, ConfigErrors

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

#: The configuration files shipped inside the package (``autotune/data``): what a command reads
#: by default, so that an installed ``autotune`` runs from any folder. The repository's
#: ``configs/`` holds identical copies (tests/test_packaging.py keeps them so).
PACKAGED_CONFIGS = ("dry-run.toml", "sim-rig.toml", "sim-driver.toml", "calibrate.toml")

_DATA_DIR = Path(__file__).resolve().parent / "data"


def packaged_config(name: str) -> Path:
    """Path of a configuration file shipped with the package.

    Parameters
    ----------
    name : str
        One of :data:`PACKAGED_CONFIGS` (e.g. ``"dry-run.toml"``).

    Raises
    ------
    ValueError
        ``name`` is not a packaged configuration.
    """
    if name not in PACKAGED_CONFIGS:
        raise ValueError(f"name: expected one of {', '.join(PACKAGED_CONFIGS)}, got {name!r}")
    return _DATA_DIR / name


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


@dataclass(frozen=True)
class CurveConfig:
    """CURVE key files of the client: its own secret key and the rig server's public key."""

    client_secret_key_file: Path
    server_public_key_file: Path


@dataclass(frozen=True)
class BusConfig:
    """Where the rig listens and how long to wait for it."""

    endpoint: str
    timeout_s: float
    retries: int
    backoff_s: float
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


@dataclass(frozen=True)
class MeasurementConfig:
    """How one point is measured: a fringe of each field state."""

    shots_per_phase: int
    ramsey_phases: int
    confidence: float
    resamples: int
    verification_shots_per_phase: int


@dataclass(frozen=True)
class SearchConfig:
    """The search strategy and when it stops."""

    strategy: StrategyKind
    seed: int
    max_points: int
    max_shots: int
    max_rig_time_s: float
    n_initial_points: int
    min_points: int
    grid_points_per_dimension: int
    coordinate_points_per_dimension: int
    coordinate_rounds: int
    exploration: float
    drift_compensation: bool
    max_drift_hz_per_s: float
    refine_points: int
    refine_half_width_hz: float


@dataclass(frozen=True)
class NominalConfig:
    """Nominal physics of the apparatus, used only for the first design."""

    coupling_hz: float
    waist_m: float

    @property
    def two_pi_velocity(self) -> float:
        """The nominal 2*pi velocity (m/s)."""
        return nominal_two_pi_velocity(self.coupling_hz, self.waist_m)


@dataclass(frozen=True)
class RetuneConfig:
    """How a retune decides and how far it looks."""

    still_good_fraction: float
    half_widths: Mapping[str, float]
    max_points: int
    max_shots: int
    n_initial_points: int
    check_shots_per_phase: int


@dataclass(frozen=True)
class LockConfig:
    """Settings of the phase-lock strategy (``[lock]``), SI units.

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
        First detuning step when the slope is unknown (Hz; default: the nominal coupling / 5).
    velocity_step_fraction : float
        Velocity step of the absorption scan, as a fraction of the velocity.
    phase_at_peak_rad, phase_at_peak_prior_rad : float
        Prior of the phase shift at the peak (rad): pi, the sign flip of a 2 pi rotation.
    drift_prior_hz_per_s : float
        Width of the prior on the cavity's drift during a calibration (Hz/s).
    max_corrections : int
        Most re-verifications after a verification whose own phase shows a shortfall.
    """

    target_shortfall: float
    still_good_shortfall: float
    lock_shots_per_phase: int
    velocity_shots_per_phase: int
    capture_phase_error_rad: float
    min_contrast_ratio: float
    bracket_step_hz: float
    velocity_step_fraction: float
    phase_at_peak_rad: float
    phase_at_peak_prior_rad: float
    drift_prior_hz_per_s: float
    max_corrections: int


@dataclass(frozen=True)
class TrackConfig:
    """Holding the 2π condition through the night (``[track]``), SI units.

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

    budget_fraction: float = 0.05
    floor: float = 0.97
    false_alarm_interval_s: float = 288_000.0
    max_gain: float = 0.7
    max_correction_hz: float = 5000.0
    min_correction_hz: float = 100.0
    min_shots_per_phase: int = 100
    max_interval_s: float = 1800.0
    walk_hz_per_sqrt_s: float = 20.0
    inversion_drop: float = 0.25
    retune_shots_per_phase: int = 1500
    max_consecutive_failures: int = 3
    max_rig_time_s: float = 0.0
    max_wall_time_s: float = 0.0
    end_at_local_time: str = ""
    on_stop: StopAction = "safe"

    @property
    def end_at_minutes(self) -> int | None:
        """Minutes after midnight of ``end_at_local_time`` (None when empty)."""
        if not self.end_at_local_time:
            return None
        hours, minutes = self.end_at_local_time.split(":")
        return int(hours) * 60 + int(minutes)


@dataclass(frozen=True)
class RecoveryConfig:
    """Bounded recovery from rig faults."""

    step_retries: int
    retry_wait_s: float
    interlock_poll_s: float
    interlock_max_wait_s: float
    safe_on_stop_s: float = 10.0


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


class _Table:
    """A TOML table being read: typed getters that name the key on error, and a leftover check.

    Problems are collected in ``problems`` (shared by every table of one file) instead of
    raised, so that one reading reports every wrong key at once; a getter whose value is wrong
    returns a stand-in value so that reading can go on. A table that is missing or not a table
    is reported once and reads as empty without further reports.
    """

    def __init__(self, source: str, path: str, data: object, problems: list[ConfigError],
                 *, absent: bool = False) -> None:
        self.source = source
        self.path = path
        self.problems = problems
        self.absent = absent or not isinstance(data, Mapping)
        if not isinstance(data, Mapping) and not absent:
            problems.append(ConfigError(source, path or "<top>", "a table", data))
        self.data: Mapping[str, Any] = data if isinstance(data, Mapping) else {}
        self.used: set[str] = set()

    def _key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def problem(self, key: str, expected: str, got: object, hint: str = "") -> None:
        """Record a problem of ``key`` (a dotted key relative to this table)."""
        if not self.absent:
            self.problems.append(ConfigError(self.source, self._key(key), expected, got,
                                             hint=hint))

    def _raw(self, name: str, default: object) -> object:
        self.used.add(name)
        if name in self.data:
            return self.data[name]
        if default is _REQUIRED:
            self.problem(name, "a value (key is missing)", None)
            return _MISSING
        return default

    def table(self, name: str, *, required: bool = True) -> _Table | None:
        self.used.add(name)
        if name not in self.data:
            if required:
                self.problem(name, "a table (missing)", None)
                return _Table(self.source, self._key(name), {}, self.problems, absent=True)
            return None
        return _Table(self.source, self._key(name), self.data[name], self.problems,
                      absent=self.absent)

    def _ranged(self, name: str, value: float, low: float | None, high: float | None,
                low_open: bool, why: str = "") -> None:
        if low is not None and (value <= low if low_open else value < low):
            self.problem(name, f"a value {'>' if low_open else '>='} {low:g}", value)
        elif high is not None and value > high:
            self.problem(name, f"a value <= {high:g}" + (f" ({why})" if why else ""), value)

    def number(
        self,
        name: str,
        default: object = None,
        *,
        low: float | None = None,
        high: float | None = None,
        low_open: bool = False,
        spec: plausible.Plausible | None = None,
        why: str = "",
    ) -> float:
        """A finite number within ``[low, high]`` and, with ``spec``, within the range a lab
        could mean for its kind of quantity (refused with a hint at a slipped unit)."""
        if default is None:
            default = _REQUIRED
        value = self._raw(name, default)
        stand_in = float(low if low is not None else (high if high is not None else 1.0)) + (
            1.0 if low_open else 0.0)
        if value is _MISSING:
            return stand_in
        if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
            self.problem(name, "a finite number", value)
            return stand_in
        typed, value = value, float(value)
        before = len(self.problems)
        self._ranged(name, value, low, high, low_open, why)
        if spec is not None and len(self.problems) == before:
            found = spec.problem(value)
            if found is not None:
                self.problem(name, found[0], typed, found[1])
        return value

    def integer(self, name: str, default: object = None, *, low: int | None = None,
                high: int | None = None, why: str = "") -> int:
        if default is None:
            default = _REQUIRED
        value = self._raw(name, default)
        stand_in = low if low is not None else 1
        if value is _MISSING:
            return stand_in
        if isinstance(value, bool) or not isinstance(value, int):
            self.problem(name, "an integer", value)
            return stand_in
        self._ranged(name, value, low, high, False, why)
        return value

    def boolean(self, name: str, default: object = None) -> bool:
        if default is None:
            default = _REQUIRED
        value = self._raw(name, default)
        if value is _MISSING:
            return False
        if not isinstance(value, bool):
            self.problem(name, "true or false", value)
            return False
        return value

    def string(self, name: str, default: object = None, *, choices: tuple[str, ...] = ()) -> str:
        if default is None:
            default = _REQUIRED
        value = self._raw(name, default)
        stand_in = choices[0] if choices else "-"
        if value is _MISSING:
            return stand_in
        if not isinstance(value, str) or not value:
            self.problem(name, "a non-empty string", value)
            return stand_in
        if choices and value not in choices:
            self.problem(name, f"one of {', '.join(choices)}", value)
            return stand_in
        return value

    def finish(self) -> None:
        for name in sorted(set(self.data) - self.used):
            near = difflib.get_close_matches(str(name), sorted(self.used), n=1)
            self.problem(name, "no such key (known: " + ", ".join(sorted(self.used)) + ")",
                         self.data[name], f"did you mean {near[0]!r}?" if near else "")


_REQUIRED = object()
_MISSING = object()

_SHOTS_WHY = "1e9 shots are 77 days of beam at 150 shots per second: no budget a lab means"
_RIG_TIME_WHY = "30 days: no budget a lab means"


def _check_two_pi_velocity(table: _Table, nominal: NominalConfig,
                           setpoints: list[SetpointConfig]) -> None:
    """The nominal 2π velocity must lie in the velocity search box: the search starts there,
    and a nominal outside it is a unit slipped in ``coupling_hz`` or ``waist_m`` (or a box
    around another rig). The velocity comes from :func:`nominal_two_pi_velocity`; the refusal
    names the units that would put it inside. Not checked when either key is not a positive
    number (already refused) or the velocity box is itself refused."""
    box = next((sp for sp in setpoints if sp.name == "velocity"), None)
    typed = [table.data.get(key) for key in ("coupling_hz", "waist_m")]
    if box is None or table.absent or not all(
            isinstance(x, int | float) and not isinstance(x, bool) and math.isfinite(x) and x > 0
            for x in typed) or any(problem.key.startswith("setpoints.velocity.")
                                   for problem in table.problems):
        return
    velocity = nominal.two_pi_velocity
    if box.search_min <= velocity <= box.search_max:
        return
    guesses = []
    for key, value, spec in (("coupling_hz", nominal.coupling_hz, plausible.COUPLING_HZ),
                             ("waist_m", nominal.waist_m, plausible.WAIST_M)):
        for factor, unit in plausible.unit_slips(spec.unit):
            other = dataclasses.replace(nominal, **{key: value * factor})
            if box.search_min <= other.two_pi_velocity <= box.search_max:
                guesses.append(f"{key} = {value:g} {unit} = {value * factor:g} "
                               f"(giving {other.two_pi_velocity:.1f} m/s)")
    table.problem(
        "coupling_hz/waist_m",
        f"a nominal 2π velocity Ω0 w / (2 √π), Ω0 = 2π coupling_hz, within the velocity search "
        f"box [{box.search_min:g}, {box.search_max:g}] m/s (setpoints.velocity)",
        _MetresPerSecond(velocity),
        f"the 2π velocity of coupling_hz = {nominal.coupling_hz:g} Hz and waist_m = "
        f"{nominal.waist_m:g} m" + (f"; did you mean {' or '.join(guesses)}?" if guesses else
                                    "; check both and the box"))


class _MetresPerSecond(float):
    """A velocity that shows its unit in a message (``503.7 m/s``)."""

    def __repr__(self) -> str:
        return f"{float(self):.4g} m/s"


def _is_local_time(text: str) -> bool:
    """True for ``"HH:MM"`` with 00 <= HH <= 23 and 00 <= MM <= 59."""
    parts = text.split(":")
    if len(parts) != 2 or not all(len(p) == 2 and p.isdigit() for p in parts):
        return False
    return int(parts[0]) <= 23 and int(parts[1]) <= 59


#: The ranges a lab could mean for each set-point of the protocol: (value, step); a set-point
#: of another name is held to the catch-all of any channel.
_SETPOINT_RANGES: dict[str, tuple[plausible.Plausible, plausible.Plausible]] = {
    "velocity": (plausible.VELOCITY_M_PER_S, plausible.VELOCITY_STEP_M_PER_S),
    "detuning": (plausible.DETUNING_HZ, plausible.DETUNING_STEP_HZ),
}
_ANY_SETPOINT = (plausible.CHANNEL_VALUE, plausible.CHANNEL_VALUE)


def _read_setpoint(table: _Table, name: str) -> SetpointConfig:
    value_range, step_range = _SETPOINT_RANGES.get(name, _ANY_SETPOINT)
    unit = table.string("unit")
    limit_min = table.number("limit_min", spec=value_range)
    limit_max = table.number("limit_max", spec=value_range)
    if limit_max <= limit_min:
        table.problem("limit_max", f"a value > limit_min = {limit_min:g}", limit_max)
    search_min = table.number("search_min", low=limit_min, high=limit_max, spec=value_range)
    search_max = table.number("search_max", low=limit_min, high=limit_max, spec=value_range)
    if search_max <= search_min:
        table.problem("search_max", f"a value > search_min = {search_min:g}", search_max)
    max_step = table.number("max_step", low=0.0, low_open=True, spec=step_range)
    table.finish()
    return SetpointConfig(name, unit, search_min, search_max, limit_min, limit_max, max_step)


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
    """
    base = base_dir if base_dir is not None else Path.cwd()
    problems: list[ConfigError] = []
    top = _Table(source, "", data, problems)

    bus_t = top.table("bus")
    endpoint = bus_t.string("endpoint")
    if endpoint != "-" and not endpoint.startswith(("tcp://", "ipc://", "inproc://")):
        bus_t.problem("endpoint", "a ZeroMQ endpoint such as tcp://127.0.0.1:5560", endpoint)
    curve_t = bus_t.table("curve", required=False)
    curve = None
    if curve_t is not None:
        curve = CurveConfig(
            base / curve_t.string("client_secret_key_file"),
            base / curve_t.string("server_public_key_file"),
        )
        curve_t.finish()
    bus = BusConfig(
        endpoint=endpoint,
        timeout_s=bus_t.number("timeout_s", low=0.0, high=600.0, low_open=True),
        retries=bus_t.integer("retries", low=0, high=100),
        backoff_s=bus_t.number("backoff_s", low=0.0, high=60.0),
        curve=curve,
    )
    bus_t.finish()

    sp_t = top.table("setpoints")
    setpoints = []
    for name in sorted(sp_t.data, key=lambda n: (n != "velocity", n != "detuning", n)):
        sub = sp_t.table(name)
        setpoints.append(_read_setpoint(sub, name))
    for needed in ("velocity", "detuning"):
        if needed not in sp_t.data:
            sp_t.problem(needed, "a table (missing)", None)
    sp_t.finish()

    m_t = top.table("measurement")
    measurement = MeasurementConfig(
        shots_per_phase=m_t.integer("shots_per_phase", low=1, high=10_000_000),
        ramsey_phases=m_t.integer("ramsey_phases", low=3, high=256),
        confidence=m_t.number("confidence", 0.95, low=0.5, high=0.999),
        resamples=m_t.integer("resamples", 2000, low=100, high=100_000),
        verification_shots_per_phase=m_t.integer("verification_shots_per_phase", low=1,
                                                 high=100_000_000),
    )
    m_t.finish()

    s_t = top.table("search")
    strategy = s_t.string("strategy", "phase_lock", choices=get_args(StrategyKind))
    search = SearchConfig(
        strategy=strategy,  # type: ignore[arg-type]
        seed=s_t.integer("seed", 0, low=0, high=2**32 - 1),
        max_points=s_t.integer("max_points", low=1, high=10_000),
        max_shots=s_t.integer("max_shots", low=1, high=plausible.MAX_SHOTS, why=_SHOTS_WHY),
        max_rig_time_s=s_t.number("max_rig_time_s", low=0.0, low_open=True,
                                  high=plausible.MAX_RIG_TIME_S, why=_RIG_TIME_WHY),
        n_initial_points=s_t.integer("n_initial_points", 8, low=1, high=1000),
        min_points=s_t.integer("min_points", 12, low=1, high=10_000),
        grid_points_per_dimension=s_t.integer("grid_points_per_dimension", 9, low=2, high=200),
        coordinate_points_per_dimension=s_t.integer("coordinate_points_per_dimension", 9, low=3,
                                                    high=200),
        coordinate_rounds=s_t.integer("coordinate_rounds", 3, low=1, high=50),
        exploration=s_t.number("exploration", 0.01, low=0.0, high=1.0),
        drift_compensation=s_t.boolean("drift_compensation", False),
        max_drift_hz_per_s=s_t.number("max_drift_hz_per_s", 3.0, low=0.0, high=1e4,
                                      low_open=True),
        refine_points=s_t.integer("refine_points", 7, low=0, high=50),
        refine_half_width_hz=s_t.number("refine_half_width_hz", 9e3, low=0.0, low_open=True,
                                        spec=plausible.DETUNING_STEP_HZ),
    )
    s_t.finish()

    n_t = top.table("nominal")
    nominal = NominalConfig(
        coupling_hz=n_t.number("coupling_hz", spec=plausible.COUPLING_HZ),
        waist_m=n_t.number("waist_m", spec=plausible.WAIST_M),
    )
    n_t.finish()
    _check_two_pi_velocity(n_t, nominal, setpoints)

    a_t = top.table("acceptance")
    min_inversion = a_t.number("min_inversion", low=-1.0, high=1.0)
    on_reject = a_t.string("on_reject", "safe", choices=get_args(RejectAction))
    max_shortfall = a_t.number("max_shortfall", low=0.0, high=1.0, low_open=True) \
        if "max_shortfall" in a_t.data else None
    a_t.used.add("max_shortfall")
    a_t.finish()

    c_t = top.table("calibration")
    store = base / c_t.string("store")
    c_t.finish()

    r_t = top.table("retune")
    hw_t = r_t.table("half_widths")
    half_widths = {}
    for sp in setpoints:
        half_widths[sp.name] = hw_t.number(sp.name, low=0.0, low_open=True,
                                           spec=_SETPOINT_RANGES.get(sp.name, _ANY_SETPOINT)[1])
    hw_t.finish()
    retune = RetuneConfig(
        still_good_fraction=r_t.number("still_good_fraction", low=0.0, high=1.0, low_open=True),
        half_widths=half_widths,
        max_points=r_t.integer("max_points", low=1, high=10_000),
        max_shots=r_t.integer("max_shots", low=1, high=plausible.MAX_SHOTS, why=_SHOTS_WHY),
        n_initial_points=r_t.integer("n_initial_points", 4, low=1, high=1000),
        check_shots_per_phase=r_t.integer("check_shots_per_phase", low=1, high=100_000_000),
    )
    r_t.finish()

    rec_t = top.table("recovery", required=False)
    if rec_t is None:
        rec_t = _Table(source, "recovery", {}, problems)
    recovery = RecoveryConfig(
        step_retries=rec_t.integer("step_retries", 3, low=0, high=100),
        retry_wait_s=rec_t.number("retry_wait_s", 1.0, low=0.0, high=3600.0),
        interlock_poll_s=rec_t.number("interlock_poll_s", 5.0, low=0.0, high=3600.0, low_open=True),
        interlock_max_wait_s=rec_t.number("interlock_max_wait_s", 600.0, low=0.0, high=86400.0),
        safe_on_stop_s=rec_t.number("safe_on_stop_s", 10.0, low=0.0, high=600.0, low_open=True),
    )
    rec_t.finish()

    l_t = top.table("lock", required=False)
    if l_t is None:
        l_t = _Table(source, "lock", {}, problems)
    lock = LockConfig(
        target_shortfall=l_t.number("target_shortfall", 0.01, low=0.0, high=0.5, low_open=True),
        still_good_shortfall=l_t.number("still_good_shortfall", 0.02, low=0.0, high=0.5,
                                        low_open=True),
        lock_shots_per_phase=l_t.integer("lock_shots_per_phase", 500, low=1, high=10_000_000),
        velocity_shots_per_phase=l_t.integer("velocity_shots_per_phase", 500, low=1,
                                             high=10_000_000),
        capture_phase_error_rad=l_t.number("capture_phase_error_rad", 0.6 * math.pi, low=0.0,
                                           high=math.pi, low_open=True),
        min_contrast_ratio=l_t.number("min_contrast_ratio", 0.35, low=0.0, high=1.0),
        bracket_step_hz=l_t.number("bracket_step_hz", nominal.coupling_hz / 5.0, low=0.0,
                                   low_open=True, spec=plausible.DETUNING_STEP_HZ),
        velocity_step_fraction=l_t.number("velocity_step_fraction", 0.05, low=0.0, high=0.5,
                                          low_open=True),
        phase_at_peak_rad=l_t.number("phase_at_peak_rad", math.pi, low=0.0, high=2 * math.pi),
        phase_at_peak_prior_rad=l_t.number("phase_at_peak_prior_rad", 0.02 * math.pi, low=0.0,
                                           high=math.pi, low_open=True),
        drift_prior_hz_per_s=l_t.number("drift_prior_hz_per_s", 3.0, low=0.0, high=1e4,
                                        low_open=True),
        max_corrections=l_t.integer("max_corrections", 2, low=0, high=20),
    )
    l_t.finish()

    t_t = top.table("track", required=False)
    if t_t is None:
        t_t = _Table(source, "track", {}, problems)
    defaults = TrackConfig()
    end_at = t_t.string("end_at_local_time", "-", choices=())
    if end_at == "-":
        end_at = ""
    elif not _is_local_time(end_at):
        t_t.problem("end_at_local_time", 'a local time of day "HH:MM" (00:00 to 23:59)', end_at)
        end_at = ""
    track = TrackConfig(
        budget_fraction=t_t.number("budget_fraction", defaults.budget_fraction, low=0.0,
                                   high=1.0, low_open=True),
        floor=t_t.number("floor", defaults.floor, low=0.0, high=1.0, low_open=True),
        false_alarm_interval_s=t_t.number("false_alarm_interval_s",
                                          defaults.false_alarm_interval_s, low=60.0, high=1e9),
        max_gain=t_t.number("max_gain", defaults.max_gain, low=0.0, high=1.0, low_open=True),
        max_correction_hz=t_t.number("max_correction_hz", defaults.max_correction_hz, low=0.0,
                                     low_open=True, spec=plausible.DETUNING_STEP_HZ),
        min_correction_hz=t_t.number("min_correction_hz", defaults.min_correction_hz, low=0.0,
                                     high=plausible.DETUNING_STEP_HZ.high),
        min_shots_per_phase=t_t.integer("min_shots_per_phase", defaults.min_shots_per_phase,
                                        low=1, high=10_000_000),
        max_interval_s=t_t.number("max_interval_s", defaults.max_interval_s, low=60.0,
                                  high=86400.0),
        walk_hz_per_sqrt_s=t_t.number("walk_hz_per_sqrt_s", defaults.walk_hz_per_sqrt_s,
                                      spec=plausible.RANDOM_WALK_HZ_PER_SQRT_S),
        inversion_drop=t_t.number("inversion_drop", defaults.inversion_drop, low=0.0, high=1.0,
                                  low_open=True),
        retune_shots_per_phase=t_t.integer("retune_shots_per_phase",
                                           defaults.retune_shots_per_phase, low=1,
                                           high=100_000_000),
        max_consecutive_failures=t_t.integer("max_consecutive_failures",
                                             defaults.max_consecutive_failures, low=1, high=1000),
        max_rig_time_s=t_t.number("max_rig_time_s", defaults.max_rig_time_s, low=0.0,
                                  high=plausible.MAX_RIG_TIME_S, why=_RIG_TIME_WHY),
        max_wall_time_s=t_t.number("max_wall_time_s", defaults.max_wall_time_s, low=0.0,
                                   high=plausible.MAX_RIG_TIME_S, why=_RIG_TIME_WHY),
        end_at_local_time=end_at,
        on_stop=t_t.string("on_stop", defaults.on_stop, choices=get_args(StopAction)),  # type: ignore[arg-type]
    )
    t_t.finish()
    top.finish()

    # Relations between keys, checked once every key has been read.
    if search.min_points > search.max_points:
        s_t.problem("min_points", f"a value <= search.max_points = {search.max_points}",
                    search.min_points)
    if search.n_initial_points > search.max_points:
        s_t.problem("n_initial_points", f"a value <= search.max_points = {search.max_points}",
                    search.n_initial_points)
    if track.min_correction_hz >= track.max_correction_hz:
        t_t.problem("min_correction_hz", f"a value < track.max_correction_hz = "
                    f"{track.max_correction_hz:g}", track.min_correction_hz)
    if retune.n_initial_points > retune.max_points:
        r_t.problem("n_initial_points", f"a value <= retune.max_points = {retune.max_points}",
                    retune.n_initial_points)
    if problems:
        raise ConfigErrors(problems)

    return RunConfig(
        source=source,
        bus=bus,
        setpoints=tuple(setpoints),
        measurement=measurement,
        search=search,
        nominal=nominal,
        min_inversion=min_inversion,
        calibration_store=store,
        retune=retune,
        recovery=recovery,
        lock=lock,
        track=track,
        on_reject=on_reject,  # type: ignore[arg-type]
        max_shortfall=max_shortfall,
        raw=dict(data),
    )


def load_config(path: str | Path) -> RunConfig:
    """Read and check a calibrate/retune TOML file.

    Raises
    ------
    ConfigError
        The file is missing, is not UTF-8 TOML, or holds a wrong, missing or unknown value
        (every problem of the file at once).
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            data = tomllib.load(handle)
    except FileNotFoundError as exc:
        raise ConfigError(str(path), "<file>", "an existing TOML file", "no such file") from exc
    except OSError as exc:
        raise ConfigError(str(path), "<file>", "a readable file", str(exc)) from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(str(path), "<file>", "a TOML file (UTF-8 text)",
                          f"bytes that are not UTF-8 text ({exc.reason} at byte {exc.start})"
                          ) from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(path), "<file>", "valid TOML", str(exc)) from exc
    return config_from_dict(data, source=str(path), base_dir=path.parent)
