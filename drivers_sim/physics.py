"""Atom-cavity-Ramsey model of the simulated rig: pure, vectorised, numpy/scipy only.

The model follows docs/physics.md:

- :class:`ModeProfile` is the shape ``f`` of the coupling envelope ``Omega_0 f(v t / w)``: the
  Gaussian mode of docs/physics.md section 2 (the default), a super-Gaussian ``exp(-|x|^p)`` or an
  asymmetric mode (two half-Gaussians of different waists);
- :func:`crossing_amplitudes` integrates the 2x2 problem {|g,n>, |e,n-1>} of one crossing of the
  mode for whole arrays of velocities, detunings and photon numbers at once;
- :func:`ramsey_rotation` is the zone rotation U(theta, phi) on (g, i);
- :func:`outcome_coefficients` averages one atom over a velocity distribution (Gauss-Hermite
  nodes) and a photon-number distribution and returns the first-harmonic coefficients
  ``(a, b, c)`` of every outcome, ``P_x(phi) = a + b cos(phi) + c sin(phi)``;
- :func:`detected_coefficients` applies a confusion matrix; :func:`fringe_figures` gives the
  inversion, phase shift, contrasts and absorption defined in docs/physics.md section 5;
- :func:`thermal_photon_number`, :func:`thermal_distribution` and
  :func:`one_photon_distribution` describe the fields; :func:`stark_field_for_detuning`,
  :func:`stark_detuning` the quadratic Stark tuning.

Conventions. Detunings are given as ``delta / 2 pi`` in Hz, ``delta = omega_eg - omega_cavity``;
the coupling as ``Omega_0 / 2 pi`` in Hz. Outcome axes are ordered ``(e, g, i)``, field axes
``(empty, one_photon)``, coefficient axes ``(a, b, c)``.
"""

from __future__ import annotations

import dataclasses
import functools
import math
from typing import Literal, get_args

import numpy as np

from autotune.driver import FIELDS

__all__ = [
    "DEFAULT_CROSSING_STEPS",
    "DEFAULT_HALF_WIDTH",
    "FIELDS",
    "GAUSSIAN_MODE",
    "MODE_PROFILES",
    "OUTCOMES",
    "SUPER_GAUSSIAN_ORDER_RANGE",
    "WAIST_ASYMMETRY_RANGE",
    "AtomCavityModel",
    "ModeProfile",
    "ModeProfileKind",
    "confusion_matrix",
    "crossing_amplitudes",
    "detected_coefficients",
    "fringe_figures",
    "one_photon_distribution",
    "outcome_coefficients",
    "pulse_area",
    "ramsey_phase_offset",
    "ramsey_rotation",
    "stark_detuning",
    "stark_field_for_detuning",
    "thermal_distribution",
    "thermal_photon_number",
    "two_level_evolution",
    "two_pi_velocity",
    "velocity_nodes",
    "zone_area",
]

OUTCOMES: tuple[str, str, str] = ("e", "g", "i")

#: Planck constant and Boltzmann constant, J s and J/K: exact by definition in the SI since
#: 2019 (BIPM, The International System of Units, 9th edition, 2019, table 1; the same values
#: as ``scipy.constants.h`` and ``.k``, tests/sim/test_sim_physics.py). Written here so that a
#: rig does not import scipy.constants (about 0.3 s of its start-up) for two numbers.
PLANCK_J_S = 6.62607015e-34
BOLTZMANN_J_PER_K = 1.380649e-23

#: Crossing steps over the window; each step is two exact SU(2) exponentials. 256 steps keep
#: the amplitudes within 4e-7 of a converged solution over 250..900 m/s, |delta|/2pi <= 300 kHz,
#: n <= 4 for the demo coupling (checked against qutip in tests/sim/test_physics.py).
DEFAULT_CROSSING_STEPS = 256
#: Half-width of the integration window in units of w / v. The mode is exp(-x^2): at x = 4 the
#: coupling is 1.1e-7 of its peak and the missing pulse area is erfc(4) = 1.5e-8 of the total,
#: below 1e-6 in amplitude up to pulse areas of 60 rad; 3.5 would leave 7e-7 of the area, which
#: is above 1e-6 in amplitude for n = 4 at slow velocities.
DEFAULT_HALF_WIDTH = 4.0

#: Relative pulse area left outside the integration window of every mode profile: that of the
#: Gaussian window +-DEFAULT_HALF_WIDTH, erfc(4) = 1.5e-8.
_TAIL_FRACTION = math.erfc(DEFAULT_HALF_WIDTH)

ModeProfileKind = Literal["gaussian", "super_gaussian", "asymmetric"]
#: Names of the mode profiles, as written in the simulated rig's ``[cavity] mode_profile``.
MODE_PROFILES: tuple[str, ...] = get_args(ModeProfileKind)
#: Range of super-Gaussian orders the crossing solver is checked for (tests/sim against qutip).
SUPER_GAUSSIAN_ORDER_RANGE = (2.0, 10.0)
#: Range of the waist asymmetry of the asymmetric profile (waists w (1 -+ a) stay >= w / 2).
WAIST_ASYMMETRY_RANGE = (-0.5, 0.5)

