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
point, with a prior on its slope and curvature from the physics of the empty contrast, which
every point measures. That contrast follows the Ramsey dephasing law (docs/physics.md section
3, :func:`dephasing_contrast`)::

    C(x) = C_inf exp(-s^2 (1 + x)^4 / 2),      s >= 0,  C_inf <= 1

one parameter for its shape, ``s`` the spread of the Ramsey phase over the velocity class at
``v_ref``: the contrast can only rise with velocity, and its curvature is tied to its slope.
``r`` follows the contrast's shape, ``(r1, r2) = S (-2 s^2, 2 s^4 - 3 s^2) + (d1, d2)`` (the
Taylor coefficients of ``S C(x) / C(0)``, :func:`law_proxy`; ``S`` the inversion scale), with a
discrepancy ``d ~ N(0, tau^2)``, ``tau = (0.1 S, 0.5 S)`` for the terms the empty contrast does
not carry (the photon's decay on its flight, ``d / (v T_c) ~ 0.04`` per unit of ``x`` on the
demo rig; Ramsey pulses that are pi/2 only at one velocity; a mode that is not Gaussian), and
with its slope four times wider, the two averaged by the measured inversions'
marginal likelihood (Bayesian model averaging): where the inversions disagree with the proxy,
the data decide, and while few velocities cannot tell them apart, the stated width keeps all. This is Bayesian regression on the figure of merit itself with the
error signals as its prior mean.

A point's inversion and its empty contrast are read from the same empty fringe, so their noise
is correlated (for an inverted fringe the inversion moves half a unit per unit of the contrast's
noise, :func:`autotune.analysis.fringe.shared_fringe_covariance`). The contrasts and the ``r``
values are therefore conditioned on jointly, as correlated Gaussian observations given ``s``
(linear in ``C_inf``, ``r0`` and ``d``), and ``s`` is marginalised on a grid: a noisy empty
fringe is not counted once in the prior's slope and again in the data, and the law's single
parameter and its sign give back the precision that a free slope and curvature of the
contrast, learned from the same few fringes, cannot.

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
           "DISCREPANCY_SCALES",
           "AbsorptionFit", "cholesky_jittered", "ProxyDisagreement", "proxy_disagreement",
           "DISAGREEMENT_LEVEL", "DephasingLaw", "dephasing_contrast", "law_proxy"]

#: Prior standard deviation of the slope and curvature of ``r`` beyond the contrast's
#: prediction, as fractions of the inversion scale (per unit of ``x`` and of ``x^2``).
DISCREPANCY = (0.1, 0.5)
#: The widest alternative of the slope's discrepancy (the slope only: the curvature is the
#: absorption's, measured sharply).
DISCREPANCY_WIDENING = 4.0
#: The slope discrepancy's alternatives, in units of the narrow one (the narrow and the
#: widest), equally likely a priori and averaged by the inversions' marginal likelihood.
DISCREPANCY_SCALES = (1.0, DISCREPANCY_WIDENING)
#: Two-sided level of the test of the measured inversions' slope against the proxy's
#: (:func:`proxy_disagreement`) below which the disagreement is called significant.
DISAGREEMENT_LEVEL = 0.05
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
        Whether a widened discrepancy carries more of the data's marginal likelihood than the
        narrow one (the inversions disagree with the proxy); the posterior averages them.
    disagreement : ProxyDisagreement or None
        The measured inversions' slope along ``x`` against the proxy's (None with fewer than
        two velocity groups).
    law : DephasingLaw or None
        The posterior of the empty contrast's dephasing law along velocity under the slope
        discrepancy with the larger evidence (the one ``widened`` names; ``proxy`` is its
        prediction), not averaged over the discrepancies as ``coef`` and ``cov`` are.
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
    law: DephasingLaw | None = None

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


#: Largest correlation of a point's inversion with its empty contrast that the joint model
#: takes (keeps each pair's covariance positive definite).
_MAX_SHARED_CORRELATION = 0.95
#: The grid of the dephasing law's phase spread at the reference velocity (rad): uniform prior on
#: [0, its end]. The end is where the contrast has fallen to the smallest scale used
#: (``exp(-s^2 / 2) = 0.05``); the contrast's own bound (``C_inf <= 1``) cuts it far lower.
_SPREAD_GRID = np.linspace(0.0, math.sqrt(-2.0 * math.log(_MIN_SCALE)), 491)


