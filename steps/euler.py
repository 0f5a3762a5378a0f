"""Windowed Euler deconvolution at each pick: source position, depth, background and structural index.

Around each pick of the picking stage, square windows of the sizes
``window_sizes_m`` are cut from the enhanced grid (the residual and its
easting, northing and upward derivatives) and Euler's homogeneity equation
is solved on each by least squares (Thompson 1982, EULDPH: a new technique
for making computer-assisted depth estimates from magnetic data; Reid et
al. 1990, Magnetic interpretation in three dimensions using Euler
deconvolution; the solver is ``steps/_euler_solve.py``, checked against
harmonica 0.7's ``EulerDeconvolution`` in the tests).

Structural index (Reid et al. 1990, table 1, for magnetic fields): 3 for a
point dipole (a compact object, a sphere), 2 for a line of dipoles (a pipe,
a horizontal cylinder), 1 for a thin dyke or sill edge, 0 for a contact.

``si_mode = "fixed"``
    One solution per pick and index of ``structural_indices``.
``si_mode = "best_fit"``
    For each window, every index of ``structural_indices`` is solved and
    the one whose equation residual is smallest relative to the spread of
    the equation's right-hand side (``misfit_ratio``) is kept: the index
    that makes the window look most like one ideal source. Common practice
    in the spirit of Reid et al. (1990), who compare solutions for several
    indices; no published formula for this ratio.

Among the windows of a pick the accepted solution with the smallest depth
standard error is kept. A solution is accepted when it lies inside its
window horizontally, below the sensors, its depth standard error is at most
``max_relative_depth_sigma`` of its depth and its misfit ratio at most
``max_misfit_ratio`` (windows of noise alone give ratios near 0.6-0.8 in
the tests, an ideal source near 0; acceptance by relative uncertainty and
fit, common practice, no published source). A window with too few
finite cells or a singular normal matrix gives NaN and a note; a pick with
no accepted window keeps the best (smallest depth error) rejected solution
with ``ok = False`` and the reason, and never stops the stage.

Heights: the grids lie at the sensors. Their elevation is the grid
attribute ``grid_elevation_m`` when present, else ``grid_elevation_m``
here (default 0: depths below the sensors). ``depth_below_sensor_m`` is the
grid elevation less the source's ``upward_m``.

The depths support, and never replace, the judgement of qualified
specialists; they are no clearance certificate.

References
----------
Reid, A. B., Allsop, J. M., Granser, H., Millett, A. J. & Somerton, I. W.
    (1990). Magnetic interpretation in three dimensions using Euler
    deconvolution. Geophysics 55(1), 80-91.
Thompson, D. T. (1982). EULDPH: A new technique for making computer-assisted
    depth estimates from magnetic data. Geophysics 47(1), 31-37.
"""

from __future__ import annotations

import dask
import numpy as np
import pandas as pd
import xarray as xr

from lodeline.model import DataError, Stage, StageContext, StageResult, validate_grid
from lodeline.params import Param, ParameterError, validate_table

from ._euler_solve import solve_window

__all__ = ["PARAMS", "STAGE", "run", "COLUMNS"]

VARIABLES = ("residual", "derivative_easting", "derivative_northing", "derivative_upward")
BATCH = 256  # picks whose windows are read from the grid in one dask compute

PARAMS = (
    Param("window_sizes_m", [4.0, 6.0, 8.0, 12.0], "Sides of the square windows centred on each pick, m.", kind=list, item_kind=float, minimum=1),
    Param("structural_indices", [3.0], "Structural indices tried (3 point dipole, 2 line, 1 dyke edge, 0 contact).", kind=list, item_kind=float, minimum=1),
    Param("si_mode", "fixed", "'fixed': one solution per index; 'best_fit': keep the index that fits each window best.", kind=str, choices=("fixed", "best_fit")),
    Param("grid_elevation_m", 0.0, "Elevation of the grid (the sensors) when the grid has no grid_elevation_m attribute, m.", minimum=-12000.0, maximum=12000.0),
    Param("min_cells", 25, "Least number of finite cells in a window.", kind=int, minimum=5),
    Param("max_relative_depth_sigma", 0.25, "Largest accepted depth standard error as a fraction of the depth.", minimum=0.0, exclusive_minimum=True),
    Param("max_misfit_ratio", 0.5, "Largest accepted misfit ratio (equation residual RMS over the spread of its right-hand side).", minimum=0.0, exclusive_minimum=True),
    Param("kinds", ["point", "cluster"], "Kinds of picks solved (other picks get a row with a note).", kind=list, item_kind=str,
          choices=("point", "cluster", "linear", "extended")),
)

COLUMNS = [
    "pick_id", "kind", "pick_easting_m", "pick_northing_m", "easting_m", "northing_m", "upward_m",
    "depth_below_sensor_m", "depth_sigma_m", "easting_sigma_m", "northing_sigma_m", "base_level_nT",
    "structural_index", "si_mode", "window_m", "n_cells", "misfit_ratio", "ok", "note",
]