# Gauss-Legendre nodes and weights of the fourth-order commutator-free scheme
# (two exponentials per step, each an exact SU(2) rotation of a constant 2x2 Hamiltonian).
_GL_NODES = (0.5 - math.sqrt(3.0) / 6.0, 0.5 + math.sqrt(3.0) / 6.0)
_CF_FIRST = (0.25 + math.sqrt(3.0) / 6.0, 0.25 - math.sqrt(3.0) / 6.0)
_CF_SECOND = (0.25 - math.sqrt(3.0) / 6.0, 0.25 + math.sqrt(3.0) / 6.0)

# Elements per chunk of the step-matrix tree: bounds memory to a few tens of MB.
_CHUNK_ELEMENTS = 1 << 21


# --------------------------------------------------------------------------------------------
# The mode profile
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class ModeProfile:
    """Shape ``f`` of the coupling envelope ``Omega(t) = Omega_0 sqrt(n) f(v t / w)``.

    ``x = v t / w`` is the position along the beam in units of the waist ``w``, with the mode
    centre at ``x = 0`` and the atom moving towards ``+x``; every profile has ``f(0) = 1``, so
    ``Omega_0`` stays the coupling at the mode centre.

    Attributes
    ----------
    kind : {"gaussian", "super_gaussian", "asymmetric"}
        ``"gaussian"``: ``f = exp(-x^2)`` (docs/physics.md section 2). ``"super_gaussian"``:
        ``f = exp(-|x|^order)``, a flatter top and steeper sides for ``order > 2``.
        ``"asymmetric"``: ``f = exp(-x^2 / (1 - asymmetry)^2)`` before the centre (``x < 0``) and
        ``exp(-x^2 / (1 + asymmetry)^2)`` after it: waists ``w (1 - a)`` and ``w (1 + a)``, so
        ``w`` is their mean and the pulse area is that of the Gaussian of waist ``w``.
    order : float
        Order ``p`` of the super-Gaussian, in :data:`SUPER_GAUSSIAN_ORDER_RANGE` (ignored
        otherwise; 2 is the Gaussian).
    asymmetry : float
        ``a`` of the asymmetric profile, in :data:`WAIST_ASYMMETRY_RANGE` (ignored otherwise).
    """

    kind: ModeProfileKind = "gaussian"
    order: float = 2.0
    asymmetry: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in MODE_PROFILES:
            raise ValueError(f"kind: expected one of {list(MODE_PROFILES)}, got {self.kind!r}")
        low, high = SUPER_GAUSSIAN_ORDER_RANGE
        if self.kind == "super_gaussian" and not (
                isinstance(self.order, (int, float)) and low <= self.order <= high):
            raise ValueError(f"order: expected a number in [{low:g}, {high:g}], got {self.order!r}")
        low, high = WAIST_ASYMMETRY_RANGE
        if self.kind == "asymmetric" and not (
                isinstance(self.asymmetry, (int, float)) and low <= self.asymmetry <= high):
            raise ValueError(f"asymmetry: expected a number in [{low:g}, {high:g}], "
                             f"got {self.asymmetry!r}")

    def envelope(self, x):
        """``f(x)`` at positions ``x`` along the beam in units of the waist (array_like)."""
        x = np.asarray(x, dtype=float)
        if self.kind == "gaussian":
            return np.exp(-(x**2))
        if self.kind == "super_gaussian":
            return np.exp(-(np.abs(x) ** self.order))
        waist = np.where(x < 0.0, 1.0 - self.asymmetry, 1.0 + self.asymmetry)
        return np.exp(-((x / waist) ** 2))

    @property
    def area(self) -> float:
        """``integral of f(x) dx`` over the whole line (the pulse area in units of Omega w / v).

        Gaussian and asymmetric: ``sqrt(pi)``; super-Gaussian: ``2 Gamma(1 + 1/p)``.
        """
        if self.kind == "super_gaussian":
            return 2.0 * math.gamma(1.0 + 1.0 / self.order)
        return math.sqrt(math.pi)

    def window(self) -> tuple[float, float]:
        """Extent ``(before, after)`` of the integration window beyond the centre, in waists.

        Each side leaves the same relative pulse area outside as the Gaussian window
        +-:data:`DEFAULT_HALF_WIDTH` (``erfc(4) = 1.5e-8``): for the super-Gaussian
        ``X^p = Q^-1(1/p, erfc(4))`` (the inverse regularised upper incomplete gamma function,
        since the tail of ``exp(-x^p)`` beyond ``X`` is ``Gamma(1/p, X^p) / p``).
        """
        if self.kind == "gaussian":
            return DEFAULT_HALF_WIDTH, DEFAULT_HALF_WIDTH
        if self.kind == "super_gaussian":
            # Only a super-Gaussian mode needs scipy.special: imported here, it costs the
            # other rigs nothing at start-up (about 0.3 s).
            from scipy import special
            edge = float(special.gammainccinv(1.0 / self.order, _TAIL_FRACTION)) ** (
                1.0 / self.order)
            return edge, edge
        return DEFAULT_HALF_WIDTH * (1.0 - self.asymmetry), DEFAULT_HALF_WIDTH * (1.0 + self.asymmetry)

    def to_dict(self) -> dict[str, float | str]:
        """The profile's kind and the parameter it uses (JSON-ready)."""
        if self.kind == "super_gaussian":
            return {"kind": self.kind, "order": float(self.order)}
        if self.kind == "asymmetric":
            return {"kind": self.kind, "asymmetry": float(self.asymmetry)}
        return {"kind": self.kind}


