"""Nonlinear least-squares fit of point dipoles to total-field readings.

Variable projection (Golub & Pereyra 1973): the anomaly is linear in the
moments and the background (a constant, a plane in easting and
northing, or a quadratic surface), so for each trial set of source positions these are solved by
linear least squares, and only the positions (three numbers per source)
are searched, with ``scipy.optimize.least_squares`` (trust-region
reflective, bounds on the positions) from several starts; the start of
least cost wins. The search uses Kaufman's (1975) approximation of the
variable-projection Jacobian (the projected derivative of the design
matrix times the linear coefficients), one QR factorisation per
evaluation instead of a linear solve per position parameter.

Uncertainties are those of the linearised full problem: with ``J`` the
Jacobian of the model with respect to every parameter (positions, moments,
background) at the solution and ``s^2 = RSS / (n - p)`` the residual
variance, the covariance is ``s^2 (J^T J)^-1`` (Press et al. 2007, ch.
15.5). The Jacobian's position columns are the closed-form derivatives
of the dipole anomaly with respect to the source position
(:func:`lodeline.steps._dipole_model.source_gradient`); the moment and
background columns are exact (the model is linear in them). The moment magnitude's standard error is propagated
from the moments' covariance through ``m / |m|``.

References
----------
Golub, G. H., and Pereyra, V. (1973). The differentiation of
    pseudo-inverses and nonlinear least squares problems whose variables
    separate. SIAM Journal on Numerical Analysis 10(2), 413-432.
    [Golub1973]_
Kaufman, L. (1975). A variable projection method for solving separable
    nonlinear least squares problems. BIT Numerical Mathematics 15,
    49-57. [Kaufman1975]_ (cited from memory)
Press, W. H., Teukolsky, S. A., Vetterling, W. T., and Flannery, B. P.
    (2007). Numerical Recipes, 3rd ed. Cambridge University Press.
    [Press2007]_
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import least_squares

from ._dipole_model import design, source_gradient

__all__ = ["BACKGROUND_TERMS", "DipoleFit", "background_columns", "correlation_factor", "fit_dipoles"]

# relative step tolerance of the search about the readings' centroid: 1e-4 of a few metres is a fraction of a
# millimetre, far below any position error of a fit (1 cm and more)
_XTOL = 1e-4
_FTOL = 1e-10


@dataclass
class DipoleFit:
    """Result of a fit of ``k`` dipoles.

    Attributes
    ----------
    positions : ndarray (k, 3)
        Source positions east, north, up, m.
    moments : ndarray (k, 3)
        Moments east, north, up, A m^2.
    position_cov : ndarray (k, 3, 3)
        Covariance of each source's position, m^2.
    moment_cov : ndarray (k, 3, 3)
        Covariance of each source's moment, (A m^2)^2.
    r2 : float
        Coefficient of determination of the whole model (dipoles plus
        background) about the mean of the readings.
    rms_nT : float
        RMS of the fit residuals, nT.
    n : int
        Readings used.
    at_bound : bool
        Whether a position ended on its search bound.
    bound_sources : ndarray of bool (k,)
        Per source, whether its position ended on its search bound.
    residuals : ndarray (n,)
        Readings less the fitted model (dipoles and background), nT.
    """

    positions: np.ndarray
    moments: np.ndarray
    position_cov: np.ndarray
    moment_cov: np.ndarray
    r2: float
    rms_nT: float
    n: int
    at_bound: bool
    bound_sources: np.ndarray = None
    residuals: np.ndarray = None


def correlation_factor(obs: np.ndarray, res: np.ndarray, max_step_m: float = 1.0) -> float:
    """Variance inflation ``(1 + r) / (1 - r)`` for residuals correlated along the track.

    ``r`` is the correlation of consecutive residuals (readings in storage
    order, so along a track, closer than ``max_step_m``); with that lag-one
    correlation the effective number of independent readings is about
    ``n (1 - r) / (1 + r)`` (Bayley & Hammersley 1946, The "effective"
    number of independent observations in an autocorrelated time series),
    so the covariance of the fit grows by the inverse. White noise gives
    ``r`` near 0 and no change; a misfit that varies smoothly along the track
    (an unmodelled neighbour, a residual level) gives ``r`` near 1 and widens
    the uncertainties to match.
    """
    if len(res) < 10:
        return 1.0
    step = np.hypot(np.diff(obs[:, 0]), np.diff(obs[:, 1]))
    ok = step < max_step_m
    if ok.sum() < 5:
        return 1.0
    a, b = res[:-1][ok], res[1:][ok]
    den = float(np.sqrt(np.sum(a * a) * np.sum(b * b)))
    r = float(np.sum(a * b) / den) if den > 0 else 0.0
    r = min(max(r, 0.0), 0.99)
    return (1.0 + r) / (1.0 - r)


BACKGROUND_TERMS = {"constant": 1, "plane": 3, "quadratic": 6}


def background_columns(obs: np.ndarray, kind: str) -> np.ndarray:
    """Design columns of the background: 1; east, north about the window centre; and for ``quadratic`` their squares and product (per 10 m, for conditioning)."""
    ones = np.ones((obs.shape[0], 1))
    if kind == "constant":
        return ones
    d = obs[:, :2] - obs[:, :2].mean(axis=0)
    if kind == "plane":
        return np.hstack([ones, d])
    q = d / 10.0
    return np.hstack([ones, d, q * q, (q[:, 0] * q[:, 1])[:, None]])


def _linear(obs, values, positions, f_hat, back):
    a = np.hstack([design(obs, positions, f_hat), back])
    coef, *_ = np.linalg.lstsq(a, values, rcond=None)
    return a, coef


def fit_dipoles(
    obs: np.ndarray,
    values: np.ndarray,
    f_hat: np.ndarray,
    starts: list[np.ndarray],
    lower: np.ndarray,
    upper: np.ndarray,
    background: str = "plane",
) -> DipoleFit:
    """Fit ``k`` point dipoles and a background to total-field readings.

    Parameters
    ----------
    obs : ndarray (n, 3)
        Reading positions east, north, up, m.
    values : ndarray (n,)
        Residual anomaly, nT.
    f_hat : ndarray (3,)
        Main-field unit vector (east, north, up).
    starts : list of ndarray (k, 3)
        Starting source positions, m; at least one.
    lower, upper : ndarray (k, 3)
        Bounds of the source positions, m (``lower < upper``).
    background : {"constant", "plane", "quadratic"}
        Background fitted with the dipoles.

    Returns
    -------
    DipoleFit
    """
    back = background_columns(obs, background)
    k = lower.shape[0]
    # the search runs about the readings' centroid: map coordinates (1e5-1e7 m) would make the optimiser's
    # relative step tolerance a fraction of a metre
    origin = obs.mean(axis=0)
    full = obs
    obs = obs - origin
    shift = np.tile(origin, k)
    lo, hi = lower.ravel() - shift, upper.ravel() - shift

    last: dict = {}

    def linear(p):
        # the optimiser asks for the residual and then the Jacobian at the same point: solve once
        key = p.tobytes()
        if last.get("key") != key:
            last["key"], last["value"] = key, _linear(obs, values, p.reshape(k, 3), f_hat, back)
        return last["value"]

    def residual(p):
        a, coef = linear(p)
        return a @ coef - values

    def jacobian(p):
        # Kaufman's (1975) approximation to the variable-projection Jacobian: d r / d p_i = P (d A / d p_i) c,
        # with P the projector on the complement of A's columns; (d A / d p_i) c is the derivative of the
        # source's anomaly with respect to its position, in closed form (source_gradient)
        a, coef = linear(p)
        q, _ = np.linalg.qr(a)
        v = source_gradient(obs, p.reshape(k, 3), coef[: 3 * k].reshape(k, 3), f_hat)
        return v - q @ (q.T @ v)

    best = None
    for start in starts:
        x0 = np.clip(np.asarray(start, float).ravel() - shift, lo + 1e-6, hi - 1e-6)
        sol = least_squares(residual, x0, jac=jacobian, bounds=(lo, hi), method="trf", x_scale=1.0, xtol=_XTOL,
                            ftol=_FTOL, max_nfev=400)
        if best is None or sol.cost < best.cost:
            best = sol
    pos = best.x.reshape(k, 3) + origin
    obs = full
    a, coef = _linear(obs, values, pos, f_hat, back)
    moments = coef[: 3 * k].reshape(k, 3)
    res = a @ coef - values
    n = values.size
    n_par = 3 * k + a.shape[1]
    rss = float(res @ res)
    tss = float(np.sum((values - values.mean()) ** 2))
    # full Jacobian: position columns in closed form, the rest exact (the model is linear in them)
    jac = np.hstack([source_gradient(obs, pos, moments, f_hat), a])
    s2 = rss / max(n - n_par, 1) * correlation_factor(obs, res)
    cov = s2 * np.linalg.pinv(jac.T @ jac)
    pcov = np.stack([cov[3 * j : 3 * j + 3, 3 * j : 3 * j + 3] for j in range(k)])
    off = 3 * k
    mcov = np.stack([cov[off + 3 * j : off + 3 * j + 3, off + 3 * j : off + 3 * j + 3] for j in range(k)])
    span = hi - lo
    # within 1 % of the box (at most 5 cm) of a bound: the data did not hold the source inside the box
    tol = np.minimum(0.01 * span, 0.05)
    on_bound = ((best.x - lo < tol) | (hi - best.x < tol)).reshape(k, 3).any(axis=1)
    at_bound = bool(on_bound.any())
    return DipoleFit(
        positions=pos,
        moments=moments,
        position_cov=pcov,
        moment_cov=mcov,
        r2=1.0 - rss / tss if tss > 0 else np.nan,
        rms_nT=float(np.sqrt(rss / n)),
        n=int(n),
        at_bound=at_bound,
        bound_sources=on_bound,
        residuals=-res,
    )
