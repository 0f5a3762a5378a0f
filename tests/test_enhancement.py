"""Tests of the grid-enhancement stage (work-in-progress module name).

Outside references used here:

* the closed-form field of a point dipole, B = mu0 / (4 pi) (3 (m . r) r / r**5
  - m / r**3), and the total-field anomaly as its projection on the unit
  main-field vector (Blakely 1995, Potential Theory in Gravity and Magnetic
  Applications, ch. 4 and ch. 12; from memory), with its spatial
  derivatives differentiated by hand; the hand derivative is itself checked
  by central differences at +-1 mm, and the field against harmonica's
  ``dipole_magnetic`` (a general-purpose reference library);
* harmonica 0.7's FFT transforms (``derivative_upward``,
  ``derivative_easting(method="fft")``, ``upward_continuation``,
  ``reduction_to_pole``, ``total_gradient_amplitude``, ``tilt_angle``) on a
  NaN-free grid;
* rasterio reading back the GeoTIFF (CRS, geotransform, nodata).

Relative RMS figures are over the central half of the grid in each
direction (the edges trimmed), RMS(difference) / RMS(reference).
"""

from __future__ import annotations

import logging

import dask.array as da
import numpy as np
import pytest
import xarray as xr
from pyproj import CRS
from scipy import ndimage

from _dipole import dipole, unit_enu
from lodeline.model import DataError, StageContext, validate_grid
from lodeline.params import ParameterError
from lodeline.progress import make_progress
from lodeline.steps import enhancement as enh
from lodeline.steps._enhancement_fft import PRODUCTS, rtp_operator, wavenumbers

CRS_WKT = CRS.from_epsg(32631).to_wkt()
SPACING = 0.25  # m
N = 256  # cells a side: 64 m, 16 source depths
FIELD = (68.7, 2.0)  # inclination, grid declination, degrees


# --------------------------------------------------------------------------
# Synthetic builders
# --------------------------------------------------------------------------


def lattice(n=N, spacing=SPACING, origin=(500_000.0, 5_700_000.0)):
    east = origin[0] + np.arange(n) * spacing
    north = origin[1] + np.arange(n) * spacing
    return east, north


def make_grid(values, east, north, chunks=None, inclination=FIELD[0], grid_declination=FIELD[1]):
    """A grid dataset following the model conventions (residual in nT, dask tiles)."""
    data = da.from_array(values, chunks=chunks or values.shape)
    ds = xr.Dataset(
        {"residual": (("northing", "easting"), data, {"units": "nT", "long_name": "residual"})},
        coords={
            "northing": ("northing", north, {"units": "m"}),
            "easting": ("easting", east, {"units": "m"}),
        },
        attrs={
            "crs_wkt": CRS_WKT,
            "main_field_nT": 49_924.0,
            "main_field_inclination_deg": inclination,
            "main_field_declination_deg": grid_declination + 1.0,
            "main_field_grid_declination_deg": grid_declination,
        },
    )
    validate_grid(ds, where="test builder")
    return ds


def context(tmp_path):
    return StageContext(
        survey={"crs": "EPSG:32631", "crs_wkt": CRS_WKT, "name": "t"},
        inputs={},
        scratch=tmp_path,
        log=logging.getLogger("test"),
        progress=make_progress(False),
    )


def run_stage(tmp_path, grid, **params):
    params = {"geotiff": False, "quicklook": False, **params}
    return enh.run({"gridding": {"grid": grid}}, params, context(tmp_path))


def dipole_grid(up=0.0, m_dir=FIELD, f_dir=FIELD, depth=4.0, n=N):
    east, north = lattice(n)
    e, nn = np.meshgrid(east, north)
    source = (east.mean() + 0.1, north.mean() - 0.05, -depth)
    total, grad = dipole(e, nn, np.full_like(e, up), source, 10.0, m_dir, f_dir)
    return east, north, total, grad


