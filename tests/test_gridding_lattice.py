"""The compiled lattice kernels of the line gridder against the reference implementation.

``lodeline.steps._gridding_lattice`` computes, for the nodes of a regular
lattice, the numbers that ``lodeline.steps._gridding_lines.grid_tile`` (the
reference, numpy, any set of points) computes; the blanking kernel gives the
distances of ``scipy.spatial.cKDTree`` (outside reference). The synthetic
survey is the dipole field of ``tests/_gridding_synth.py`` (harmonica).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

import _gridding_synth as synth
from lodeline.steps import _gridding_lattice as lattice
from lodeline.steps import _gridding_lines as lines


def _arrays(readings):
    e = readings["easting"].values
    n = readings["northing"].values
    v = readings["residual"].values[:, None]
    track = readings["line_index"].values.astype(np.int64) * 65536 + readings["sensor_index"].values
    return e, n, v, track


@pytest.mark.parametrize("across", ["bessel", "pchip"])
@pytest.mark.parametrize("angle_deg", [30.0, 75.0])
def test_lattice_kernel_equals_reference(across, angle_deg):
    readings, _ = synth.make_survey(n_tracks=8, length_m=20.0, angle_deg=angle_deg, noise_nT=0.05, ties=True)
    e, n, v, track = _arrays(readings)
    node_e = np.arange(np.floor(e.min()) - 2, np.ceil(e.max()) + 2, 0.25)
    node_n = np.arange(np.floor(n.min()) - 2, np.ceil(n.max()) + 2, 0.25)
    kw = dict(angle_deg=angle_deg, reach_m=3.0, max_gap_m=1.5, min_sep_m=0.125, across=across)
    fast = lattice.grid_lattice(e, n, v, track, node_e, node_n, **kw)[0]
    ge, gn = np.meshgrid(node_e, node_n)
    ref = lines.grid_tile(e, n, v, track, ge.ravel(), gn.ravel(), **kw)[0].reshape(ge.shape)
    # Same nodes filled, and the same values to rounding: the kernel reorders
    # no arithmetic beyond the along-track interpolation formula (a few ulps
    # of values of order 10 nT, so 1e-9 nT is far above rounding and far
    # below any real difference).
    assert np.isfinite(fast).sum() > 0.3 * fast.size  # a diagonal strip in its bounding box
    assert np.array_equal(np.isfinite(fast), np.isfinite(ref))
    ok = np.isfinite(ref)
    assert np.max(np.abs(fast[ok] - ref[ok])) < 1e-9


def test_blanking_kernel_against_kdtree():
    rng = np.random.default_rng(3)
    e = rng.uniform(0, 20, 500)
    n = rng.uniform(0, 10, 500)
    node_e = np.arange(-3, 23, 0.25)
    node_n = np.arange(-3, 13, 0.25)
    mask = lattice.blank_lattice(e, n, node_e, node_n, 1.2)
    ge, gn = np.meshgrid(node_e, node_n)
    dist, _ = cKDTree(np.column_stack([e, n])).query(np.column_stack([ge.ravel(), gn.ravel()]))
    dist = dist.reshape(ge.shape)
    # Exactly the nodes within 1.2 m (none sits within rounding of the limit here).
    assert 0.2 < mask.mean() < 0.95
    assert np.array_equal(mask, dist <= 1.2)
