"""The simulated rig: set-points, virtual clock, drift, detectors and noise.

:class:`SimulatedRig` holds the state of one simulated apparatus and answers the operations of
the wire protocol (README) with JSON-ready dicts: ``describe``, ``apply``, ``acquire``,
``status``, ``safe`` and, simulated rig only, ``truth``, ``advance``, ``thermal_step``.

Model of the state
------------------
- Set-points in force, starting at the safe ones; ``apply`` checks names, finiteness, limits and
  step sizes, then takes ``settle_time_s`` of rig time.
- A virtual clock in seconds; ``acquire`` takes ``shots / repetition_rate_hz``.
- The true detuning is the Stark-law detuning of the set-point (with the hidden coefficient
  error and the hidden error of the electrode field) plus the cavity offset ``initial + ramp * clock + random walk + thermal steps``;
  the random walk advances with the clock (increments ``N(0, sigma^2 dt)``).
- Counts: per shot a Poisson number of atoms (mean ``atoms_per_sample``), each detected with
  efficiency ``eta`` and assigned to e, g or i through the confusion matrix. By Poisson
  thinning the aggregated counts of one acquisition are independent
  ``Poisson(shots * mu * eta * p_x)`` with ``p_x`` the detected probabilities, which is how
  they are drawn. Atoms of one sample are independent (each sees the prepared field).
- Randomness: one ``numpy.random.SeedSequence(seed)`` spawns a child for the counts and one
  for the drift, so the same seed and call sequence give the same counts.

Caching and its error
---------------------
After a set-point change the rig computes the detected coefficients on a stencil of
``stencil_points`` true detunings spaced ``stencil_spacing_hz`` around the present true
detuning (one vectorised call, a few ms) and an acquisition interpolates them with the
Lagrange polynomial through the stencil at the present true detuning, so drift is followed
honestly without recomputing. The stencil is rebuilt around the present detuning when drift
moves it more than one spacing from the centre. With the defaults (5 points, 200 Hz) the
interpolation error on any probability is about 1e-10 (measured by benchmarks/bench_sim.py,
which prints it), far below the counting noise of any acquisition.

The truth's best set-points come from a coarse grid of a reduced model (3 velocity nodes,
2 photons, 64 steps) over the velocity limits and the true detunings reachable within the
limits (plus a margin), then Nelder-Mead refinement of the three best local maxima with the
full model. The landscape in TRUE detuning does not move with the cavity offset, so the result
is cached and mapped to set-point detuning at each call; it is searched again only when the
mapped best leaves the limits or a coarse cell better than any seen at the last search enters
the reachable window (the coarse grid is recomputed when it no longer covers that window).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np
# scipy.optimize loads on the first truth request (scipy's submodules load on first use): a
# rig that is never asked for the truth does not import it.
import scipy
import structlog

from autotune.driver import BadRequest, InterlockSet, OutOfRange
from autotune.wire.protocol import STEP_TOLERANCE
from drivers_sim import physics
from drivers_sim.config import SimRigConfig

__all__ = ["SimulatedRig", "SetpointError", "RequestError", "RigInterlock"]

_log = structlog.get_logger(__name__)

_FIELDS = physics.FIELDS
_MAX_ADVANCE_S = 1.0e7  # about four months of rig time in one call
# Largest thermal step on demand: ten times the detuning limits of any sane rig; beyond it the
# request is a typo (kHz for Hz), not a thermal event.
_MAX_THERMAL_STEP_HZ = 1.0e6
# Coarse truth grid and its margin beyond the reachable true-detuning window.
_COARSE_VELOCITY_STEP = 10.0
_COARSE_DETUNING_STEP_HZ = 2.0e3
_COARSE_MARGIN_HZ = 30.0e3
_REFINE_CANDIDATES = 3


class SetpointError(OutOfRange, ValueError):
    """A set-point was refused: unknown name, not finite, outside its limits or too big a step.

    The message names the set-point, the limit and the value; a server answers ``out_of_range``.
    """


class RequestError(BadRequest, ValueError):
    """A request's value cannot be taken (unknown field, bad phase or shot count).

    A server answers it with ``bad_request``; any other exception of the rig is ``internal``.
    """


class RigInterlock(InterlockSet, RuntimeError):
    """The rig's interlock is set: ``apply`` and ``acquire`` are refused until it clears."""


