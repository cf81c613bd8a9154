"""What a night can promise before it holds (pure): the time its checks take to confirm a
thermal step, from this rig's measured signal and the budget, against the longest a night
accepts without saying so, and what would bring it within.

:func:`step_outlook` takes the night's first plan (:func:`autotune.analysis.hold_plan.plan_checks`,
made from the calibration's measured atoms, contrasts and phase noise within the checks' share of
the budget) and, when its expected time to confirm a ``step_hz`` step exceeds ``within_s``,
plans again with one thing changed at a time to find what would confirm it within: the least
``budget_fraction`` (the share the night's rule gives at it, the beam spent so far kept) and the
least factor on the detected atoms per shot (detection efficiency, atoms per sample); and, from
the plan's own checks, the least step size the night as configured confirms within ``within_s``.
The night journals it as a decision, warns in one line, and keeps it in its result; it still
runs (a lab may accept a slower night). :mod:`autotune.analysis.hold` describes the whole.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass
from typing import Any

from autotune.analysis.guided import LockPrior
from autotune.analysis.hold_budget import checks_share_at
from autotune.analysis.hold_check import reference_value
from autotune.analysis.hold_lock import DriftLock, HoldSettings
from autotune.analysis.hold_plan import CheckPlan, plan_checks, step_delay_of
from autotune.analysis.hold_signal import NoiseModel, SignalModel

__all__ = ["CONFIRM_WITHIN_S", "StepOutlook", "night_outlook", "outlook_due", "step_outlook"]

#: Longest expected rig time from a thermal step to its confirmation (the alarm) that a night
#: accepts without a warning (s): the night's worst recovery from a step that the night study
#: asks of every family (benchmarks/README.md, the night study's targets), of which the retune
#: after the alarm takes one to two minutes more.
CONFIRM_WITHIN_S = 900.0
# Each search stops when its bracket is within this factor (each plan again costs up to a
# second of CPU), after at most this many halvings on a log scale.
_PRECISION = 1.05
_HALVINGS = 8
# Most detected atoms per shot searched, as a factor on the measured ones.
_MOST_ATOMS_FACTOR = 1000.0


@dataclass(frozen=True)
class StepOutlook:
    """The night's expected time to confirm a thermal step, and what would bring it within.

    Attributes
    ----------
    step_hz : float
        The step planned for (Hz).
    confirm_s : float
        Expected rig time from the step to its confirmation, the step landing anywhere between
        two checks (the plan's ``step_delay_s``; inf when the checks cannot confirm it).
    confirm_late_s : float
        The same for a step just after a check (s).
    within_s : float
        The longest accepted without a warning (:data:`CONFIRM_WITHIN_S`).
    met : bool
        ``confirm_s <= within_s``.
    budget_fraction : float
        The configured ``[track] budget_fraction``.
    check_share : float
        Share of the beam the plan's checks take (rechecks included).
    shots_per_phase, interval_s, check_s : int, float, float
        The plan's check: shots per field and phase, rig time between checks (s), beam time of
        one check (s).
    detected_per_shot : float or None
        Detected atoms per shot, both fields together, measured (None without a signal model).
    contrast_empty, contrast_one_photon : float or None
        The measured fringe contrasts.
    phase_variance_shots : float
        The phase variance per shot the plan used (rad^2 times shots).
    budget_fraction_needed : float or None
        The least ``budget_fraction`` whose plan confirms the step within ``within_s``, all else
        as measured (None when met, or when not even the whole beam would).
    atoms_factor_needed : float or None
        The least factor on the detected atoms per shot that would (None when met, or beyond
        :data:`_MOST_ATOMS_FACTOR`).
    step_hz_confirmed : float or None
        The least step the night as configured confirms within ``within_s`` (None when met, or
        when no step within the lock's capture range is).
    """

    step_hz: float
    confirm_s: float
    confirm_late_s: float
    within_s: float
    met: bool
    budget_fraction: float
    check_share: float
    shots_per_phase: int
    interval_s: float
    check_s: float
    detected_per_shot: float | None
    contrast_empty: float | None
    contrast_one_photon: float | None
    phase_variance_shots: float
    budget_fraction_needed: float | None
    atoms_factor_needed: float | None
    step_hz_confirmed: float | None

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready mapping (infinities as None), with :attr:`warning`."""
        out = {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
               for k, v in asdict(self).items()}
        out["warning"] = self.warning
        return out

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> StepOutlook:
        """Rebuild from :meth:`to_dict`."""
        values = {f.name: data[f.name] for f in dataclasses.fields(cls)}
        for name in ("confirm_s", "confirm_late_s"):
            if values[name] is None:
                values[name] = math.inf
        return cls(**values)

    @property
    def warning(self) -> str | None:
        """One line naming what to change (None when met)."""
        if self.met:
            return None
        options = []
        if self.budget_fraction_needed:
            options.append(f"budget_fraction {self.budget_fraction_needed:.2g}")
        if self.atoms_factor_needed:
            options.append(f"atoms/shot x{self.atoms_factor_needed:.2g}")
        if self.step_hz_confirmed:
            options.append(f"steps >= {math.ceil(self.step_hz_confirmed / 100.0) / 10:.1f} kHz")
        step, within = f"{self.step_hz / 1e3:.0f} kHz step", f"{self.within_s / 60:.0f}"
        head = (f"{step} never confirmed; within {within}: " if not math.isfinite(self.confirm_s)
                else f"{step} confirmed in {_over(self.confirm_s, self.within_s)} min > {within}; "
                     "within: ")
        if not options:
            return head + "no budget_fraction, atoms/shot or step size in reach"
        return head + (", ".join(options[:-1]) + " or " if len(options) > 1 else "") + \
            options[-1]

    @property
    def reason(self) -> str:
        """The outlook in one sentence with its numbers."""
        signal = ("" if self.detected_per_shot is None else
                  f"{self.detected_per_shot:.3g} detected atoms per shot, contrasts "
                  f"{self.contrast_empty:.2f} and {self.contrast_one_photon:.2f}, ")
        confirm = (f"never confirm a {self.step_hz / 1e3:.0f} kHz step"
                   if not math.isfinite(self.confirm_s) else
                   f"confirm a {self.step_hz / 1e3:.0f} kHz step {_minutes(self.confirm_s)} after "
                   f"it in the mean ({_minutes(self.confirm_late_s)} when it comes just after a "
                   f"check)")
        head = (f"from this rig's signal ({signal}phase variance "
                f"{self.phase_variance_shots:.3g} rad^2 per shot) and budget_fraction "
                f"{self.budget_fraction:g}, checks of {self.shots_per_phase} shots per phase "
                f"({self.check_s:.0f} s of beam) every {self.interval_s / 60:.1f} min "
                f"({self.check_share:.1%} of the beam) {confirm}")
        if self.met:
            return f"{head}, within {self.within_s / 60:.0f} min"
        needs = []
        if self.budget_fraction_needed:
            needs.append(f"budget_fraction {self.budget_fraction_needed:.3g}")
        if self.atoms_factor_needed:
            needs.append(f"{self.atoms_factor_needed:.3g} times the detected atoms per shot "
                         f"(detection efficiency, atoms per sample)")
        missing = [] if self.budget_fraction_needed else ["no budget_fraction up to 1"]
        if not self.atoms_factor_needed:
            missing.append(f"no factor on the detected atoms up to {_MOST_ATOMS_FACTOR:g}")
        step = (f"steps of {self.step_hz_confirmed / 1e3:.1f} kHz and more are confirmed "
                f"within it as configured" if self.step_hz_confirmed else
                "no step within the lock's capture range is confirmed within it as configured")
        parts = []
        if needs:
            parts.append(f"{' or '.join(needs)} would confirm it within"
                         + (", each alone" if len(needs) > 1 else ""))
        if missing:
            parts.append(f"{' and '.join(missing)} would")
        return (f"{head}, over the {self.within_s / 60:.0f} min a night accepts: "
                f"{'; '.join(parts + [step])}; the night runs as configured")


def _over(seconds: float, within_s: float) -> str:
    """Minutes over the line, to a tenth when whole minutes would print the line itself
    ("16 min > 15", but "15.3 min > 15")."""
    whole = f"{seconds / 60:.0f}"
    return f"{seconds / 60:.1f}" if float(whole) <= within_s / 60 else whole


def _minutes(seconds: float) -> str:
    return "never" if not math.isfinite(seconds) else f"{seconds / 60:.1f} min"


def _least(within: Callable[[float], bool], low: float, high: float,
           guess: float | None = None) -> float | None:
    """The least ``x`` in ``(low, high]`` with ``within(x)`` to within :data:`_PRECISION`
    (``within`` taken as monotone, ``within(low)`` false; ``guess`` tried first, then halvings
    on a log scale): the upper end of the last bracket, so that ``within`` holds at the value
    returned. None when ``within(high)`` is false."""
    if high <= low or not within(high):
        return None
    if guess is not None and low < guess < high:
        if within(guess):
            high = guess
        else:
            low = guess
    for _ in range(_HALVINGS):
        if high <= low * _PRECISION:
            break
        middle = math.sqrt(low * high)
        if within(middle):
            high = middle
        else:
            low = middle
    return high


def step_outlook(settings: HoldSettings, *, plan: CheckPlan, noise: NoiseModel,
                 signal: SignalModel | None, prior: LockPrior, lock: DriftLock,
                 reference_inversion: float, reference_stderr: float, check_share: float,
                 step_rate_per_s: float, step_hz: float = 15e3,
                 within_s: float = CONFIRM_WITHIN_S,
                 share_at: Callable[[float], float] | None = None) -> StepOutlook:
    """The outlook of ``plan`` (made by :func:`plan_checks` from the same inputs), and when it
    confirms a ``step_hz`` step later than ``within_s`` in the mean, what would bring it
    within, each alone: by planning again, a ``budget_fraction`` up to 1 (the checks' share
    at it is ``share_at(fraction)``, :func:`autotune.analysis.hold_budget.checks_share_at`;
    without it, ``check_share`` scaled with the fraction, a share that is half the budget) and
    the measured signal's detected atoms per shot times a factor (the noise's variances per
    shot divided by it); and, from ``plan`` itself (:func:`step_delay_of`: the night as
    configured, its checks planned for ``step_hz``), the least step up to the lock's capture
    range that its checks confirm within."""
    def delay(*, share: float = check_share, atoms: float = 1.0) -> float:
        if share <= 0.0:
            return math.inf
        scaled_noise = NoiseModel(noise.phase_variance_shots / atoms,
                                  noise.inversion_variance_shots / atoms, noise.measurements)
        scaled_signal = None if signal is None else dataclasses.replace(
            signal, detected_per_shot_empty=signal.detected_per_shot_empty * atoms,
            detected_per_shot_one_photon=signal.detected_per_shot_one_photon * atoms)
        again = plan_checks(settings, noise=scaled_noise, prior=prior, lock=lock,
                            reference_inversion=reference_inversion,
                            reference_stderr=reference_stderr, check_share=min(share, 1.0),
                            step_hz=step_hz, signal=scaled_signal,
                            step_rate_per_s=step_rate_per_s)
        return again.step_delay_s

    met = plan.step_delay_s <= within_s
    budget_needed = atoms_needed = step_confirmed = None
    if not met:
        fraction = float(settings.budget_fraction)
        at = share_at if share_at is not None else (
            lambda budget_fraction: check_share * budget_fraction / fraction)
        # The time to confirm goes about as the interval, which goes as one over the share
        # and, the check's size set by the noise, as one over the detected atoms: first guesses.
        guess = plan.step_delay_s / within_s if math.isfinite(plan.step_delay_s) else None
        budget_needed = _least(lambda f: delay(share=at(f)) <= within_s, fraction, 1.0,
                               None if guess is None else fraction * guess)
        atoms_needed = _least(lambda a: delay(atoms=a) <= within_s, 1.0, _MOST_ATOMS_FACTOR,
                              guess)
        capture_hz = settings.lock.capture_phase_error_rad / abs(prior.slope_rad_per_hz)
        step_confirmed = _least(lambda s: step_delay_of(plan, s) <= within_s, step_hz,
                                capture_hz)
    per_shot = None if signal is None else (
        0.5 * (signal.detected_per_shot_empty + signal.detected_per_shot_one_photon))
    return StepOutlook(
        step_hz=float(step_hz), confirm_s=float(plan.step_delay_s),
        confirm_late_s=float(plan.inputs.get("step_delay_late_s", plan.step_delay_s)),
        within_s=float(within_s), met=bool(met), budget_fraction=float(settings.budget_fraction),
        check_share=float(plan.check_share), shots_per_phase=int(plan.shots_per_phase),
        interval_s=float(plan.interval_s), check_s=float(plan.check_s),
        detected_per_shot=per_shot,
        contrast_empty=None if signal is None else float(signal.contrast_empty),
        contrast_one_photon=None if signal is None else float(signal.contrast_one_photon),
        phase_variance_shots=float(plan.inputs.get("phase_variance_shots",
                                                   noise.phase_variance_shots)),
        budget_fraction_needed=budget_needed, atoms_factor_needed=atoms_needed,
        step_hz_confirmed=step_confirmed)


def night_outlook(settings: HoldSettings, *, plan: CheckPlan, share: Mapping[str, float],
                  rows: Sequence[Sequence[float]], prior: LockPrior, lock: DriftLock,
                  reference: Mapping[str, float], step_hz: float = 15e3,
                  within_s: float = CONFIRM_WITHIN_S) -> StepOutlook:
    """:func:`step_outlook` of a plan made by :func:`autotune.analysis.hold_budget.plan_night`
    (``share`` its numbers) from the same noise ``rows``, lock and reference; the budget
    fraction that would do is searched with the share the night's rule gives at it
    (:func:`autotune.analysis.hold_budget.checks_share_at`: the beam spent so far stays)."""
    inversion, stderr = reference_value(reference)
    return step_outlook(settings, plan=plan,
                        noise=NoiseModel.from_estimates([(r[0], r[1], int(r[2])) for r in rows]),
                        signal=SignalModel.from_rows(rows), prior=prior, lock=lock,
                        reference_inversion=inversion, reference_stderr=stderr,
                        check_share=share["share"],
                        step_rate_per_s=share["recoveries_per_h"] / 3600.0, step_hz=step_hz,
                        within_s=within_s,
                        share_at=lambda fraction: checks_share_at(
                            share, settings.budget_fraction, fraction))


def outlook_due(latest: Mapping[str, Any] | None, plan: CheckPlan,
                within_s: float = CONFIRM_WITHIN_S) -> bool:
    """Whether a night tells its outlook at this plan: at its first plan (``latest`` None), and
    again at a later plan whose time to confirm a step has crossed ``within_s`` either way
    since the last outlook told (``latest``, a :meth:`StepOutlook.to_dict`): a night whose
    checks slow down after a retune has eaten into the budget warns then, and says when they
    are back within. Plans on the same side of the line tell nothing new."""
    if latest is None:
        return True
    return bool(latest.get("met")) != bool(plan.step_delay_s <= within_s)