#: The Gaussian mode of docs/physics.md section 2.
GAUSSIAN_MODE = ModeProfile()


# --------------------------------------------------------------------------------------------
# The crossing
# --------------------------------------------------------------------------------------------


def pulse_area(velocity, *, coupling_hz, waist_m, photons=1, profile=GAUSSIAN_MODE):
    """Resonant pulse area of one crossing of the mode.

    Parameters
    ----------
    velocity : array_like
        Atomic velocity, m/s.
    coupling_hz : float
        Vacuum Rabi frequency at the mode centre, ``Omega_0 / 2 pi``, Hz.
    waist_m : float
        Mode waist ``w`` (coupling ``exp(-(v t)^2 / w^2)``), m.
    photons : array_like, optional
        Photon number ``n``; the coupling scales as ``sqrt(n)``.
    profile : ModeProfile, optional
        Shape of the envelope (default the Gaussian mode).

    Returns
    -------
    numpy.ndarray
        ``A = Omega_0 sqrt(n) S w / v`` with ``S = profile.area`` (``sqrt(pi)`` for the
        Gaussian), rad.
    """
    velocity = np.asarray(velocity, dtype=float)
    return 2.0 * np.pi * coupling_hz * np.sqrt(np.asarray(photons, dtype=float)) * (
        profile.area * waist_m / velocity
    )


def two_pi_velocity(*, coupling_hz, waist_m, profile=GAUSSIAN_MODE):
    """Velocity at which one photon gives a 2 pi vacuum Rabi rotation, m/s.

    Returns ``v_2pi = Omega_0 w S / (2 pi)`` with ``Omega_0 = 2 pi coupling_hz`` and
    ``S = profile.area``: ``Omega_0 w / (2 sqrt(pi))`` for the Gaussian.
    """
    if profile.kind == "gaussian":
        return 2.0 * math.pi * coupling_hz * waist_m / (2.0 * math.sqrt(math.pi))
    return coupling_hz * waist_m * profile.area


def _su2_product(u1, v1, u2, v2):
    """SU(2) product ``U1 @ U2`` for ``U = [[u, -conj(v)], [v, conj(u)]]``."""
    return u1 * u2 - np.conj(v1) * v2, v1 * u2 + np.conj(u1) * v2


def _tree_reduce(u, v):
    """Time-ordered product of step matrices along axis 0 (later steps on the left)."""
    while u.shape[0] > 1:
        if u.shape[0] % 2:
            pad_u = np.ones((1,) + u.shape[1:], dtype=u.dtype)
            pad_v = np.zeros((1,) + v.shape[1:], dtype=v.dtype)
            u = np.concatenate([u, pad_u])
            v = np.concatenate([v, pad_v])
        u, v = _su2_product(u[1::2], v[1::2], u[0::2], v[0::2])
    return u[0], v[0]