#: Uniform in the phase spread: on a rig without dephasing (the boundary ``s = 0``) a prior
#: uniform in the contrast's slope (``u = s^2``) covered r's slope 0.937 of the time at 95 %
#: on the synthetic rig of tests/test_velocity_model.py, uniform in ``s`` 0.975 (session 9).
_SPREAD_PRIOR_LOG_MASS = np.full(len(_SPREAD_GRID), -math.log(len(_SPREAD_GRID)))


def _moment_matched(log_weights: np.ndarray, means: np.ndarray, covs: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray, float, np.ndarray]:
    """A Gaussian mixture with unnormalised log weights, matched by its mean and covariance
    (the law of total covariance): ``(mean, cov, log of the weights' sum, normalised weights)``,
    the weights normalised in the log domain so that no evidence overflows."""
    top = float(np.max(log_weights))
    weights = np.exp(log_weights - top)
    total = float(weights.sum())
    weights = weights / total
    mean = weights @ means
    spread = means - mean[None, :]
    cov = np.einsum("g,gij->ij", weights, covs) + np.einsum("g,gi,gj->ij", weights, spread, spread)
    return mean, 0.5 * (cov + cov.T), top + math.log(total), weights


@dataclass(frozen=True)
class DephasingLaw:
    """The posterior of the empty contrast's law along velocity (docs/physics.md section 3).

    ``C(v) = C_inf exp(-s(v)^2 / 2)`` with ``s(v) = s_ref (v_ref / v)^2 = s_ref (1 + x)^2`` the
    spread of the Ramsey phase ``2 pi Delta_R L / v`` over the velocity class, ``s_ref >= 0``:
    the contrast can only rise with velocity, and its slope and curvature in ``x`` are one
    parameter's. ``C_inf <= 1`` (a fringe's contrast cannot exceed one).

    Attributes
    ----------
    spread_rad, spread_stderr_rad : float
        Posterior mean and sd of ``s_ref``, the phase spread at the reference velocity (rad).
    contrast_limit : float
        Posterior mean of ``C_inf``, the contrast without dephasing.
    relative_slope, relative_slope_stderr : float
        Posterior mean and sd of the contrast's slope in ``x`` at ``x = 0`` relative to its
        level, ``-2 s_ref^2``.
    relative_curvature : float
        Posterior mean of its Taylor curvature relative to its level, ``2 s_ref^4 - 3 s_ref^2``.
    """

    spread_rad: float
    spread_stderr_rad: float
    contrast_limit: float
    relative_slope: float
    relative_slope_stderr: float
    relative_curvature: float

    def to_dict(self) -> dict[str, float]:
        """The law's posterior as plain numbers (the journal's)."""
        return {"phase_spread_rad": self.spread_rad,
                "phase_spread_stderr_rad": self.spread_stderr_rad,
                "contrast_without_dephasing": self.contrast_limit,
                "relative_slope": self.relative_slope,
                "relative_slope_stderr": self.relative_slope_stderr}


def dephasing_contrast(x: np.ndarray | float, spread_rad: float, limit: float = 1.0
                       ) -> np.ndarray | float:
    """The empty fringe's contrast along ``x = v_ref / v - 1`` under the Ramsey dephasing law.

    A Gaussian velocity class of spread ``sigma_v`` spreads the free-evolution phase
    ``2 pi Delta_R L / v`` by ``s(v) = 2 pi Delta_R L sigma_v / v^2`` (to first order in
    ``sigma_v / v``), and averaging the fringe over a Gaussian phase multiplies its contrast by
    ``exp(-s^2 / 2)`` (docs/physics.md section 3). With ``s(v) = s_ref (v_ref / v)^2 = s_ref
    (1 + x)^2``::

        C(x) = C_inf exp(-s_ref^2 (1 + x)^4 / 2)

    Parameters
    ----------
    x : float or ndarray
        ``v_ref / v - 1``.
    spread_rad : float
        ``s_ref``, the phase spread at ``v_ref`` (rad, >= 0).
    limit : float
        ``C_inf``, the contrast without dephasing.
    """
    u = float(spread_rad) ** 2
    return limit * np.exp(-0.5 * u * (1.0 + np.asarray(x, dtype=float)) ** 4)


