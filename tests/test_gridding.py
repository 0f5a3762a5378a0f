"""Tests of the gridding stage (lodeline.steps.gridding).

Outside references: the dipole field of harmonica.dipole_magnetic (Blakely
1995, Potential Theory in Gravity and Magnetic Applications) as the
noise-free truth; scipy.interpolate.griddata (Delaunay linear and
Clough-Tocher cubic) as the general scattered-data reference the line
gridder is measured against; scipy.spatial.cKDTree for blanking distances;
rasterio (GDAL) reading the GeoTIFF back (OGC GeoTIFF 1.1).
"""

from __future__ import annotations

import logging

import numpy as np
import pytest
from scipy.spatial import cKDTree

import _gridding_synth as synth
from lodeline.model import StageContext, flag_mask, validate_grid
from lodeline.params import ParameterError, validate_table
from lodeline.progress import make_progress
from lodeline.steps import gridding as gridding


def params(**over):
    return validate_table(gridding.PARAMS, over, "gridding")


def grid_of(readings, segments, **over):
    grid, info = gridding.grid_readings(readings, segments, params(**over))
    return grid.compute(), info


def frame(grid, angle_deg=30.0):
    """Along/across coordinates of the grid nodes in the synthetic's frame, m."""
    e, n = np.meshgrid(grid["easting"].values, grid["northing"].values)
    ux, uy = synth._frame(angle_deg)
    de, dn = e - synth.ORIGIN[0], n - synth.ORIGIN[1]
    return e, n, de * ux + dn * uy, -de * uy + dn * ux


@pytest.fixture(scope="module")
def survey():
    return synth.make_survey(n_tracks=20, noise_nT=0.05, ties=True)


def test_tiled_equals_untiled(survey):
    readings, segments = survey
    small, _ = grid_of(readings, segments, tile_cells=24, cell_size_m=0.25, blank_distance_m=1.5)
    whole, _ = grid_of(readings, segments, tile_cells=100_000, cell_size_m=0.25, blank_distance_m=1.5)
    lazy, _ = gridding.grid_readings(readings, segments, params(tile_cells=24, cell_size_m=0.25, blank_distance_m=1.5))
    assert lazy["residual"].data.chunks[0][0] == 24 and len(lazy["residual"].data.chunks[1]) > 3
    a, b = small["residual"].values, whole["residual"].values
    # Same blanking mask, exactly: it depends on distances only.
    assert np.array_equal(np.isfinite(a), np.isfinite(b))
    inside = np.isfinite(b)
    span = np.ptp(b[inside])
    # Issue requirement: difference below 1e-6 of the anomaly range (the
    # method is local, so any difference above rounding is a halo bug).
    assert np.max(np.abs(a[inside] - b[inside])) < 1e-6 * span


@pytest.mark.parametrize("spacing_m", [1.0, 2.0])
def test_accuracy_against_delaunay(spacing_m):
    """RMS error at grid nodes against the noise-free dipole field (harmonica).

    Figures recorded in docs/gridding.md.
    """
    n_tracks = int(round(20 / spacing_m))
    readings, segments = synth.make_survey(n_tracks=n_tracks, spacing_m=spacing_m)
    grids = {}
    for method in ("lines", "linear", "cubic"):
        g, _ = grid_of(readings, segments, method=method, cell_size_m=0.25, blank_distance_m=1.5 * spacing_m)
        grids[method] = g["residual"].values
    e, n, a, c = frame(g)
    truth = synth.field(e, n)
    # Inside the surveyed strip (interpolation, not extrapolation, for every method).
    inner = (a > 1) & (a < 55) & (c > 0.5) & (c < (n_tracks - 1) * spacing_m - 0.5)
    ok = inner & np.all([np.isfinite(v) for v in grids.values()], axis=0)
    assert ok.sum() > 0.9 * inner.sum()
    rms = {m: float(np.sqrt(np.mean((v[ok] - truth[ok]) ** 2))) for m, v in grids.items()}
    span = float(np.ptp(truth[ok]))
    print(f"spacing {spacing_m} m, anomaly range {span:.1f} nT, RMS error nT: {rms}")
    # The fast default must be at least as accurate as Delaunay linear (issue requirement).
    assert rms["lines"] <= rms["linear"]
    # And close to the C1 Clough-Tocher cubic: within 1.5 times its error
    # (a 1-D cubic across tracks against a 2-D C1 cubic; we measured 1.1x).
    assert rms["lines"] <= 1.5 * rms["cubic"]
    # Absolute: under 2 % of the anomaly range on 1 m tracks, 3 % on 2 m
    # tracks (anomalies ~3 m wide are undersampled across at 2 m).
    assert rms["lines"] < (0.02 if spacing_m == 1.0 else 0.03) * span


def test_blanking(survey):
    readings, segments = survey
    blank = 1.2
    g, info = grid_of(readings, segments, cell_size_m=0.25, blank_distance_m=blank)
    tree = cKDTree(np.column_stack([readings["easting"].values, readings["northing"].values]))
    e, n, a, c = frame(g)
    dist, _ = tree.query(np.column_stack([e.ravel(), n.ravel()]))
    dist = dist.reshape(e.shape)
    values = g["residual"].values
    # Never a value farther than the blanking distance from a reading.
    assert np.isfinite(values).any()
    assert not np.isfinite(values[dist > blank]).any()
    # Cells within the blanking distance and inside the along-track range of the tracks are filled.
    near = (dist <= blank) & (a > 0.3) & (a < 55.7)
    assert np.isfinite(values[near]).all()


