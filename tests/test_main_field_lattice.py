"""The compiled lattice interpolation of the main_field stage against scipy's.

``lodeline.steps._main_field_lattice.interpolate`` (numba loop) is checked
against :class:`scipy.interpolate.RegularGridInterpolator` with
``method="linear"`` (outside reference: the general-purpose library's
multilinear interpolation on a rectilinear grid) on a lattice with a
non-uniform time axis (a 1 January node), points in and out of the lattice,
in order and shuffled, and NaN / NaT coordinates.
"""

from __future__ import annotations

import numpy as np
from scipy.interpolate import RegularGridInterpolator

from lodeline.steps import _main_field_lattice as lattice_mod


def _lattice(rng):
    east = np.arange(3) * 1000.0 + 493000.0
    north = np.arange(4) * 1000.0 + 5994000.0
    elev = np.array([-100.0, 0.0, 100.0])
    time = lattice_mod.time_axis(np.datetime64("2025-12-31T10:00"), np.datetime64("2026-01-02T05:00"), 5 * 3600 * 10**9)
    values = 49_000.0 + rng.normal(0, 50, (east.size, north.size, elev.size, time.size))
    return lattice_mod.Lattice(east, north, elev, time, values)


def test_interpolation_equals_scipy():
    rng = np.random.default_rng(7)
    lat = _lattice(rng)
    assert np.unique(np.diff(lat.seconds)).size > 1  # the time axis is not uniform (1 January node)
    m = 5000
    e = rng.uniform(lat.easting[0] - 100, lat.easting[-1] + 100, m)
    n = np.sort(rng.uniform(lat.northing[0], lat.northing[-1], m))
    z = rng.uniform(-120, 120, m)
    t0 = lat.time[0].astype(np.int64)
    span = lat.time[-1].astype(np.int64) - t0
    t = np.sort(t0 + rng.integers(0, span, m)).astype("datetime64[ns]")
    e[:3] = lat.easting[[0, -1, 1]]  # nodes and the upper edge are inside
    e[10], n[11], z[12] = np.nan, np.nan, np.nan
    t[13] = np.datetime64("NaT")
    ref_table = RegularGridInterpolator(lat.axes, lat.values, method="linear", bounds_error=False, fill_value=np.nan)
    secs = (t.astype(np.int64) - t0) / 1e9
    secs[13] = np.nan
    points = np.column_stack([e, n, z, secs])
    bad = ~np.isfinite(points).all(axis=1)
    points[bad] = 0.0
    ref = ref_table(points)
    ref[bad] = np.nan
    for order in (np.arange(m), rng.permutation(m)):
        got = lattice_mod.interpolate(e[order], n[order], z[order], t[order], lattice=lat)
        want = ref[order]
        assert np.array_equal(np.isnan(got), np.isnan(want))
        assert np.isnan(want).sum() > 100  # some points outside in easting and elevation
        # Same multilinear interpolant: only the order of the floating-point
        # sums differs (values ~5e4 nT, so 1e-8 nT is a few hundred ulps).
        ok = ~np.isnan(want)
        assert np.max(np.abs(got[ok] - want[ok])) < 1e-8
