"""Per-cell detection maps of the detectability stage, tile by tile.

Distance to the nearest accepted reading
    Each reading chunk (whole segments) is first reduced to the positions
    and sensor altitudes of its accepted readings, and a bounding box of
    each chunk is found once. A grid tile then gathers only the readings of
    the chunks whose box reaches within ``search_radius_m`` of the tile,
    keeps those within that reach, builds a k-d tree of them (Bentley 1975,
    ``scipy.spatial.cKDTree``) and queries its own cells. Memory per task
    is one tile and the readings within its reach (not the survey); a cell
    with no accepted reading within the radius gets NaN. We chose the tree
    over a distance transform of rasterised readings because it gives the
    exact distance (a raster quantises it to a cell) and the altitude of the
    very reading found.

Slant distance
    ``r0 = sqrt(d^2 + (h + b)^2)``: ``d`` the horizontal distance, ``h`` the
    altitude (sensor height above the seabed) of that nearest reading and
    ``b`` the burial depth below the seabed.

Least detectable moment and mass
    ``m = threshold r0^n / (C F)`` with the orientation factor ``F`` of the
    elevation angle ``atan(z / d)`` (``steps/_detectability_physics.py``).
    With the picker's matched subspace dipole detector the least moments come
    instead from ``steps/_detectability_detector.py`` (the detector's own
    statistic over the filled cells of its windows). Mass bands as in the
    sizing stage (``steps/_dipole_mass.py``): the high
    (conservative) end is the worst-orientation moment over the moment per
    kilogram of a solid iron sphere; the low (optimistic) end is the
    typical-orientation moment over that moment per kilogram times the
    elongation, hollowness and remanence factors.

Pickable cells
    The picking stage places no pick on a blank cell nor within
    ``edge_margin_m`` of one or of the grid edge; the same test (a Euclidean
    distance transform, ``scipy.ndimage.distance_transform_edt``, over each
    tile with a halo) marks the cells where a pick could lie. A cell that is
    not pickable detects nothing: its least detectable moment and mass are
    NaN and it is never counted detectable.

Area of interest
    A polygon in the survey CRS (``shapely.contains_xy`` on cell centres),
    or, when none is given, the gridded (non-blank) cells.

References
----------
Bentley, J. L. (1975). Multidimensional binary search trees used for
    associative searching. Communications of the ACM 18(9), 509-517.
    [Bentley1975]_
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import dask
import dask.array as da
import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from ._blocks import as_dask
from . import _detectability_physics as phys

__all__ = ["DetectionModel", "accepted_chunks", "chunk_boxes", "nearest_maps", "pickable_mask", "area_mask",
           "cell_maps", "class_masses", "MAP_VARIABLES", "BASIS_LAYERS"]

#: name -> (units, long name) of the per-cell variables, in stack order
MAP_VARIABLES = {
    "horizontal_distance_m": ("m", "horizontal distance to the nearest accepted reading"),
    "sensor_altitude_m": ("m", "sensor height above the seabed at the nearest accepted reading"),
    "slant_distance_m": ("m", "distance from a target at the map burial depth to the nearest accepted reading"),
    "least_moment_worst_Am2": ("A m2", "least detectable moment at the map burial depth, worst orientation"),
    "least_moment_typical_Am2": ("A m2", "least detectable moment at the map burial depth, typical (induced) orientation"),
    "least_mass_high_kg": ("kg", "least detectable mass, conservative end (worst orientation, solid iron sphere)"),
    "least_mass_low_kg": ("kg", "least detectable mass, optimistic end (typical orientation, elongated hollow remanent item)"),
    "class_least_mass_kg": ("kg", "least mass detected at every burial down to the class's maximum, on the class basis"),
    "pickable": ("1", "1 where the picking stage could place a pick (filled, beyond its edge margin)"),
    "class_detectable": ("1", "1 where the target class is detectable, 0 where not; NaN outside the area of interest"),
}


#: the hidden layers after MAP_VARIABLES: class detectable on each basis
BASIS_LAYERS = ("detectable_conservative", "detectable_typical", "detectable_optimistic")


@dataclass(frozen=True)
class DetectionModel:
    """What turns distances into least detectable targets.

    Attributes
    ----------
    table : FactorTable
        Orientation factors for the criterion and inclination.
    threshold : float
        Picking threshold, nT/m (gradient) or nT (total field).
    burial_m : float
        Burial depth of the maps, m below the seabed.
    class_mass_kg : float
        Mass of the target class, kg.
    class_burials_m : tuple of float
        Burial depths at which the class must be detected (0 to its maximum).
    moment_per_kg : float
        Moment of a solid iron sphere per kilogram, A m^2/kg.
    amplification : float
        Elongation x hollowness x remanence factor of the optimistic end.
    class_basis : str
        ``"conservative"``, ``"typical"`` or ``"optimistic"``.
    """

    table: phys.FactorTable
    threshold: float
    burial_m: float
    class_mass_kg: float
    class_burials_m: tuple
    moment_per_kg: float
    amplification: float
    class_basis: str

    def mass(self, d, z, basis: str):
        """Least detectable mass (kg) of a basis at horizontal offset ``d`` and height ``z`` above the target."""
        moment = phys.least_moment(self.table, phys.BASES[basis], self.threshold, d, z)
        per_kg = self.moment_per_kg * (self.amplification if basis == "optimistic" else 1.0)
        return moment / per_kg

    def class_mass(self, d, h, basis: str | None = None):
        """Least mass (kg) detected at every class burial, for sensor altitude ``h`` (the largest over burials)."""
        basis = basis or self.class_basis
        out = None
        for b in self.class_burials_m:
            m = self.mass(d, h + b, basis)
            out = m if out is None else np.fmax(out, m)
        return out


def _accepted(e, n, alt, flags, line, value, *, exclude: int, keep_line: np.ndarray, fallback: float):
    ok = ((flags & np.uint32(exclude)) == 0) & np.isfinite(e) & np.isfinite(n) & np.isfinite(value) & keep_line[line]
    a = np.where(np.isfinite(alt), alt, fallback)
    return np.asarray(e[ok], float), np.asarray(n[ok], float), np.asarray(a[ok], float)


def accepted_chunks(readings, exclude: int, keep_line: np.ndarray, fallback_altitude: float, value: str = "residual"):
    """One delayed (easting, northing, altitude) of accepted readings per reading chunk.

    Accepted: none of the ``exclude`` flags, finite position and finite
    ``value`` (the gridded variable), on a kept line. A NaN altitude is
    replaced by ``fallback_altitude``.
    """
    chunks = readings["easting"].data.chunks

    def blocks(name):
        return as_dask(readings[name], chunks).to_delayed().ravel()

    cols = [blocks(x) for x in ("easting", "northing", "altitude", "flags", "line_index", value)]
    return [dask.delayed(_accepted, pure=True)(*parts, exclude=exclude, keep_line=keep_line, fallback=fallback_altitude)
            for parts in zip(*cols)]


def _bbox(chunk):
    e, n = chunk[0], chunk[1]
    if e.size == 0:
        return (np.inf, -np.inf, np.inf, -np.inf, 0)
    return (float(e.min()), float(e.max()), float(n.min()), float(n.max()), int(e.size))


def chunk_boxes(chunks) -> np.ndarray:
    """(W, E, S, N, count) of each accepted-reading chunk, computed once."""
    boxes = dask.compute(*[dask.delayed(_bbox)(c) for c in chunks])
    return np.array(boxes, dtype=np.float64).reshape(-1, 5)


def _nearest_tile(te, tn, radius, *chunks):
    """(2, ny, nx): horizontal distance to and altitude of the nearest accepted reading (NaN beyond ``radius``)."""
    out = np.full((2, tn.size, te.size), np.nan)
    w, e_, s, n_ = te[0] - radius, te[-1] + radius, tn[0] - radius, tn[-1] + radius
    parts = []
    for ce, cn, ca in chunks:
        sel = (ce >= w) & (ce <= e_) & (cn >= s) & (cn <= n_)
        if sel.any():
            parts.append((ce[sel], cn[sel], ca[sel]))
    if not parts:
        return out
    e = np.concatenate([p[0] for p in parts])
    n = np.concatenate([p[1] for p in parts])
    a = np.concatenate([p[2] for p in parts])
    tree = cKDTree(np.column_stack([e - te[0], n - tn[0]]))  # local coordinates keep precision
    ge, gn = np.meshgrid(te - te[0], tn - tn[0])
    near = _maybe_near(tree, ge, gn, radius)
    dist, idx = tree.query(np.column_stack([ge[near], gn[near]]), k=1, distance_upper_bound=radius)
    found = np.isfinite(dist)
    d = np.full(ge.shape, np.nan)
    alt = np.full(ge.shape, np.nan)
    d[near] = np.where(found, dist, np.nan)
    alt[near] = np.where(found, a[np.minimum(idx, len(a) - 1)], np.nan)
    out[0] = d
    out[1] = alt
    return out


def _maybe_near(tree, ge, gn, radius):
    """Cells that may have a reading within ``radius``: the blocks of cells whose centre has one within
    ``radius`` plus the block's half diagonal (exact: no cell outside them has one).

    Most cells of a grid over lines at an angle to its axes are empty; the
    full nearest-reading search then runs on the others only.
    """
    ny, nx = ge.shape
    cell = max(abs(ge[0, 1] - ge[0, 0]) if nx > 1 else 0.0, abs(gn[1, 0] - gn[0, 0]) if ny > 1 else 0.0)
    block = max(1, int(radius / (4 * cell))) if cell > 0 else 1
    if block < 2:
        return np.ones(ge.shape, bool)
    rows, cols = np.arange(0, ny, block), np.arange(0, nx, block)
    ce = np.array([ge[0, c : c + block].mean() for c in cols])
    cn = np.array([gn[r : r + block, 0].mean() for r in rows])
    half = 0.5 * np.hypot(block * cell, block * cell)
    cge, cgn = np.meshgrid(ce, cn)
    dist, _ = tree.query(np.column_stack([cge.ravel(), cgn.ravel()]), k=1, distance_upper_bound=radius + half * 1.0001)
    hit = np.isfinite(dist).reshape(len(rows), len(cols))
    return np.repeat(np.repeat(hit, block, axis=0), block, axis=1)[:ny, :nx]


def nearest_maps(chunks, boxes, node_e, node_n, tile_rows: tuple, tile_cols: tuple, radius: float) -> da.Array:
    """Dask array (2, ny, nx) of :func:`_nearest_tile`, one task per tile of the given chunking."""
    rows, j = [], 0
    for ny in tile_rows:
        tn = node_n[j : j + ny]
        row, i = [], 0
        for nx in tile_cols:
            te = node_e[i : i + nx]
            hit = ((boxes[:, 4] > 0) & (boxes[:, 0] <= te[-1] + radius) & (boxes[:, 1] >= te[0] - radius)
                   & (boxes[:, 2] <= tn[-1] + radius) & (boxes[:, 3] >= tn[0] - radius))
            use = [chunks[c] for c in np.flatnonzero(hit)]
            if use:
                block = dask.delayed(_nearest_tile, pure=True)(te, tn, radius, *use)
                row.append(da.from_delayed(block, shape=(2, ny, nx), dtype=np.float64))
            else:
                row.append(da.full((2, ny, nx), np.nan, dtype=np.float64, chunks=(2, ny, nx)))
            i += nx
        rows.append(row)
        j += ny
    return da.block(rows)


def pickable_mask(filled: da.Array, spacing: tuple[float, float], margin_m: float) -> da.Array:
    """True where a cell is filled and at least ``margin_m`` from every blank cell and the grid edge.

    The picking stage's test: Euclidean distance to the nearest blank cell
    (off-grid cells count as blank), over each tile with a halo.
    """
    dy, dx = spacing
    halo = (int(math.ceil(margin_m / dy)) + 1, int(math.ceil(margin_m / dx)) + 1)

    def block(mask):
        if margin_m <= 0:
            return mask
        padded = np.pad(mask, 1, constant_values=False)  # the grid edge is blank
        dist = ndimage.distance_transform_edt(padded, sampling=(dy, dx))[1:-1, 1:-1]
        return mask & (dist >= margin_m)

    small = any(min(c) < h for c, h in zip(filled.chunks, halo) if len(c) > 1)
    arr = filled.rechunk(tuple(max(h, 256) for h in halo)) if small else filled
    depth = {a: (halo[a] if len(arr.chunks[a]) > 1 else 0) for a in (0, 1)}
    if any(depth.values()):
        out = arr.map_overlap(block, depth=depth, boundary=False, dtype=bool)
    else:
        out = arr.map_blocks(block, dtype=bool)
    return out.rechunk(filled.chunks)


def area_mask(template: da.Array, node_e, node_n, polygon) -> da.Array:
    """True at cell centres inside ``polygon`` (shapely, survey CRS); the grid's chunks."""
    import shapely

    shapely.prepare(polygon)

    def block(_, block_info=None):
        (j0, j1), (i0, i1) = block_info[0]["array-location"]
        ge, gn = np.meshgrid(node_e[i0:i1], node_n[j0:j1])
        return shapely.contains_xy(polygon, ge, gn)

    return template.map_blocks(block, dtype=bool)