def test_geotiff_and_quicklook(survey, tmp_path):
    rasterio = pytest.importorskip("rasterio")
    from rasterio.crs import CRS

    readings, segments = survey
    context = StageContext(
        survey={"crs": "EPSG:32631", "crs_wkt": synth.CRS_WKT, "name": "t"},
        inputs={},
        scratch=tmp_path,
        log=logging.getLogger("test"),
        progress=make_progress(False),
    )
    result = gridding.run({"levelling": {"readings": readings, "segments": segments}},
                          params(cell_size_m=0.5, blank_distance_m=1.5, tile_cells=32), context)
    grid = result.datasets["grid"]
    validate_grid(grid)
    assert result.files["grid_residual.png"].stat().st_size > 10_000
    with rasterio.open(result.files["grid_residual.tif"]) as src:
        assert src.crs == CRS.from_epsg(32631)
        t = src.transform
        e, n = grid["easting"].values, grid["northing"].values
        # Origin at the north-west corner of the north-west cell, square cells of 0.5 m.
        assert (t.a, t.e, t.b, t.d) == (0.5, -0.5, 0.0, 0.0)
        assert t.c == pytest.approx(e[0] - 0.25, abs=1e-9)
        assert t.f == pytest.approx(n[-1] + 0.25, abs=1e-9)
        band = src.read(1)
        assert src.count == 1 and src.nodata == -99999.0
    values = grid["residual"].values
    j, i = np.argwhere(np.isfinite(values))[len(np.argwhere(np.isfinite(values))) // 2]
    row, col = src.index(e[i], n[j])
    # float32 in the file: a relative rounding of 6e-8.
    assert band[row, col] == pytest.approx(values[j, i], rel=1e-6, abs=1e-6)
    assert np.all(band[np.flipud(~np.isfinite(values))] == -99999.0)
    assert 0 < result.summary["coverage_fraction"] <= 1
    assert grid.attrs["main_field_inclination_deg"] == synth.INCLINATION_DEG


def test_flagged_readings_left_out(survey):
    readings, segments = survey
    spike_at = readings.sizes["reading"] // 3
    res = readings["residual"].values.copy()
    res[spike_at] += 1000.0
    flags = readings["flags"].values.copy()
    flags[spike_at] |= np.uint32(flag_mask("spike"))
    spiked = readings.assign(residual=(("reading",), res, readings["residual"].attrs),
                             flags=(("reading",), flags, readings["flags"].attrs))
    clean, _ = grid_of(readings, segments, cell_size_m=0.25, blank_distance_m=1.5)
    left_out, info = grid_of(spiked, segments, cell_size_m=0.25, blank_distance_m=1.5)
    kept, _ = grid_of(spiked, segments, cell_size_m=0.25, blank_distance_m=1.5, exclude_flags=[])
    # With the flag honoured the spike is absent (the grid differs from the
    # clean one only by the missing reading: well under 1 nT, against 1000).
    diff = np.nanmax(np.abs(left_out["residual"].values - clean["residual"].values))
    assert diff < 1.0
    assert np.nanmax(kept["residual"].values) > 500.0
    assert info["readings_left_out"] == 1


def test_chunking_and_variables(survey):
    readings, segments = survey
    one, _ = grid_of(readings, segments, cell_size_m=0.25, blank_distance_m=1.5, variables=["residual", "total_field"])
    lengths = (segments["stop"] - segments["start"]).values
    per_segment = readings.chunk({"reading": tuple(int(x) for x in lengths)})
    many, _ = grid_of(per_segment, segments, cell_size_m=0.25, blank_distance_m=1.5, variables=["residual", "total_field"])
    validate_grid(many)
    assert tuple(many.dims) == ("northing", "easting")
    # Readings chunking must not change a single value.
    np.testing.assert_array_equal(one["residual"].values, many["residual"].values)
    # total_field = residual + 49900 nT in the synthetic; the Bessel Hermite
    # is linear in the data, so the grids differ by that constant (to
    # float64 rounding of 5e4 nT: 1e-8).
    d = many["total_field"].values - many["residual"].values
    assert np.nanmax(np.abs(d - 49900.0)) < 1e-8
    assert many["total_field"].attrs["units"] == "nT"


def test_defaults_from_spacing(survey):
    readings, segments = survey
    _, info = gridding.grid_readings(readings, segments, params())
    # Tracks 1 m apart: cell a quarter of it, blanking 1.5 times it.
    assert info["track_spacing_m"] == pytest.approx(1.0, abs=0.02)
    assert info["cell_size_m"] == 0.25 and info["blank_distance_m"] == 1.5
    assert info["line_direction_deg"] % 180 == pytest.approx(30.0, abs=0.5)


def test_bad_variable(survey):
    readings, segments = survey
    with pytest.raises(ParameterError, match="gridding.variables"):
        gridding.grid_readings(readings, segments, params(variables=["nope"]))


def test_tie_lines_only_fill(survey):
    """Tie lines fill cells the survey lines leave empty and change no other cell."""
    readings, segments = survey
    with_ties, info_with = grid_of(readings, segments, cell_size_m=0.25, blank_distance_m=1.5)
    without, info_without = grid_of(readings, segments, cell_size_m=0.25, blank_distance_m=1.5,
                                    include_tie_lines=False)
    a, b = with_ties["residual"].values, without["residual"].values
    tie_readings = int(np.isin(readings["line_index"].values, [20, 21]).sum())
    assert info_with["readings_used"] - info_without["readings_used"] == tie_readings
    both = np.isfinite(a) & np.isfinite(b)
    # Same survey-line cells, same values (to rounding); the ties add cells.
    np.testing.assert_allclose(a[both], b[both], rtol=0, atol=1e-9)
    assert np.isfinite(a).sum() > np.isfinite(b).sum()
