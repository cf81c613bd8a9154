"""The inversion along velocity, with the physics as its prior (pure, no I/O).

The least absorption marks the best velocity only when nothing else in the inversion depends
on velocity (docs/physics.md section 5b). Several things do: the Ramsey dephasing grows as
``Delta_R L sigma_v / v^2`` (section 3), so the empty fringe's contrast rises with velocity;
the Ramsey pulse areas scale as ``1 / v``; the photon decays during the flight to the mode
(``exp(-d / (v T_c))``, section 4). To first order the inversion along velocity is the product
of the empty-fringe contrast and the interaction factor that the absorption measures, so near
the optimum, in ``x = v_ref / v - 1``::

    I(x) = r(x) - P_e(x),      r(x) = r0 + r1 x + r2 x^2

``P_e(x)`` is the absorption's weighted quadratic fit (an excess absorption ``Delta P_e`` costs
``Delta P_e`` of the inversion, :mod:`autotune.analysis.guided`'s notes), and ``r`` is the part of the
inversion that the absorption does not carry: fitted to the measured ``I + P_e`` of every
point, with a Gaussian prior on its slope and curvature from the physics, ``(r1, r2) =
(S / c0) (c1, c2)`` where ``c0 + c1 x + c2 x^2`` is the fit of the empty-fringe contrast that
every point measures and ``S`` the inversion scale. The prior is widened by a discrepancy
``tau = (0.1 S, 0.5 S)`` (the terms the empty contrast does not carry: the photon's decay on
its flight, ``d / (v T_c) ~ 0.04`` per unit of ``x`` on the demo rig, with room), its slope
fourfold again when the measured inversions' marginal likelihood prefers it: where the inversions
disagree with the proxy, the data decide. This is Bayesian linear regression on the figure of
merit itself with the error signals as its prior mean.

The velocity optimum is the vertex of ``I(x)`` (a maximum when its curvature is negative);
it is bracketed when it lies between the smallest and the largest velocity measured.

Whether the measured inversions say more than the absorption is told by
:func:`proxy_disagreement`: the weighted least-squares slope of ``r`` along ``x`` against the
slope the absorption alone allows (``r`` flat within the discrepancy ``tau``), in standard
errors. It is tested against the absorption, not against the contrast's prediction: the empty
contrast is measured from the same fringes as the inversion (``I = (a1 - a0) + |theta1 -
theta0|``, about half the empty contrast's noise, :mod:`autotune.analysis.fringe`), so a noisy
fringe moves both the same way and they cannot arbitrate each other.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from autotune.errors import ValueRefused

__all__ = ["InversionCurve", "fit_inversion_curve", "DISCREPANCY", "DISCREPANCY_WIDENING",
           "AbsorptionFit", "cholesky_jittered", "ProxyDisagreement", "proxy_disagreement",
           "DISAGREEMENT_LEVEL"]

#: Prior standard deviation of the slope and curvature of ``r`` beyond the contrast's
#: prediction, as fractions of the inversion scale (per unit of ``x`` and of ``x^2``).
DISCREPANCY = (0.1, 0.5)
#: The discrepancy may widen by this factor when the inversions' marginal likelihood prefers it
#: (the slope only: the curvature is the absorption's, measured sharply).
DISCREPANCY_WIDENING = 4.0
#: Two-sided level of the test of the measured inversions' slope against the proxy's
#: (:func:`proxy_disagreement`) below which the disagreement is called significant.
DISAGREEMENT_LEVEL = 0.05
#: Prior standard deviation of the empty contrast's curvature in ``x``, relative to its level.
CONTRAST_CURVATURE = 0.5
#: Smallest empty contrast and inversion scale used as denominators.
_MIN_SCALE = 0.05


class _QuadraticInX:
    """A quadratic ``c0 + c1 x + c2 x^2`` in ``x = v_ref / v - 1`` (the pulse area's relative
    excess over that at ``v_ref``): what the inversion and the absorption curves share."""

    velocity_ref: float
    coef: np.ndarray
    cov: np.ndarray

    def x_of(self, velocity: float) -> float:
        """``x`` of a velocity (m/s)."""
        return self.velocity_ref / velocity - 1.0

    def velocity_of(self, x: float) -> float:
        """The velocity (m/s) of an ``x``."""
        return self.velocity_ref / (1.0 + x)

    def value(self, x: float) -> float:
        """The curve at ``x``."""
        return float(self.coef[0] + self.coef[1] * x + self.coef[2] * x * x)

    def vertex(self) -> float | None:
        """``x`` of the curve's vertex, None where it has none of the expected kind."""
        raise NotImplementedError

    def vertex_velocity_stderr(self) -> float:
        """Standard error of the velocity of the vertex (the inversion's maximum, the
        absorption's minimum): the delta method on ``x* = -c1 / (2 c2)`` with the fit's
        covariance, carried to ``v = v_ref / (1 + x*)``; inf without a vertex."""
        vertex = self.vertex()
        if vertex is None:
            return math.inf
        c1, c2 = float(self.coef[1]), float(self.coef[2])
        gradient = np.array([0.0, -1.0 / (2.0 * c2), c1 / (2.0 * c2**2)])
        x_sd = math.sqrt(max(float(gradient @ self.cov @ gradient), 0.0))
        return self.velocity_of(vertex) * x_sd / (1.0 + vertex)