def _check(settings: dict) -> None:
    for i, w in enumerate(settings["window_sizes_m"]):
        if not w > 0:
            raise ParameterError(f"euler.window_sizes_m[{i}] = {w!r} must be > 0 m")
    for i, si in enumerate(settings["structural_indices"]):
        if not 0 <= si <= 3:
            raise ParameterError(f"euler.structural_indices[{i}] = {si!r} is out of range: expected 0 to 3")


def _windows(grid: xr.Dataset, picks: pd.DataFrame, half: float) -> list:
    """The largest window of each pick (a dict of numpy arrays), read in batches."""
    east = np.asarray(grid["easting"].values, dtype=float)
    north = np.asarray(grid["northing"].values, dtype=float)
    out = []
    for start in range(0, len(picks), BATCH):
        part = picks.iloc[start : start + BATCH]
        lazy, where = [], []
        for pe, pn in zip(part["easting_m"], part["northing_m"]):
            ci = np.flatnonzero(np.abs(east - pe) <= half + 1e-9)
            ri = np.flatnonzero(np.abs(north - pn) <= half + 1e-9)
            if ci.size == 0 or ri.size == 0:
                lazy.append(None)
                where.append(None)
                continue
            sub = grid[list(VARIABLES)].isel(northing=slice(ri[0], ri[-1] + 1), easting=slice(ci[0], ci[-1] + 1))
            lazy.append([sub[v].data for v in VARIABLES])
            where.append((east[ci[0] : ci[-1] + 1], north[ri[0] : ri[-1] + 1]))
        computed = dask.compute(*[x for x in lazy if x is not None])
        it = iter(computed)
        for x, w in zip(lazy, where):
            if x is None:
                out.append(None)
            else:
                vals = next(it)
                out.append({"east": w[0], "north": w[1], **{v: np.asarray(a, dtype=float) for v, a in zip(VARIABLES, vals)}})
    return out


def _solve_pick(win: dict | None, pe: float, pn: float, z: float, settings: dict) -> list[dict]:
    """Solutions of one pick: one per index (fixed) or one (best_fit); each the best window."""
    indices = settings["structural_indices"]
    if win is None:
        return [_empty(si, "the pick lies outside the grid") for si in (indices if settings["si_mode"] == "fixed" else [np.nan])]
    E, N = np.meshgrid(win["east"] - pe, win["north"] - pn)
    per_window = []  # (window, {si: solution})
    for w in sorted(settings["window_sizes_m"]):
        inside = (np.abs(E) <= w / 2 + 1e-9) & (np.abs(N) <= w / 2 + 1e-9)
        args = [np.where(inside, a, np.nan) for a in (E, N)]
        up = np.where(inside, 0.0, np.nan)  # heights relative to the grid
        data = [np.where(inside, win[v], np.nan) for v in VARIABLES]
        sols = {}
        for si in indices:
            sol = solve_window(args[0], args[1], up, *data, si, settings["min_cells"])
            sol.update(_accept(sol, w, settings))
            sols[si] = sol
        per_window.append((w, sols))
    rows = []
    if settings["si_mode"] == "fixed":
        for si in indices:
            rows.append(_pick_best([(w, si, s[si]) for w, s in per_window], pe, pn, z, "fixed"))
    else:
        cands = []
        for w, sols in per_window:
            finite = [(s["misfit_ratio"], si) for si, s in sols.items() if np.isfinite(s["misfit_ratio"])]
            if finite:
                si = min(finite)[1]
                cands.append((w, si, sols[si]))
            else:
                first = next(iter(sols))
                cands.append((w, first, sols[first]))
        rows.append(_pick_best(cands, pe, pn, z, "best_fit"))
    return rows


def _accept(sol: dict, w: float, settings: dict) -> dict:
    if sol["note"]:
        return {"ok": False}
    e0, n0, u0 = sol["location"]
    depth = -u0
    if abs(e0) > w / 2 or abs(n0) > w / 2:
        return {"ok": False, "note": f"solution outside its {w:g} m window"}
    if depth <= 0:
        return {"ok": False, "note": "solution at or above the sensors"}
    if sol["sigma"][2] > settings["max_relative_depth_sigma"] * depth:
        return {"ok": False, "note": f"depth standard error {sol['sigma'][2]:.3g} m above {settings['max_relative_depth_sigma']:g} of the depth"}
    if sol["misfit_ratio"] > settings["max_misfit_ratio"]:
        return {"ok": False, "note": f"misfit ratio {sol['misfit_ratio']:.3g} above {settings['max_misfit_ratio']:g}"}
    return {"ok": True}