def law_proxy(spread_rad: np.ndarray | float, scale: float) -> np.ndarray:
    """The law's prediction of ``r``'s slope and curvature in ``x`` at ``x = 0``: the Taylor
    coefficients of ``S C(x) / C(0)``, ``S (-2 u, 2 u^2 - 3 u)`` with ``u = s_ref^2``; shape
    ``(..., 2)``."""
    u = np.asarray(spread_rad, dtype=float) ** 2
    return float(scale) * np.stack([-2.0 * u, 2.0 * u * u - 3.0 * u], axis=-1)


@dataclass(frozen=True)
class _LawGrid:
    """Per value of the phase spread on the grid: the conditional posterior of ``theta = (C_inf,
    r0, d1, d2)`` (mean ``(G, 4)``, covariance ``(G, 4, 4)``), the log evidence (up to a
    constant that depends on neither the spread nor the discrepancy), the log probability that
    ``C_inf <= 1`` and the law's ``(p1, p2)`` of ``r`` (``(G, 2)``)."""

    spread: np.ndarray
    mean: np.ndarray
    cov: np.ndarray
    log_evidence: np.ndarray
    log_within_one: np.ndarray
    proxy: np.ndarray


def _law_grid(x: np.ndarray, c: np.ndarray, c_var: np.ndarray, r: np.ndarray,
              r_var: np.ndarray, shared: np.ndarray, scale: float, tau: np.ndarray,
              c_prior_mean: float, r0_mean: float, spread: np.ndarray | None = None) -> _LawGrid:
    """The linear-Gaussian conditionals of the law's model, one per phase spread.

    Given the phase spread ``s`` the model is linear-Gaussian in ``theta = (C_inf, r0, d1, d2)``:
    ``C_i = C_inf h_i(s) + e_i`` with ``h_i`` the law's shape (:func:`dephasing_contrast` with
    ``C_inf = 1``), and ``r_i = r0 + (p1(s) + d1) x_i + (p2(s) + d2) x_i^2 + f_i`` with ``(p1,
    p2)`` the law's Taylor coefficients (:func:`law_proxy`), each pair ``(e_i, f_i)`` correlated
    by the shared fringe, pairs independent. Prior: ``C_inf ~ N(c_prior_mean, 1)``, ``r0 ~
    N(r0_mean, 1)``, ``d ~ N(0, diag(tau^2))``. The posterior is that of a linear-Gaussian model
    with correlated noise (C. M. Bishop, *Pattern Recognition and Machine Learning*, 2006,
    sections 2.3.1-2.3.3): ``Sigma^-1 = A^T N^-1 A + P^-1``, ``mu = Sigma b``, ``b = A^T N^-1
    y + P^-1 m``. The evidence ``log N(y; A m, N + A P A^T)`` is written through them as
    ``-(y^T N^-1 y + m^T P^-1 m - b^T mu) / 2 - log|P| / 2 + log|Sigma| / 2``, dropping
    ``-n log(2 pi) - log|N| / 2`` (the same for every spread and discrepancy).
    """
    grid = _SPREAD_GRID if spread is None else np.asarray(spread, dtype=float)
    design = np.stack([np.ones(len(x)), x, x * x], axis=1)
    det = c_var * r_var - shared**2
    w_cc, w_rr, w_cr = r_var / det, c_var / det, -shared / det
    h = np.exp(-0.5 * (grid**2)[:, None] * (1.0 + x[None, :]) ** 4)               # (G, n)
    proxy = law_proxy(grid, scale)                                               # (G, 2)
    rr = r[None, :] - proxy[:, :1] * x[None, :] - proxy[:, 1:] * (x * x)[None, :]
    prior_var = np.array([1.0, 1.0, tau[0] ** 2, tau[1] ** 2])
    prior_mean = np.array([c_prior_mean, r0_mean, 0.0, 0.0])
    g = len(grid)
    precision = np.zeros((g, 4, 4))
    precision[:, 0, 0] = (h * h) @ w_cc
    cross = (h * w_cr[None, :]) @ design                                        # (G, 3)
    precision[:, 0, 1:] = cross
    precision[:, 1:, 0] = cross
    precision[:, 1:, 1:] = design.T @ (design * w_rr[:, None])
    precision[:, np.arange(4), np.arange(4)] += 1.0 / prior_var
    b = np.zeros((g, 4))
    b[:, 0] = h @ (w_cc * c) + (h * rr) @ w_cr
    b[:, 1:] = (w_cr * c)[None, :] @ design + (rr * w_rr[None, :]) @ design
    b += prior_mean / prior_var
    cov = np.linalg.inv(precision)
    cov = 0.5 * (cov + np.swapaxes(cov, 1, 2))
    mean = np.einsum("gij,gj->gi", cov, b)
    y_w_y = float(w_cc @ (c * c)) + 2.0 * (rr @ (w_cr * c)) + (rr * rr) @ w_rr
    _, logdet_precision = np.linalg.slogdet(precision)
    log_evidence = (-0.5 * (y_w_y + float(prior_mean @ (prior_mean / prior_var))
                            - np.einsum("gi,gi->g", b, mean))
                    - 0.5 * float(np.sum(np.log(prior_var))) - 0.5 * logdet_precision)
    from scipy import special
    log_within_one = special.log_ndtr((1.0 - mean[:, 0])
                                      / np.sqrt(np.maximum(cov[:, 0, 0], 1e-300)))
    return _LawGrid(grid, mean, cov, log_evidence, log_within_one, proxy)


