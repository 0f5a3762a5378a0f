"""Refining dipole fits: neighbours' fields removed, and sources added where a fit leaves signal.

Two steps run after the single and joint fits of
:mod:`lodeline.steps.dipole_fit`; together they are a greedy form of
fitting a sum of dipoles to interfering anomalies one window at a time
(block Gauss-Seidel on the windows; a source is added where the residual
is largest, as in matching pursuit, Mallat & Zhang 1993).

Neighbour correction
    A weak source beside a strong one sits on the strong one's tail: 12 m
    from a 50 nT anomaly at 3.5 m depth the tail is still about 1 nT. The
    readings of each window are corrected by the modelled fields of the
    fitted sources (inside their search box, R^2 at least ``accept_r2``)
    farther than ``radius_m`` from every member of the window, and the
    window is refitted, strongest first, ``neighbour_passes`` times.
    Sources nearer than that are left in: they may be a second fit of the
    window's own source (overlapping windows). Windows where the
    neighbours' field stays below the noise are left as they are.

Added sources
    A window whose residual RMS exceeds both ``add_rms_multiple`` times
    the noise and ``add_fraction`` of its largest anomaly has left signal
    unexplained: close sources fitted as one. A source is started at the
    largest residual averaged over 0.4 m (about two along-track steps, so
    that one noisy reading cannot seed it), at least
    ``add_min_separation_m`` from every fitted source and outside
    ``feature_buffer_m`` of linear and extended features; all sources of
    the window are refitted together. The addition is kept when the
    extra-sum-of-squares F test prefers it (Draper & Smith 1998, ch. 5; 6
    extra parameters) at ``joint_p_value``, the statistic divided by the
    variance inflation of residuals correlated along the track (Bayley &
    Hammersley 1946), no two sources lie closer than the separation, and
    no source's own anomaly exceeds the readings' largest (two large
    opposite dipoles cancelling to explain a small anomaly). A new source
    nearer than 1.5 m to the window's edge has its anomaly cut off: the
    window is widened by the readings within ``radius_m`` of it and the
    group refitted there; if that refit fails the checks, or the source
    ends on its search box, it stays in the model as a nuisance term (the
    tail of a source outside) and gets no row. At most two failed seeds
    end the search; at most ``max_joint`` sources share a window.

Sources found in the residual
    The picking sees two anomalies a few metres apart as one when the
    weaker lies on the stronger's flank (no separate maximum of the
    detector), and a fit window of ``radius_m`` about the pick holds only
    part of the weaker one. With ``residual_sources``, the fields of all
    usable fitted sources (within 30 m of each) are removed from the loaded
    readings (out to twice the radius of each pick); the residual averaged
    over 0.4 m, less its median within ``radius_m``, is searched, largest
    first, at readings farther than ``radius_m`` - 1.5 m from every window
    centre, farther than half the radius from every fitted source and
    outside the feature buffer, for values above
    ``residual_noise_multiple`` times the noise. Each such seed (at least
    ``radius_m`` from the previous seeds) gets a single-dipole fit on the
    readings within ``radius_m`` of it, with the neighbours' fields
    removed. It is kept when the fit is inside its box, reaches
    ``accept_r2``, does not run back to within half a radius of a fitted
    source (that would be the misfit of that source), is not a cancelling
    source, and the F test prefers it to the background alone. Such
    sources get new pick numbers and the note "found in the residual of
    the fitted sources". On the demo survey this finds a 2.3 nT item 4 m
    beside a 4.5 nT one (its pick's window held only the near flank) and
    adds no false alarm; 10 x the noise is a choice made there (common
    practice, no published source).

The noise is the residual noise the picking stage measured (its
``picking_metadata``), or, where that is missing, 1.4826 times the median
absolute deviation of second differences of consecutive readings along
the tracks, divided by sqrt(6) (a second difference of white noise has
standard deviation sqrt(6) sigma).

The thresholds (2 x noise, 1 % of the anomaly, 1 m, 1.5 m) are choices
made on the demo survey, where the misfit of an isolated strong item
through position and altitude errors is about 1 % of its peak (common
practice, no published source).

References
----------
Bayley, G. V., and Hammersley, J. M. (1946). The "effective" number of
    independent observations in an autocorrelated time series. Journal of
    the Royal Statistical Society Supplement 8(2), 184-197. [Bayley1946]_
Draper, N. R., and Smith, H. (1998). Applied Regression Analysis, 3rd ed.
    Wiley. [Draper1998]_ (extra-sum-of-squares F test; cited from memory)
Mallat, S. G., and Zhang, Z. (1993). Matching pursuits with
    time-frequency dictionaries. IEEE Transactions on Signal Processing
    41(12), 3397-3415. [Mallat1993]_
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree
from scipy.stats import f as f_dist

from ._dipole_model import design
from ._dipole_rows import fit_group
from ._dipole_solve import BACKGROUND_TERMS, background_columns, correlation_factor

__all__ = ["better", "noise_from_readings", "refine"]

_SMOOTH_M = 0.4
# a source whose own anomaly in the window exceeds the readings' largest is cancelling another
# source of the fit (two large opposite dipoles explaining a small anomaly), not a separate object
_CANCEL = 1.2
# an added source this near the edge of its window is a nuisance term (the tail of a source outside), m
_EDGE_M = 1.5
# fields of fitted sources are removed from the readings within this distance when the residual is searched, m
_TAIL_M = 30.0


def better(one, joint, extra_sources: int, settings: dict, inflation: float = 1.0) -> bool:
    """Extra-sum-of-squares F test of ``joint`` (``extra_sources`` more dipoles) against ``one`` on the same readings.

    ``inflation`` divides the F statistic: the variance inflation of
    residuals correlated along the track (see
    :func:`lodeline.steps._dipole_solve.correlation_factor`), so that a
    smooth misfit is not taken for as many independent readings.
    """
    n_back = BACKGROUND_TERMS[settings["background"]]
    k_one = one.positions.shape[0]
    extra = 6 * extra_sources
    dof = joint.n - 6 * (k_one + extra_sources) - n_back
    rss_one, rss_joint = one.n * one.rms_nT**2, joint.n * joint.rms_nT**2
    if dof <= 0 or rss_joint <= 0 or rss_joint >= rss_one:
        return False
    f_stat = ((rss_one - rss_joint) / extra) / (rss_joint / dof) / inflation
    return bool(f_dist.sf(f_stat, extra, dof) < settings["joint_p_value"])


def noise_from_readings(obs: np.ndarray, values: np.ndarray, max_step_m: float = 1.0) -> float:
    """Noise standard deviation from second differences of consecutive readings, nT (NaN when too few)."""
    if len(values) < 10:
        return float("nan")
    step = np.hypot(np.diff(obs[:, 0]), np.diff(obs[:, 1]))
    ok = (step[:-1] < max_step_m) & (step[1:] < max_step_m)
    d2 = values[2:] - 2 * values[1:-1] + values[:-2]
    d2 = d2[ok]
    if d2.size < 10:
        return float("nan")
    return float(1.4826 * np.median(np.abs(d2 - np.median(d2))) / np.sqrt(6.0))


def _sources(rows, settings):
    """Positions (k, 3), moments (k, 3) and row indices of the rows usable as neighbours."""
    use = [j for j, r in enumerate(rows)
           if np.isfinite(r.get("fit_r2", np.nan)) and not r.get("_at_bound", True) and r["fit_r2"] >= settings["accept_r2"]]
    pos = np.array([[rows[j]["easting_m"], rows[j]["northing_m"], rows[j]["elevation_m"]] for j in use], float).reshape(-1, 3)
    mom = np.array([[rows[j]["moment_east_Am2"], rows[j]["moment_north_Am2"], rows[j]["moment_up_Am2"]] for j in use],
                   float).reshape(-1, 3)
    return pos, mom, use


def _neighbour_field(obs, rows, members, f_hat, settings, centres=None) -> np.ndarray:
    """Field at ``obs`` of the usable sources farther than ``radius_m`` from every member's box centre.

    Sources nearer than that are left in the readings: they may be a second
    fit of one of the members' own sources (overlapping windows), and
    removing them would remove the members' own signal.
    """
    pos, mom, use = _sources(rows, settings)
    if centres is None:
        centres = np.array([rows[j]["_centre"] for j in members], float).reshape(-1, 2)
    if not len(pos):
        return np.zeros(len(obs))
    dist = np.min(np.hypot(pos[:, None, 0] - centres[None, :, 0], pos[:, None, 1] - centres[None, :, 1]), axis=1)
    keep = [i for i, j in enumerate(use) if j not in set(members) and dist[i] > settings["radius_m"]]
    return _field(obs, pos[keep], mom[keep], f_hat)


def _field(obs: np.ndarray, positions: np.ndarray, moments: np.ndarray, f_hat: np.ndarray) -> np.ndarray:
    """Summed total-field anomaly of dipoles at ``obs``, nT, one source at a time (no n x 3k matrix)."""
    out = np.zeros(len(obs))
    for p, m in zip(positions, moments):
        out += design(obs, p[None], f_hat) @ m
    return out


def _update(rows, members, new_rows, fit, group_id, note):
    for m, (j, new) in enumerate(zip(members, new_rows)):
        old = rows[j]
        new.update(pick_id=old["pick_id"], kind=old["kind"], joint_group=group_id,
                   main_field_nT=old["main_field_nT"], note=note if note is not None else old["note"],
                   _at_bound=bool(fit.bound_sources[m]), _centre=old["_centre"], _window=old["_window"])
        rows[j] = new


def _groups(rows) -> list[list[int]]:
    seen, out = {}, []
    for j, r in enumerate(rows):
        if "_window" not in r:
            continue
        g = r.get("joint_group", -1)
        if g == -1:
            out.append([j])
        elif g in seen:
            out[seen[g]].append(j)
        else:
            seen[g] = len(out)
            out.append([j])
    return out


def _strength(rows, members) -> float:
    vals = [rows[j]["moment_Am2"] / max(rows[j]["depth_below_sensor_m"], 0.1) ** 3 for j in members]
    vals = [v for v in vals if np.isfinite(v)]
    return max(vals) if vals else 0.0




def _neighbour_passes(rows, obs_all, values, f_hat, settings, noise_nT, quick) -> int:
    refitted = 0
    for _ in range(settings["neighbour_passes"]):
        for members in sorted(_groups(rows), key=lambda g: -_strength(rows, g)):
            idx = rows[members[0]]["_window"]
            obs = obs_all[idx]
            other = _neighbour_field(obs, rows, members, f_hat, settings)
            if not np.max(np.abs(other), initial=0.0) > noise_nT:
                continue
            centres = np.array([rows[j]["_centre"] for j in members])
            starts = [np.array([rows[j]["easting_m"], rows[j]["northing_m"], rows[j]["elevation_m"]]) for j in members]
            fit, new = fit_group(obs, values[idx] - other, f_hat, centres, starts, quick)
            _update(rows, members, new, fit, rows[members[0]]["joint_group"], None)
            refitted += 1
    return refitted


def _position(row) -> np.ndarray:
    return np.array([row["easting_m"], row["northing_m"], row["elevation_m"]], float)


def _size(values: np.ndarray) -> float:
    """Largest departure from the median, nT."""
    return float(np.max(np.abs(values - np.median(values)))) if len(values) else 0.0


def _cancelling(obs, fit, f_hat, data_size: float, first_added: int) -> bool:
    """Whether an added source's own anomaly (as :func:`_size` measures it) exceeds ``_CANCEL`` times the readings'.

    Only the added sources (``first_added`` on) are checked: a member that
    stands for several close objects until they are resolved may well be
    larger than the readings' anomaly for a while.
    """
    own = [_size(design(obs, p[None], f_hat) @ m) for p, m in zip(fit.positions[first_added:], fit.moments[first_added:])]
    return bool(own) and bool(max(own) > _CANCEL * data_size)


def _seed_order(obs, residual, allowed, tree_window) -> np.ndarray:
    """Window readings by decreasing absolute residual averaged over ``_SMOOTH_M``; only ``allowed`` ones."""
    near = tree_window.query_ball_point(obs[:, :2], _SMOOTH_M)
    smooth = np.array([residual[n].mean() for n in near])
    order = np.argsort(-np.abs(smooth))
    return order[allowed[order]]


def _grow(rows, members, obs_all, values, f_hat, settings, noise_nT, domain, tree, quick, state) -> None:
    """Add sources to one group's window while the fit leaves signal (see the module docstring)."""
    idx = rows[members[0]]["_window"]
    obs = obs_all[idx]
    centres = [np.asarray(rows[j]["_centre"], float) for j in members]
    val = values[idx] - _neighbour_field(obs, rows, members, f_hat, settings, np.array(centres))
    starts = [_position(rows[j]) for j in members]
    current, new_rows = fit_group(obs, val, f_hat, np.array(centres), starts, quick)
    best = None
    failed: list[np.ndarray] = []
    sep = settings["add_min_separation_m"]
    tree_window = cKDTree(obs[:, :2])
    depth = float(np.median([s[2] for s in starts]))
    data_size = _size(val)
    while len(starts) < settings["max_joint"] and len(failed) < 2:
        model = val - current.residuals
        size = float(np.max(np.abs(model - np.median(model))))
        gate = max(settings["add_rms_multiple"] * noise_nT, settings["add_fraction"] * size)
        if not current.at_bound and current.rms_nT <= gate:
            break
        others, _, _ = _sources(rows, settings)
        taken = np.array([p[:2] for p in current.positions] + [p[:2] for p in others] + failed)
        seed = None
        for i in _seed_order(obs, current.residuals, domain[idx], tree_window)[:200]:
            if np.min(np.hypot(taken[:, 0] - obs[i, 0], taken[:, 1] - obs[i, 1])) >= sep:
                seed = obs[i, :2].copy()
                break
        if seed is None:
            break
        state["tried"] += 1
        trial_centres = centres + [seed]
        trial_starts = [p.copy() for p in current.positions] + [np.array([seed[0], seed[1], depth])]
        fit, trial_rows = fit_group(obs, val, f_hat, np.array(trial_centres), trial_starts, quick)
        pos = fit.positions[:, :2]
        gaps = np.hypot(pos[:, None, 0] - pos[None, :, 0], pos[:, None, 1] - pos[None, :, 1])[np.triu_indices(len(pos), 1)]
        cancelling = _cancelling(obs, fit, f_hat, data_size, len(members))
        preferred = better(current, fit, 1, settings, correlation_factor(obs, fit.residuals))
        if cancelling or (gaps < sep).any() or fit.r2 < settings["accept_r2"] or not preferred:
            failed.append(seed)
            continue
        # a source on its box edge, or nearer than _EDGE_M to the window's edge, may stand for the tail of a
        # source outside the window: it stays in the model (a nuisance term) while more sources are tried, and
        # is given no row
        member_xy = np.array([rows[j]["_centre"] for j in members], float)
        reach = np.min(np.hypot(fit.positions[:, None, 0] - member_xy[None, :, 0],
                                fit.positions[:, None, 1] - member_xy[None, :, 1]), axis=1)
        edge = reach > settings["radius_m"] - _EDGE_M
        edge[: len(members)] = False
        widen = np.flatnonzero(edge & ~fit.bound_sources)
        if widen.size:
            # added sources at the window's edge: widen the window by the readings about them and refit the
            # whole group there, so that their anomalies are seen whole
            for m in widen:
                trial_centres[m] = fit.positions[m, :2].copy()
            around = [np.array(tree.query_ball_point(trial_centres[m], settings["radius_m"]), dtype=np.int64) for m in widen]
            wide = np.union1d(idx, np.concatenate(around))
            wide_obs = obs_all[wide]
            wide_val = values[wide] - _neighbour_field(wide_obs, rows, members, f_hat, settings, np.array(trial_centres))
            wide_fit, wide_rows = fit_group(wide_obs, wide_val, f_hat, np.array(trial_centres), list(fit.positions), quick)
            wide_size = _size(wide_val)
            refused = (wide_fit.bound_sources.any() or wide_fit.r2 < settings["accept_r2"]
                       or _cancelling(wide_obs, wide_fit, f_hat, wide_size, len(members)))
            if not refused:
                idx, obs, val, data_size = wide, wide_obs, wide_val, wide_size
                tree_window = cKDTree(obs[:, :2])
                fit, trial_rows, edge = wide_fit, wide_rows, np.zeros(len(trial_centres), bool)
        fit.bound_sources = fit.bound_sources | edge
        centres, starts, current, new_rows = trial_centres, list(fit.positions), fit, trial_rows
        best = (centres, current, new_rows, idx)
    if best is None:
        return
    centres, fit, new_rows, idx = best
    for j in members:
        rows[j]["_window"] = idx
    group_id = rows[members[0]]["joint_group"]
    if group_id == -1:
        group_id = state["next_group"]
        state["next_group"] += 1
    keep = list(members)
    for m in range(len(members), len(new_rows)):
        if fit.bound_sources[m]:
            state["nuisance"] += 1
            continue
        state["next_pick_id"] += 1
        added = new_rows[m]
        added.update(pick_id=state["next_pick_id"], kind="cluster", joint_group=group_id,
                     main_field_nT=rows[members[0]]["main_field_nT"], note="", _at_bound=False, _centre=centres[m], _window=idx)
        rows.append(added)
        keep.append(len(rows) - 1)
        state["added"] += 1
    names = ", ".join(str(rows[j]["pick_id"]) for j in keep)
    note = (f"fitted jointly with picks {names} (sources added where the fit left signal)" if len(keep) > len(members)
            else (f"fitted jointly with picks {names} and " if len(members) > 1 else "fitted with ")
            + "a nuisance dipole for a source outside the window")
    order = list(range(len(members))) + [m for m in range(len(members), len(new_rows)) if not fit.bound_sources[m]]
    if len(keep) == len(members) == 1:
        group_id = rows[members[0]]["joint_group"]
    _update(rows, keep, [new_rows[m] for m in order], _Bounds(fit.bound_sources[order]), group_id, note)


