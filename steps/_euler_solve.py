"""Least-squares solution of Euler's homogeneity equation on one window (Thompson 1982; Reid et al. 1990).

For a field ``f`` homogeneous of degree ``-N`` about a source point
``(e0, n0, u0)`` plus a constant background ``b``, every cell of a window
satisfies (Reid et al. 1990, eq. 2)::

    (e - e0) df/de + (n - n0) df/dn + (u - u0) df/du = N (b - f)

which is linear in ``(e0, n0, u0, b)``::

    e0 df/de + n0 df/dn + u0 df/du + N b = e df/de + n df/dn + u df/du + N f

solved by least squares over the window's finite cells. The covariance of
the solution is ``s**2 (J^T J)^-1`` with ``s**2`` the residual variance
(``n - 4`` degrees of freedom), the same estimate as harmonica 0.7's
``EulerDeconvolution`` (used as the reference in the tests); it measures how
well the window fits one ideal source, not the full uncertainty of the
position. For ``N = 0`` (a contact) the background drops out of the
equation and only the position is solved (Reid et al. 1990 discuss the
zero index through its offset form; here the background is simply left
undetermined and reported as NaN).

``misfit_ratio`` is the root mean square of the equation residual over the
root mean square of the right-hand side about its mean: 0 for an exact
fit, near 1 when the equation explains nothing. It is the criterion used
to choose the structural index when it is solved for (the index whose
solution fits the window best; common practice in the spirit of the
index-comparison of Reid et al. 1990, no published formula).

References
----------
Reid, A. B., Allsop, J. M., Granser, H., Millett, A. J. & Somerton, I. W.
    (1990). Magnetic interpretation in three dimensions using Euler
    deconvolution. Geophysics 55(1), 80-91.
Thompson, D. T. (1982). EULDPH: A new technique for making computer-assisted
    depth estimates from magnetic data. Geophysics 47(1), 31-37.
"""

from __future__ import annotations

import numpy as np

__all__ = ["solve_window", "MAX_CONDITION"]

#: Windows whose normal matrix has a larger condition number are refused as singular.
MAX_CONDITION = 1.0e12


def _fail(note: str, n: int) -> dict:
    nan = float("nan")
    return {"location": np.full(3, nan), "base_level": nan, "sigma": np.full(4, nan), "misfit_ratio": nan, "n_cells": n, "note": note}


def solve_window(e, n, u, f, fe, fn, fu, structural_index: float, min_cells: int) -> dict:
    """Solve Euler's equation on the finite cells of one window.

    Parameters
    ----------
    e, n, u : numpy.ndarray
        Cell coordinates (easting, northing, upward), m. Centre them on the
        window for conditioning; the solution is in the same frame.
    f, fe, fn, fu : numpy.ndarray
        Residual (nT) and its easting, northing, upward derivatives (nT/m).
    structural_index : float
        ``N`` >= 0.
    min_cells : int
        Fewer finite cells than this give a failed solution.

    Returns
    -------
    dict
        ``location`` (e0, n0, u0, m), ``base_level`` (nT, NaN for N = 0),
        ``sigma`` (standard errors of e0, n0, u0 in m and of b in nT),
        ``misfit_ratio``, ``n_cells`` and ``note`` ("" when solved).
    """
    arrays = [np.asarray(a, dtype=float).ravel() for a in (e, n, u, f, fe, fn, fu)]
    ok = np.logical_and.reduce([np.isfinite(a) for a in arrays])
    e, n, u, f, fe, fn, fu = (a[ok] for a in arrays)
    count = int(ok.sum())
    N = float(structural_index)
    unknowns = 3 if N == 0 else 4
    if count < max(min_cells, unknowns + 1):
        return _fail(f"too few finite cells in the window ({count} < {max(min_cells, unknowns + 1)})", count)
    columns = [fe, fn, fu] + ([np.full(count, N)] if unknowns == 4 else [])
    jac = np.column_stack(columns)
    rhs = e * fe + n * fn + u * fu + N * f
    normal = jac.T @ jac
    cond = np.linalg.cond(normal)
    if not np.isfinite(cond) or cond > MAX_CONDITION:
        return _fail(f"singular window (condition number {cond:.3g} > {MAX_CONDITION:.0e})", count)
    inv = np.linalg.inv(normal)
    est = inv @ (jac.T @ rhs)
    res = rhs - jac @ est
    chi2 = float(res @ res) / (count - unknowns)
    cov = chi2 * inv
    sigma = np.sqrt(np.clip(np.diag(cov), 0.0, None))
    spread = float(np.sqrt(np.mean((rhs - rhs.mean()) ** 2)))
    misfit = float(np.sqrt(np.mean(res**2)) / spread) if spread > 0 else float("nan")
    base = float(est[3]) if unknowns == 4 else float("nan")
    sig = np.append(sigma[:3], sigma[3] if unknowns == 4 else np.nan)
    return {"location": est[:3].copy(), "base_level": base, "sigma": sig, "misfit_ratio": misfit, "n_cells": count, "note": ""}