def _pick_best(cands: list, pe: float, pn: float, z: float, mode: str) -> dict:
    good = [c for c in cands if c[2]["ok"]]
    pool = good or [c for c in cands if np.isfinite(c[2]["sigma"][2])]
    if not pool:
        notes = "; ".join(sorted({c[2]["note"] for c in cands if c[2]["note"]}))
        row = _empty(cands[0][1] if cands else np.nan, notes or "no window solved")
        row["n_cells"] = max((c[2]["n_cells"] for c in cands), default=0)
        return row
    w, si, s = min(pool, key=lambda c: c[2]["sigma"][2])
    e0, n0, u0 = s["location"]
    return {
        "easting_m": pe + e0, "northing_m": pn + n0, "upward_m": z + u0, "depth_below_sensor_m": -u0,
        "depth_sigma_m": s["sigma"][2], "easting_sigma_m": s["sigma"][0], "northing_sigma_m": s["sigma"][1],
        "base_level_nT": s["base_level"], "structural_index": si, "si_mode": mode, "window_m": w,
        "n_cells": s["n_cells"], "misfit_ratio": s["misfit_ratio"], "ok": bool(s["ok"]), "note": s["note"],
    }


def _empty(si, note: str) -> dict:
    nan = float("nan")
    return {"easting_m": nan, "northing_m": nan, "upward_m": nan, "depth_below_sensor_m": nan, "depth_sigma_m": nan,
            "easting_sigma_m": nan, "northing_sigma_m": nan, "base_level_nT": nan, "structural_index": si, "si_mode": "",
            "window_m": nan, "n_cells": 0, "misfit_ratio": nan, "ok": False, "note": note}


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Euler deconvolution around each pick.

    Parameters
    ----------
    data : dict
        ``data["picking"]["picks"]`` (DataFrame with pick_id, easting_m,
        northing_m, kind) and ``data["enhancement"]["grid"]`` (residual, nT,
        and its three derivatives, nT/m, on (northing, easting)).
    params : dict
        The ``[euler]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext

    Returns
    -------
    lodeline.model.StageResult
        Table ``euler`` (:data:`COLUMNS`), summary with counts and the
        median depth.
    """
    s = validate_table(PARAMS, params, "euler")
    _check(s)
    grid = data["enhancement"]["grid"]
    validate_grid(grid, where="euler")
    missing = [v for v in VARIABLES if v not in grid.data_vars]
    if missing:
        raise DataError(f"euler: the enhancement grid lacks {', '.join(missing)}; add them to enhancement.products and rerun")
    picks = data["picking"].get("picks")
    if picks is None:
        raise DataError("euler: the picking stage gave no 'picks' table; rerun the picking stage")
    need = [c for c in ("pick_id", "easting_m", "northing_m", "kind") if c not in picks.columns]
    if need:
        raise DataError(f"euler: the picks table lacks the columns {', '.join(need)}; rerun the picking stage")
    z = float(grid.attrs.get("grid_elevation_m", s["grid_elevation_m"]))

    solved = picks[picks["kind"].isin(s["kinds"])].reset_index(drop=True)
    windows = _windows(grid, solved, max(s["window_sizes_m"]) / 2)
    rows = []
    for (_, pick), win in zip(solved.iterrows(), windows):
        for row in _solve_pick(win, float(pick["easting_m"]), float(pick["northing_m"]), z, s):
            rows.append({"pick_id": pick["pick_id"], "kind": pick["kind"], "pick_easting_m": pick["easting_m"],
                         "pick_northing_m": pick["northing_m"], **row})
    for _, pick in picks[~picks["kind"].isin(s["kinds"])].iterrows():
        rows.append({"pick_id": pick["pick_id"], "kind": pick["kind"], "pick_easting_m": pick["easting_m"],
                     "pick_northing_m": pick["northing_m"], **_empty(np.nan, f"kind {pick['kind']!r} not solved (euler.kinds)")})
    table = pd.DataFrame(rows, columns=COLUMNS).sort_values(["pick_id", "structural_index"], kind="stable").reset_index(drop=True)
    ok = table["ok"].astype(bool)
    summary = {
        "picks": int(len(picks)),
        "solutions": int(len(table)),
        "accepted": int(ok.sum()),
        "failed_or_rejected": int((~ok).sum()),
        "grid_elevation_m": z,
        "median_depth_below_sensor_m": float(table.loc[ok, "depth_below_sensor_m"].median()) if ok.any() else None,
        "si_mode": s["si_mode"],
    }
    context.log.info("euler: %d solutions for %d picks, %d accepted", len(table), len(picks), int(ok.sum()))
    return StageResult(tables={"euler": table}, summary=summary)


STAGE = Stage(
    name="euler",
    run=run,
    params=PARAMS,
    after=("picking", "enhancement"),
    order=100,
    summary="Windowed Euler deconvolution at each pick: source position, depth below the sensors, background and structural index.",
)