@dataclasses.dataclass(frozen=True)
class _Stencil:
    velocity: float
    detunings: np.ndarray  # true detunings, Hz
    detected: np.ndarray  # (points, 2, 3, 3)


@dataclasses.dataclass(frozen=True)
class _Best:
    velocity: float
    true_detuning_hz: float
    inversion: float
    coarse_top: float  # best coarse-grid value inside the window searched


@dataclasses.dataclass(frozen=True)
class _Landscape:
    velocities: np.ndarray
    true_detunings: np.ndarray
    inversion: np.ndarray  # (velocities, detunings), reduced model


def _model_from_config(config: SimRigConfig) -> physics.AtomCavityModel:
    confusion = physics.confusion_matrix(
        e_read_as_g=config.detection.e_read_as_g,
        g_read_as_e=config.detection.g_read_as_e,
        g_read_as_i=config.detection.g_read_as_i,
        i_read_as_g=config.detection.i_read_as_g,
    )
    return physics.AtomCavityModel(
        coupling_hz=config.cavity.coupling_hz,
        waist_m=config.cavity.waist_m,
        cavity_frequency_hz=config.cavity.frequency_hz,
        temperature_k=config.cavity.temperature_k,
        damping_time_s=config.cavity.damping_time_s,
        one_photon_probability=config.field.one_photon_probability,
        preparation_to_cavity_m=config.beam.preparation_to_cavity_m,
        velocity_bias_m_per_s=config.beam.velocity_bias_m_per_s,
        velocity_spread_m_per_s=config.beam.velocity_spread_m_per_s,
        ramsey_detuning_hz=config.ramsey.detuning_hz,
        zone_separation_m=config.ramsey.zone_separation_m,
        zone_area_rad=config.ramsey.area_at_set_velocity_rad,
        zone_power_velocity_m_per_s=config.ramsey.power_set_velocity_m_per_s,
        confusion=tuple(tuple(float(x) for x in row) for row in confusion),
        velocity_nodes=config.model.velocity_nodes,
        max_photons=config.model.max_photons,
        crossing_steps=config.model.crossing_steps,
        mode_profile=config.cavity.profile,
    )


