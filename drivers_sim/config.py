"""Configuration of the simulated rig: TOML -> frozen dataclasses, checked once.

Each section's annotations declare its keys' types and bounds, checked by
:mod:`autotune.schema` (unknown keys refused, with the nearest name); the rules joining keys of
several tables sit beside them (``_relations``). An error is a :class:`SimConfigError` whose
message names the file, the dotted key, what was expected and what was received, for every
problem of the file at once. A physical value must
also lie in the range a lab could mean (:mod:`autotune.plausible`, shared with the client's
configuration): a value typed in the wrong unit is refused with a hint at the likely one
(``cavity.damping_time_s ... got 25: did you mean 25 ms = 0.025?``). The top-level ``[faults]`` table belongs to the server
(``autotune rig`` validates it with :class:`autotune.kit.server.FaultConfig`) and is kept
unvalidated as a plain dict.

Use :func:`load_sim_config` for a file and :func:`sim_config_from_dict` for a dict (tests and
studies that perturb a scenario; :meth:`SimRigConfig.to_dict` gives the dict back). The
dataclasses are frozen and work with :func:`dataclasses.replace`, which does not re-check:
round-trip through ``to_dict`` / ``sim_config_from_dict`` when the new values need checking.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import autotune.plausible as plausible
from autotune.errors import ConfigError, FileErrors
from autotune.wire.protocol import SetpointLimit as WireLimit
from autotune.schema import check, integer, number, read_toml, refuse, table, text
from drivers_sim.physics import (
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


class SimConfigError(FileErrors, ValueError):
    """A simulated-rig configuration file or value is wrong (a :class:`ValueError` too, as it
    always was): every problem of the file, each naming the file, the dotted key, what was
    expected and what was received (``problems``).
    """


_PROBABILITY = number(0.0, 1.0)


# --------------------------------------------------------------------------------------------
# Sections
# --------------------------------------------------------------------------------------------


@table
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

    name: text()
    default_seed: integer(0, 2**63 - 1)
    repetition_rate_hz: number(0.0, 1e7, low_open=True, plausible=plausible.REPETITION_RATE_HZ)
    atoms_per_sample: number(0.0, 100.0, plausible=plausible.ATOMS_PER_SAMPLE)
    settle_time_s: number(0.0, 3600.0)
    max_shots_per_acquisition: integer(1, 10**9)


@table
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

    frequency_hz: number(0.0, low_open=True, plausible=plausible.CAVITY_FREQUENCY_HZ)
    coupling_hz: number(0.0, 1e8, low_open=True, plausible=plausible.COUPLING_HZ)
    waist_m: number(0.0, 1.0, low_open=True, plausible=plausible.WAIST_M)
    damping_time_s: number(0.0, 1e6, low_open=True, plausible=plausible.DAMPING_TIME_S)
    temperature_k: number(0.0, 1e4, plausible=plausible.TEMPERATURE_K)
    initial_offset_hz: number(-1e9, 1e9, plausible=plausible.DETUNING_HZ)
    mode_profile: ModeProfileKind = "gaussian"
    # None (left out of the file) unless the profile needs it: an explicit None is refused.
    super_gaussian_order: number(*SUPER_GAUSSIAN_ORDER_RANGE) = None
    waist_asymmetry: number(*WAIST_ASYMMETRY_RANGE) = None

    @property
    def profile(self) -> ModeProfile:
        """The mode profile as the physics model takes it."""
        if self.mode_profile == "super_gaussian":
            return ModeProfile("super_gaussian", order=float(self.super_gaussian_order))
        if self.mode_profile == "asymmetric":
            return ModeProfile("asymmetric", asymmetry=float(self.waist_asymmetry))
        return ModeProfile()


@table
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

    velocity_bias_m_per_s: number(-1e4, 1e4, plausible=plausible.VELOCITY_BIAS_M_PER_S)
    velocity_spread_m_per_s: number(0.0, 1e4, plausible=plausible.VELOCITY_SPREAD_M_PER_S)
    preparation_to_cavity_m: number(0.0, 100.0, plausible=plausible.FLIGHT_DISTANCE_M)


@table
class FieldSection:
    """``[field]``: preparation of the one-photon field.

    Attributes
    ----------
    one_photon_probability : float
        Probability ``p1`` that the preparation puts one photon in.
    """

    one_photon_probability: _PROBABILITY


@table
class RamseySection:
    """``[ramsey]``: the interferometer zones.

    Attributes
    ----------
    detuning_hz : float
        Ramsey detuning ``Delta_R`` from the g-i line, Hz.
    zone_separation_m : float
        Distance ``L`` between the zones, m.
    area_at_set_velocity_rad : float
        Zone pulse area at the velocity where the zones' power was set, rad.
    power_set_velocity_m_per_s : float or None
        Velocity at which the zones' power was set (once, for every set-point): an atom of
        velocity ``v`` then sees the area ``area_at_set_velocity_rad * power_set / v``, and
        both fringes lose contrast as ``v`` leaves it (docs/physics.md section 3); optional,
        default: the power is set again at every velocity set-point (the area is
        ``area_at_set_velocity_rad`` at the set velocity).
    """

    detuning_hz: number(-1e9, 1e9, plausible=plausible.RAMSEY_DETUNING_HZ)
    zone_separation_m: number(0.0, 100.0, plausible=plausible.ZONE_SEPARATION_M)
    area_at_set_velocity_rad: number(0.0, 2.0 * math.pi)
    # None (left out of the file): the power follows the set velocity; an explicit None is refused.
    power_set_velocity_m_per_s: number(0.0, 1e4, low_open=True,
                                       plausible=plausible.VELOCITY_M_PER_S) = None


@table
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

    coefficient_hz_m2_per_v2: number(-1e6, 1e6, plausible=plausible.STARK_COEFFICIENT_HZ_M2_PER_V2)
    coefficient_error: number(-0.5, 0.5)
    bias_field_v_per_m: number(0.0, 1e7, low_open=True, plausible=plausible.ELECTRIC_FIELD_V_PER_M)
    electrode_gap_m: number(0.0, low_open=True, plausible=plausible.ELECTRODE_GAP_M)
    bias_field_error_v_per_m: number(-1e7, 1e7, plausible=plausible.ELECTRIC_FIELD_V_PER_M) = 0.0


@table
class DetectionSection:
    """``[detection]``: detectors.

    Attributes
    ----------
    efficiency : float
        Probability ``eta`` that an atom is detected.
    e_read_as_g, g_read_as_e, g_read_as_i, i_read_as_g : float
        Confusion probabilities of a detected atom.
    """

    efficiency: number(0.0, 1.0, low_open=True)
    e_read_as_g: _PROBABILITY
    g_read_as_e: _PROBABILITY
    g_read_as_i: _PROBABILITY
    i_read_as_g: _PROBABILITY


@table
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

    ramp_hz_per_s: number(-1e6, 1e6, plausible=plausible.DRIFT_RAMP_HZ_PER_S)
    random_walk_hz_per_sqrt_s: number(0.0, 1e6, plausible=plausible.RANDOM_WALK_HZ_PER_SQRT_S)
    thermal_step_hz: number(-1e9, 1e9, plausible=plausible.THERMAL_STEP_HZ)


@table
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

    velocity_nodes: integer(1, 64) = 9
    max_photons: integer(1, 20) = 4
    crossing_steps: integer(8, 65536) = 256
    stencil_spacing_hz: number(0.0, 1e6, low_open=True) = 200.0
    stencil_points: integer(3, 15) = 5


@dataclasses.dataclass(frozen=True)
class SetpointLimit(WireLimit):
    """Limits of one set-point (``[limits.NAME]``), in its SI unit: the wire's set-point limit
    (:class:`autotune.wire.protocol.SetpointLimit`: ``unit``, ``min``, ``max``, ``max_step``, and
    its ``tighter``) with the simulated rig's safe value.

    Attributes
    ----------
    safe : float
        Safe value (applied by ``safe``).
    """

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


_SECTIONS = ("rig", "cavity", "beam", "field", "ramsey", "stark", "detection", "drift", "model")


def _ordered(low: float, high: float, safe: float, suffix: str) -> None:
    if low >= high:
        refuse(f"max_{suffix}", f"a number > min_{suffix} = {low:g}", high)
    if not low <= safe <= high:
        refuse(f"safe_{suffix}", f"a number in [{low:g}, {high:g}]", safe)


_SPEED = number(0.0, low_open=True, plausible=plausible.VELOCITY_M_PER_S)
_DETUNING = number(plausible=plausible.DETUNING_HZ)


@table
class _VelocityLimits:
    """``[limits.velocity]`` as the file spells it, m/s."""

    min_m_per_s: _SPEED
    max_m_per_s: _SPEED
    max_step_m_per_s: number(0.0, low_open=True, plausible=plausible.VELOCITY_STEP_M_PER_S)
    safe_m_per_s: _SPEED

    def __post_init__(self) -> None:
        _ordered(self.min_m_per_s, self.max_m_per_s, self.safe_m_per_s, "m_per_s")


@table
class _DetuningLimits:
    """``[limits.detuning]`` as the file spells it, Hz."""

    min_hz: _DETUNING
    max_hz: _DETUNING
    max_step_hz: number(0.0, low_open=True, plausible=plausible.DETUNING_STEP_HZ)
    safe_hz: _DETUNING

    def __post_init__(self) -> None:
        _ordered(self.min_hz, self.max_hz, self.safe_hz, "hz")


@table
class _Limits:
    velocity: _VelocityLimits
    detuning: _DetuningLimits


@table
class _File:
    """The whole file as written (``[faults]`` is the server's: any table)."""

    rig: RigSection
    cavity: CavitySection
    beam: BeamSection
    field: FieldSection
    ramsey: RamseySection
    stark: StarkSection
    detection: DetectionSection
    drift: DriftSection
    limits: _Limits
    model: ModelSection = ModelSection()
    faults: dict[str, Any] = dataclasses.field(default_factory=dict)


def _relations(file: _File, source: str) -> list[ConfigError]:
    """The rules that join keys of several tables (each key is right by itself)."""
    found: list[ConfigError] = []

    def refused(key: str, expected: str, got: Any) -> None:
        found.append(ConfigError(source, key, expected, got))

    detection, cavity, stark, beam = file.detection, file.cavity, file.stark, file.beam
    if detection.g_read_as_e + detection.g_read_as_i > 1.0:
        refused("detection.g_read_as_i",
                f"a probability <= 1 - g_read_as_e = {1.0 - detection.g_read_as_e:g}",
                detection.g_read_as_i)
    for key, profile, bounds in (
            ("super_gaussian_order", "super_gaussian", SUPER_GAUSSIAN_ORDER_RANGE),
            ("waist_asymmetry", "asymmetric", WAIST_ASYMMETRY_RANGE)):
        value = getattr(cavity, key)
        if cavity.mode_profile == profile and value is None:
            refused(f"cavity.{key}", f"a finite number >= {bounds[0]:g} and <= {bounds[1]:g} "
                    f"(mode_profile = {profile!r} needs it)", "nothing")
        if cavity.mode_profile != profile and value is not None:
            refused(f"cavity.{key}", f"no value unless cavity.mode_profile = {profile!r} "
                    f"(it is {cavity.mode_profile!r})", value)
    k = stark.coefficient_hz_m2_per_v2
    velocity, detuning = file.limits.velocity, file.limits.detuning
    slowest = velocity.min_m_per_s + beam.velocity_bias_m_per_s - 6.0 * beam.velocity_spread_m_per_s
    if slowest <= 0.0:
        refused("beam.velocity_bias_m_per_s", "a bias and spread that keep every true velocity "
                "> 0 at limits.velocity.min_m_per_s", beam.velocity_bias_m_per_s)
    if k == 0.0:
        refused("stark.coefficient_hz_m2_per_v2", "a non-zero number", 0.0)
        return found
    # Every detuning set-point must map to a real electrode field (E^2 >= 0), ...
    squares = {bound: stark.bias_field_v_per_m**2 + getattr(detuning, f"{bound}_hz") / k
               for bound in ("min", "max")}
    for bound, square in squares.items():
        if square < 0.0:
            refused("stark.bias_field_v_per_m", f"a bias field that reaches limits.detuning."
                    f"{bound}_hz (needs >= {math.sqrt(stark.bias_field_v_per_m**2 - square):g})",
                    stark.bias_field_v_per_m)
            return found
    # ... and the stray field must not reverse the field the atoms see anywhere within the
    # limits (the set-point -> detuning map would fold over and lose its inverse).
    weakest = min(math.sqrt(square) for square in squares.values())
    if abs(stark.bias_field_error_v_per_m) >= weakest:
        refused("stark.bias_field_error_v_per_m", f"a field error smaller in size than the "
                f"weakest electrode field within limits.detuning ({weakest:g} V/m)",
                stark.bias_field_error_v_per_m)
    return found


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
        value, or values that do not fit together: all of them in one message (the rules
        joining tables once every key is right by itself).
    """
    file = check(_File, data, file=source, rules=lambda file: _relations(file, source),
                 error=SimConfigError)
    limits = {
        "velocity": SetpointLimit("m/s", file.limits.velocity.min_m_per_s,
                                  file.limits.velocity.max_m_per_s,
                                  file.limits.velocity.max_step_m_per_s,
                                  file.limits.velocity.safe_m_per_s),
        "detuning": SetpointLimit("Hz", file.limits.detuning.min_hz, file.limits.detuning.max_hz,
                                  file.limits.detuning.max_step_hz, file.limits.detuning.safe_hz),
    }
    return SimRigConfig(source=source, limits=limits, faults=dict(file.faults),
                        **{name: getattr(file, name) for name in _SECTIONS})


def load_sim_config(path: str | Path) -> SimRigConfig:
    """Read and check a simulated-rig TOML file.

    Parameters
    ----------
    path : str or pathlib.Path
        The TOML file.

    Raises
    ------
    SimConfigError
        If the file is missing, unreadable, not UTF-8 TOML, or any value is wrong (every
        problem of the file at once).
    """
    return sim_config_from_dict(read_toml(path, error=SimConfigError), source=str(path))