def _law_posterior(x: np.ndarray, c: np.ndarray, c_var: np.ndarray, r: np.ndarray,
                   r_var: np.ndarray, shared: np.ndarray, scale: float, tau: np.ndarray,
                   c_prior_mean: float, r0_mean: float
                   ) -> tuple[np.ndarray, np.ndarray, float, DephasingLaw]:
    """Posterior of ``r``'s quadratic under the dephasing law, the contrasts and ``r`` observed
    jointly (:func:`_law_grid`).

    The phase spread has a uniform prior on :data:`_SPREAD_GRID`, restricted to ``C_inf <= 1``
    (its weight times ``P(C_inf <= 1 | s, data)``); the posterior of ``r``'s coefficients is the
    mixture over the grid, matched by its mean and covariance (the law of total covariance).
    Returns that mean, covariance, the log evidence (integrated over the spread) and the law.
    """
    grid = _law_grid(x, c, c_var, r, r_var, shared, scale, tau, c_prior_mean, r0_mean)
    # The prior's mass at each grid value (sums to one): the evidence integrates over the spread.
    coef = grid.mean[:, 1:].copy()
    coef[:, 1:] += grid.proxy
    r_mean, r_cov, evidence, weights = _moment_matched(
        grid.log_evidence + grid.log_within_one + _SPREAD_PRIOR_LOG_MASS, coef, grid.cov[:, 1:, 1:])
    s = grid.spread
    u = s * s
    s_mean = float(weights @ s)
    slope = -2.0 * u
    slope_mean = float(weights @ slope)
    law = DephasingLaw(
        spread_rad=s_mean,
        spread_stderr_rad=math.sqrt(max(float(weights @ (s - s_mean) ** 2), 0.0)),
        contrast_limit=float(weights @ grid.mean[:, 0]),
        relative_slope=slope_mean,
        relative_slope_stderr=math.sqrt(max(float(weights @ (slope - slope_mean) ** 2), 0.0)),
        relative_curvature=float(weights @ (2.0 * u * u - 3.0 * u)))
    return r_mean, r_cov, evidence, law


