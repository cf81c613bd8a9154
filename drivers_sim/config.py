"""Configuration of the simulated rig: TOML -> frozen dataclasses, checked once.

Every value is checked here for type, range and finiteness, and unknown keys are refused; an
error is a :class:`SimConfigError` whose message names the file, the dotted key, what was
expected and what was received, for every problem of the file at once. A physical value must
also lie in the range a lab could mean (:mod:`autotune.plausible`, shared with the client's
configuration): a value typed in the wrong unit is refused with a hint at the likely one
(``cavity.damping_time_s ... got 25: did you mean 25 ms = 0.025?``). The top-level ``[faults]`` table belongs to the server
(``autotune rig`` validates it with :class:`autotune.server.FaultConfig`) and is kept
unvalidated as a plain dict.

Use :func:`load_sim_config` for a file and :func:`sim_config_from_dict` for a dict (tests and
studies that perturb a scenario; :meth:`SimRigConfig.to_dict` gives the dict back). The
dataclasses are frozen and work with :func:`dataclasses.replace`, which does not re-check:
round-trip through ``to_dict`` / ``sim_config_from_dict`` when the new values need checking.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import autotune.plausible as plausible
from drivers_sim.physics import (
    MODE_PROFILES,
    SUPER_GAUSSIAN_ORDER_RANGE,
    WAIST_ASYMMETRY_RANGE,
    ModeProfile,
    ModeProfileKind,
)

__all__ = [
    "SETPOINT_UNITS",
    "SimConfigError",
    "RigSection",
    "CavitySection",
    "BeamSection",
    "FieldSection",
    "RamseySection",
    "StarkSection",
    "DetectionSection",
    "DriftSection",
    "ModelSection",
    "SetpointLimit",
    "SimRigConfig",
    "load_sim_config",
    "sim_config_from_dict",
]

#: Set-point names (the README's wire protocol) and their SI units; the suffix of their limit keys.
SETPOINT_UNITS: dict[str, str] = {"velocity": "m/s", "detuning": "Hz"}
_UNIT_SUFFIX = {"velocity": "m_per_s", "detuning": "hz"}


class SimConfigError(ValueError):
    """A simulated-rig configuration file or value is wrong.

    The message names the file, the dotted key, what was expected and what was received.
    """


# --------------------------------------------------------------------------------------------
# Sections
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class RigSection:
    """``[rig]``: identity and timing.

    Attributes
    ----------
    name : str
        Rig name reported by ``describe``.
    default_seed : int
        Seed used when none is given, >= 0.
    repetition_rate_hz : float
        Samples (shots) per second of rig time, Hz.
    atoms_per_sample : float
        Poisson mean number of atoms per sample.
    settle_time_s : float
        Rig time an ``apply`` takes, s.
    max_shots_per_acquisition : int
        Largest ``shots`` one ``acquire`` accepts.
    """

    name: str
    default_seed: int
    repetition_rate_hz: float
    atoms_per_sample: float
    settle_time_s: float
    max_shots_per_acquisition: int


@dataclasses.dataclass(frozen=True)
class CavitySection:
    """``[cavity]``: the mode (hidden truth of the simulation).

    Attributes
    ----------
    frequency_hz : float
        Mode frequency, Hz.
    coupling_hz : float
        Vacuum Rabi frequency ``Omega_0 / 2 pi`` at the mode centre, Hz.
    waist_m : float
        Mode waist ``w`` of the coupling ``Omega_0 f(v t / w)``, m (for the asymmetric profile
        the mean of the waists before and after the centre).
    damping_time_s : float
        Energy damping time ``T_c``, s.
    temperature_k : float
        Mode temperature, K.
    initial_offset_hz : float
        Cavity drift offset at clock 0 (true minus set detuning, before Stark error), Hz.
    mode_profile : {"gaussian", "super_gaussian", "asymmetric"}
        Shape ``f`` of the coupling envelope (:class:`drivers_sim.physics.ModeProfile`);
        optional, default ``"gaussian"``.
    super_gaussian_order : float or None
        Order ``p`` of ``f = exp(-|x|^p)``; required with ``mode_profile = "super_gaussian"``,
        refused otherwise.
    waist_asymmetry : float or None
        ``a`` of the asymmetric mode (waists ``w (1 - a)`` before the centre and ``w (1 + a)``
        after it, along the beam); required with ``mode_profile = "asymmetric"``, refused
        otherwise.
    """

    frequency_hz: float
    coupling_hz: float
    waist_m: float
    damping_time_s: float
    temperature_k: float
    initial_offset_hz: float
    mode_profile: ModeProfileKind = "gaussian"
    super_gaussian_order: float | None = None
    waist_asymmetry: float | None = None

    @property
    def profile(self) -> ModeProfile:
        """The mode profile as the physics model takes it."""
        if self.mode_profile == "super_gaussian":
            return ModeProfile("super_gaussian", order=float(self.super_gaussian_order))
        if self.mode_profile == "asymmetric":
            return ModeProfile("asymmetric", asymmetry=float(self.waist_asymmetry))
        return ModeProfile()


@dataclasses.dataclass(frozen=True)
class BeamSection:
    """``[beam]``: velocity selection (hidden truth) and geometry.

    Attributes
    ----------
    velocity_bias_m_per_s : float
        True mean velocity minus the set-point, m/s.
    velocity_spread_m_per_s : float
        Standard deviation of the selected class, m/s.
    preparation_to_cavity_m : float
        Flight distance from the field preparation to the mode centre, m.
    """

    velocity_bias_m_per_s: float
    velocity_spread_m_per_s: float
    preparation_to_cavity_m: float


@dataclasses.dataclass(frozen=True)
class FieldSection:
    """``[field]``: preparation of the one-photon field.

    Attributes
    ----------
    one_photon_probability : float
        Probability ``p1`` that the preparation puts one photon in.
    """

    one_photon_probability: float


@dataclasses.dataclass(frozen=True)
class RamseySection:
    """``[ramsey]``: the interferometer zones.

    Attributes
    ----------
    detuning_hz : float
        Ramsey detuning ``Delta_R`` from the g-i line, Hz.
    zone_separation_m : float
        Distance ``L`` between the zones, m.
    area_at_set_velocity_rad : float
        Zone pulse area at the set velocity (power calibrated there), rad.
    """

    detuning_hz: float
    zone_separation_m: float
    area_at_set_velocity_rad: float


@dataclasses.dataclass(frozen=True)
class StarkSection:
    """``[stark]``: quadratic Stark tuning of the e-g line.

    Attributes
    ----------
    coefficient_hz_m2_per_v2 : float
        Nominal coefficient ``k`` of ``delta/2pi = k (E^2 - E_bias^2)``, Hz per (V/m)^2.
    coefficient_error : float
        Hidden relative error of ``k`` (true = nominal * (1 + error)).
    bias_field_v_per_m : float
        Field at detuning set-point 0, V/m.
    electrode_gap_m : float
        Electrode gap (voltage = field * gap), m.
    bias_field_error_v_per_m : float
        Hidden error of the electrode field: the atoms see the field commanded through the
        nominal law plus this (a stray field along the electrodes' axis), V/m; optional,
        default 0. The true detuning is ``k_true ((E + error)^2 - E_bias^2)``.
    """

    coefficient_hz_m2_per_v2: float
    coefficient_error: float
    bias_field_v_per_m: float
    electrode_gap_m: float
    bias_field_error_v_per_m: float = 0.0


@dataclasses.dataclass(frozen=True)
class DetectionSection:
    """``[detection]``: detectors.

    Attributes
    ----------
    efficiency : float
        Probability ``eta`` that an atom is detected.
    e_read_as_g, g_read_as_e, g_read_as_i, i_read_as_g : float
        Confusion probabilities of a detected atom.
    """

    efficiency: float
    e_read_as_g: float
    g_read_as_e: float
    g_read_as_i: float
    i_read_as_g: float


@dataclasses.dataclass(frozen=True)
class DriftSection:
    """``[drift]``: cavity-frequency drift on the rig clock.

    Attributes
    ----------
    ramp_hz_per_s : float
        Linear ramp of the offset, Hz/s.
    random_walk_hz_per_sqrt_s : float
        Random-walk strength: the offset's standard deviation grows as this times sqrt(t).
    thermal_step_hz : float
        Default size of a thermal step, Hz.
    """

    ramp_hz_per_s: float
    random_walk_hz_per_sqrt_s: float
    thermal_step_hz: float


@dataclasses.dataclass(frozen=True)
class ModelSection:
    """``[model]``: numerical settings of the simulation (optional table).

    Attributes
    ----------
    velocity_nodes : int
        Gauss-Hermite nodes of the velocity average.
    max_photons : int
        Highest photon number modelled.
    crossing_steps : int
        Integration steps of one crossing.
    stencil_spacing_hz : float
        Spacing of the detuning stencil cached per set-point, Hz.
    stencil_points : int
        Points of that stencil (odd, >= 3).
    """

    velocity_nodes: int = 9
    max_photons: int = 4
    crossing_steps: int = 256
    stencil_spacing_hz: float = 200.0
    stencil_points: int = 5


@dataclasses.dataclass(frozen=True)
class SetpointLimit:
    """Limits of one set-point (``[limits.NAME]``), in its SI unit.

    Attributes
    ----------
    unit : str
        SI unit of the set-point.
    min, max : float
        Allowed range.
    max_step : float
        Largest change one ``apply`` may make.
    safe : float
        Safe value (applied by ``safe``).
    """

    unit: str
    min: float
    max: float
    max_step: float
    safe: float


@dataclasses.dataclass(frozen=True)
class SimRigConfig:
    """The whole simulated-rig configuration.

    Attributes
    ----------
    source : str
        Where it came from (file path or ``"<memory>"``).
    rig, cavity, beam, field, ramsey, stark, detection, drift, model
        The sections.
    limits : dict of str to SetpointLimit
        One entry per set-point name of :data:`SETPOINT_UNITS`.
    faults : dict
        The ``[faults]`` table, unvalidated (the server checks it).
    """

    source: str
    rig: RigSection
    cavity: CavitySection
    beam: BeamSection
    field: FieldSection
    ramsey: RamseySection
    stark: StarkSection
    detection: DetectionSection
    drift: DriftSection
    model: ModelSection
    limits: dict[str, SetpointLimit]
    faults: dict[str, Any] = dataclasses.field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """The configuration as the nested dict :func:`sim_config_from_dict` accepts."""
        out: dict[str, Any] = {}
        for name in _SECTIONS:
            # Keys left unset (None: a parameter of a profile not in use) stay out of the file.
            out[name] = {key: value for key, value in dataclasses.asdict(getattr(self, name)).items()
                         if value is not None}
        out["limits"] = {
            name: {
                f"{key}_{_UNIT_SUFFIX[name]}": getattr(limit, key)
                for key in ("min", "max", "max_step", "safe")
            }
            for name, limit in self.limits.items()
        }
        if self.faults:
            out["faults"] = dict(self.faults)
        return out


# --------------------------------------------------------------------------------------------
# Checking
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class _Spec:
    kind: str  # "float", "int", "str" or "choice"
    low: float | None = None
    high: float | None = None
    low_open: bool = False
    high_open: bool = False
    choices: tuple[str, ...] = ()

    def describe(self) -> str:
        if self.kind == "choice":
            return "one of " + ", ".join(repr(c) for c in self.choices)
        what = {"float": "a finite number", "int": "an integer", "str": "a non-empty string"}[
            self.kind
        ]
        parts = []
        if self.low is not None:
            parts.append(f"{'>' if self.low_open else '>='} {self.low:g}")
        if self.high is not None:
            parts.append(f"{'<' if self.high_open else '<='} {self.high:g}")
        return what + (" " + " and ".join(parts) if parts else "")


def _f(low=None, high=None, *, low_open=False, high_open=False):
    return _Spec("float", low, high, low_open, high_open)


def _i(low=None, high=None):
    return _Spec("int", low, high)


_PROB = _f(0.0, 1.0)
_POS = _f(0.0, low_open=True)

_SECTION_SPECS: dict[str, dict[str, _Spec]] = {
    "rig": {
        "name": _Spec("str"),
        "default_seed": _i(0, 2**63 - 1),
        "repetition_rate_hz": _f(0.0, 1e7, low_open=True),
        "atoms_per_sample": _f(0.0, 100.0),
        "settle_time_s": _f(0.0, 3600.0),
        "max_shots_per_acquisition": _i(1, 10**9),
    },
    "cavity": {
        "frequency_hz": _f(0.0, low_open=True),
        "coupling_hz": _f(0.0, 1e8, low_open=True),
        "waist_m": _f(0.0, 1.0, low_open=True),
        "damping_time_s": _f(0.0, 1e6, low_open=True),
        "temperature_k": _f(0.0, 1e4),
        "initial_offset_hz": _f(-1e9, 1e9),
        "mode_profile": _Spec("choice", choices=MODE_PROFILES),
        "super_gaussian_order": _f(*SUPER_GAUSSIAN_ORDER_RANGE),
        "waist_asymmetry": _f(*WAIST_ASYMMETRY_RANGE),
    },
    "beam": {
        "velocity_bias_m_per_s": _f(-1e4, 1e4),
        "velocity_spread_m_per_s": _f(0.0, 1e4),
        "preparation_to_cavity_m": _f(0.0, 100.0),
    },
    "field": {
        "one_photon_probability": _PROB,
    },
    "ramsey": {
        "detuning_hz": _f(-1e9, 1e9),
        "zone_separation_m": _f(0.0, 100.0),
        "area_at_set_velocity_rad": _f(0.0, 2.0 * math.pi),
    },
    "stark": {
        "coefficient_hz_m2_per_v2": _f(-1e6, 1e6),
        "coefficient_error": _f(-0.5, 0.5),
        "bias_field_v_per_m": _f(0.0, 1e7, low_open=True),
        "electrode_gap_m": _POS,
        "bias_field_error_v_per_m": _f(-1e7, 1e7),
    },
    "detection": {
        "efficiency": _f(0.0, 1.0, low_open=True),
        "e_read_as_g": _PROB,
        "g_read_as_e": _PROB,
        "g_read_as_i": _PROB,
        "i_read_as_g": _PROB,
    },
    "drift": {
        "ramp_hz_per_s": _f(-1e6, 1e6),
        "random_walk_hz_per_sqrt_s": _f(0.0, 1e6),
        "thermal_step_hz": _f(-1e9, 1e9),
    },
    "model": {
        "velocity_nodes": _i(1, 64),
        "max_photons": _i(1, 20),
        "crossing_steps": _i(8, 65536),
        "stencil_spacing_hz": _f(0.0, 1e6, low_open=True),
        "stencil_points": _i(3, 15),
    },
}
#: The range a lab could mean of each physical key (autotune.plausible names each source),
#: checked once the key's type and hard bounds above hold.
_PLAUSIBLE: dict[str, plausible.Plausible] = {
    "rig.repetition_rate_hz": plausible.REPETITION_RATE_HZ,
    "rig.atoms_per_sample": plausible.ATOMS_PER_SAMPLE,
    "cavity.frequency_hz": plausible.CAVITY_FREQUENCY_HZ,
    "cavity.coupling_hz": plausible.COUPLING_HZ,
    "cavity.waist_m": plausible.WAIST_M,
    "cavity.damping_time_s": plausible.DAMPING_TIME_S,
    "cavity.temperature_k": plausible.TEMPERATURE_K,
    "cavity.initial_offset_hz": plausible.DETUNING_HZ,
    "beam.velocity_bias_m_per_s": plausible.VELOCITY_BIAS_M_PER_S,
    "beam.velocity_spread_m_per_s": plausible.VELOCITY_SPREAD_M_PER_S,
    "beam.preparation_to_cavity_m": plausible.FLIGHT_DISTANCE_M,
    "ramsey.detuning_hz": plausible.RAMSEY_DETUNING_HZ,
    "ramsey.zone_separation_m": plausible.ZONE_SEPARATION_M,
    "stark.coefficient_hz_m2_per_v2": plausible.STARK_COEFFICIENT_HZ_M2_PER_V2,
    "stark.bias_field_v_per_m": plausible.ELECTRIC_FIELD_V_PER_M,
    "stark.electrode_gap_m": plausible.ELECTRODE_GAP_M,
    "stark.bias_field_error_v_per_m": plausible.ELECTRIC_FIELD_V_PER_M,
    "drift.ramp_hz_per_s": plausible.DRIFT_RAMP_HZ_PER_S,
    "drift.random_walk_hz_per_sqrt_s": plausible.RANDOM_WALK_HZ_PER_SQRT_S,
    "drift.thermal_step_hz": plausible.THERMAL_STEP_HZ,
    "limits.velocity.min_m_per_s": plausible.VELOCITY_M_PER_S,
    "limits.velocity.max_m_per_s": plausible.VELOCITY_M_PER_S,
    "limits.velocity.safe_m_per_s": plausible.VELOCITY_M_PER_S,
    "limits.velocity.max_step_m_per_s": plausible.VELOCITY_STEP_M_PER_S,
    "limits.detuning.min_hz": plausible.DETUNING_HZ,
    "limits.detuning.max_hz": plausible.DETUNING_HZ,
    "limits.detuning.safe_hz": plausible.DETUNING_HZ,
    "limits.detuning.max_step_hz": plausible.DETUNING_STEP_HZ,
}
_SECTIONS = tuple(_SECTION_SPECS)
_SECTION_TYPES = {
    "rig": RigSection,
    "cavity": CavitySection,
    "beam": BeamSection,
    "field": FieldSection,
    "ramsey": RamseySection,
    "stark": StarkSection,
    "detection": DetectionSection,
    "drift": DriftSection,
    "model": ModelSection,
}
_OPTIONAL_SECTIONS = frozenset({"model"})


class _Checker:
    """Reads the file's tables, collecting every problem (a wrong value reads as a stand-in so
    that reading goes on); :meth:`raise_problems` reports them all in one error."""

    def __init__(self, source: str) -> None:
        self.source = source
        self.problems: list[str] = []

    def fail(self, key: str, expected: str, got: Any, hint: str = "") -> SimConfigError:
        return SimConfigError(f"{self.source}: {key}: expected {expected}, got {got!r}"
                              + (f": {hint}" if hint else ""))

    def note(self, key: str, expected: str, got: Any, hint: str = "") -> None:
        """Record a problem and go on reading."""
        self.problems.append(str(self.fail(key, expected, got, hint)))

    def raise_problems(self) -> None:
        """Raise every problem noted so far in one :class:`SimConfigError`."""
        if len(self.problems) == 1:
            raise SimConfigError(self.problems[0])
        if self.problems:
            raise SimConfigError(f"{self.source}: {len(self.problems)} problems:\n"
                                 + "\n".join(f"  - {problem}" for problem in self.problems))

    def table(self, data: Any, key: str) -> Mapping[str, Any]:
        if not isinstance(data, Mapping):
            self.note(key, "a table", data)
            return {}
        return data

    def unknown(self, data: Mapping[str, Any], allowed, prefix: str) -> None:
        for key in data:
            if key not in allowed:
                where = f"{prefix}.{key}" if prefix else str(key)
                near = difflib.get_close_matches(str(key), [str(a) for a in allowed], n=1)
                self.note(where, f"one of the keys {sorted(allowed)}", "an unknown key",
                          f"did you mean {near[0]!r}?" if near else "")

    def value(self, spec: _Spec, raw: Any, key: str) -> Any:
        stand_in = self._stand_in(spec)
        if spec.kind == "choice":
            if not isinstance(raw, str) or raw not in spec.choices:
                self.note(key, spec.describe(), raw)
                return stand_in
            return raw
        if spec.kind == "str":
            if not isinstance(raw, str) or not raw.strip():
                self.note(key, spec.describe(), raw)
                return stand_in
            return raw
        if spec.kind == "int":
            if isinstance(raw, bool) or not isinstance(raw, int):
                self.note(key, spec.describe(), raw)
                return stand_in
            value: float | int = raw
        else:
            if isinstance(raw, bool) or not isinstance(raw, (int, float)):
                self.note(key, spec.describe(), raw)
                return stand_in
            value = float(raw)
            if not math.isfinite(value):
                self.note(key, spec.describe(), raw)
                return stand_in
        if spec.low is not None and (value <= spec.low if spec.low_open else value < spec.low):
            self.note(key, spec.describe(), raw)
            return stand_in
        if spec.high is not None and (value >= spec.high if spec.high_open else value > spec.high):
            self.note(key, spec.describe(), raw)
            return stand_in
        if key in _PLAUSIBLE and (found := _PLAUSIBLE[key].problem(float(value))) is not None:
            self.note(key, found[0], raw, found[1])
        return value

    @staticmethod
    def _stand_in(spec: _Spec) -> Any:
        """A value that lets reading go on after a problem (never returned to a caller)."""
        if spec.kind == "choice":
            return spec.choices[0]
        if spec.kind == "str":
            return "-"
        low = spec.low if spec.low is not None else 0.0
        high = spec.high if spec.high is not None else low + 2.0
        middle = 0.5 * (low + high) if spec.low is not None or spec.high is not None else 1.0
        return int(middle) if spec.kind == "int" else float(middle)

    def section(self, name: str, data: Any) -> Any:
        """The section's dataclass, or None when the table is missing (noted once)."""
        specs = _SECTION_SPECS[name]
        cls = _SECTION_TYPES[name]
        if data is None:
            if name in _OPTIONAL_SECTIONS:
                return cls()
            self.note(name, "a table", "nothing")
            return None
        if not isinstance(data, Mapping):
            self.note(name, "a table", data)
            return None
        self.unknown(data, specs, name)
        defaults = {f.name: f.default for f in dataclasses.fields(cls)}
        values = {}
        for key, spec in specs.items():
            dotted = f"{name}.{key}"
            if key not in data:
                if defaults[key] is dataclasses.MISSING:
                    self.note(dotted, spec.describe(), "nothing")
                    values[key] = self._stand_in(spec)
                else:
                    values[key] = defaults[key]
                continue
            values[key] = self.value(spec, data[key], dotted)
        return cls(**values)

    def limits(self, data: Any) -> dict[str, SetpointLimit]:
        """The ``[limits.NAME]`` tables; a set-point whose table has a problem is left out."""
        if data is None:
            self.note("limits", "a table", "nothing")
            return {}
        data = self.table(data, "limits")
        self.unknown(data, SETPOINT_UNITS, "limits")
        out = {}
        for name, unit in SETPOINT_UNITS.items():
            prefix = f"limits.{name}"
            if name not in data:
                self.note(prefix, "a table", "nothing")
                continue
            if not isinstance(data[name], Mapping):
                self.note(prefix, "a table", data[name])
                continue
            table = data[name]
            before = len(self.problems)
            suffix = _UNIT_SUFFIX[name]
            keys = {f"{k}_{suffix}": k for k in ("min", "max", "max_step", "safe")}
            self.unknown(table, keys, prefix)
            values = {}
            for key, field in keys.items():
                dotted = f"{prefix}.{key}"
                if key not in table:
                    self.note(dotted, "a finite number", "nothing")
                    continue
                spec = _f(0.0, low_open=True) if field == "max_step" else _f()
                if name == "velocity" and field in ("min", "max", "safe"):
                    spec = _f(0.0, low_open=True)
                values[field] = self.value(spec, table[key], dotted)
            if len(self.problems) > before:
                continue
            if values["min"] >= values["max"]:
                self.note(f"{prefix}.max_{suffix}", f"a number > min_{suffix} = {values['min']:g}",
                          values["max"])
            elif not values["min"] <= values["safe"] <= values["max"]:
                self.note(f"{prefix}.safe_{suffix}",
                          f"a number in [{values['min']:g}, {values['max']:g}]", values["safe"])
            else:
                out[name] = SetpointLimit(unit=unit, **values)
        return out