CENTRE = (slice(N // 4, 3 * N // 4), slice(N // 4, 3 * N // 4))


def rel_rms(a, b, where=CENTRE):
    a, b = np.asarray(a)[where], np.asarray(b)[where]
    return float(np.sqrt(np.mean((a - b) ** 2)) / np.sqrt(np.mean(b**2)))


# --------------------------------------------------------------------------
# The references themselves
# --------------------------------------------------------------------------


def test_closed_form_dipole_agrees_with_harmonica_and_finite_differences():
    """The hand-derived reference: field vs harmonica.dipole_magnetic, gradient vs +-1 mm central differences."""
    import harmonica as hm

    east, north, total, grad = dipole_grid(n=64)
    e, n = np.meshgrid(east, north)
    source = (east.mean() + 0.1, north.mean() - 0.05, -4.0)
    m = 10.0 * unit_enu(*FIELD)
    be, bn, bu = hm.dipole_magnetic(
        (e.ravel(), n.ravel(), np.zeros(e.size)), tuple(np.array([s]) for s in source), tuple(np.array([c]) for c in m), field="b"
    )
    f = unit_enu(*FIELD)
    ref = (f[0] * be + f[1] * bn + f[2] * bu).reshape(e.shape)
    # float64 round-off on fields of ~30 nT: 1e-6 nT is far below any filter error tested here
    assert np.max(np.abs(total - ref)) < 1e-6
    h = 1e-3
    for j in range(3):
        step = np.zeros(3)
        step[j] = h
        plus, _ = dipole(e + step[0], n + step[1], step[2] + 0 * e, source, 10.0, FIELD, FIELD)
        minus, _ = dipole(e - step[0], n - step[1], -step[2] + 0 * e, source, 10.0, FIELD, FIELD)
        fd = (plus - minus) / (2 * h)
        # central-difference truncation error ~ h**2 / 6 * T''' / T' ~ (1e-3 / 4 m)**2: ~1e-7 relative
        assert np.max(np.abs(fd - grad[j])) / np.max(np.abs(grad[j])) < 1e-5


# --------------------------------------------------------------------------
# Accuracy against the closed form
# --------------------------------------------------------------------------


def test_derivatives_and_total_gradient_match_the_closed_form(tmp_path):
    """FFT derivatives and total gradient amplitude vs the analytic dipole gradient (Blakely 1995)."""
    east, north, total, grad = dipole_grid()
    result = run_stage(tmp_path, make_grid(total, east, north))
    out = result.datasets["grid"]
    tga = np.sqrt(grad[0] ** 2 + grad[1] ** 2 + grad[2] ** 2)
    # The limit, 2e-3: the field is cut at the grid edge, 32 m = 8 depths from the
    # source, where it is (1/8)**3 ~ 2e-3 of its peak; the part of the field
    # missing beyond the edge (replaced by the tapered reflection) perturbs the
    # filtered field by about that fraction. Spectral aliasing is negligible:
    # exp(-|k| 4 m) at the Nyquist wavenumber (4 pi rad/m) is e-22. Measured: 1e-5 to 3e-4.
    assert rel_rms(out["derivative_upward"].values, grad[2]) < 2e-3
    assert rel_rms(out["derivative_easting"].values, grad[0]) < 2e-3
    assert rel_rms(out["derivative_northing"].values, grad[1]) < 2e-3
    assert rel_rms(out["total_gradient_amplitude"].values, tga) < 2e-3
    # tilt angle: same reference, where the gradient is not negligible (a ratio of small numbers elsewhere)
    tilt = np.arctan2(-grad[2], np.hypot(grad[0], grad[1]))
    strong = np.zeros_like(tga, dtype=bool)
    strong[CENTRE] = tga[CENTRE] > 0.01 * tga.max()
    # 0.01 rad: where the gradient is at least 1 % of its peak, gradient errors of the size
    # allowed above (2e-3 of the RMS) move the angle by a few 1e-3 rad. Measured: 2e-3 rad.
    assert np.max(np.abs(out["tilt_angle"].values[strong] - tilt[strong])) < 0.01
    for name in PRODUCTS:
        assert out[name].attrs["units"] == {"tilt_angle": "rad", "reduced_to_pole": "nT", "upward_continued": "nT"}.get(name, "nT/m")
        assert out[name].attrs["halo_cells"] == 64
    validate_grid(out, where="enhancement output")


def test_reduction_to_pole_matches_the_vertical_field_dipole(tmp_path):
    """Inclined-field dipole (inc 68.7, dec 2) reduced to the pole vs a vertical-field, vertically magnetised dipole (Blakely 1995)."""
    east, north, total, _ = dipole_grid()
    _, _, vertical, _ = dipole_grid(m_dir=(90.0, 0.0), f_dir=(90.0, 0.0))
    out = run_stage(tmp_path, make_grid(total, east, north), products=["reduced_to_pole"]).datasets["grid"]
    # 5e-3: as for the derivatives, but the reduction-to-pole operator has a longer
    # spatial response (homogeneous of degree 0 in |k|, decaying as 1/r**2), so the
    # truncated field weighs more. Measured: 6e-4.
    assert rel_rms(out["reduced_to_pole"].values, vertical) < 5e-3
    assert out["reduced_to_pole"].attrs["inclination_deg"] == FIELD[0]
    assert out["reduced_to_pole"].attrs["stabilised"] is False


def test_upward_continuation_matches_the_forward_model(tmp_path):
    """Upward continuation by 1.5 m vs the closed-form dipole field computed 1.5 m higher."""
    east, north, total, _ = dipole_grid()
    _, _, higher, _ = dipole_grid(up=1.5)
    out = run_stage(tmp_path, make_grid(total, east, north), products=["upward_continued"], upward_continuation_m=1.5).datasets["grid"]
    # 2e-3: the truncation argument of the derivatives test. Measured: ~3e-4.
    assert rel_rms(out["upward_continued"].values, higher) < 2e-3
    assert out["upward_continued"].attrs["upward_continuation_m"] == 1.5


# --------------------------------------------------------------------------
# Tiles, blanks
# --------------------------------------------------------------------------


def _survey_with_blanks(n=384):
    east, north = lattice(n)
    e, nn = np.meshgrid(east, north)
    rng = np.random.default_rng(7)
    total = np.zeros_like(e)
    for _ in range(6):
        source = (east[0] + rng.uniform(20, 76), north[0] + rng.uniform(20, 76), -rng.uniform(3, 5))
        total += dipole(e, nn, 0 * e, source, rng.uniform(2, 20), FIELD, FIELD)[0]
    total[:20, :] = np.nan  # a blank strip along the south edge
    total[:, -30:] = np.nan  # and the east edge
    total[150:170, 200:230] = np.nan  # a hole
    return east, north, total


def test_tiled_and_whole_grid_agree_inside_the_mask(tmp_path):
    east, north, total = _survey_with_blanks()
    whole = run_stage(tmp_path / "w", make_grid(total, east, north)).datasets["grid"]
    tiled = run_stage(tmp_path / "t", make_grid(total, east, north, chunks=(96, 96)), halo_cells=64).datasets["grid"]
    assert tiled["residual"].data.chunks == ((96,) * 4, (96,) * 4)
    assert tiled["derivative_upward"].data.chunks == ((96,) * 4, (96,) * 4)
    valid = np.isfinite(total)
    inner = ndimage.binary_erosion(valid, iterations=16)  # 4 m from any blank
    for name in PRODUCTS:
        a, b = tiled[name].values, whole[name].values
        np.testing.assert_array_equal(np.isnan(a), ~valid, err_msg=name)
        if name == "tilt_angle":
            continue
        # 1.5e-2 (4e-2 for the reduction to the pole, whose response is longest):
        # the filter response beyond a 64-cell (16 m) halo, plus the tile-local fill
        # of the blanks; measured 2e-3..6e-3 (1.4e-2 for the reduction to the pole).
        limit = 4e-2 if name == "reduced_to_pole" else 1.5e-2
        assert rel_rms(a, b, inner) < limit, name
    tga = whole["total_gradient_amplitude"].values
    strong = inner & (tga > 0.05 * np.nanmax(tga))
    # where the gradient is at least 5 % of its peak, gradient errors of 1.5e-2 of the RMS
    # move the tilt by a few hundredths of a radian: 0.05. Measured: 0.01 rad.
    assert np.max(np.abs(tiled["tilt_angle"].values[strong] - whole["tilt_angle"].values[strong])) < 0.05
    # the halo matters: without it the tile edges show
    bare = run_stage(tmp_path / "b", make_grid(total, east, north, chunks=(96, 96)), halo_cells=0).datasets["grid"]
    assert rel_rms(bare["derivative_upward"].values, whole["derivative_upward"].values, inner) > 2 * rel_rms(
        tiled["derivative_upward"].values, whole["derivative_upward"].values, inner
    )


def test_blank_hole_is_filled_and_masked_again(tmp_path):
    """A hole away from the source: the derivatives around it still match the closed form."""
    east, north, total, grad = dipole_grid()
    holed = total.copy()
    holed[40:60, 150:180] = np.nan
    out = run_stage(tmp_path, make_grid(holed, east, north, chunks=(128, 128))).datasets["grid"]
    assert np.isnan(out["derivative_upward"].values[40:60, 150:180]).all()
    assert np.isfinite(out["derivative_upward"].values[np.isfinite(holed)]).all()
    # inside the central half (the hole is outside it), with the hole filled: 5e-3,
    # a little above the 2e-3 of the unbroken grid for the filled hole 2-4 m from its edge.
    # Measured: 1.0e-3.
    assert rel_rms(out["derivative_upward"].values, grad[2]) < 5e-3


# --------------------------------------------------------------------------
# harmonica as the reference library
# --------------------------------------------------------------------------


def test_same_as_harmonica_on_a_nan_free_grid(tmp_path):
    import harmonica as hm

    east, north, total, _ = dipole_grid()
    out = run_stage(tmp_path, make_grid(total, east, north), upward_continuation_m=1.0).datasets["grid"]
    grid = xr.DataArray(total, coords={"northing": north, "easting": east}, dims=("northing", "easting"))
    ref = {
        "derivative_upward": hm.derivative_upward(grid),
        "derivative_easting": hm.derivative_easting(grid, method="fft"),
        "derivative_northing": hm.derivative_northing(grid, method="fft"),
        "upward_continued": hm.upward_continuation(grid, 1.0),
        "reduced_to_pole": hm.reduction_to_pole(grid, inclination=FIELD[0], declination=FIELD[1]),
        "total_gradient_amplitude": hm.total_gradient_amplitude(grid),
        # harmonica's tilt uses the upward derivative: minus ours (see the stage docstring)
        "tilt_angle": -hm.tilt_angle(grid),
    }
    for name, expected in ref.items():
        values = np.asarray(expected.values)
        # harmonica transforms the grid unpadded, we pad and taper; the grid's edge field
        # (2e-3 of the peak) sets the difference, as in the closed-form tests: 3e-3.
        # harmonica's total gradient amplitude takes finite-difference horizontal
        # derivatives, whose error, (cell / 2 m anomaly scale)**2 / 6 ~ 3e-3 at 0.25 m
        # cells over a 4 m deep source, sets the limit there: 1e-2.
        # Measured: 2e-5..2e-4 (3.4e-3 for the total gradient amplitude).
        limit = 1e-2 if name == "total_gradient_amplitude" else 3e-3
        if name == "tilt_angle":
            tga = out["total_gradient_amplitude"].values
            strong = np.zeros(tga.shape, dtype=bool)
            strong[CENTRE] = tga[CENTRE] > 0.01 * tga.max()
            # 0.03 rad: harmonica's finite-difference horizontal derivatives again. Measured: 6.5e-3.
            assert np.max(np.abs(out[name].values[strong] - values[strong])) < 0.03
            continue
        ours = out[name].values
        if name == "reduced_to_pole":
            # harmonica's operator is 0/0 at k = 0, ours keeps the mean (multiplier 1):
            # compare without the level of the compared window
            ours = ours - ours[CENTRE].mean()
            values = values - values[CENTRE].mean()
        assert rel_rms(ours, values) < limit, name


# --------------------------------------------------------------------------
# Low inclination
# --------------------------------------------------------------------------


def test_low_inclination_warns_and_stabilises(tmp_path, caplog):
    east, north, total, _ = dipole_grid(m_dir=(10.0, 2.0), f_dir=(10.0, 2.0))
    rng = np.random.default_rng(3)
    noisy = total + rng.normal(0.0, 0.05, total.shape)  # 0.05 nT sensor noise
    grid = make_grid(noisy, east, north, inclination=10.0)
    with caplog.at_level(logging.WARNING, logger="test"):
        result = run_stage(tmp_path, grid, products=["reduced_to_pole"])
    assert any("below rtp_stabilise_below_deg" in r.getMessage() for r in caplog.records)
    assert result.summary["rtp_stabilised"] is True
    rtp = result.datasets["grid"]["reduced_to_pole"].values
    assert np.isfinite(rtp).all()
    # the stabilised amplitude is bounded by 1 / sin(20 deg)**2 = 8.55 (analytic bound of the
    # pseudo-inclination operator), so the 0.05 nT noise grows by at most that factor
    ke, kn, k = wavenumbers((256, 256), (SPACING, SPACING))
    stabilised = rtp_operator(ke, kn, k, (10.0, 2.0), None, 20.0)
    exact = rtp_operator(ke, kn, k, (10.0, 2.0), None, 0.0)
    assert np.max(np.abs(stabilised)) <= 1.0 / np.sin(np.deg2rad(20.0)) ** 2 * (1 + 1e-12)
    assert np.max(np.abs(exact)) > 30.0  # 1 / sin(10 deg)**2 = 33 along magnetic east-west
    # the phase is that of the exact operator
    nz = k > 0
    np.testing.assert_allclose(np.angle(stabilised[nz]), np.angle(exact[nz]), atol=1e-9)
    # and above the limit the operator is the exact one
    np.testing.assert_array_equal(rtp_operator(ke, kn, k, FIELD, None, 20.0), rtp_operator(ke, kn, k, FIELD, None, 0.0))


def test_no_warning_at_high_inclination(tmp_path, caplog):
    east, north, total, _ = dipole_grid(n=64)
    with caplog.at_level(logging.WARNING, logger="test"):
        result = run_stage(tmp_path, make_grid(total, east, north), products=["reduced_to_pole"])
    assert not [r for r in caplog.records if r.levelno >= logging.WARNING]
    assert result.summary["rtp_stabilised"] is False


# --------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------


def test_geotiff_has_the_crs_and_geotransform(tmp_path):
    import rasterio
    from rasterio.crs import CRS as RCRS

    east, north, total, _ = dipole_grid(n=64)
    total[:5, :7] = np.nan
    result = run_stage(
        tmp_path, make_grid(total, east, north), products=["derivative_upward", "total_gradient_amplitude"], geotiff=True, quicklook=True
    )
    assert sorted(result.files) == [
        "derivative_upward.png",
        "derivative_upward.tif",
        "total_gradient_amplitude.png",
        "total_gradient_amplitude.tif",
    ]
    grid = result.datasets["grid"]
    with rasterio.open(result.files["total_gradient_amplitude.tif"]) as src:
        assert src.crs == RCRS.from_epsg(32631)
        t = src.transform
        assert (t.a, t.b, t.d, t.e) == (SPACING, 0.0, 0.0, -SPACING)
        # upper-left corner: west edge and north edge of the cells (centres +- half a cell)
        assert t.c == pytest.approx(east[0] - SPACING / 2, abs=1e-9)
        assert t.f == pytest.approx(north[-1] + SPACING / 2, abs=1e-9)
        band = src.read(1)
        assert np.isnan(src.nodata)
        assert src.tags()["units"] == "nT/m"
    tga = grid["total_gradient_amplitude"].values.astype(np.float32)
    # row 0 is the northernmost row: the grid (south to north) flipped; blanks stay NaN
    np.testing.assert_array_equal(band, tga[::-1])
    assert np.isnan(band[-5:, :7]).all()
    # the pixel containing a point maps back to the grid cell containing it
    row, col = rasterio.transform.rowcol(t, east[10], north[20])
    assert band[row, col] == tga[20, 10]
    with open(result.files["derivative_upward.png"], "rb") as fh:
        assert fh.read(8) == b"\x89PNG\r\n\x1a\n"


# --------------------------------------------------------------------------
# Parameters and input checks
# --------------------------------------------------------------------------


def test_bad_input_gives_clear_errors(tmp_path):
    east, north, total, _ = dipole_grid(n=32)
    grid = make_grid(total, east, north)
    with pytest.raises(ParameterError, match="products"):
        run_stage(tmp_path, grid, products=["vertical_derivative"])
    with pytest.raises(DataError, match="residual"):
        run_stage(tmp_path, grid.rename({"residual": "field"}))
    bent = grid.assign_coords(easting=np.r_[east[:-1], east[-1] + 1.0])
    with pytest.raises(DataError, match="easting"):
        run_stage(tmp_path, bent)
    bare = grid.copy()
    bare.attrs = {"crs_wkt": CRS_WKT}
    with pytest.raises(DataError, match="rtp_inclination_deg"):
        run_stage(tmp_path, bare)
    # an override makes it work, and is recorded
    out = run_stage(tmp_path, bare, products=["reduced_to_pole"], rtp_inclination_deg=60.0, rtp_declination_deg=0.0)
    assert out.datasets["grid"]["reduced_to_pole"].attrs["inclination_deg"] == 60.0


def test_grid_stored_north_to_south_gives_the_same_products(tmp_path):
    """Descending northing: the signed cell step keeps the derivatives' signs."""
    east, north, total, _ = dipole_grid(n=64)
    up = run_stage(tmp_path / "u", make_grid(total, east, north)).datasets["grid"]
    down = run_stage(tmp_path / "d", make_grid(total[::-1].copy(), east, north[::-1].copy())).datasets["grid"]
    for name in PRODUCTS:
        # the same arithmetic on mirrored arrays: equal to round-off (1e-9 of the peak)
        scale = np.nanmax(np.abs(up[name].values))
        np.testing.assert_allclose(down[name].values[::-1], up[name].values, atol=1e-9 * scale, err_msg=name)


def test_tiles_smaller_than_the_halo_are_merged_and_restored(tmp_path):
    """Chunks of 40 cells with a 64-cell halo: worked on larger tiles, returned in the input's chunks."""
    east, north, total, _ = dipole_grid(n=150)
    whole = run_stage(tmp_path / "w", make_grid(total, east, north)).datasets["grid"]
    small = run_stage(tmp_path / "s", make_grid(total, east, north, chunks=(40, 40)), halo_cells=64).datasets["grid"]
    assert small["total_gradient_amplitude"].data.chunks == ((40, 40, 40, 30), (40, 40, 40, 30))
    # the same tolerance as the tiled test (1.5e-2; the filter response beyond the halo)
    centre = (slice(37, 113), slice(37, 113))
    assert rel_rms(small["derivative_upward"].values, whole["derivative_upward"].values, centre) < 1.5e-2
