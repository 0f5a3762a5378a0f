"""Visiting order of the reacquisition plan: nearest neighbour, then 2-opt.

The order is an open path (the vessel does not come back to the first
target) from a fixed first point. It starts as the nearest-neighbour tour
(Rosenkrantz, Stearns and Lewis 1977): from the current point go to the
closest point not yet visited. The path is then improved by 2-opt moves
(Croes 1958): a move reverses the stretch ``path[i..j]``, which replaces the
legs ``(path[i-1], path[i])`` and ``(path[j], path[j+1])`` by
``(path[i-1], path[j])`` and ``(path[i], path[j+1])``; when ``j`` is the
last point only the first leg changes (the path is open). Moves that
shorten the path by more than a millimetre are made until none is left, so
the result is a 2-opt local optimum, in general not the shortest path
(random Euclidean instances end a few per cent above the optimum; Johnson
and McGeoch 1997, cited from memory).

Distances are straight lines in the survey's projected coordinates (m).
No distance matrix is built: each step computes one row of distances with
numpy, so memory grows with the number of points, not its square.

References
----------
Croes, G. A. (1958). A method for solving traveling-salesman problems.
    Operations Research 6(6), 791-812. [Croes1958]_
Johnson, D. S., and McGeoch, L. A. (1997). The traveling salesman problem:
    a case study in local optimization. In Aarts and Lenstra (eds.), Local
    Search in Combinatorial Optimization, Wiley, 215-310. [Johnson1997]_
Rosenkrantz, D. J., Stearns, R. E., and Lewis, P. M. (1977). An analysis
    of several heuristics for the traveling salesman problem. SIAM Journal
    on Computing 6(3), 563-581. [Rosenkrantz1977]_
"""

from __future__ import annotations

import numpy as np

__all__ = ["path_length", "leg_lengths", "nearest_neighbour", "two_opt", "plan_order"]

#: Smallest shortening (m) for which a 2-opt move is made; stops endless
#: swaps between orders whose lengths differ by rounding only.
MIN_GAIN_M = 1e-3


def leg_lengths(xy: np.ndarray, order) -> np.ndarray:
    """Length of each leg of the path ``xy[order]``, m (one fewer than points)."""
    pts = np.asarray(xy, float)[np.asarray(order, dtype=np.int64)]
    return np.hypot(*np.diff(pts, axis=0).T) if len(pts) > 1 else np.zeros(0)


def path_length(xy: np.ndarray, order) -> float:
    """Length of the open path through ``xy`` in ``order``, m."""
    return float(leg_lengths(xy, order).sum())


def nearest_neighbour(xy: np.ndarray, start: int = 0) -> np.ndarray:
    """Nearest-neighbour order from ``start`` (ties go to the lower index).

    Parameters
    ----------
    xy : ndarray (n, 2)
        Easting, northing, m.
    start : int
        Index of the first point.

    Returns
    -------
    ndarray of int, shape (n,)
        A permutation of ``range(n)`` beginning with ``start``.
    """
    xy = np.asarray(xy, float)
    n = len(xy)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    left = np.ones(n, bool)
    order = np.empty(n, dtype=np.int64)
    current = int(start)
    for k in range(n):
        order[k] = current
        left[current] = False
        if k == n - 1:
            break
        d = np.hypot(xy[:, 0] - xy[current, 0], xy[:, 1] - xy[current, 1])
        d[~left] = np.inf
        current = int(np.argmin(d))
    return order


def two_opt(xy: np.ndarray, order, max_passes: int = 1000) -> tuple[np.ndarray, int]:
    """Improve an open path with a fixed first point by 2-opt moves.

    Parameters
    ----------
    xy : ndarray (n, 2)
        Easting, northing, m.
    order : sequence of int
        Starting order (a permutation); its first point stays first.
    max_passes : int
        Most sweeps over the path (each sweep tries every ``i``).

    Returns
    -------
    order : ndarray of int
        The improved order: no single move shortens it by more than
        :data:`MIN_GAIN_M` (unless ``max_passes`` ran out).
    moves : int
        Number of moves made.
    """
    xy = np.asarray(xy, float)
    path = np.array(order, dtype=np.int64)
    n = len(path)
    moves = 0
    if n < 3:
        return path, moves
    px, py = xy[path, 0].copy(), xy[path, 1].copy()
    for _ in range(max_passes):
        improved = False
        for i in range(1, n - 1):
            ax, ay = px[i - 1], py[i - 1]
            # legs removed: (i-1, i) and (j, j+1); legs added: (i-1, j) and (i, j+1);
            # for the last j there is no j+1 (open path) and only the first leg changes
            nxt = np.zeros(n - i - 1)
            nxt[:-1] = np.hypot(px[i + 2 :] - px[i + 1 : -1], py[i + 2 :] - py[i + 1 : -1])
            new_second = np.zeros(n - i - 1)
            new_second[:-1] = np.hypot(px[i + 2 :] - px[i], py[i + 2 :] - py[i])
            gain = (np.hypot(px[i] - ax, py[i] - ay) + nxt) - (np.hypot(px[i + 1 :] - ax, py[i + 1 :] - ay) + new_second)
            best = int(np.argmax(gain))
            if gain[best] > MIN_GAIN_M:
                j = i + 1 + best
                for arr in (path, px, py):
                    arr[i : j + 1] = arr[i : j + 1][::-1].copy()
                moves += 1
                improved = True
        if not improved:
            break
    return path, moves


def plan_order(xy: np.ndarray, start: int = 0) -> dict:
    """Nearest neighbour then 2-opt from ``start``; lengths of each order.

    Parameters
    ----------
    xy : ndarray (n, 2)
        Easting, northing, m, in the order given (rank order).
    start : int
        Index of the fixed first point.

    Returns
    -------
    dict
        ``order`` (ndarray of int), ``length_m`` (the planned order),
        ``nearest_neighbour_m``, ``given_order_m`` (points in the order
        given, from ``start``), ``moves`` (2-opt moves made).
    """
    xy = np.asarray(xy, float)
    n = len(xy)
    nn = nearest_neighbour(xy, start)
    order, moves = two_opt(xy, nn)
    given = np.concatenate([[start], np.delete(np.arange(n), start)]) if n else np.zeros(0, np.int64)
    return {
        "order": order,
        "length_m": path_length(xy, order),
        "nearest_neighbour_m": path_length(xy, nn),
        "given_order_m": path_length(xy, given),
        "moves": moves,
    }