def two_level_evolution(detuning_hz, coupling_hz, duration_s, *, profile=None,
                        steps=DEFAULT_CROSSING_STEPS):
    """State after a two-level evolution from ``|g>``, for whole arrays of parameters at once.

    The Hamiltonian (rotating frame, hbar = 1) is
    ``H(t) = (delta/2)(|e><e| - |g><g|) + (Omega f(t/T) / 2)(|e><g| + |g><e|)`` for ``t`` in
    ``[0, T]``, integrated with ``steps`` steps of a fourth-order commutator-free scheme: each
    step is the product of two exact closed-form SU(2) exponentials of constant 2x2
    Hamiltonians built from the coupling at the two Gauss-Legendre nodes of the step.
    The detuning term is exact in every exponential, so only the time variation of ``f`` is
    approximated (error ~ steps^-4).

    Parameters
    ----------
    detuning_hz : array_like
        ``delta / 2 pi``, Hz.
    coupling_hz : array_like
        Peak coupling ``Omega / 2 pi``, Hz.
    duration_s : array_like
        Duration ``T``, s. The three arrays broadcast against each other.
    profile : callable, optional
        ``f(s)`` for ``s = t / T`` in [0, 1], vectorised over a 1-d array; default constant 1.
    steps : int, optional
        Number of steps.

    Returns
    -------
    c_g, c_e : numpy.ndarray of complex
        Amplitudes of ``|g>`` and ``|e>`` at ``t = T`` (Schrodinger picture of the rotating
        frame), shape of the broadcast inputs.
    """
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 1:
        raise ValueError(f"steps: expected an integer >= 1, got {steps!r}")
    detuning_hz, coupling_hz, duration_s = np.broadcast_arrays(
        np.asarray(detuning_hz, dtype=float),
        np.asarray(coupling_hz, dtype=float),
        np.asarray(duration_s, dtype=float),
    )
    shape = detuning_hz.shape
    # Dimensionless time s = t / T: detuning and coupling in rad over the whole duration.
    alpha = 2.0 * np.pi * (detuning_hz * duration_s).ravel()
    beta = 2.0 * np.pi * (coupling_hz * duration_s).ravel()
    h = 1.0 / steps
    starts = h * np.arange(steps)
    if profile is None:
        f1 = f2 = np.ones(steps)
    else:
        f1 = np.asarray(profile(starts + _GL_NODES[0] * h), dtype=float)
        f2 = np.asarray(profile(starts + _GL_NODES[1] * h), dtype=float)
    # Mode weights of the two exponentials of every step, in time order (first applied first).
    weights = np.empty(2 * steps)
    weights[0::2] = _CF_FIRST[0] * f1 + _CF_FIRST[1] * f2
    weights[1::2] = _CF_SECOND[0] * f1 + _CF_SECOND[1] * f2
    weights *= 0.5 * h
    # Each exponential carries half a step of the constant detuning term -(alpha/2) sigma_z.
    p = -0.25 * h * alpha
    u_out = np.empty(alpha.size, dtype=complex)
    v_out = np.empty(alpha.size, dtype=complex)
    chunk = max(1, _CHUNK_ELEMENTS // weights.size)
    for lo in range(0, alpha.size, chunk):
        sl = slice(lo, lo + chunk)
        q = weights[:, None] * beta[None, sl]
        r = np.hypot(p[None, sl], q)
        sinc = np.sinc(r / np.pi)
        u = np.cos(r) - 1j * (p[None, sl] * sinc)
        v = -1j * (q * sinc)
        u_out[sl], v_out[sl] = _tree_reduce(u, v)
    return u_out.reshape(shape), v_out.reshape(shape)


def crossing_amplitudes(
    velocity,
    detuning_hz,
    photons,
    *,
    coupling_hz,
    waist_m,
    steps=DEFAULT_CROSSING_STEPS,
    half_width=DEFAULT_HALF_WIDTH,
    profile=GAUSSIAN_MODE,
):
    """Amplitudes of one crossing ``|g,n> -> a_g |g,n> + a_e |e,n-1>`` of the mode.

    The Hamiltonian (rotating frame, hbar = 1) is
    ``H = (delta/2)(|e><e| - |g><g|) + (Omega_0 sqrt(n) f(v t / w) / 2) sigma_x`` with ``f`` the
    mode profile, integrated by :func:`two_level_evolution`. The Gaussian is integrated over
    ``t`` in ``[-half_width, +half_width] w / v`` in one pass. Every other profile is integrated
    in two passes of half the steps each, from the start of its window
    (:meth:`ModeProfile.window`) to the mode centre and from the centre to the end, so that the
    only point where ``f`` may not be smooth (``|x|^p`` at ``x = 0``, the change of waist
    of the asymmetric mode) falls on a step boundary; the two SU(2) evolutions are multiplied.
    All arguments but ``steps``, ``half_width`` and ``profile`` broadcast against each other.

    Parameters
    ----------
    velocity : array_like
        Atomic velocity, m/s (> 0).
    detuning_hz : array_like
        Atom-cavity detuning ``delta / 2 pi``, Hz.
    photons : array_like of int
        Photon number ``n >= 0``; ``n = 0`` gives ``a_g = 1, a_e = 0`` exactly.
    coupling_hz : float
        ``Omega_0 / 2 pi`` at the mode centre, Hz.
    waist_m : float
        Mode waist, m.
    steps : int, optional
        Number of integration steps over the window (both passes together).
    half_width : float, optional
        Half-width of the Gaussian's window in units of ``w / v`` (other profiles use their
        own window).
    profile : ModeProfile, optional
        Shape of the coupling envelope (default the Gaussian mode).

    Returns
    -------
    a_g, a_e : numpy.ndarray of complex
        Amplitudes in the interaction picture of ``H0 = (delta/2)(|e><e| - |g><g|)`` taken with
        its time origin at the mode centre, i.e. ``a_g`` relative to the free evolution of
        ``|g,n>``; shape of the broadcast inputs.
    """
    velocity, detuning_hz, photons = np.broadcast_arrays(
        np.asarray(velocity, dtype=float),
        np.asarray(detuning_hz, dtype=float),
        np.asarray(photons),
    )
    if np.any(~np.isfinite(velocity)) or np.any(velocity <= 0.0):
        raise ValueError(f"velocity: expected finite values > 0 m/s, got {velocity!r}")
    if np.any(photons < 0):
        raise ValueError(f"photons: expected integers >= 0, got {photons!r}")
    coupling = coupling_hz * np.sqrt(photons.astype(float))
    if profile.kind == "gaussian":
        duration = 2.0 * half_width * waist_m / velocity

        def mode(s):
            return np.exp(-((half_width * (2.0 * s - 1.0)) ** 2))

        c_g, c_e = two_level_evolution(detuning_hz, coupling, duration, profile=mode, steps=steps)
        # Free evolution of |g> over the window is exp(+i delta T / 2); the window is symmetric,
        # so |e> needs no correction in the interaction picture.
        a_g = c_g * np.exp(-1j * np.pi * detuning_hz * duration)
        return a_g, c_e
    if isinstance(steps, bool) or not isinstance(steps, (int, np.integer)) or steps < 2:
        raise ValueError(f"steps: expected an integer >= 2, got {steps!r}")
    before, after = profile.window()
    # Each side spans the same number of its own waists (the same tail), so equal steps.
    steps_before = steps // 2
    duration_before = before * waist_m / velocity
    duration_after = after * waist_m / velocity
    u_b, v_b = two_level_evolution(
        detuning_hz, coupling, duration_before, steps=steps_before,
        profile=lambda s: profile.envelope(before * (s - 1.0)))
    u_a, v_a = two_level_evolution(
        detuning_hz, coupling, duration_after, steps=steps - steps_before,
        profile=lambda s: profile.envelope(after * s))
    c_g, c_e = _su2_product(u_a, v_a, u_b, v_b)
    # Interaction picture with its origin at the centre, window [-T_b, T_a]: |g> picks up
    # exp(-i delta (T_a + T_b) / 2), |e> exp(+i delta (T_a - T_b) / 2).
    a_g = c_g * np.exp(-1j * np.pi * detuning_hz * (duration_before + duration_after))
    a_e = c_e * np.exp(1j * np.pi * detuning_hz * (duration_after - duration_before))
    return a_g, a_e


# --------------------------------------------------------------------------------------------
# Ramsey zones
# --------------------------------------------------------------------------------------------


def ramsey_rotation(theta, phi):
    """Ramsey-zone rotation on the (g, i) basis.

    Parameters
    ----------
    theta : array_like
        Pulse area, rad.
    phi : array_like
        Pulse phase, rad.

    Returns
    -------
    numpy.ndarray
        ``U = [[cos(theta/2), -i e^{-i phi} sin(theta/2)], [-i e^{+i phi} sin(theta/2),
        cos(theta/2)]]``, shape ``broadcast(theta, phi).shape + (2, 2)``.
    """
    theta, phi = np.broadcast_arrays(np.asarray(theta, float), np.asarray(phi, float))
    cos = np.cos(theta / 2.0)
    sin = np.sin(theta / 2.0)
    out = np.empty(theta.shape + (2, 2), dtype=complex)
    out[..., 0, 0] = cos
    out[..., 0, 1] = -1j * np.exp(-1j * phi) * sin
    out[..., 1, 0] = -1j * np.exp(1j * phi) * sin
    out[..., 1, 1] = cos
    return out


def zone_area(true_velocity, set_velocity, *, area_at_set=math.pi / 2.0):
    """Pulse area of a Ramsey zone whose power was calibrated at ``set_velocity``, rad.

    The area scales as ``1 / v`` at fixed microwave power (longer transit, bigger area):
    ``theta = area_at_set * set_velocity / true_velocity``.
    """
    return area_at_set * np.asarray(set_velocity, float) / np.asarray(true_velocity, float)


def ramsey_phase_offset(true_velocity, *, ramsey_detuning_hz, zone_separation_m):
    """Free-evolution phase added to the R2 phase, ``2 pi Delta_R L / v``, rad."""
    return 2.0 * np.pi * ramsey_detuning_hz * zone_separation_m / np.asarray(true_velocity, float)


def velocity_nodes(mean_m_per_s, spread_m_per_s, count):
    """Gauss-Hermite nodes of a Gaussian velocity distribution.

    Parameters
    ----------
    mean_m_per_s : array_like
        Mean true velocity, m/s.
    spread_m_per_s : float
        Standard deviation, m/s (0 collapses every node on the mean).
    count : int
        Number of nodes.

    Returns
    -------
    velocities : numpy.ndarray
        Shape ``mean.shape + (count,)``, m/s.
    weights : numpy.ndarray
        Shape ``(count,)``, summing to 1.
    """
    x, w = np.polynomial.hermite.hermgauss(count)
    mean = np.asarray(mean_m_per_s, float)
    return mean[..., None] + math.sqrt(2.0) * spread_m_per_s * x, w / math.sqrt(math.pi)


# --------------------------------------------------------------------------------------------
# Fields
# --------------------------------------------------------------------------------------------


def thermal_photon_number(frequency_hz, temperature_k):
    """Bose-Einstein mean photon number ``1 / (exp(h f / k_B T) - 1)``.

    Parameters
    ----------
    frequency_hz : array_like
        Mode frequency, Hz.
    temperature_k : array_like
        Temperature, K (0 gives 0).

    Returns
    -------
    numpy.ndarray
        Mean thermal photon number (the SI's exact ``h`` and ``k``, :data:`PLANCK_J_S` and
        :data:`BOLTZMANN_J_PER_K`).
    """
    frequency_hz = np.asarray(frequency_hz, float)
    temperature_k = np.asarray(temperature_k, float)
    with np.errstate(divide="ignore", over="ignore"):
        x = PLANCK_J_S * frequency_hz / (BOLTZMANN_J_PER_K * temperature_k)
        return np.where(x > 700.0, 0.0, 1.0 / np.expm1(np.minimum(x, 700.0)))


def thermal_distribution(mean_photons, max_photons):
    """Thermal photon-number distribution ``p_n = m^n / (1 + m)^(n + 1)``, n = 0..max_photons.

    The tail above ``max_photons`` (``(m / (1 + m))^(max_photons + 1)``, 2e-9 for the demo
    at n <= 4) is folded back by renormalising.
    """
    n = np.arange(max_photons + 1)
    m = float(mean_photons)
    p = (m / (1.0 + m)) ** n / (1.0 + m)
    return p / p.sum()


def _damping_generator(mean_photons, size):
    """Rate matrix (per unit 1/T_c) of the photon populations of a thermally damped mode.

    ``dp_n/dt = (m+1)[(n+1) p_{n+1} - n p_n] + m[n p_{n-1} - (n+1) p_n]`` (the diagonal part
    of the standard damped-oscillator master equation at mean thermal number ``m``),
    truncated at ``size - 1`` photons with a reflecting edge so probability is conserved.
    """
    n = np.arange(size, dtype=float)
    down = (mean_photons + 1.0) * n  # n -> n-1
    up = mean_photons * (n + 1.0)  # n -> n+1
    up[-1] = 0.0
    gen = np.diag(-(down + up))
    gen[np.arange(size - 1), np.arange(1, size)] = down[1:]
    gen[np.arange(1, size), np.arange(size - 1)] = up[:-1]
    return gen


def one_photon_distribution(
    one_photon_probability, mean_photons, max_photons, delay_s, damping_time_s
):
    """Photon-number distribution of the imperfect one-photon field when the atom crosses.

    At preparation the field holds ``|1>`` with probability ``p1`` and ``|0>`` otherwise, on
    top of the thermal photons already in the mode (photon numbers added as independent
    counts: a model choice). It then relaxes toward thermal equilibrium with time constant
    ``T_c`` during ``delay_s`` (the populations' rate equation of a thermally damped mode).

    Parameters
    ----------
    one_photon_probability : float
        ``p1``, probability that the preparation put one photon in.
    mean_photons : float
        Thermal mean photon number of the mode.
    max_photons : int
        Highest photon number returned; the tail is folded back by renormalising.
    delay_s : array_like
        Time from preparation to the crossing, s (one value per velocity class).
    damping_time_s : float
        Energy damping time ``T_c`` of the mode, s.

    Returns
    -------
    numpy.ndarray
        Shape ``delay.shape + (max_photons + 1,)``, rows summing to 1.
    """
    size = max_photons + 8
    thermal = thermal_distribution(mean_photons, size - 1)
    start = (1.0 - one_photon_probability) * thermal
    start[1:] += one_photon_probability * thermal[:-1]
    rates, vectors, inverse = _damping_modes(float(mean_photons), size)
    delay_s = np.asarray(delay_s, float)
    decay = np.exp(np.multiply.outer(delay_s / damping_time_s, rates))
    p = np.einsum("ij,...j,j->...i", vectors, decay, inverse @ start)
    p = np.clip(p[..., : max_photons + 1], 0.0, None)
    return p / p.sum(axis=-1, keepdims=True)


@functools.lru_cache(maxsize=32)
def _damping_modes(mean_photons, size):
    """Eigen-decomposition of :func:`_damping_generator` (real, distinct rates: a birth-death
    chain in detailed balance), so that populations at many delays cost one product each."""
    rates, vectors = np.linalg.eig(_damping_generator(mean_photons, size))
    rates = rates.real
    vectors = vectors.real
    return rates, vectors, np.linalg.inv(vectors)


# --------------------------------------------------------------------------------------------
# Detection
# --------------------------------------------------------------------------------------------


def confusion_matrix(*, e_read_as_g=0.0, g_read_as_e=0.0, g_read_as_i=0.0, i_read_as_g=0.0):
    """Detector confusion matrix ``M[detected, true]`` over ``(e, g, i)``; columns sum to 1.

    Parameters
    ----------
    e_read_as_g, g_read_as_e, g_read_as_i, i_read_as_g : float
        Probability that an atom in the first level is assigned to the second.
    """
    m = np.zeros((3, 3))
    m[1, 0] = e_read_as_g
    m[0, 1] = g_read_as_e
    m[2, 1] = g_read_as_i
    m[1, 2] = i_read_as_g
    m[np.diag_indices(3)] = 1.0 - m.sum(axis=0)
    return m


# --------------------------------------------------------------------------------------------
# One atom through R1 - cavity - R2
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True)
class AtomCavityModel:
    """Physical parameters of one atom's passage, in SI units.

    Attributes
    ----------
    coupling_hz : float
        ``Omega_0 / 2 pi``, Hz.
    waist_m : float
        Mode waist, m.
    cavity_frequency_hz : float
        Mode frequency (for the thermal photon number), Hz.
    temperature_k : float
        Mode temperature, K.
    damping_time_s : float
        Field energy damping time ``T_c``, s.
    one_photon_probability : float
        ``p1`` of the one-photon preparation.
    preparation_to_cavity_m : float
        Distance an atom flies between the field preparation and the mode centre, m;
        the delay is this distance over the true velocity.
    velocity_bias_m_per_s : float
        True minus set velocity, m/s.
    velocity_spread_m_per_s : float
        Standard deviation of the true velocity, m/s.
    ramsey_detuning_hz : float
        Ramsey detuning ``Delta_R`` from the g-i line, Hz.
    zone_separation_m : float
        Distance ``L`` between the Ramsey zones, m.
    zone_area_rad : float
        Zone pulse area at the velocity where the zones' power was set, rad.
    zone_power_velocity_m_per_s : float or None
        That velocity, m/s, the same for every set-point; None (default): the power is set
        again at each velocity set-point, so the area is ``zone_area_rad`` at the set velocity.
    confusion : tuple of tuple of float
        ``M[detected][true]`` over ``(e, g, i)``.
    velocity_nodes : int
        Gauss-Hermite nodes of the velocity average.
    max_photons : int
        Highest photon number modelled.
    crossing_steps : int
        Steps of :func:`crossing_amplitudes`.
    mode_profile : ModeProfile
        Shape of the coupling envelope (default the Gaussian mode).
    """

    coupling_hz: float
    waist_m: float
    cavity_frequency_hz: float
    temperature_k: float
    damping_time_s: float
    one_photon_probability: float
    preparation_to_cavity_m: float
    velocity_bias_m_per_s: float
    velocity_spread_m_per_s: float
    ramsey_detuning_hz: float = 0.0
    zone_separation_m: float = 0.0
    zone_area_rad: float = math.pi / 2.0
    zone_power_velocity_m_per_s: float | None = None
    confusion: tuple[tuple[float, ...], ...] = ((1.0, 0.0, 0.0), (0.0, 1.0, 0.0), (0.0, 0.0, 1.0))
    velocity_nodes: int = 9
    max_photons: int = 4
    crossing_steps: int = DEFAULT_CROSSING_STEPS
    mode_profile: ModeProfile = GAUSSIAN_MODE

    @property
    def thermal_photons(self) -> float:
        """Thermal mean photon number of the mode."""
        return float(thermal_photon_number(self.cavity_frequency_hz, self.temperature_k))


