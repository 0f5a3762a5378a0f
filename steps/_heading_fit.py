"""Joint least-squares estimate of per-sensor heading errors from bin levels (helper of the heading stage).

Model of the level ``y`` of a bin of sensor ``j`` (see ``_heading_bins``)::

    y = G(u, v) + o_j + sum_k d_jk tau**k + A_j cos(h - theta) + C_j sin(h - theta) + noise

``G`` is the field shared by all sensors (geology, what is left of the
regional and external field), a tensor-product cubic B-spline in route
coordinates ``u`` (along the survey-line axis ``theta``) and ``v`` (across
it) with knots every ``knot_spacing_m``, evaluated at the bin's mean sensor
position (de Boor 1978). ``o_j`` is the sensor's level (its offset plus the
constant ``a`` of its heading error: the two cannot be told apart, since
every heading sees both), ``d_jk`` its drift (a polynomial in
``tau = (t - t_mid) / t_half``, ``t_mid`` and ``t_half`` the middle and half
the span of the bin times), and ``A_j``, ``C_j`` the heading error along and
across the line axis, so that ``b = A cos(theta) - C sin(theta)`` and
``c = A sin(theta) + C cos(theta)`` in ``b cos(h) + c sin(h)``. The heading
terms use the mean cosine and sine of the course over the bin, which is
exact for this model whatever the course does inside the bin.

Why it separates: on lines flown in both directions over nearly the same
ground, ``G`` is the same and ``A_j`` changes sign; on tie lines across
them ``C_j`` changes sign while ``G`` is pinned by the survey lines at the
crossings. ``G`` is smooth on the scale of ``knot_spacing_m``, so it cannot
follow a level that alternates from one line to the next, as long as
``knot_spacing_m`` is several line spacings. One sensor's level is the
reference (the spline's constant); the levels are reported about their mean.

The spline is a P-spline (Eilers & Marx 1996): the penalty
``smoothing * sum(second differences of the coefficients)**2`` along ``u``
and along ``v`` ties coefficients with little data to their neighbours;
coefficients that no bin touches are left out.

Fitting is weighted least squares on the sparse normal equations. With
``robust`` the weights come from iteratively reweighted least squares
(Holland & Welsch 1977): Huber weights (Huber 1964, tuning 1.345) to
convergence, a convex start, then Tukey's biweight (Beaton & Tukey 1974,
tuning 4.685), which gives no weight to bins far off the model (targets,
faults), with the scale ``1.4826 * MAD`` of the residuals (Rousseeuw &
Croux 1993). Both tunings give 95 % efficiency for Gaussian noise.

Standard errors of the heading coefficients are sandwich estimates for the
weighted fit (White 1980), in two forms. Clustered by line (Liang & Zeger
1986): the residuals of one line can be correlated (the same external
field and geology for all its sensors), so the bins of a line are summed
before squaring, with the factor ``G / (G - 1)`` for ``G`` lines (Cameron &
Miller 2015). With bins independent (factor ``n / (n - p)``, MacKinnon &
White 1985). The clustered form is right for correlated residuals but is
itself uncertain when few lines carry the information (the across term
rests on the tie lines, often four or so), and the independent form is
too small for correlated residuals; the larger of the two is reported
(common practice, no published source), and both are kept.

Identifiability: the along-axis term needs lines flown both ways along the
axis; the across-axis term needs lines across it. Each segment's mean
course is sorted into "forward" and "backward" (within 45 degrees of
``theta`` or ``theta + 180``) and "cross" (the rest). A sensor with fewer
than ``min_lines`` forward plus backward segments, or none in one of the
two directions, gets no estimate; with fewer than ``min_cross_lines``
cross segments its across term is not estimated and set to 0 (it does not
change lines along the axis, only the tie lines).

References
----------
Beaton, A. E. & Tukey, J. W. (1974). The fitting of power series, meaning
    polynomials, illustrated on band-spectroscopic data. Technometrics
    16(2), 147-185.
Cameron, A. C. & Miller, D. L. (2015). A practitioner's guide to
    cluster-robust inference. Journal of Human Resources 50(2), 317-372.
de Boor, C. (1978). A Practical Guide to Splines. Springer.
Eilers, P. H. C. & Marx, B. D. (1996). Flexible smoothing with B-splines
    and penalties. Statistical Science 11(2), 89-121.
Holland, P. W. & Welsch, R. E. (1977). Robust regression using iteratively
    reweighted least-squares. Communications in Statistics - Theory and
    Methods 6(9), 813-827.
Huber, P. J. (1964). Robust estimation of a location parameter. Annals of
    Mathematical Statistics 35(1), 73-101.
Liang, K.-Y. & Zeger, S. L. (1986). Longitudinal data analysis using
    generalized linear models. Biometrika 73(1), 13-22.
MacKinnon, J. G. & White, H. (1985). Some heteroskedasticity-consistent
    covariance matrix estimators with improved finite sample properties.
    Journal of Econometrics 29(3), 305-325.
Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
    deviation. Journal of the American Statistical Association 88(424),
    1273-1283.
White, H. (1980). A heteroskedasticity-consistent covariance matrix
    estimator and a direct test for heteroskedasticity. Econometrica
    48(4), 817-838.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import scipy.sparse as sp
import scipy.sparse.linalg as spla

__all__ = [
    "HUBER_K",
    "BIWEIGHT_C",
    "MAD_TO_SIGMA",
    "FitSettings",
    "Design",
    "FitResult",
    "course_axis",
    "coverage",
    "cubic_bspline",
    "build_design",
    "solve",
    "fit",
]

#: Huber tuning constant (95 % efficiency at the Gaussian; Holland & Welsch 1977).
HUBER_K = 1.345
#: Biweight tuning constant (95 % efficiency at the Gaussian; Beaton & Tukey 1974).
BIWEIGHT_C = 4.685
#: Consistency factor of the MAD for Gaussian noise (Rousseeuw & Croux 1993).
MAD_TO_SIGMA = 1.4826
#: Ridge on the spline coefficients relative to the mean diagonal of the
#: normal matrix: only there to keep the system regular when the data leave
#: a direction free; its bias is of this relative size.
_RIDGE = 1e-9
_COS45 = np.cos(np.radians(45.0))
#: Standard errors reported: the larger of the two (``""``), clustered by line, bins independent.
_SE_SUFFIXES = ("", "_lines", "_bins")


@dataclass(frozen=True)
class FitSettings:
    """Parameters of the fit (see the stage's parameter table)."""

    spacing_m: float = 20.0
    smoothing: float = 0.1
    drift_degree: int = 1
    min_lines: int = 4
    min_cross_lines: int = 2
    robust: bool = True
    max_iterations: int = 30
    tolerance_nT: float = 1e-5


@dataclass
class Design:
    """The weighted least-squares problem ``[X; P] beta ~ [y; 0]``.

    Attributes
    ----------
    X : scipy.sparse.csr_matrix
        Design matrix, one row per bin used.
    y : ndarray
        Bin levels, nT.
    P : scipy.sparse.csr_matrix
        Penalty rows (square roots of ``smoothing`` and of the ridge already
        applied): the fit minimises ``sum w (y - X beta)**2 + |P beta|**2``.
    heading : dict
        Sensor index -> (column of A, column of C or None).
    offset, drift : dict
        Sensor index -> column of its level (None for the reference), and
        list of its drift columns.
    spline : slice
        Columns of the spline coefficients.
    theta : float
        Line axis, rad (grid azimuth).
    t_mid_s, t_half_s : float
        Centre and half-span of the bin times, s.
    """

    X: sp.csr_matrix
    y: np.ndarray
    P: sp.csr_matrix
    heading: dict
    offset: dict
    drift: dict
    spline: slice
    theta: float
    t_mid_s: float
    t_half_s: float


@dataclass
class FitResult:
    """What :func:`fit` found.

    Attributes
    ----------
    sensors : pandas.DataFrame
        One row per sensor index seen in the bins (see :func:`fit`).
    theta : float
        Line axis, rad.
    sigma_nT : float
        Robust scale of the bin residuals, nT.
    rows : ndarray of bool
        Which bins were used.
    weights, residual : ndarray
        Final weight and residual (nT) of each used bin.
    iterations : int
        Least-squares solutions computed.
    """

    sensors: pd.DataFrame
    theta: float
    sigma_nT: float
    rows: np.ndarray
    weights: np.ndarray
    residual: np.ndarray
    iterations: int = 0


def course_axis(cos: np.ndarray, sin: np.ndarray, weight: np.ndarray | None = None) -> float:
    """Dominant course axis (undirected) of a set of courses, rad in [0, pi).

    The mean of the doubled angles, halved, so that courses ``h`` and
    ``h + 180`` count for the same axis.
    """
    h = np.arctan2(sin, cos)
    w = np.ones_like(h) if weight is None else np.asarray(weight, dtype=np.float64)
    axis = 0.5 * np.arctan2(np.sum(w * np.sin(2 * h)), np.sum(w * np.cos(2 * h)))
    return float(np.mod(axis, np.pi))


def coverage(bins: pd.DataFrame, theta: float, min_lines: int, min_cross_lines: int) -> pd.DataFrame:
    """Segments per sensor flown forward, backward and across the axis ``theta``.

    Parameters
    ----------
    bins : pandas.DataFrame
        Columns ``segment``, ``sensor``, ``cos``, ``sin``, ``count``.
    theta : float
        Line axis, rad.
    min_lines, min_cross_lines : int
        See the module docstring.

    Returns
    -------
    pandas.DataFrame
        Indexed by sensor: ``forward``, ``backward``, ``cross`` (segment
        counts), ``along_ok``, ``across_ok`` (bool), ``bins``.
    """
    w = bins["count"].to_numpy(np.float64)
    seg = bins.assign(wc=w * bins["cos"], ws=w * bins["sin"]).groupby("segment").agg(
        sensor=("sensor", "first"), wc=("wc", "sum"), ws=("ws", "sum"), bins=("count", "size")
    )
    rel = np.arctan2(seg["ws"], seg["wc"]) - theta
    c = np.cos(rel)
    seg["forward"] = c >= _COS45
    seg["backward"] = c <= -_COS45
    seg["cross"] = ~(seg["forward"] | seg["backward"])
    out = seg.groupby("sensor").agg(
        forward=("forward", "sum"), backward=("backward", "sum"), cross=("cross", "sum"), bins=("bins", "sum")
    )
    out = out.astype(np.int64)
    out["along_ok"] = (out["forward"] > 0) & (out["backward"] > 0) & (out["forward"] + out["backward"] >= min_lines)
    out["across_ok"] = out["along_ok"] & (out["cross"] >= min_cross_lines)
    return out


def cubic_bspline(x: np.ndarray, x0: float, spacing: float, intervals: int) -> tuple[np.ndarray, np.ndarray]:
    """Uniform cubic B-spline basis (de Boor 1978) at points ``x``.

    Parameters
    ----------
    x : ndarray of float
        Points, in ``[x0, x0 + intervals * spacing]``.
    x0, spacing : float
        First knot of the covered range and knot spacing.
    intervals : int
        Number of knot intervals covering the range; there are
        ``intervals + 3`` basis functions.

    Returns
    -------
    index : ndarray of int, shape (n, 4)
        The four basis functions that are non-zero at each point.
    weight : ndarray of float, shape (n, 4)
        Their values (they sum to 1).
    """
    t = (np.asarray(x, dtype=np.float64) - x0) / spacing
    i = np.clip(np.floor(t), 0, intervals - 1).astype(np.int64)
    f = t - i
    w = np.column_stack(
        [
            (1 - f) ** 3 / 6,
            (3 * f**3 - 6 * f**2 + 4) / 6,
            (-3 * f**3 + 3 * f**2 + 3 * f + 1) / 6,
            f**3 / 6,
        ]
    )
    return i[:, None] + np.arange(4)[None, :], w


def _spline_columns(u, v, spacing, smoothing):
    """Sparse tensor-spline block of the design, and its penalty rows, on the touched coefficients."""
    u0, v0 = float(u.min()), float(v.min())
    mu = max(1, int(np.ceil((float(u.max()) - u0) / spacing)))
    mv = max(1, int(np.ceil((float(v.max()) - v0) / spacing)))
    nu, nv = mu + 3, mv + 3
    iu, wu = cubic_bspline(u, u0, spacing, mu)
    iv, wv = cubic_bspline(v, v0, spacing, mv)
    n = u.size
    full = (iu[:, :, None] * nv + iv[:, None, :]).reshape(n, 16)
    vals = (wu[:, :, None] * wv[:, None, :]).reshape(n, 16)
    kept = np.unique(full)
    compact = np.full(nu * nv, -1, dtype=np.int64)
    compact[kept] = np.arange(kept.size)
    rows = np.repeat(np.arange(n), 16)
    B = sp.csr_matrix((vals.ravel(), (rows, compact[full].ravel())), shape=(n, kept.size))

    grid = compact.reshape(nu, nv)
    pen_rows = []
    for a, b, c in ((grid[:-2, :], grid[1:-1, :], grid[2:, :]), (grid[:, :-2], grid[:, 1:-1], grid[:, 2:])):
        ok = (a >= 0) & (b >= 0) & (c >= 0)
        pen_rows.append(np.column_stack([a[ok], b[ok], c[ok]]))
    triples = np.concatenate(pen_rows) if pen_rows else np.zeros((0, 3), dtype=np.int64)
    m = triples.shape[0]
    D = sp.csr_matrix(
        (np.tile([1.0, -2.0, 1.0], m) * np.sqrt(smoothing), (np.repeat(np.arange(m), 3), triples.ravel())),
        shape=(m, kept.size),
    )
    return B, D


def build_design(bins: pd.DataFrame, theta: float, along: list, across: list, settings: FitSettings) -> Design:
    """Design matrix and penalty of the joint fit.

    Parameters
    ----------
    bins : pandas.DataFrame
        Bins of the sensors to fit (columns ``value``, ``cos``, ``sin``,
        ``easting``, ``northing``, ``time_s``, ``sensor``).
    theta : float
        Line axis, rad.
    along : list of int
        Sensors whose heading error is fitted (their along-axis term).
    across : list of int
        Those of them whose across-axis term is fitted too.
    settings : FitSettings

    Returns
    -------
    Design
    """
    n = len(bins)
    sensor = bins["sensor"].to_numpy(np.int64)
    ct, st = np.cos(theta), np.sin(theta)
    cos_rel = bins["cos"].to_numpy() * ct + bins["sin"].to_numpy() * st
    sin_rel = bins["sin"].to_numpy() * ct - bins["cos"].to_numpy() * st
    t = bins["time_s"].to_numpy(np.float64)
    t_lo, t_hi = float(t.min()), float(t.max())
    t_mid, t_half = 0.5 * (t_lo + t_hi), max(0.5 * (t_hi - t_lo), 1.0)
    tau = (t - t_mid) / t_half

    cols, heading, offset, drift = [], {}, {}, {}

    def add(values, mask):
        cols.append(np.where(mask, values, 0.0))
        return len(cols) - 1

    for j in along:
        mask = sensor == j
        heading[j] = (add(cos_rel, mask), add(sin_rel, mask) if j in across else None)
    for k, j in enumerate(along):
        offset[j] = None if k == 0 else add(np.ones(n), sensor == j)
        drift[j] = [add(tau**d, sensor == j) for d in range(1, settings.drift_degree + 1)]
    fixed = sp.csr_matrix(np.column_stack(cols)) if cols else sp.csr_matrix((n, 0))

    e = bins["easting"].to_numpy(np.float64)
    north = bins["northing"].to_numpy(np.float64)
    e, north = e - e.mean(), north - north.mean()
    u = e * st + north * ct
    v = e * ct - north * st
    B, D = _spline_columns(u, v, settings.spacing_m, settings.smoothing)
    X = sp.hstack([fixed, B], format="csr")
    p_fixed = fixed.shape[1]
    scale = float(np.asarray(X.multiply(X).sum(axis=0)).mean()) if n else 1.0
    ridge = sp.diags(np.full(B.shape[1], np.sqrt(_RIDGE * scale)))
    P = sp.vstack(
        [
            sp.hstack([sp.csr_matrix((D.shape[0], p_fixed)), D]),
            sp.hstack([sp.csr_matrix((B.shape[1], p_fixed)), ridge]),
        ],
        format="csr",
    )
    return Design(
        X=X,
        y=bins["value"].to_numpy(np.float64),
        P=P,
        heading=heading,
        offset=offset,
        drift=drift,
        spline=slice(p_fixed, X.shape[1]),
        theta=theta,
        t_mid_s=t_mid,
        t_half_s=t_half,
    )


def _normal(design: Design, weights: np.ndarray) -> sp.csc_matrix:
    Xw = design.X.multiply(weights[:, None]).tocsr()
    return (design.X.T @ Xw + design.P.T @ design.P).tocsc()


def solve(design: Design, weights: np.ndarray) -> tuple[np.ndarray, spla.SuperLU]:
    """Weighted penalised least-squares solution and the factor of the normal matrix.

    Minimises ``sum(weights * (y - X beta)**2) + |P beta|**2``.
    """
    M = _normal(design, weights)
    lu = spla.splu(M)
    beta = lu.solve(design.X.T @ (weights * design.y))
    return beta, lu


def _robust_scale(r: np.ndarray) -> float:
    s = MAD_TO_SIGMA * float(np.median(np.abs(r - np.median(r))))
    return s if s > 0 else float(np.sqrt(np.mean(r**2))) or 1.0


def _huber(z):
    a = np.abs(z)
    return np.where(a <= HUBER_K, 1.0, HUBER_K / np.maximum(a, 1e-300))


def _biweight(z):
    q = z / BIWEIGHT_C
    return np.where(np.abs(q) < 1.0, (1.0 - q**2) ** 2, 0.0)


def _irls(design: Design, settings: FitSettings, watch: np.ndarray):
    """Weights, solution and factor of the final iteration."""
    n = design.y.size
    w = np.ones(n)
    beta, lu = solve(design, w)
    iterations = 1
    if not settings.robust:
        return w, beta, lu, iterations
    for weight_fn in (_huber, _biweight):
        for _ in range(settings.max_iterations):
            r = design.y - design.X @ beta
            w = weight_fn(r / _robust_scale(r))
            new, lu = solve(design, w)
            iterations += 1
            change = np.max(np.abs(new[watch] - beta[watch])) if watch.size else 0.0
            beta = new
            if change < settings.tolerance_nT:
                break
    return w, beta, lu, iterations


def _sandwich(design, lu, cols, w, r, groups):
    """Sandwich covariance of the coefficients ``cols``, clustered by ``groups`` (None: each bin alone)."""
    p = design.X.shape[1]
    E = np.zeros((p, len(cols)))
    E[cols, np.arange(len(cols))] = 1.0
    Z = lu.solve(E)
    psi = np.asarray(design.X @ Z) * (w * r)[:, None]
    if groups is None:
        n = psi.shape[0]
        factor = n / max(n - p, 1)
        return factor * psi.T @ psi
    _, g = np.unique(groups, return_inverse=True)
    G = int(g.max()) + 1
    sums = np.zeros((G, len(cols)))
    np.add.at(sums, g, psi)
    return (G / max(G - 1, 1)) * sums.T @ sums


def fit(bins: pd.DataFrame, settings: FitSettings) -> FitResult:
    """Estimate the heading error of every sensor from bin levels.

    Parameters
    ----------
    bins : pandas.DataFrame
        One row per bin: ``segment``, ``sensor``, ``line`` (the cluster of
        the standard errors), ``kind`` ("survey" or "tie"), ``value`` (nT),
        ``cos``, ``sin``, ``easting``, ``northing`` (m), ``time_s``,
        ``count``.
    settings : FitSettings

    Returns
    -------
    FitResult
        ``sensors`` has, per sensor index: ``forward``, ``backward``,
        ``cross`` (segments), ``bins``, ``along_ok``, ``across_ok``,
        ``along_nT``, ``across_nT`` (A, C), ``b_nT``, ``c_nT``, their
        standard errors ``<name>_se_nT`` (the larger of
        ``<name>_se_lines_nT``, clustered by line, and
        ``<name>_se_bins_nT``, bins independent), ``level_nT`` (sensor level at ``t_mid``, about the
        mean of the fitted sensors), ``drift_nT_per_h`` (slope at mid
        survey), ``bins_downweighted`` (final weight below 0.5). Sensors
        not estimated have zeros for the coefficients and NaN errors.
    """
    all_sensors = np.unique(bins["sensor"].to_numpy(np.int64))
    if all_sensors.size == 0:
        return FitResult(pd.DataFrame(index=pd.Index([], name="sensor")), np.nan, np.nan,
                         np.zeros(0, dtype=bool), np.zeros(0), np.zeros(0))
    survey = bins["kind"].to_numpy() == "survey"
    axis_bins = bins[survey] if survey.any() else bins
    theta = course_axis(axis_bins["cos"].to_numpy(), axis_bins["sin"].to_numpy(), axis_bins["count"].to_numpy())
    cov = coverage(bins, theta, settings.min_lines, settings.min_cross_lines).reindex(all_sensors)
    along = [int(j) for j in all_sensors if bool(cov.loc[j, "along_ok"])]
    across = [j for j in along if bool(cov.loc[j, "across_ok"])]

    table = cov.copy()
    for name in (
        "along_nT", "across_nT", "b_nT", "c_nT", "level_nT", "drift_nT_per_h",
    ):
        table[name] = 0.0 if name in ("along_nT", "across_nT", "b_nT", "c_nT") else np.nan
    for name in ("along", "across", "b", "c"):
        for suffix in _SE_SUFFIXES:
            table[f"{name}_se{suffix}_nT"] = np.nan
    table["bins_downweighted"] = 0

    sensor = bins["sensor"].to_numpy(np.int64)
    rows = np.isin(sensor, along)
    if not along:
        return FitResult(table, theta, np.nan, rows, np.zeros(0), np.zeros(0))
    used = bins[rows]
    design = build_design(used, theta, along, across, settings)
    watch = np.array([c for pair in design.heading.values() for c in pair if c is not None], dtype=np.int64)
    w, beta, lu, iterations = _irls(design, settings, watch)
    r = design.y - design.X @ beta
    sigma = _robust_scale(r)

    cov_line = _sandwich(design, lu, watch, w, r, used["line"].to_numpy())
    cov_bin = _sandwich(design, lu, watch, w, r, None)
    where = {c: k for k, c in enumerate(watch)}
    ct, st = np.cos(theta), np.sin(theta)
    rot = np.array([[ct, -st], [st, ct]])
    used_sensor = used["sensor"].to_numpy(np.int64)
    levels = {}
    for j in along:
        ca, cc = design.heading[j]
        a_c = np.array([beta[ca], beta[cc] if cc is not None else 0.0])
        b_c = rot @ a_c
        table.loc[j, ["along_nT", "across_nT", "b_nT", "c_nT"]] = [a_c[0], a_c[1], b_c[0], b_c[1]]
        idx = [where[ca]] + ([where[cc]] if cc is not None else [])
        for suffix, cmat in (("_lines", cov_line), ("_bins", cov_bin)):
            block = np.zeros((2, 2))
            block[: len(idx), : len(idx)] = cmat[np.ix_(idx, idx)]
            bc_cov = rot @ block @ rot.T
            table.loc[j, f"along_se{suffix}_nT"] = np.sqrt(block[0, 0])
            table.loc[j, f"across_se{suffix}_nT"] = np.sqrt(block[1, 1]) if cc is not None else np.nan
            table.loc[j, f"b_se{suffix}_nT"] = np.sqrt(bc_cov[0, 0])
            table.loc[j, f"c_se{suffix}_nT"] = np.sqrt(bc_cov[1, 1])
        for name in ("along", "across", "b", "c"):
            table.loc[j, f"{name}_se_nT"] = np.fmax(
                table.loc[j, f"{name}_se_lines_nT"], table.loc[j, f"{name}_se_bins_nT"]
            )
        levels[j] = 0.0 if design.offset[j] is None else float(beta[design.offset[j]])
        if design.drift[j]:
            table.loc[j, "drift_nT_per_h"] = float(beta[design.drift[j][0]]) / (design.t_half_s / 3600.0)
        table.loc[j, "bins_downweighted"] = int(np.sum(w[used_sensor == j] < 0.5))
    mean_level = float(np.mean(list(levels.values())))
    for j, level in levels.items():
        table.loc[j, "level_nT"] = level - mean_level
    return FitResult(table, theta, sigma, rows, w, r, iterations)
