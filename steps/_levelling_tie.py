"""Least-squares tie-line levelling from crossover differences.

At a crossover ``k`` of survey segment ``i`` (one line of one sensor) and
tie segment ``j`` the difference ``d_k = r_i - r_j`` of the two residuals
(nT) should vanish once both are levelled. Each segment gets a correction
``c`` (subtracted from its residual), so that after levelling the difference
is ``d_k - (c_i(t_ik) - c_j)``. The corrections are found in two least-
squares steps, in the classic order of tie-line levelling (tie lines first,
then the survey lines to them; Yarger, Robertson & Wentland 1978 fit low-
order polynomials in time to the crossover differences by least squares,
from memory for the step order):

1. *Tie lines*: a constant per segment, survey and tie alike, minimising
   ``sum_k (d_k - (a_i - a_j))**2``. Adding one constant to every segment
   of a connected group (segments joined through crossovers) changes no
   difference, so each group gets one datum: the sum of its tie-segment
   constants is zero (the tie lines keep their mean level). The tie
   constants are kept; the survey constants are only a step to them.
2. *Survey lines*: with the ties levelled, each survey segment gets a
   polynomial of order ``trend_order`` in its normalised time
   ``tau = 2 (t - t_first) / (t_last - t_first) - 1`` fitted to
   ``d_k + a_j``, the order lowered to one less than the number of
   distinct tie lines it crosses (a straight line needs two ties).

Both steps are sparse linear least-squares problems solved with LSQR
(Paige & Saunders 1982, ``scipy.sparse.linalg.lsqr``). Crossovers whose
misfit exceeds ``outlier_multiple`` robust standard deviations (1.4826 MAD,
Rousseeuw & Croux 1993) of all misfits are left out and the step solved
again, until the set no longer changes; a crossover on a steep anomaly,
where a few centimetres of position error change the field by a lot, is
the usual outlier.

References
----------
Paige, C. C. & Saunders, M. A. (1982). LSQR: an algorithm for sparse linear
    equations and sparse least squares. ACM Transactions on Mathematical
    Software 8(1), 43-71.
Rousseeuw, P. J. & Croux, C. (1993). Alternatives to the median absolute
    deviation. Journal of the American Statistical Association 88(424),
    1273-1283.
Yarger, H. L., Robertson, R. R. & Wentland, R. L. (1978). Diurnal drift
    removal from aeromagnetic data using least squares. Geophysics 43(6),
    1148-1156.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.sparse.csgraph import connected_components
from scipy.sparse.linalg import lsqr

__all__ = ["MAD_TO_SIGMA", "TieSolution", "solve", "tie_design", "line_design", "level"]

#: Consistency factor of the MAD for Gaussian noise (Rousseeuw & Croux 1993).
MAD_TO_SIGMA = 1.4826

#: Most solve-and-reject passes of each step.
_MAX_PASSES = 10

#: Least robust standard deviation of the misfits used to reject, nT. A
#: crossover that its segment's polynomial fits exactly (one crossover for a
#: constant, two for a straight line) has a misfit of rounding size only
#: (1e-15 nT); rejecting on such a spread would drop crossovers at random and
#: leave their lines unlevelled. A millionth of a nT is far below any
#: magnetometer's resolution (about a thousandth of a nT, from memory).
_SIGMA_FLOOR_NT = 1e-6


@dataclass
class TieSolution:
    """Result of :func:`level`.

    Attributes
    ----------
    coefficients : ndarray, shape (segments, trend_order + 1)
        Correction of every segment as a polynomial in its normalised time,
        nT (tie segments: a constant; untouched segments: zeros).
    order : ndarray of int
        Order used per segment (-1: no correction, no usable crossover).
    used : ndarray of bool
        Per crossover, used by the final (survey-line) step.
    used_ties : ndarray of bool
        Per crossover, used by the tie step.
    model : ndarray of float
        Per crossover, ``c_i(t_ik) - c_j`` (nT): the change of the
        difference made by levelling.
    sigma_nT : float
        Robust standard deviation of the final misfits, nT.
    """

    coefficients: np.ndarray
    order: np.ndarray
    used: np.ndarray
    used_ties: np.ndarray
    model: np.ndarray
    sigma_nT: float


def solve(a: sparse.spmatrix, b: np.ndarray) -> np.ndarray:
    """Least-squares solution of ``a x = b`` with LSQR, to near machine precision."""
    a = sparse.csr_matrix(a)
    if a.shape[1] == 0:
        return np.zeros(0)
    b = np.asarray(b, dtype=np.float64)
    result = lsqr(a, b, atol=1e-14, btol=1e-14, conlim=1e12, iter_lim=max(100, 20 * a.shape[1]))
    return result[0]


def tie_design(seg_line: np.ndarray, seg_tie: np.ndarray, is_tie: np.ndarray) -> tuple[sparse.csr_matrix, np.ndarray]:
    """Design matrix of the tie step (a constant per segment) with its datum rows.

    Parameters
    ----------
    seg_line, seg_tie : ndarray of int
        Survey and tie segment of each crossover used.
    is_tie : ndarray of bool
        Per global segment, true for a tie-line segment.

    Returns
    -------
    a : scipy.sparse.csr_matrix
        One row per crossover (+1 for the survey segment's constant, -1
        for the tie segment's), then one datum row per connected group
        (+1 for each tie segment of the group; right-hand side 0).
    columns : ndarray of int
        Global segment of each column.
    """
    seg_line = np.asarray(seg_line, dtype=np.int64)
    seg_tie = np.asarray(seg_tie, dtype=np.int64)
    columns = np.unique(np.concatenate([seg_line, seg_tie]))
    col_line = np.searchsorted(columns, seg_line)
    col_tie = np.searchsorted(columns, seg_tie)
    m, ncol = seg_line.size, columns.size
    rows = np.arange(m)
    values = np.concatenate([np.ones(m), -np.ones(m)])
    where = (np.concatenate([rows, rows]), np.concatenate([col_line, col_tie]))
    a = sparse.coo_matrix((values, where), shape=(m, ncol))
    graph = sparse.coo_matrix((np.ones(m), (col_line, col_tie)), shape=(ncol, ncol))
    n_groups, group = connected_components(graph, directed=False)
    tie_cols = np.flatnonzero(np.asarray(is_tie)[columns])
    datum = sparse.coo_matrix((np.ones(tie_cols.size), (group[tie_cols], tie_cols)), shape=(n_groups, ncol))
    return sparse.vstack([a, datum]).tocsr(), columns


def line_design(
    seg_line: np.ndarray, tau: np.ndarray, order: np.ndarray
) -> tuple[sparse.csr_matrix, np.ndarray, np.ndarray]:
    """Design matrix of the survey-line step (a polynomial in time per segment).

    Parameters
    ----------
    seg_line : ndarray of int
        Survey segment of each crossover used.
    tau : ndarray of float
        Normalised time of each crossover on its survey segment (-1 to 1).
    order : ndarray of int
        Polynomial order per global segment (-1: not solved).

    Returns
    -------
    a : scipy.sparse.csr_matrix
        One row per crossover; the columns of segment ``i`` hold
        ``tau**0 ... tau**order[i]``.
    col_seg, col_power : ndarray of int
        Segment and power of each column.
    """
    seg_line = np.asarray(seg_line, dtype=np.int64)
    tau = np.asarray(tau, dtype=np.float64)
    order = np.asarray(order, dtype=np.int64)
    segs = np.unique(seg_line)
    segs = segs[order[segs] >= 0]
    col_seg = np.repeat(segs, order[segs] + 1)
    col_power = np.concatenate([np.arange(order[s] + 1) for s in segs]) if segs.size else np.zeros(0, np.int64)
    first_col = np.full(order.size, -1, dtype=np.int64)
    first_col[segs] = np.concatenate([[0], np.cumsum(order[segs] + 1)[:-1]]) if segs.size else []
    rows, cols, vals = [], [], []
    keep = first_col[seg_line] >= 0
    r_idx = np.flatnonzero(keep)
    for p in range(int(order.max(initial=-1)) + 1):
        has = order[seg_line[r_idx]] >= p
        rr = r_idx[has]
        rows.append(rr)
        cols.append(first_col[seg_line[rr]] + p)
        vals.append(tau[rr] ** p)
    if rows:
        rows, cols, vals = np.concatenate(rows), np.concatenate(cols), np.concatenate(vals)
    a = sparse.coo_matrix((vals, (rows, cols)), shape=(seg_line.size, col_seg.size)).tocsr()
    return a, col_seg, col_power


def _robust_sigma(x: np.ndarray) -> float:
    if x.size == 0:
        return float("nan")
    return float(MAD_TO_SIGMA * np.median(np.abs(x - np.median(x))))


def _reject(misfit: np.ndarray, valid: np.ndarray, used: np.ndarray, multiple: float) -> np.ndarray:
    """Crossovers kept for the next pass: misfit within ``multiple`` robust sigmas."""
    if multiple <= 0:
        return used
    sigma = _robust_sigma(misfit[used])
    if not np.isfinite(sigma):
        return used
    sigma = max(sigma, _SIGMA_FLOOR_NT)
    centre = np.median(misfit[used])
    with np.errstate(invalid="ignore"):
        return valid & (np.abs(misfit - centre) <= multiple * sigma)


def _orders(seg_line, tie_line, used, n_segments, trend_order):
    """Order per segment: at most one less than the distinct tie lines it crosses."""
    order = np.full(n_segments, -1, dtype=np.int64)
    if not used.any():
        return order
    pairs = np.unique(np.column_stack([seg_line[used], tie_line[used]]), axis=0)
    segs, n_ties = np.unique(pairs[:, 0], return_counts=True)
    order[segs] = np.minimum(trend_order, n_ties - 1)
    return order


def level(
    seg_line: np.ndarray,
    seg_tie: np.ndarray,
    difference: np.ndarray,
    tau_line: np.ndarray,
    tie_line: np.ndarray,
    is_tie: np.ndarray,
    *,
    trend_order: int,
    level_ties: bool,
    outlier_multiple: float,
) -> TieSolution:
    """Per-segment corrections that minimise the crossover differences.

    Parameters
    ----------
    seg_line, seg_tie : ndarray of int
        Survey and tie segment (global numbers) of each crossover.
    difference : ndarray of float
        Survey minus tie residual at each crossover, nT (NaN: unusable).
    tau_line : ndarray of float
        Normalised time of each crossover on its survey segment.
    tie_line : ndarray of int
        Line index of the tie segment of each crossover.
    is_tie : ndarray of bool
        Per global segment, true for a tie-line segment.
    trend_order : int
        Highest polynomial order in time of a survey segment's correction.
    level_ties : bool
        Whether tie segments get constants of their own (step 1); when
        false they are held as they are.
    outlier_multiple : float
        Rejection limit in robust standard deviations (0: no rejection).

    Returns
    -------
    TieSolution
    """
    seg_line = np.asarray(seg_line, dtype=np.int64)
    seg_tie = np.asarray(seg_tie, dtype=np.int64)
    d = np.asarray(difference, dtype=np.float64)
    tau_line = np.asarray(tau_line, dtype=np.float64)
    tie_line = np.asarray(tie_line, dtype=np.int64)
    is_tie = np.asarray(is_tie, dtype=bool)
    n_seg = is_tie.size
    valid = np.isfinite(d) & np.isfinite(tau_line)

    # Step 1: tie constants.
    tie_const = np.zeros(n_seg)
    used_ties = np.zeros_like(valid)
    if level_ties and valid.any():

        def fit_ties(used):
            a, columns = tie_design(seg_line[used], seg_tie[used], is_tie)
            b = np.concatenate([d[used], np.zeros(a.shape[0] - int(used.sum()))])
            x = np.zeros(n_seg)
            x[columns] = solve(a, b)
            return x, d - (x[seg_line] - x[seg_tie])

        x, used_ties = _iterate(fit_ties, valid, outlier_multiple)
        crossed = np.zeros(n_seg, dtype=bool)
        crossed[seg_tie[used_ties]] = True
        tie_const = np.where(is_tie & crossed, x, 0.0)

    # Step 2: survey-line polynomials against the levelled ties.
    target = d + tie_const[seg_tie]

    def fit_lines(used):
        order = _orders(seg_line, tie_line, used, n_seg, trend_order)
        a, col_seg, col_power = line_design(seg_line[used], tau_line[used], order)
        coefficients = np.zeros((n_seg, trend_order + 1))
        coefficients[col_seg, col_power] = solve(a, target[used])
        return (coefficients, order), target - _poly(coefficients, seg_line, tau_line)

    (coefficients, order), used = _iterate(fit_lines, valid, outlier_multiple)
    coefficients[is_tie, 0] = tie_const[is_tie]
    crossed = np.zeros(n_seg, dtype=bool)
    crossed[seg_tie[used_ties]] = True
    order[is_tie] = np.where(crossed[is_tie], 0, -1)
    model = _poly(coefficients, seg_line, tau_line) - tie_const[seg_tie]
    sigma = _robust_sigma((d - model)[used])
    return TieSolution(coefficients, order, used, used_ties, model, sigma)


def _iterate(fit, valid: np.ndarray, multiple: float):
    """Fit, reject outliers, and fit again until the crossovers used no longer change.

    ``fit(used)`` returns ``(result, misfit)`` with a misfit per crossover.
    Returns the last result and the crossovers it used.
    """
    used = valid.copy()
    for _ in range(_MAX_PASSES):
        result, misfit = fit(used)
        again = _reject(misfit, valid, used, multiple)
        if np.array_equal(again, used) or not again.any():
            return result, used
        used = again
    result, _ = fit(used)
    return result, used


def _poly(coefficients: np.ndarray, seg: np.ndarray, tau: np.ndarray) -> np.ndarray:
    out = np.zeros(seg.size)
    power = np.ones(seg.size)
    for j in range(coefficients.shape[1]):
        out += coefficients[seg, j] * power
        power = power * tau
    return out