def _fock_coefficients(a_g, a_e, theta, phase_v):
    """Coefficients (a, b, c) of (e, g, i) for one Fock state; last axis of the result: 3x3."""
    cos = np.cos(theta / 2.0)
    sin = np.sin(theta / 2.0)
    # After R1 (phase 0) from g: c_g = cos, c_i = -i sin.
    c_g = cos
    c_i = -1j * sin
    big_a = cos * c_g * a_g
    big_b = -1j * sin * c_i * np.exp(-1j * phase_v)
    big_c = -1j * np.exp(1j * phase_v) * sin * c_g * a_g
    big_d = cos * c_i
    ab = big_a * np.conj(big_b)
    cd = big_c * np.conj(big_d)
    out = np.empty(np.shape(a_g) + (3, 3))
    out[..., 0, 0] = np.abs(c_g) ** 2 * np.abs(a_e) ** 2
    out[..., 0, 1] = 0.0
    out[..., 0, 2] = 0.0
    out[..., 1, 0] = np.abs(big_a) ** 2 + np.abs(big_b) ** 2
    out[..., 1, 1] = 2.0 * ab.real
    out[..., 1, 2] = -2.0 * ab.imag
    out[..., 2, 0] = np.abs(big_c) ** 2 + np.abs(big_d) ** 2
    out[..., 2, 1] = 2.0 * cd.real
    out[..., 2, 2] = -2.0 * cd.imag
    return out