class _Bounds:
    """The bound flags of the kept sources, in the shape :func:`_update` reads."""

    def __init__(self, bound_sources):
        self.bound_sources = np.asarray(bound_sources, bool)


def refine(rows, obs_all, values, f_hat, settings, noise_nT: float, domain: np.ndarray,
           next_pick_id: int, next_group: int) -> dict:
    """Neighbour correction and added sources, in place on ``rows``.

    Parameters
    ----------
    rows : list of dict
        Fitted rows of the stage; fitted ones carry ``_centre`` (box centre,
        m), ``_window`` (indices into ``obs_all``) and ``_at_bound``.
    obs_all : ndarray (n, 3)
        Reading positions east, north, up, m.
    values : ndarray (n,)
        Residual anomaly, nT.
    f_hat : ndarray (3,)
        Main-field unit vector.
    settings : dict
        Validated stage parameters.
    noise_nT : float
        Noise standard deviation of the readings, nT.
    domain : ndarray of bool (n,)
        Readings that may seed an added source (away from linear and
        extended features).
    next_pick_id, next_group : int
        Last pick number used, and the first joint-group number free.

    Returns
    -------
    dict
        ``refitted`` (windows refitted with neighbours removed), ``added``
        (sources added), ``seeds_tried``.
    """
    if not (np.isfinite(noise_nT) and noise_nT > 0) or len(obs_all) == 0:
        return {"refitted": 0, "added": 0, "seeds_tried": 0, "nuisance": 0, "residual": 0}
    quick = dict(settings, start_depths_m=[float(np.median(settings["start_depths_m"]))])
    refitted = _neighbour_passes(rows, obs_all, values, f_hat, settings, noise_nT, quick)
    state = {"added": 0, "tried": 0, "nuisance": 0, "next_pick_id": next_pick_id, "next_group": next_group}
    tree = cKDTree(obs_all[:, :2])
    if settings["add_sources"] and settings["max_joint"] >= 2:
        for members in sorted(_groups(rows), key=lambda g: -_strength(rows, g)):
            _grow(rows, members, obs_all, values, f_hat, settings, noise_nT, domain, tree, quick, state)
    state["residual"] = 0
    if settings["residual_sources"]:
        _residual_sources(rows, obs_all, values, f_hat, settings, noise_nT, domain, tree, quick, state)
    return {"refitted": refitted, "added": state["added"], "seeds_tried": state["tried"], "nuisance": state["nuisance"],
            "residual": state["residual"]}


