"""Plausible ranges of the physical quantities a person types, and hints at a slipped unit.

Every physical number of a run configuration, of DRIVER.toml's channel laws, of the simulated
rig's configuration and of the command line is checked against a range a lab could mean. The
ranges are wide (a factor of tens around what the trade uses); those of the nominal physics and
of the velocity are narrower than a factor of 1000, so that a value typed in the wrong unit
(kHz where Hz is asked, mm where m is asked) falls outside, and a refusal says which unit a
value was probably typed in::

    calibrate.toml: nominal.coupling_hz: expected a value from 1000 to 500000 Hz (vacuum Rabi
    frequencies of microwave cavity QED with Rydberg atoms are tens of kHz), got 49: did you
    mean 49 kHz = 49000?

Each range names where it comes from beside it (a published or textbook fact, "from memory"
where recalled, or the design of this program). Pure and a leaf: no I/O and no import of
autotune, so that the simulated rig's configuration (``drivers_sim``) holds its keys to the
same table as the client's.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = [
    "Plausible",
    "unit_slips",
    "COUPLING_HZ",
    "WAIST_M",
    "VELOCITY_M_PER_S",
    "VELOCITY_STEP_M_PER_S",
    "DETUNING_HZ",
    "DETUNING_STEP_HZ",
    "THERMAL_STEP_HZ",
    "CAVITY_FREQUENCY_HZ",
    "DAMPING_TIME_S",
    "TEMPERATURE_K",
    "VELOCITY_BIAS_M_PER_S",
    "VELOCITY_SPREAD_M_PER_S",
    "FLIGHT_DISTANCE_M",
    "RAMSEY_DETUNING_HZ",
    "ZONE_SEPARATION_M",
    "STARK_COEFFICIENT_HZ_M2_PER_V2",
    "ELECTRIC_FIELD_V_PER_M",
    "ELECTRODE_GAP_M",
    "DRIFT_RAMP_HZ_PER_S",
    "RANDOM_WALK_HZ_PER_SQRT_S",
    "REPETITION_RATE_HZ",
    "ATOMS_PER_SAMPLE",
    "VOLTAGE_V",
    "CHANNEL_VALUE",
    "LAW_SCALE",
    "MAX_SHOTS",
    "MAX_RIG_TIME_S",
    "SERVER_TIMEOUT_S",
    "SEED_MAX",
]

#: The units a number of each kind is most often typed in by mistake, as (factor to the asked
#: unit, name of that unit). A value outside its range whose product with a factor falls inside
#: gets the hint "did you mean VALUE NAME = PRODUCT?".
_SLIPS: dict[str, tuple[tuple[float, str], ...]] = {
    "Hz": ((1e3, "kHz"), (1e6, "MHz"), (1e9, "GHz")),
    "m": ((1e-3, "mm"), (1e-2, "cm")),
    "m/s": ((1e3, "km/s"), (1e-3, "mm/s")),
    "s": ((1e-3, "ms"), (3600.0, "h")),
    "K": ((1e-3, "mK"),),
    "V/m": ((1e2, "V/cm"), (1e3, "kV/m")),
    "V": ((1e-3, "mV"), (1e3, "kV")),
    "Hz per (V/m)^2": ((1e-4, "Hz per (V/cm)^2"), (1e-1, "kHz per (V/cm)^2")),
    "Hz/s": ((1e3, "kHz/s"), (1.0 / 3600.0, "Hz per hour"), (1e3 / 3600.0, "kHz per hour")),
    "Hz/s^0.5": ((1e3, "kHz/s^0.5"),),
}


def unit_slips(unit: str) -> tuple[tuple[float, str], ...]:
    """The units a value asked in ``unit`` is most often typed in by mistake, as (factor to
    ``unit``, name): ``unit_slips("Hz")`` starts with ``(1e3, "kHz")``."""
    return _SLIPS.get(unit, ())


def _number(value: float) -> str:
    """A number as a person typed it: no exponent below a million, no trailing zeros."""
    if value != 0.0 and (abs(value) >= 1e6 or abs(value) < 1e-3):
        return f"{value:g}"
    return f"{value:.6f}".rstrip("0").rstrip(".")


@dataclass(frozen=True)
class Plausible:
    """A range a lab could mean for one kind of physical quantity.

    Attributes
    ----------
    low, high : float
        The range, in ``unit``. With ``magnitude`` the range holds ``|value|`` (the sign is
        free), else the value itself.
    unit : str
        The SI unit the key asks for (a key of :data:`_SLIPS` gets unit hints).
    why : str
        Where the range comes from, in a few words, shown in the refusal.
    low_open : bool
        ``low`` itself is outside the range.
    magnitude : bool
        Check ``|value|`` against ``[low, high]``.
    zero : bool
        Zero is allowed besides the range (a step of nothing, for instance).
    """

    low: float
    high: float
    unit: str
    why: str
    low_open: bool = False
    magnitude: bool = False
    zero: bool = False

    def holds(self, value: float) -> bool:
        """Whether ``value`` (finite) lies in the range."""
        if self.zero and value == 0.0:
            return True
        x = abs(value) if self.magnitude else value
        above_low = x > self.low if self.low_open else x >= self.low
        return above_low and x <= self.high

    def expected(self) -> str:
        """The range in words, with its reason: the ``expected`` part of a refusal."""
        unit = "" if self.unit in ("", "1") else f" {self.unit}"
        low, high = _number(self.low), _number(self.high)
        span = (f"above {low} and at most {high}{unit}" if self.low_open
                else f"from {low} to {high}{unit}")
        if self.magnitude:
            span = f"a size {span}, either sign"
        elif self.low == -self.high:
            span = f"a value within +-{high}{unit}"
        else:
            span = f"a value {span}"
        if self.zero:
            span += ", or 0"
        return f"{span} ({self.why})"

    def hint(self, value: float) -> str:
        """``"did you mean ...?"`` naming the units in which ``value`` would be in range, or
        ``""`` when it is in range or no common slip explains it."""
        if not math.isfinite(value) or self.holds(value):
            return ""
        guesses = [f"{_number(value)} {name} = {_number(value * factor)}"
                   for factor, name in unit_slips(self.unit)
                   if value != 0.0 and self.holds(value * factor)]
        return f"did you mean {' or '.join(guesses)}?" if guesses else ""

    def problem(self, value: float) -> tuple[str, str] | None:
        """``None`` when ``value`` is in range, else ``(expected, hint)`` for the refusal."""
        if self.holds(value):
            return None
        return self.expected(), self.hint(value)


# -- the atom-cavity system ------------------------------------------------------------------
# The demo scenario (49 kHz, 5.8 mm, 503.7 m/s, 48.6 GHz, 25 ms, 0.7 K) lies well inside each.

#: Vacuum Rabi frequency Omega_0/2pi: circular Rydberg atoms in superconducting microwave
#: cavities couple at tens of kHz (from memory: about 25 to 50 kHz in the published
#: experiments); a factor of 20 below and 10 above.
COUPLING_HZ = Plausible(
    1e3, 5e5, "Hz",
    "vacuum Rabi frequencies of microwave cavity QED with Rydberg atoms are tens of kHz")
#: Mode waist: a microwave or mm-wave Fabry-Perot mode's waist is of the order of its
#: wavelength, 6 mm at 50 GHz (a Gaussian beam cannot be focused much below lambda/pi; from
#: memory, a few mm in the published cavities).
WAIST_M = Plausible(
    5e-4, 5e-2, "m", "a microwave cavity mode's waist is a few mm, about its wavelength")
#: Atomic velocity: a thermal (effusive) beam of alkali atoms flies at hundreds of m/s
#: (sqrt(8 k T / (pi m)) is 330 m/s for rubidium at 450 K, scipy.constants); velocity
#: selection picks classes from about 100 to 700 m/s (from memory).
VELOCITY_M_PER_S = Plausible(
    10.0, 3000.0, "m/s", "atoms of a thermal beam fly at hundreds of m/s")
#: Largest velocity change of one apply: anything up to the whole plausible range.
VELOCITY_STEP_M_PER_S = Plausible(
    0.0, 3000.0, "m/s", "a step within the plausible velocities", low_open=True)
#: Atom-cavity detuning (set-point and offsets): the lock works within tens of kHz, Stark
#: tuning of a Rydberg line reaches MHz (a few V/cm at -250 kHz per (V/cm)^2, docs/physics.md
#: section 4); 100 MHz is beyond any tuning a rig of this kind uses (from memory).
DETUNING_HZ = Plausible(
    -1e8, 1e8, "Hz", "Stark tuning of a Rydberg line spans kHz to MHz, never 100 MHz")
#: Largest detuning change (or a detuning width, a correction) of one move.
DETUNING_STEP_HZ = Plausible(
    0.0, 1e8, "Hz", "a detuning within +-100 MHz", low_open=True)
#: A thermal step of the cavity frequency: kHz to tens of kHz (the demo's 15 kHz, docs/physics.md
#: section 6); a step under 100 Hz is below what one check of the lock resolves (the demo's
#: phase noise of 0.045 pi per point is about 1 kHz, docs/physics.md section 5b), so it is a kHz
#: value typed in Hz; 0 is no step.
THERMAL_STEP_HZ = Plausible(
    100.0, 1e7, "Hz", "a thermal step of the cavity is kHz to tens of kHz", magnitude=True,
    zero=True)
#: Cavity (and e-g transition) frequency: circular Rydberg transitions near n = 50 lie at about
#: 50 GHz; microwave to sub-mm cavities span 1 GHz to 1 THz.
CAVITY_FREQUENCY_HZ = Plausible(
    1e9, 1e12, "Hz", "Rydberg transitions and their cavities lie at microwave frequencies")
#: Field energy damping time T_c: ms to 0.1 s for superconducting microwave cavities (from
#: memory); a room-temperature copper cavity reaches microseconds.
DAMPING_TIME_S = Plausible(
    1e-6, 10.0, "s", "photon storage times of microwave cavities are microseconds to 0.1 s")
#: Mode temperature: a dilution or helium cryostat holds 0.05 to 4 K; room temperature is the
#: upper end a lab could mean.
TEMPERATURE_K = Plausible(0.0, 300.0, "K", "a cryostat's mode temperature, at most room temperature")
#: Bias of the velocity selection (true minus set velocity): a calibration error, a few m/s
#: (from memory), at most a fraction of the velocity.
VELOCITY_BIAS_M_PER_S = Plausible(
    -300.0, 300.0, "m/s", "the error of a velocity selection is a few m/s")
#: Spread of a selected velocity class: a Gaussian of a few m/s (from memory).
VELOCITY_SPREAD_M_PER_S = Plausible(
    0.0, 300.0, "m/s", "a selected velocity class is a few m/s wide")
#: Flight distance from the field preparation to the mode: tens of cm in a cryostat.
FLIGHT_DISTANCE_M = Plausible(0.0, 10.0, "m", "an atomic beam line inside a cryostat is tens of cm")
#: Ramsey detuning from the g-i line: kHz to hundreds of kHz (the demo's 10 kHz); above 10 MHz
#: the fringe of a beam with a few m/s spread is gone (docs/physics.md section 3).
RAMSEY_DETUNING_HZ = Plausible(
    -1e7, 1e7, "Hz", "a Ramsey detuning is kHz to hundreds of kHz")
#: Distance between the Ramsey zones: cm (the demo's 6 cm).
ZONE_SEPARATION_M = Plausible(0.0, 5.0, "m", "Ramsey zones are cm apart")
#: Quadratic Stark coefficient of an e-g pair: -25 Hz per (V/m)^2 near n = 50 (docs/physics.md
#: section 4), scaling about as n^6 (hydrogenic second-order Stark shift; T. F. Gallagher,
#: Rydberg Atoms, 1994): about 0.3 at n = 25 and 400 at n = 100.
STARK_COEFFICIENT_HZ_M2_PER_V2 = Plausible(
    1e-3, 1e3, "Hz per (V/m)^2",
    "the quadratic Stark coefficient of a circular Rydberg pair near n = 50 is tens of Hz "
    "per (V/m)^2", magnitude=True)
#: Electrode fields: a few V/cm (hundreds of V/m); circular states near n = 50 ionise at about
#: 100 V/cm = 1e4 V/m (from memory), so 1e5 V/m is beyond any field a rig applies.
ELECTRIC_FIELD_V_PER_M = Plausible(
    -1e5, 1e5, "V/m", "electrode fields on Rydberg atoms are a few V/cm")
#: Gap between the Stark electrodes (the cavity mirrors' spacing, cm).
ELECTRODE_GAP_M = Plausible(1e-4, 1.0, "m", "Stark electrodes are mm to cm apart")
#: Linear drift of the cavity: the demo's 4 kHz per hour is 1.1 Hz/s; 1 kHz/s (3.6 MHz per
#: hour) is a cavity no lock holds.
DRIFT_RAMP_HZ_PER_S = Plausible(-1e3, 1e3, "Hz/s", "a cavity drifts by kHz per hour")
#: Random walk of the cavity: the demo's 10 Hz/s^0.5 is 1.7 kHz over 8 h.
RANDOM_WALK_HZ_PER_SQRT_S = Plausible(
    0.0, 1e4, "Hz/s^0.5", "a cavity's random walk is kHz over hours")
#: Samples (shots) per second: atom preparation is pulsed at tens of Hz to tens of kHz.
REPETITION_RATE_HZ = Plausible(
    0.0, 1e6, "Hz", "atoms are prepared at tens of Hz to tens of kHz", low_open=True)
#: Mean atoms per sample: single-atom detection needs well under one (the demo's 0.2).
ATOMS_PER_SAMPLE = Plausible(0.0, 10.0, "1", "single-atom detection uses under one atom per sample")

# -- the control system ----------------------------------------------------------------------

#: Voltages of a channel in V (or mV, kV, converted): electrodes take volts, detector high
#: voltage kV; no channel of such a rig drives 100 kV.
VOLTAGE_V = Plausible(-1e5, 1e5, "V", "electrode and detector voltages are volts to kV")
#: Any other channel, in its own unit: a catch-all so that no limit is a stand-in for
#: "no limit" (1e308); leave a key out to take the driver's own limit instead.
CHANNEL_VALUE = Plausible(
    -1e12, 1e12, "", "no instrument channel reads beyond 1e12 of its unit; leave the key out "
    "to take the driver's limit")
#: Scale of a linear law (set-point unit per channel unit).
#: (0 passes here: the law refuses it with its own reason.)
LAW_SCALE = Plausible(
    1e-12, 1e12, "", "a law within 12 decades of a unit", magnitude=True, zero=True)

# -- budgets and waits ------------------------------------------------------------------------

#: Shot budgets: 1e9 shots are 77 days at the demo's 150 shots per second.
MAX_SHOTS = 10**9
#: Rig-time budgets and ends of a night: 30 days.
MAX_RIG_TIME_S = 30 * 86400.0
#: Longest start or stop of a driver: an hour (a driver taking longer is taken as hung).
SERVER_TIMEOUT_S = 3600.0
#: Seeds: numpy's SeedSequence takes any non-negative integer; the configs keep 32 bits.
SEED_MAX = 2**32 - 1