def outcome_coefficients(model: AtomCavityModel, set_velocity, true_detuning_hz):
    """Fringe coefficients of one atom for both fields, before detection.

    Parameters
    ----------
    model : AtomCavityModel
        Physical parameters.
    set_velocity : array_like
        Velocity set-point, m/s; the true velocities are Gaussian around
        ``set_velocity + velocity_bias`` with the model's spread.
    true_detuning_hz : array_like
        True atom-cavity detuning ``delta / 2 pi``, Hz. Broadcasts with ``set_velocity``.

    Returns
    -------
    numpy.ndarray
        Shape ``broadcast.shape + (2, 3, 3)``: field (empty, one_photon), outcome (e, g, i),
        coefficient (a, b, c) with ``P_x(phi) = a + b cos(phi) + c sin(phi)`` at set Ramsey
        phase ``phi``.
    """
    set_velocity, true_detuning_hz = np.broadcast_arrays(
        np.asarray(set_velocity, float), np.asarray(true_detuning_hz, float)
    )
    shape = set_velocity.shape
    vset = set_velocity.ravel()
    det = true_detuning_hz.ravel()
    v_true, w_nodes = velocity_nodes(
        vset + model.velocity_bias_m_per_s, model.velocity_spread_m_per_s, model.velocity_nodes
    )  # (M, K)
    power_set = vset[:, None] if model.zone_power_velocity_m_per_s is None \
        else model.zone_power_velocity_m_per_s
    theta = zone_area(v_true, power_set, area_at_set=model.zone_area_rad)
    phase_v = ramsey_phase_offset(
        v_true,
        ramsey_detuning_hz=model.ramsey_detuning_hz,
        zone_separation_m=model.zone_separation_m,
    )
    n = np.arange(model.max_photons + 1)
    a_g = np.ones(v_true.shape + (n.size,), dtype=complex)
    a_e = np.zeros_like(a_g)
    if n.size > 1:
        a_g[..., 1:], a_e[..., 1:] = crossing_amplitudes(
            v_true[..., None],
            det[:, None, None],
            n[None, None, 1:],
            coupling_hz=model.coupling_hz,
            waist_m=model.waist_m,
            steps=model.crossing_steps,
            profile=model.mode_profile,
        )
    fock = _fock_coefficients(a_g, a_e, theta[..., None], phase_v[..., None])  # (M,K,N,3,3)
    mean = model.thermal_photons
    p_empty = thermal_distribution(mean, model.max_photons)  # (N,)
    p_one = one_photon_distribution(
        model.one_photon_probability,
        mean,
        model.max_photons,
        model.preparation_to_cavity_m / v_true,
        model.damping_time_s,
    )  # (M, K, N)
    empty = np.einsum("mknxc,n,k->mxc", fock, p_empty, w_nodes)
    one = np.einsum("mknxc,mkn,k->mxc", fock, p_one, w_nodes)
    out = np.stack([empty, one], axis=1)
    return out.reshape(shape + (2, 3, 3))