def fit_inversion_curve(xs: Sequence[float], inversions: Sequence[float],
                        inversion_vars: Sequence[float], absorptions: Sequence[float],
                        absorption_vars: Sequence[float], contrasts: Sequence[float],
                        contrast_vars: Sequence[float], absorption_coef: np.ndarray,
                        absorption_cov: np.ndarray, scale: float, velocity_ref: float,
                        x_groups: Sequence[float],
                        inversion_contrast_covs: Sequence[float] | None = None) -> InversionCurve:
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
    inversion_contrast_covs : sequence of float, optional
        Each point's covariance of its (corrected) inversion with its empty contrast: both are
        read from the same empty fringe (:func:`autotune.analysis.fringe.shared_fringe_covariance`),
        so the contrasts and the ``r`` values are conditioned on jointly, as the correlated
        observations they are; without it (or all zero) they are taken as independent.
    """
    x = np.asarray(xs, dtype=float)
    per_point = {"inversions": inversions, "inversion_vars": inversion_vars,
                 "absorptions": absorptions, "absorption_vars": absorption_vars,
                 "contrasts": contrasts, "contrast_vars": contrast_vars}
    wrong = {name: np.shape(v) for name, v in per_point.items() if np.shape(v) != x.shape}
    if x.ndim != 1 or wrong:
        raise ValueRefused(f"fit_inversion_curve: expected one inversion, absorption and contrast "
                           f"(and their variances) per point ({x.shape}), got {wrong}")
    scale = max(float(scale), _MIN_SCALE)
    c = np.asarray(contrasts, dtype=float)
    c_var = np.maximum(np.asarray(contrast_vars, dtype=float), 1e-8)
    c_mean = float(np.sum(c / c_var) / np.sum(1.0 / c_var)) if len(c) else 1.0
    r = np.asarray(inversions, dtype=float) + np.asarray(absorptions, dtype=float)
    r_var = np.maximum(np.asarray(inversion_vars, dtype=float)
                       + np.asarray(absorption_vars, dtype=float), 1e-8)
    if inversion_contrast_covs is None:
        shared = np.zeros(len(x))
    else:
        shared = np.asarray(inversion_contrast_covs, dtype=float)
        if shared.shape != x.shape or not np.all(np.isfinite(shared)):
            raise ValueRefused(f"fit_inversion_curve: expected one finite inversion-contrast "
                               f"covariance per point ({len(x)}), got {shared.tolist()!r}")
        bound = _MAX_SHARED_CORRELATION * np.sqrt(c_var * r_var)
        shared = np.clip(shared, -bound, bound)
    r0_mean = scale + float(np.mean(absorptions)) if len(x) else scale
    fits = []
    for factor in DISCREPANCY_SCALES:
        widened = factor > 1.0
        tau = scale * np.array(DISCREPANCY) * np.array([factor, 1.0])
        fits.append((*_law_posterior(x, c, c_var, r, r_var, shared, scale, tau, c_mean, r0_mean),
                     widened))
    # The discrepancies, equally likely a priori, weighed by their evidence (Bayesian model
    # averaging, e.g. Bishop 2006, section 3.4), the mixture matched by its mean and covariance:
    # with few velocity groups the data cannot tell them apart, and choosing the likeliest
    # states the narrowest width as if it were known.
    r_coef, r_cov, _, weights = _moment_matched(np.array([f[2] for f in fits]),
                                                np.array([f[0] for f in fits]),
                                                np.array([f[1] for f in fits]))
    pick = int(np.argmax(weights))
    law, widened = fits[pick][3], fits[pick][4]
    a_coef = np.asarray(absorption_coef, dtype=float)
    a_cov = np.asarray(absorption_cov, dtype=float)
    coef = r_coef - a_coef
    # The law's own prediction of r's slope and curvature (its posterior mean).
    proxy_r = scale * np.array([law.relative_slope, law.relative_curvature])
    # Against the absorption alone (r flat within the discrepancy): the empty contrast is
    # measured from the same fringes as the inversion and shares its noise.
    tau = scale * np.array(DISCREPANCY)
    disagreement = proxy_disagreement(x, r, r_var, np.zeros(2), np.diag(tau**2), x_groups) \
        if len(x) else None
    return InversionCurve(velocity_ref=float(velocity_ref), coef=coef, cov=r_cov + a_cov,
                          residual_cov=r_cov, absorption_cov=a_cov,
                          x_groups=tuple(sorted(float(g) for g in x_groups)),
                          proxy=proxy_r - a_coef[1:], widened=widened, disagreement=disagreement,
                          law=law)


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