def _real_number(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


def _lagrange_weights(nodes: np.ndarray, x: float) -> np.ndarray:
    diff = x - nodes
    weights = np.empty(nodes.size)
    for k in range(nodes.size):
        others = np.delete(np.arange(nodes.size), k)
        weights[k] = np.prod(diff[others] / (nodes[k] - nodes[others]))
    return weights


class SimulatedRig:
    """An in-process simulated rig speaking the protocol's operations.

    Parameters
    ----------
    config : SimRigConfig
        Checked configuration (hidden truth, limits, drift, numerics).
    seed : int, optional
        Seed of all randomness (counts and drift); default ``config.rig.default_seed``.

    Notes
    -----
    Every public method returns the JSON-ready dict of the README's wire protocol for its operation. Errors:
    :class:`SetpointError` for refused set-points, :class:`RigInterlock` while the interlock is
    set, ``ValueError`` for a bad field, phase, shot count or duration.
    """

    def __init__(self, config: SimRigConfig, seed: int | None = None) -> None:
        if not isinstance(config, SimRigConfig):
            raise TypeError(f"config: expected a SimRigConfig, got {type(config).__name__}")
        if seed is None:
            seed = config.rig.default_seed
        if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
            raise ValueError(f"seed: expected an integer >= 0, got {seed!r}")
        self._config = config
        self._seed = int(seed)
        counts_seq, drift_seq = np.random.SeedSequence(self._seed).spawn(2)
        self._counts_rng = np.random.default_rng(counts_seq)
        self._drift_rng = np.random.default_rng(drift_seq)
        self._model = _model_from_config(config)
        self._coarse_model = dataclasses.replace(
            self._model,
            velocity_nodes=min(3, self._model.velocity_nodes),
            max_photons=min(2, self._model.max_photons),
            crossing_steps=min(64, self._model.crossing_steps),
        )
        self._confusion = np.asarray(self._model.confusion)
        self._limits = config.limits
        self._setpoints = {name: float(limit.safe) for name, limit in self._limits.items()}
        self._clock = 0.0
        self._walk_hz = 0.0
        self._steps_hz = 0.0
        self._interlock: str | None = None
        self._shots_total = 0
        self._stencil: _Stencil | None = None
        self._landscape: _Landscape | None = None
        self._best: _Best | None = None
        self._log = _log.bind(rig=config.rig.name, seed=self._seed)

    # ----------------------------------------------------------------------------------------
    # State helpers
    # ----------------------------------------------------------------------------------------

    @property
    def config(self) -> SimRigConfig:
        """The rig's checked configuration (hidden truth included)."""
        return self._config

    @property
    def shots_total(self) -> int:
        """Shots acquired since the rig was created."""
        return self._shots_total

    @property
    def clock(self) -> float:
        """Virtual rig clock, s."""
        return self._clock

    def _cavity_offset_hz(self) -> float:
        drift = self._config.drift
        return (
            self._config.cavity.initial_offset_hz
            + drift.ramp_hz_per_s * self._clock
            + self._walk_hz
            + self._steps_hz
        )

    def _applied_detuning_hz(self, setpoint_hz: float) -> float:
        """Stark-law detuning that the set-point really produces (hidden coefficient error and
        hidden field error: ``k_true ((E + error)^2 - E_bias^2)`` with ``E`` the field the
        nominal law commands)."""
        stark = self._config.stark
        field = physics.stark_field_for_detuning(
            setpoint_hz,
            coefficient_hz_m2_per_v2=stark.coefficient_hz_m2_per_v2,
            bias_field_v_per_m=stark.bias_field_v_per_m,
        )
        return float(
            physics.stark_detuning(
                field + stark.bias_field_error_v_per_m,
                coefficient_hz_m2_per_v2=stark.coefficient_hz_m2_per_v2 * (1.0 + stark.coefficient_error),
                bias_field_v_per_m=stark.bias_field_v_per_m,
            )
        )

    def _setpoint_for_applied(self, applied_hz: float) -> float:
        """Inverse of :meth:`_applied_detuning_hz` (on the branch ``E + error >= 0``)."""
        stark = self._config.stark
        if stark.bias_field_error_v_per_m == 0.0:
            # Linear in the set-point then; this keeps the error-free numbers bit for bit.
            return applied_hz / (1.0 + stark.coefficient_error)
        seen = physics.stark_field_for_detuning(
            applied_hz,
            coefficient_hz_m2_per_v2=stark.coefficient_hz_m2_per_v2 * (1.0 + stark.coefficient_error),
            bias_field_v_per_m=stark.bias_field_v_per_m,
        )
        return float(
            physics.stark_detuning(
                seen - stark.bias_field_error_v_per_m,
                coefficient_hz_m2_per_v2=stark.coefficient_hz_m2_per_v2,
                bias_field_v_per_m=stark.bias_field_v_per_m,
            )
        )

    def _true_detuning_hz(self, setpoint_hz: float) -> float:
        return self._applied_detuning_hz(setpoint_hz) + self._cavity_offset_hz()

    def _advance(self, seconds: float) -> None:
        if seconds <= 0.0:
            return
        self._clock += seconds
        sigma = self._config.drift.random_walk_hz_per_sqrt_s
        if sigma > 0.0:
            self._walk_hz += sigma * math.sqrt(seconds) * float(self._drift_rng.standard_normal())

    def _detected(self, velocity, true_detuning_hz, model=None) -> np.ndarray:
        coefficients = physics.outcome_coefficients(model or self._model, velocity, true_detuning_hz)
        return physics.detected_coefficients(coefficients, self._confusion)

    def _build_stencil(self, true_detuning_hz: float) -> _Stencil:
        points = self._config.model.stencil_points
        spacing = self._config.model.stencil_spacing_hz
        detunings = true_detuning_hz + spacing * (np.arange(points) - (points - 1) / 2.0)
        velocity = self._setpoints["velocity"]
        return _Stencil(velocity, detunings, self._detected(velocity, detunings))

    def _coefficients_now(self) -> np.ndarray:
        """Detected coefficients (2, 3, 3) at the present set-points and true detuning."""
        true_detuning = self._true_detuning_hz(self._setpoints["detuning"])
        stencil = self._stencil
        spacing = self._config.model.stencil_spacing_hz
        centre = stencil.detunings[stencil.detunings.size // 2] if stencil is not None else 0.0
        if (
            stencil is None
            or stencil.velocity != self._setpoints["velocity"]
            or abs(true_detuning - centre) > spacing
        ):
            stencil = self._stencil = self._build_stencil(true_detuning)
        weights = _lagrange_weights(stencil.detunings, true_detuning)
        return np.tensordot(weights, stencil.detected, axes=1)

    def _check_setpoints(self, setpoints: Any, *, check_steps: bool, check_limits: bool) -> dict[str, float]:
        if not isinstance(setpoints, Mapping):
            raise SetpointError(f"setpoints: expected a mapping of name to value, got {setpoints!r}")
        checked = {}
        for name, value in setpoints.items():
            if name not in self._limits:
                raise SetpointError(
                    f"{name}: expected a set-point name among {sorted(self._limits)}, got {name!r}"
                )
            limit = self._limits[name]
            if not _real_number(value) or not math.isfinite(float(value)):
                raise SetpointError(f"{name}: expected a finite number in {limit.unit}, got {value!r}")
            value = float(value)
            if check_limits and not limit.min <= value <= limit.max:
                raise SetpointError(
                    f"{name}: expected a value within [min {limit.min:g}, max {limit.max:g}] "
                    f"{limit.unit}, got {value:g}"
                )
            if check_steps:
                step = value - self._setpoints[name]
                if abs(step) > limit.max_step * (1.0 + STEP_TOLERANCE):
                    raise SetpointError(
                        f"{name}: expected a step of at most max_step {limit.max_step:g} {limit.unit} "
                        f"from {self._setpoints[name]:g}, got {value:g} (step {step:+g})"
                    )
            checked[name] = value
        if not check_limits:
            velocity = checked.get("velocity", self._setpoints["velocity"])
            lowest = velocity + self._model.velocity_bias_m_per_s - 6.0 * self._model.velocity_spread_m_per_s
            if lowest <= 0.0:
                raise SetpointError(
                    f"velocity: expected a value whose true velocities stay > 0 m/s, got {velocity:g}"
                )
            if "detuning" in checked:
                try:
                    self._applied_detuning_hz(checked["detuning"])
                except ValueError as exc:
                    raise SetpointError(f"detuning: {exc}") from None
        return checked

    def _refuse_if_interlocked(self, op: str) -> None:
        if self._interlock is not None:
            raise RigInterlock(f"{op} refused: interlock set ({self._interlock})")

    # ----------------------------------------------------------------------------------------
    # Protocol operations
    # ----------------------------------------------------------------------------------------

    def describe(self) -> dict[str, Any]:
        """Rig identity, set-point limits, fields and repetition rate (``describe`` result)."""
        return {
            "rig": self._config.rig.name,
            "proto": 1,
            "simulated": True,
            "setpoints": {
                name: {
                    "unit": limit.unit,
                    "min": float(limit.min),
                    "max": float(limit.max),
                    "max_step": float(limit.max_step),
                }
                for name, limit in self._limits.items()
            },
            "fields": list(_FIELDS),
            "repetition_rate_hz": float(self._config.rig.repetition_rate_hz),
            "max_shots_per_acquisition": int(self._config.rig.max_shots_per_acquisition),
            "safe_setpoints": {name: float(limit.safe) for name, limit in self._limits.items()},
        }

    def apply(self, setpoints: Mapping[str, float]) -> dict[str, Any]:
        """Apply set-points (partial allowed) after checking all of them; takes the settle time.

        Parameters
        ----------
        setpoints : mapping of str to float
            ``velocity`` in m/s and/or ``detuning`` in Hz.

        Returns
        -------
        dict
            ``{"setpoints": {...all in force}, "clock": float}``.

        Raises
        ------
        SetpointError
            Unknown name, non-finite value, outside ``[min, max]`` or a step above ``max_step``;
            nothing is applied then.
        RigInterlock
            While the interlock is set.
        """
        self._refuse_if_interlocked("apply")
        checked = self._check_setpoints(setpoints, check_steps=True, check_limits=True)
        self._setpoints.update(checked)
        self._advance(self._config.rig.settle_time_s)
        self._coefficients_now()
        return {"setpoints": dict(self._setpoints), "clock": self._clock}

    def acquire(self, field: str, ramsey_phase: float, shots: int) -> dict[str, Any]:
        """Acquire ``shots`` samples at a Ramsey phase with one field; takes shots / rate.

        Parameters
        ----------
        field : {"empty", "one_photon"}
            Field state prepared before each sample.
        ramsey_phase : float
            Set phase of the second Ramsey zone, rad.
        shots : int
            Number of samples, 1..``max_shots_per_acquisition``.

        Returns
        -------
        dict
            ``{"counts": {"e", "g", "i"}, "shots", "t_start", "t_end", "setpoints"}``.

        Raises
        ------
        ValueError
            Unknown field, non-finite phase, bad shot count.
        RigInterlock
            While the interlock is set.
        """
        if field not in _FIELDS:
            raise RequestError(f"field: expected one of {list(_FIELDS)}, got {field!r}")
        if not _real_number(ramsey_phase) or not math.isfinite(float(ramsey_phase)):
            raise RequestError(f"ramsey_phase: expected a finite number in rad, got {ramsey_phase!r}")
        limit = self._config.rig.max_shots_per_acquisition
        if isinstance(shots, bool) or not isinstance(shots, (int, np.integer)) or not 1 <= shots <= limit:
            raise RequestError(f"shots: expected an integer in [1, {limit}], got {shots!r}")
        self._refuse_if_interlocked("acquire")
        shots = int(shots)
        phase = float(ramsey_phase)
        duration = shots / self._config.rig.repetition_rate_hz
        t_start = self._clock
        # The rate is taken at the middle of the acquisition (second-order accurate in drift).
        self._advance(0.5 * duration)
        coefficients = self._coefficients_now()[_FIELDS.index(field)]
        self._advance(0.5 * duration)
        probabilities = coefficients @ np.array([1.0, math.cos(phase), math.sin(phase)])
        probabilities = np.clip(probabilities, 0.0, 1.0)
        mean = shots * self._config.rig.atoms_per_sample * self._config.detection.efficiency
        counts = self._counts_rng.poisson(mean * probabilities)
        self._shots_total += shots
        return {
            "counts": {name: int(n) for name, n in zip(physics.OUTCOMES, counts)},
            "shots": shots,
            "t_start": t_start,
            "t_end": self._clock,
            "setpoints": dict(self._setpoints),
        }

    def status(self) -> dict[str, Any]:
        """Clock, busy flag, interlock, set-points and shot counter (``status`` result)."""
        return {
            "clock": self._clock,
            "busy": False,
            "interlock": self._interlock,
            "setpoints": dict(self._setpoints),
            "shots_total": self._shots_total,
        }

    def safe(self, setpoints: Mapping[str, float] | None = None) -> dict[str, Any]:
        """Apply the safe set-points (allowed under interlock, no step limit); takes the settle time.

        Parameters
        ----------
        setpoints : mapping of str to float, optional
            Safe values to go to instead of the configured ones (a driver's channel map may
            declare its own); each must be within the limits, names not given take the
            configured safe value.

        Returns
        -------
        dict
            ``{"setpoints": {...the safe ones, now applied}}``.

        Raises
        ------
        SetpointError
            For an unknown name or a value outside the limits; nothing is applied then.
        """
        safe = {name: float(limit.safe) for name, limit in self._limits.items()}
        if setpoints is not None:
            safe.update(self._check_setpoints(setpoints, check_steps=False, check_limits=True))
        self._setpoints = safe
        self._advance(self._config.rig.settle_time_s)
        self._stencil = None
        self._log.info("safe_setpoints_applied", setpoints=self._setpoints)
        return {"setpoints": dict(self._setpoints)}

    def set_interlock(self, reason: str | None) -> None:
        """Set (``reason`` string) or clear (``None``) the interlock."""
        if reason is not None and (not isinstance(reason, str) or not reason):
            raise ValueError(f"reason: expected a non-empty string or None, got {reason!r}")
        self._interlock = reason
        self._log.info("interlock_changed", interlock=reason)

    def advance(self, seconds: float) -> dict[str, Any]:
        """Let rig time pass (drift continues), s. Returns ``{"clock": float}``."""
        if not (_real_number(seconds) and math.isfinite(float(seconds)) and seconds >= 0.0):
            raise RequestError(f"seconds: expected a finite number >= 0 s, got {seconds!r}")
        if seconds > _MAX_ADVANCE_S:
            raise SetpointError(
                f"seconds: expected a finite number in [0, {_MAX_ADVANCE_S:g}] s, got {seconds!r}"
            )
        self._advance(float(seconds))
        return {"clock": self._clock}

    def thermal_step(self, shift_hz: float | None = None) -> dict[str, Any]:
        """Step the cavity frequency offset by ``shift_hz`` (default: the configured step), Hz.

        Returns
        -------
        dict
            ``{"clock": float, "cavity_offset_hz": float}``.
        """
        if shift_hz is None:
            shift_hz = self._config.drift.thermal_step_hz
        if not _real_number(shift_hz) or not math.isfinite(float(shift_hz)):
            raise RequestError(f"shift_hz: expected a finite number in Hz, got {shift_hz!r}")
        if abs(float(shift_hz)) > _MAX_THERMAL_STEP_HZ:
            raise SetpointError(f"shift_hz: expected a step within +-{_MAX_THERMAL_STEP_HZ:g} Hz, "
                                f"got {float(shift_hz):g} Hz")
        self._steps_hz += float(shift_hz)
        self._log.info("thermal_step", shift_hz=float(shift_hz), cavity_offset_hz=self._cavity_offset_hz())
        return {"clock": self._clock, "cavity_offset_hz": self._cavity_offset_hz()}

    # ----------------------------------------------------------------------------------------
    # Truth
    # ----------------------------------------------------------------------------------------

    def truth(self, setpoints: Mapping[str, float] | None = None) -> dict[str, Any]:
        """Noiseless view of the model at the present moment (``truth`` result).

        Parameters
        ----------
        setpoints : mapping of str to float, optional
            Set-points to evaluate at (partial: the rest as in force); default the ones in
            force. They need not respect the limits or steps (nothing is applied).

        Returns
        -------
        dict
            ``setpoints``, ``clock``, ``fringes`` (detected (a, b, c) of e, g, i per field),
            ``inversion``, ``phase_shift``, ``contrast``, ``absorption``, ``best`` (true best
            set-points within the limits and their inversion) and ``hidden`` (the hidden
            parameters in force).
        """
        chosen = dict(self._setpoints)
        if setpoints is not None:
            chosen.update(self._check_setpoints(setpoints, check_steps=False, check_limits=False))
        true_detuning = self._true_detuning_hz(chosen["detuning"])
        detected = self._detected(chosen["velocity"], true_detuning)
        figures = physics.fringe_figures(detected)
        best = self._best_now()
        stark = self._config.stark
        field = float(
            physics.stark_field_for_detuning(
                chosen["detuning"],
                coefficient_hz_m2_per_v2=stark.coefficient_hz_m2_per_v2,
                bias_field_v_per_m=stark.bias_field_v_per_m,
            )
        )
        fringes = {
            name: {x: [float(v) for v in detected[f, k]] for k, x in enumerate(physics.OUTCOMES)}
            for f, name in enumerate(_FIELDS)
        }
        return {
            "setpoints": chosen,
            "clock": self._clock,
            "fringes": fringes,
            "inversion": float(figures["inversion"]),
            "phase_shift": float(figures["phase_shift"]),
            "contrast": {
                "empty": float(figures["contrast_empty"]),
                "one_photon": float(figures["contrast_one_photon"]),
            },
            "absorption": float(figures["absorption"]),
            "best": {
                "setpoints": {
                    "velocity": best.velocity,
                    "detuning": self._setpoint_for_applied(best.true_detuning_hz - self._cavity_offset_hz()),
                },
                "inversion": best.inversion,
            },
            "hidden": {
                "velocity_bias_m_per_s": self._model.velocity_bias_m_per_s,
                "velocity_spread_m_per_s": self._model.velocity_spread_m_per_s,
                "coupling_hz": self._model.coupling_hz,
                "waist_m": self._model.waist_m,
                "cavity_offset_hz": self._cavity_offset_hz(),
                "stark_coefficient_error": stark.coefficient_error,
                "stark_bias_field_error_v_per_m": stark.bias_field_error_v_per_m,
                "mode_profile": self._model.mode_profile.to_dict(),
                "true_detuning_hz": true_detuning,
                "true_velocity_m_per_s": chosen["velocity"] + self._model.velocity_bias_m_per_s,
                "electrode_voltage_v": field * stark.electrode_gap_m,
                "thermal_photons": self._model.thermal_photons,
                "best_true_detuning_hz": best.true_detuning_hz,
            },
        }

    def _reachable_true_window(self) -> tuple[float, float]:
        limit = self._limits["detuning"]
        ends = sorted(self._true_detuning_hz(x) for x in (limit.min, limit.max))
        return ends[0], ends[1]

    def _best_now(self) -> _Best:
        low, high = self._reachable_true_window()
        landscape = self._landscape
        if (
            landscape is None
            or low < landscape.true_detunings[0]
            or high > landscape.true_detunings[-1]
        ):
            landscape = self._landscape = self._coarse_landscape(low, high)
        best = self._best
        inside = (landscape.true_detunings >= low) & (landscape.true_detunings <= high)
        coarse_top = float(landscape.inversion[:, inside].max())
        # Search again if the best left the window or a better coarse cell entered it.
        if best is not None and low <= best.true_detuning_hz <= high and coarse_top <= best.coarse_top:
            return best
        best = self._best = self._search_best(landscape, low, high, coarse_top)
        return best

    def _coarse_landscape(self, low: float, high: float) -> _Landscape:
        limit = self._limits["velocity"]
        count = max(2, int(math.ceil((limit.max - limit.min) / _COARSE_VELOCITY_STEP)) + 1)
        velocities = np.linspace(limit.min, limit.max, count)
        low -= _COARSE_MARGIN_HZ
        high += _COARSE_MARGIN_HZ
        count = max(2, int(math.ceil((high - low) / _COARSE_DETUNING_STEP_HZ)) + 1)
        detunings = np.linspace(low, high, count)
        detected = self._detected(velocities[:, None], detunings[None, :], model=self._coarse_model)
        inversion = physics.fringe_figures(detected)["inversion"]
        self._log.debug("truth_landscape_computed", points=int(inversion.size))
        return _Landscape(velocities, detunings, inversion)

    def _search_best(self, landscape: _Landscape, low: float, high: float, coarse_top: float) -> _Best:
        inside = (landscape.true_detunings >= low) & (landscape.true_detunings <= high)
        grid = np.where(inside[None, :], landscape.inversion, -np.inf)
        # Local maxima of the masked grid (3x3 neighbourhood), best first.
        padded = np.pad(grid, 1, constant_values=-np.inf)
        shifted = [
            padded[1 + dv : padded.shape[0] - 1 + dv, 1 + dd : padded.shape[1] - 1 + dd]
            for dv in (-1, 0, 1)
            for dd in (-1, 0, 1)
            if (dv, dd) != (0, 0)
        ]
        is_peak = np.isfinite(grid) & np.all([grid >= s for s in shifted], axis=0)
        order = np.argsort(grid[is_peak])[::-1][:_REFINE_CANDIDATES]
        peaks = np.argwhere(is_peak)[order]
        vel_limit = self._limits["velocity"]
        v_scale = _COARSE_VELOCITY_STEP
        d_scale = _COARSE_DETUNING_STEP_HZ
        bounds = [(vel_limit.min / v_scale, vel_limit.max / v_scale), (low / d_scale, high / d_scale)]

        def negative_inversion(x: np.ndarray) -> float:
            detected = self._detected(x[0] * v_scale, x[1] * d_scale)
            return -float(physics.fringe_figures(detected)["inversion"])

        best: _Best | None = None
        for iv, idd in peaks:
            start = np.array([landscape.velocities[iv] / v_scale, landscape.true_detunings[idd] / d_scale])
            upper = np.array([b[1] for b in bounds])
            step = np.where(start + 0.5 <= upper, 0.5, -0.5)
            simplex = np.array([start, start + [step[0], 0.0], start + [0.0, step[1]]])
            result = scipy.optimize.minimize(
                negative_inversion,
                start,
                method="Nelder-Mead",
                bounds=bounds,
                options={"initial_simplex": simplex, "xatol": 1e-4, "fatol": 1e-9, "maxfev": 400},
            )
            candidate = _Best(float(result.x[0] * v_scale), float(result.x[1] * d_scale), -float(result.fun),
                              coarse_top)
            if best is None or candidate.inversion > best.inversion:
                best = candidate
        assert best is not None  # the window always holds at least one grid column
        self._log.debug("truth_best_found", velocity=best.velocity, true_detuning_hz=best.true_detuning_hz,
                        inversion=best.inversion)
        return best