def detected_coefficients(coefficients, confusion):
    """Apply a confusion matrix ``M[detected, true]`` to outcome coefficients.

    ``coefficients`` has the outcome on axis -2 and (a, b, c) on axis -1; the result gives the
    probability that a detected atom is assigned to each outcome.
    """
    return np.einsum("xy,...yc->...xc", np.asarray(confusion, float), coefficients)


def fringe_figures(detected):
    """Inversion, phase shift, contrasts and absorption from detected coefficients.

    Parameters
    ----------
    detected : array_like
        Shape ``(..., 2, 3, 3)`` as returned by :func:`detected_coefficients`.

    Returns
    -------
    dict of numpy.ndarray
        ``inversion`` = ``(a1 - a0) + hypot(b1 - b0, c1 - c0)`` of P_g (max over phi of
        ``P_g(phi|one_photon) - P_g(phi|empty)``); ``phase_shift`` in [0, 2 pi), rad, the
        difference of ``atan2(c_g, b_g)``; ``contrast_empty`` and ``contrast_one_photon`` =
        ``2 hypot(b_g, c_g)``; ``absorption`` = a-coefficient of P_e for one_photon.
    """
    d = np.asarray(detected, float)
    g0 = d[..., 0, 1, :]
    g1 = d[..., 1, 1, :]
    inversion = (g1[..., 0] - g0[..., 0]) + np.hypot(g1[..., 1] - g0[..., 1], g1[..., 2] - g0[..., 2])
    phi0 = np.arctan2(g0[..., 2], g0[..., 1])
    phi1 = np.arctan2(g1[..., 2], g1[..., 1])
    return {
        "inversion": inversion,
        "phase_shift": np.mod(phi1 - phi0, 2.0 * np.pi),
        "contrast_empty": 2.0 * np.hypot(g0[..., 1], g0[..., 2]),
        "contrast_one_photon": 2.0 * np.hypot(g1[..., 1], g1[..., 2]),
        "absorption": d[..., 1, 0, 0],
    }