def class_masses(model: DetectionModel, d, h, moments=None) -> dict:
    """Least mass detected at every class burial, per basis (kg): dict basis -> array.

    With ``moments`` (class worst, class typical moments at the class's
    maximum burial, A m^2: the detector criterion) those are used; else the
    peak model at every burial of ``model.class_burials_m``.
    """
    out = {}
    for basis in ("conservative", "typical", "optimistic"):
        per_kg = model.moment_per_kg * (model.amplification if basis == "optimistic" else 1.0)
        if moments is not None:
            out[basis] = moments[0 if basis == "conservative" else 1] / per_kg
        else:
            out[basis] = model.class_mass(d, h, basis)
    return out


def cell_maps(near: np.ndarray, pickable: np.ndarray, area: np.ndarray, model: DetectionModel,
              moments: np.ndarray | None = None) -> np.ndarray:
    """Stack (len(MAP_VARIABLES) + 3, ny, nx) float32 of one tile.

    The first layers are :data:`MAP_VARIABLES`; the last three say where the
    class is detectable on the conservative, typical and optimistic bases
    (1, 0, NaN outside the area). ``near`` is the (2, ny, nx) output of
    :func:`_nearest_tile`; ``moments`` (4, ny, nx), when given, holds the
    least moments of the detector criterion (map burial worst, typical;
    class burial worst, typical), else the peak model is used.
    """
    d, h = near[0], near[1]
    z = h + model.burial_m
    slant = np.hypot(d, z)
    usable = np.isfinite(d) & pickable
    with np.errstate(invalid="ignore", divide="ignore"):
        if moments is None:
            worst = phys.least_moment(model.table, "worst", model.threshold, d, z)
            typical = phys.least_moment(model.table, "typical", model.threshold, d, z)
        else:
            worst, typical = moments[0], moments[1]
        high = worst / model.moment_per_kg
        low = typical / (model.moment_per_kg * model.amplification)
        masses = class_masses(model, d, h, None if moments is None else moments[2:])
    nan = np.nan
    worst, typical, high, low = (np.where(usable, v, nan) for v in (worst, typical, high, low))
    detect = {}
    for basis, mass in masses.items():
        with np.errstate(invalid="ignore"):
            ok = usable & (mass <= model.class_mass_kg)
        detect[basis] = np.where(area, ok.astype(float), nan)
    cls = np.where(usable, masses[model.class_basis], nan)
    stack = [d, h, slant, worst, typical, high, low, cls, pickable.astype(float), detect[model.class_basis],
             detect["conservative"], detect["typical"], detect["optimistic"]]
    return np.stack(stack).astype(np.float32)