def sim_config_from_dict(data: Mapping[str, Any], source: str = "<memory>") -> SimRigConfig:
    """Build and check a :class:`SimRigConfig` from a nested dict (the parsed TOML).

    Parameters
    ----------
    data : mapping
        Top-level tables as in ``configs/sim-rig.toml``.
    source : str, optional
        Name used in error messages.

    Raises
    ------
    SimConfigError
        On any unknown key, missing key, wrong type, non-finite, out-of-range or implausible
        value (all of them in one message), or values that do not fit together.
    """
    check = _Checker(source)
    data = check.table(data, "<top level>")
    allowed = set(_SECTIONS) | {"limits", "faults"}
    check.unknown(data, allowed, "")
    sections = {name: check.section(name, data.get(name)) for name in _SECTIONS}
    limits = check.limits(data.get("limits"))
    faults = data.get("faults", {})
    faults = dict(check.table(faults, "faults"))
    # Every problem of a single key at once; the relations below need every key right.
    check.raise_problems()
    detection = sections["detection"]
    if detection.g_read_as_e + detection.g_read_as_i > 1.0:
        raise check.fail(
            "detection.g_read_as_i",
            f"a probability <= 1 - g_read_as_e = {1.0 - detection.g_read_as_e:g}",
            detection.g_read_as_i,
        )
    cavity = sections["cavity"]
    for key, profile in (("super_gaussian_order", "super_gaussian"),
                         ("waist_asymmetry", "asymmetric")):
        value = getattr(cavity, key)
        if cavity.mode_profile == profile and value is None:
            raise check.fail(f"cavity.{key}",
                             f"{_SECTION_SPECS['cavity'][key].describe()} "
                             f"(mode_profile = {profile!r} needs it)", "nothing")
        if cavity.mode_profile != profile and value is not None:
            raise check.fail(f"cavity.{key}",
                             f"no value unless cavity.mode_profile = {profile!r} "
                             f"(it is {cavity.mode_profile!r})", value)
    stark = sections["stark"]
    if stark.coefficient_hz_m2_per_v2 == 0.0:
        raise check.fail("stark.coefficient_hz_m2_per_v2", "a non-zero number", 0.0)
    # Every detuning set-point must map to a real electrode field (E^2 >= 0).
    detuning = limits["detuning"]
    for bound in ("min", "max"):
        square = stark.bias_field_v_per_m**2 + getattr(detuning, bound) / stark.coefficient_hz_m2_per_v2
        if square < 0.0:
            raise check.fail(
                "stark.bias_field_v_per_m",
                f"a bias field that reaches limits.detuning.{bound}_hz "
                f"(needs >= {math.sqrt(-getattr(detuning, bound) / stark.coefficient_hz_m2_per_v2):g})",
                stark.bias_field_v_per_m,
            )
    # The stray field must not reverse the field the atoms see anywhere within the limits
    # (the set-point -> detuning map would fold over and lose its inverse).
    weakest = min(
        math.sqrt(stark.bias_field_v_per_m**2 + getattr(detuning, bound) / stark.coefficient_hz_m2_per_v2)
        for bound in ("min", "max")
    )
    if abs(stark.bias_field_error_v_per_m) >= weakest:
        raise check.fail(
            "stark.bias_field_error_v_per_m",
            f"a field error smaller in size than the weakest electrode field within "
            f"limits.detuning ({weakest:g} V/m)",
            stark.bias_field_error_v_per_m,
        )
    velocity = limits["velocity"]
    bias = sections["beam"].velocity_bias_m_per_s
    spread = sections["beam"].velocity_spread_m_per_s
    if velocity.min + bias - 6.0 * spread <= 0.0:
        raise check.fail(
            "beam.velocity_bias_m_per_s",
            "a bias and spread that keep every true velocity > 0 at limits.velocity.min_m_per_s",
            bias,
        )
    return SimRigConfig(source=source, limits=limits, faults=faults, **sections)


def load_sim_config(path: str | Path) -> SimRigConfig:
    """Read and check a simulated-rig TOML file.

    Parameters
    ----------
    path : str or pathlib.Path
        The TOML file.

    Raises
    ------
    SimConfigError
        If the file cannot be read, is not UTF-8 TOML, or any value is wrong (every problem
        of a single key at once).
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            data = tomllib.load(handle)
    except OSError as exc:
        raise SimConfigError(f"{path}: expected a readable TOML file, got {exc}") from exc
    except UnicodeDecodeError as exc:
        raise SimConfigError(f"{path}: expected a TOML file (UTF-8 text), got bytes that are not "
                             f"UTF-8 text ({exc.reason} at byte {exc.start})") from exc
    except tomllib.TOMLDecodeError as exc:
        raise SimConfigError(f"{path}: expected valid TOML, got {exc}") from exc
    return sim_config_from_dict(data, source=str(path))