# --------------------------------------------------------------------------------------------
# Stark tuning
# --------------------------------------------------------------------------------------------


def stark_detuning(field_v_per_m, *, coefficient_hz_m2_per_v2, bias_field_v_per_m):
    """Detuning change from the quadratic Stark shift, relative to the bias field, Hz.

    ``delta / 2 pi = k (E^2 - E_bias^2)`` with ``k`` in Hz per (V/m)^2
    (-250 kHz per (V/cm)^2 is -25 Hz per (V/m)^2).
    """
    field = np.asarray(field_v_per_m, float)
    return coefficient_hz_m2_per_v2 * (field**2 - bias_field_v_per_m**2)


def stark_field_for_detuning(detuning_hz, *, coefficient_hz_m2_per_v2, bias_field_v_per_m):
    """Electric field that gives a detuning change under the quadratic Stark law, V/m.

    Inverse of :func:`stark_detuning` on the branch ``E >= 0``. Raises ``ValueError`` when the
    requested detuning needs ``E^2 < 0`` (beyond the bias).
    """
    detuning_hz = np.asarray(detuning_hz, float)
    square = bias_field_v_per_m**2 + detuning_hz / coefficient_hz_m2_per_v2
    if np.any(square < 0.0):
        raise ValueError(
            "detuning_hz: expected a detuning reachable from the bias field "
            f"(E^2 >= 0), got {detuning_hz.tolist()!r}"
        )
    return np.sqrt(square)