@dataclass(frozen=True)
class InversionCurve(_QuadraticInX):
    """Posterior of ``I(x) = b0 + b1 x + b2 x^2`` along ``x = v_ref / v - 1``.

    Attributes
    ----------
    velocity_ref : float
        Reference velocity of ``x`` (m/s).
    coef, cov : ndarray
        Posterior mean and covariance of ``(b0, b1, b2)`` (inversion units).
    residual_cov, absorption_cov : ndarray
        The two independent parts of ``cov``: of the residual ``r`` and of the absorption fit.
    x_groups : tuple of float
        The distinct ``x`` measured (sorted).
    proxy : ndarray
        The physics' prediction of ``(b1, b2)`` (the contrast's shape minus the absorption's).
    widened : bool
        Whether the data's marginal likelihood chose the widened discrepancy (the inversions
        disagree with the proxy).
    disagreement : ProxyDisagreement or None
        The measured inversions' slope along ``x`` against the proxy's (None with fewer than
        two velocity groups).
    """

    velocity_ref: float
    coef: np.ndarray
    cov: np.ndarray
    residual_cov: np.ndarray
    absorption_cov: np.ndarray
    x_groups: tuple[float, ...]
    proxy: np.ndarray
    widened: bool
    disagreement: ProxyDisagreement | None = None

    def vertex(self) -> float | None:
        """``x`` of the maximum, or None when the curve is not concave."""
        if self.coef[2] >= 0.0:
            return None
        return float(-self.coef[1] / (2.0 * self.coef[2]))

    def draws(self, normals: np.ndarray, residual_cov: np.ndarray | None = None,
              absorption_cov: np.ndarray | None = None) -> np.ndarray:
        """Posterior draws of ``(b0, b1, b2)`` from standard normals of shape ``(n, 3)``."""
        cov = (self.residual_cov if residual_cov is None else residual_cov) + \
            (self.absorption_cov if absorption_cov is None else absorption_cov)
        return self.coef[None, :] + normals @ cholesky_jittered(cov).T


def cholesky_jittered(cov: np.ndarray) -> np.ndarray:
    cov = 0.5 * (cov + cov.T)
    scale = max(float(np.max(np.abs(np.diag(cov)))), 1e-300)
    for jitter in (0.0, 1e-12, 1e-9, 1e-6):
        try:
            return np.linalg.cholesky(cov + jitter * scale * np.eye(len(cov)))
        except np.linalg.LinAlgError:
            continue
    values, vectors = np.linalg.eigh(cov)
    return vectors * np.sqrt(np.clip(values, 0.0, None))