def _residual_sources(rows, obs_all, values, f_hat, settings, noise_nT, domain, tree, quick, state) -> int:
    """Sources found in the residual of all fitted sources outside every fit window (see the module docstring)."""
    radius = settings["radius_m"]
    pos, mom, _ = _sources(rows, settings)
    residual = np.array(values, dtype=float)
    for p, m in zip(pos, mom):
        near = np.array(tree.query_ball_point(p[:2], _TAIL_M), dtype=np.int64)
        if near.size:
            residual[near] -= design(obs_all[near], p[None], f_hat) @ m
    centres = np.array([r["_centre"] for r in rows if "_centre" in r], float).reshape(-1, 2)
    fitted = np.array([[r["easting_m"], r["northing_m"]] for r in rows if np.isfinite(r.get("easting_m", np.nan))],
                      float).reshape(-1, 2)
    outside = domain.copy()
    if len(centres):
        outside &= cKDTree(centres).query(obs_all[:, :2], distance_upper_bound=radius - _EDGE_M)[0] == np.inf
    if len(fitted):
        outside &= cKDTree(fitted).query(obs_all[:, :2], distance_upper_bound=0.5 * radius)[0] == np.inf
    where = np.flatnonzero(outside)
    if not where.size:
        return 0
    smooth = _reduce_near(tree, obs_all[where, :2], _SMOOTH_M, residual, np.mean)
    back = _reduce_near(tree, obs_all[where, :2], radius, residual, np.median)
    excess = np.abs(smooth - back)
    order = np.argsort(-excess)
    order = order[excess[order] > settings["residual_noise_multiple"] * noise_nT]
    taken: list[np.ndarray] = []
    found = 0
    for i in order:
        seed = obs_all[where[i], :2]
        if taken and np.min(np.hypot(*(np.array(taken) - seed).T)) < radius:
            continue
        taken.append(seed.copy())
        state["tried"] += 1
        idx = np.array(tree.query_ball_point(seed, radius), dtype=np.int64)
        if idx.size < settings["min_readings"]:
            continue
        obs = obs_all[idx]
        val = values[idx] - _neighbour_field(obs, rows, [], f_hat, settings, seed[None])
        fit, (row,) = fit_group(obs, val, f_hat, seed[None], [None], settings)
        empty = _background_only(obs, val, settings["background"])
        # a fit that runs back to within half a radius of a fitted source is that source's misfit, not a new one
        again = len(fitted) and np.min(np.hypot(*(fitted - fit.positions[0, :2]).T)) < 0.5 * radius
        if (again or fit.at_bound or fit.r2 < settings["accept_r2"] or _cancelling(obs, fit, f_hat, _size(val), 0)
                or not better(empty, fit, 1, settings, correlation_factor(obs, fit.residuals))):
            continue
        state["next_pick_id"] += 1
        close = len(fitted) and np.min(np.hypot(*(fitted - fit.positions[0, :2]).T)) < 2 * radius
        row.update(pick_id=state["next_pick_id"], kind="cluster" if close else "point", joint_group=-1,
                   main_field_nT=rows[0].get("main_field_nT", np.nan) if rows else np.nan,
                   note="found in the residual of the fitted sources", _at_bound=False, _centre=seed.copy(), _window=idx)
        rows.append(row)
        fitted = np.vstack([fitted, fit.positions[:, :2]])
        found += 1
    state["residual"] = found
    return found


def _reduce_near(tree, points: np.ndarray, radius: float, values: np.ndarray, reduce, batch: int = 2048) -> np.ndarray:
    """``reduce`` of ``values`` over the readings within ``radius`` of each point, a batch of points at a time
    (the neighbour lists of one batch only are held)."""
    out = np.empty(len(points))
    for start in range(0, len(points), batch):
        lists = tree.query_ball_point(points[start : start + batch], radius)
        out[start : start + len(lists)] = [reduce(values[n]) if len(n) else np.nan for n in lists]
    return out


class _Empty:
    """A background-only fit, in the shape :func:`better` reads (``n``, ``rms_nT``)."""

    def __init__(self, n: int, rms_nT: float):
        self.n, self.rms_nT = n, rms_nT
        self.positions = np.zeros((0, 3))


def _background_only(obs, values, kind) -> _Empty:
    a = background_columns(obs, kind)
    coef, *_ = np.linalg.lstsq(a, values, rcond=None)
    res = values - a @ coef
    return _Empty(len(values), float(np.sqrt(np.mean(res**2))))