def _posterior(design: np.ndarray, values: np.ndarray, variances: np.ndarray,
               prior_mean: np.ndarray, prior_cov: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    """Posterior mean, covariance and log evidence of a linear-Gaussian model (full prior)."""
    weights = 1.0 / variances
    prior_precision = np.linalg.inv(prior_cov)
    precision = design.T @ (design * weights[:, None]) + prior_precision
    cov = np.linalg.inv(precision)
    cov = 0.5 * (cov + cov.T)
    mean = cov @ (design.T @ (values * weights) + prior_precision @ prior_mean)
    marginal = np.diag(variances) + design @ prior_cov @ design.T
    residual = values - design @ prior_mean
    _, logdet = np.linalg.slogdet(marginal)
    evidence = float(-0.5 * residual @ np.linalg.solve(marginal, residual) - 0.5 * logdet)
    return mean, cov, evidence


@dataclass(frozen=True)
class ProxyDisagreement:
    """The measured inversions along velocity against the proxy's prediction of their shape.

    Each velocity group's ``r = I + P_e`` (the part of the inversion that the absorption does not
    carry, see the module notes) is averaged with inverse-variance weights. Under the null
    hypothesis that the proxy is right up to measurement noise, the group means are ``r0 + p1 x
    + p2 x^2 + noise`` with ``(p1, p2)`` the contrast's prediction (mean and covariance) and
    ``r0`` free.

    The statistic is a z test (a Wald test of one linear combination, e.g. L. Wasserman, *All
    of Statistics*, 2004, section 10.4) of the weighted least-squares slope of the group means
    in ``x`` (the straight line's slope, as ``numpy.polyfit(x, y, 1, w=1 / sd)`` gives it)
    against the same least-squares slope of the proxy's curve: ``z = (slope - proxy_slope) / sqrt(var_data + var_proxy)``, with the
    data's variance from the group means' variances alone and the proxy's from its covariance
    (the offset cancels: the slope's weights sum to zero). ``z > 0``: the inversions rise
    towards larger ``x`` (lower velocities) more than the proxy says. The residuals are the
    group means minus the proxy's curve with ``r0`` fitted by generalised least squares, and
    their standard deviations are those of the residuals under the null, ``diag(Sigma - 1 1^T
    / (1^T Sigma^-1 1))`` with ``Sigma = diag(var) + D P D^T`` (Bishop 2006, *Pattern
    Recognition and Machine Learning*, section 3.3.2 for the predictive covariance of a linear
    model).

    Attributes
    ----------
    x : ndarray
        ``x`` of each velocity group (sorted).
    mean, mean_stderr : ndarray
        Each group's weighted mean of ``r`` and its standard deviation.
    residual, residual_stderr : ndarray
        Each group's mean minus the proxy's curve (level fitted), and its sd under the null.
    slope, slope_stderr : float
        The weighted least-squares slope of the group means in ``x`` and its sd.
    proxy_slope, proxy_slope_stderr : float
        The same slope of the proxy's curve, and its sd from the proxy's covariance.
    z, p_value : float
        The standardised difference of the two slopes and its two-sided normal p-value.
    """

    x: np.ndarray
    mean: np.ndarray
    mean_stderr: np.ndarray
    residual: np.ndarray
    residual_stderr: np.ndarray
    slope: float
    slope_stderr: float
    proxy_slope: float
    proxy_slope_stderr: float
    z: float
    p_value: float

    def significant(self, level: float = DISAGREEMENT_LEVEL) -> bool:
        """Whether the slopes differ at the two-sided ``level``."""
        return self.p_value < level

    def farthest_group(self) -> int:
        """Index of the group whose mean lies most standard deviations from the proxy's curve:
        the measurement that carries the disagreement."""
        with np.errstate(divide="ignore", invalid="ignore"):
            scores = np.abs(self.residual) / self.residual_stderr
        return int(np.nanargmax(np.where(np.isfinite(scores), scores, -1.0)))


def proxy_disagreement(xs: Sequence[float], values: Sequence[float], variances: Sequence[float],
                       proxy_mean: Sequence[float], proxy_cov: np.ndarray,
                       x_groups: Sequence[float]) -> ProxyDisagreement | None:
    """Test the measured ``r = I + P_e`` along ``x`` against the proxy's slope (see
    :class:`ProxyDisagreement`).

    Parameters
    ----------
    xs, values, variances : sequence of float
        Each point's ``x = v_ref / v - 1``, ``r`` and its variance (> 0).
    proxy_mean, proxy_cov : array_like
        The proxy's ``(p1, p2)`` (slope and curvature of ``r`` in ``x``) and their 2 x 2
        covariance.
    x_groups : sequence of float
        The velocity groups: each point belongs to the nearest.

    Returns
    -------
    ProxyDisagreement or None
        None with fewer than two groups holding points.
    """
    x = np.asarray(xs, dtype=float)
    y = np.asarray(values, dtype=float)
    var = np.asarray(variances, dtype=float)
    if not (len(x) == len(y) == len(var)):
        raise ValueRefused(f"proxy_disagreement: expected as many values and variances as xs, "
                           f"got {len(x)}, {len(y)}, {len(var)}")
    if len(x) == 0 or not len(x_groups):
        return None
    if np.any(~np.isfinite(var)) or np.any(var <= 0.0):
        raise ValueRefused("proxy_disagreement: expected variances > 0")
    groups = np.asarray(sorted(float(g) for g in x_groups))
    member = np.argmin(np.abs(x[:, None] - groups[None, :]), axis=1)
    used = np.unique(member)
    if len(used) < 2:
        return None
    gx, gmean, gvar = [], [], []
    for g in used:
        mine = member == g
        w = 1.0 / var[mine]
        gvar.append(1.0 / float(w.sum()))
        gmean.append(float((w * y[mine]).sum()) * gvar[-1])
        gx.append(float((w * x[mine]).sum()) * gvar[-1])
    gx_a, gm, gv = np.array(gx), np.array(gmean), np.array(gvar)
    p = np.asarray(proxy_mean, dtype=float)
    p_cov = np.asarray(proxy_cov, dtype=float)
    shape = np.stack([gx_a, gx_a * gx_a], axis=1)
    # The weighted least-squares slope as a linear functional of the group means.
    line = np.stack([np.ones(len(gx_a)), gx_a], axis=1)
    weights = 1.0 / gv
    normal = line.T @ (line * weights[:, None])
    functional = (np.linalg.inv(normal) @ (line * weights[:, None]).T)[1]
    slope = float(functional @ gm)
    slope_var = float(functional @ (gv * functional))
    along = functional @ shape
    proxy_slope = float(along @ p)
    proxy_var = float(along @ p_cov @ along)
    total = math.sqrt(max(slope_var + proxy_var, 1e-300))
    z = (slope - proxy_slope) / total
    p_value = float(math.erfc(abs(z) / math.sqrt(2.0)))
    # Residuals against the proxy's curve, its level by generalised least squares.
    sigma = np.diag(gv) + shape @ p_cov @ shape.T
    ones = np.ones(len(gx_a))
    inv_ones = np.linalg.solve(sigma, ones)
    level_precision = float(ones @ inv_ones)
    centred = gm - shape @ p
    level = float(inv_ones @ centred) / level_precision
    residual = centred - level
    residual_var = np.diag(sigma) - 1.0 / level_precision
    return ProxyDisagreement(
        x=gx_a, mean=gm, mean_stderr=np.sqrt(gv), residual=residual,
        residual_stderr=np.sqrt(np.maximum(residual_var, 0.0)), slope=slope,
        slope_stderr=math.sqrt(max(slope_var, 0.0)), proxy_slope=proxy_slope,
        proxy_slope_stderr=math.sqrt(max(proxy_var, 0.0)), z=float(z), p_value=p_value)


def fit_inversion_curve(xs: Sequence[float], inversions: Sequence[float],
                        inversion_vars: Sequence[float], absorptions: Sequence[float],
                        absorption_vars: Sequence[float], contrasts: Sequence[float],
                        contrast_vars: Sequence[float], absorption_coef: np.ndarray,
                        absorption_cov: np.ndarray, scale: float, velocity_ref: float,
                        x_groups: Sequence[float]) -> InversionCurve:
    """The posterior of the inversion along velocity (see the module notes).

    Parameters
    ----------
    xs : sequence of float
        ``v_ref / v - 1`` of every point.
    inversions, inversion_vars : sequence of float
        Each point's inversion (corrected for its phase error) and its variance.
    absorptions, absorption_vars : sequence of float
        Each point's absorption ``P_e(one photon)`` and its variance.
    contrasts, contrast_vars : sequence of float
        Each point's empty-fringe contrast and its variance.
    absorption_coef, absorption_cov : ndarray
        The absorption's quadratic fit in ``x`` (mean and covariance).
    scale : float
        The inversion scale ``S`` (> 0).
    velocity_ref : float
        Reference velocity of ``x`` (m/s).
    x_groups : sequence of float
        The distinct ``x`` measured.
    """
    x = np.asarray(xs, dtype=float)
    design = np.stack([np.ones(len(x)), x, x * x], axis=1)
    scale = max(float(scale), _MIN_SCALE)
    c = np.asarray(contrasts, dtype=float)
    c_var = np.maximum(np.asarray(contrast_vars, dtype=float), 1e-8)
    c_mean = float(np.sum(c / c_var) / np.sum(1.0 / c_var)) if len(c) else 1.0
    c_level = max(abs(c_mean), _MIN_SCALE)
    # A loose prior on the contrast's slope, learned from the points; a tight one on its
    # curvature: over +-10 % of velocity the dephasing law exp(-(k / v^2)^2 / 2) is nearly
    # linear in x for contrasts above about 0.5 (its curvature term is second order), and a
    # free curvature fitted to a few noisy contrasts would swamp the absorption's.
    c_prior = np.diag([1.0, (3.0 * c_level) ** 2, (CONTRAST_CURVATURE * c_level) ** 2])
    c_coef, c_cov, _ = _posterior(design, c, c_var, np.array([c_mean, 0.0, 0.0]), c_prior)
    k = scale / max(float(c_coef[0]), _MIN_SCALE)
    proxy_r = k * c_coef[1:]
    proxy_r_cov = k * k * c_cov[1:, 1:]

    r = np.asarray(inversions, dtype=float) + np.asarray(absorptions, dtype=float)
    r_var = np.maximum(np.asarray(inversion_vars, dtype=float)
                       + np.asarray(absorption_vars, dtype=float), 1e-8)
    best: tuple[float, np.ndarray, np.ndarray, bool] | None = None
    for widened, factor in ((False, 1.0), (True, DISCREPANCY_WIDENING)):
        tau = scale * np.array(DISCREPANCY) * np.array([factor, 1.0])
        prior_cov = np.zeros((3, 3))
        prior_cov[0, 0] = 1.0
        prior_cov[1:, 1:] = proxy_r_cov + np.diag(tau**2)
        prior_mean = np.array([scale + float(np.mean(absorptions)) if len(x) else scale,
                               *proxy_r])
        mean, cov, evidence = _posterior(design, r, r_var, prior_mean, prior_cov)
        if best is None or evidence > best[0] + 1e-9:
            best = (evidence, mean, cov, widened)
    assert best is not None
    _, r_coef, r_cov, widened = best
    a_coef = np.asarray(absorption_coef, dtype=float)
    a_cov = np.asarray(absorption_cov, dtype=float)
    coef = r_coef - a_coef
    # Against the absorption alone (r flat within the discrepancy): the empty contrast is
    # measured from the same fringes as the inversion and shares its noise.
    tau = scale * np.array(DISCREPANCY)
    disagreement = proxy_disagreement(x, r, r_var, np.zeros(2), np.diag(tau**2), x_groups) \
        if len(x) else None
    return InversionCurve(velocity_ref=float(velocity_ref), coef=coef, cov=r_cov + a_cov,
                          residual_cov=r_cov, absorption_cov=a_cov,
                          x_groups=tuple(sorted(float(g) for g in x_groups)),
                          proxy=proxy_r - a_coef[1:], widened=widened, disagreement=disagreement)


@dataclass(frozen=True)
class AbsorptionFit(_QuadraticInX):
    """Weighted quadratic fit of P_e in ``x = v_ref / v - 1``."""

    velocity_ref: float
    coef: np.ndarray
    cov: np.ndarray
    x_groups: tuple[float, ...]
    from_prior: bool

    def vertex(self) -> float | None:
        if self.coef[2] <= 0.0:
            return None
        return float(-self.coef[1] / (2.0 * self.coef[2]))
