"""Picking stage: local maxima of the total gradient amplitude, the measured noise level, feature kinds.

Outside references
* The signal is the closed-form dipole of Blakely (1995), *Potential Theory
  in Gravity and Magnetic Applications*, ch. 4, checked here against
  harmonica 0.7's ``dipole_magnetic``.
* The noise's gradient grids are made with harmonica 0.7's wavenumber
  derivatives (``derivative_easting``/``derivative_northing`` with
  ``method="fft"``, ``derivative_upward``), the reference library; the
  reference noise level is the RMS of the total gradient amplitude of that
  noise alone, measured by applying the same operators to pure noise.
* The 1.4826 factor of the median absolute deviation: Rousseeuw & Croux
  (1993), *Alternatives to the median absolute deviation*.
"""

from __future__ import annotations


import numpy as np
import pandas as pd
import pytest
from scipy import ndimage

from lodeline.model import DataError
from lodeline.params import ParameterError
from lodeline.steps import picking as pk

from _dipole import unit_enu
from _picking_synth import ORIGIN, context, dipole, enhanced_grid, lattice, FIELD

pytestmark = pytest.mark.filterwarnings("ignore::FutureWarning")

SPACING = 0.25
# (east offset, north offset, depth below sensors, moment A m2): SNRs from about 2 to 120 (measured below)
DIPOLES = [(12, 15, 2.5, 0.3), (30, 14, 2.0, 1.0), (45, 20, 3.0, 2.0), (15, 40, 2.5, 0.05), (35, 45, 2.0, 0.1), (48, 42, 2.2, 0.5)]
HOLE = (100, 130, 150, 190)  # rows, columns blanked
BORDER = 4


def _run(tmp_path, grid, **params):
    """Run the stage; the tests written for the gradient picker name it (the default is the dipole detector)."""
    params.setdefault("pick_on", "total_gradient_amplitude")
    return pk.run({"enhancement": {"grid": grid}}, params, context(tmp_path))


def _rel(picks):
    return np.column_stack([picks["easting_m"] - ORIGIN[0], picks["northing_m"] - ORIGIN[1]])


def _peak(source, step=0.02, half=3.0):
    """Noise-free peak of the total gradient amplitude of one dipole and its offset from the dipole (closed form)."""
    de, dn, depth, m = source
    ax = np.arange(-half, half + step / 2, step)
    e, n = np.meshgrid(ORIGIN[0] + de + ax, ORIGIN[1] + dn + ax)
    _, g = dipole(e, n, np.zeros_like(e), (ORIGIN[0] + de, ORIGIN[1] + dn, -depth), m)
    tga = np.sqrt(g[0] ** 2 + g[1] ** 2 + g[2] ** 2)
    k = np.argmax(tga)
    return float(tga.ravel()[k]), float(np.hypot(e.ravel()[k] - ORIGIN[0] - de, n.ravel()[k] - ORIGIN[1] - dn))


@pytest.fixture(scope="module")
def survey():
    ds, noise = enhanced_grid(DIPOLES, noise_nT=0.05, seed=3, blank_border=BORDER, hole=HOLE, chunks=(64, 64))
    ref = float(np.sqrt(np.mean(noise["total_gradient_amplitude"] ** 2)))
    return ds, noise, ref


def test_builder_dipole_matches_harmonica():
    """The test's closed-form dipole against harmonica.dipole_magnetic (Blakely 1995, ch. 4)."""
    import harmonica as hm

    rng = np.random.default_rng(0)
    e, n = rng.uniform(-5, 5, 50), rng.uniform(-5, 5, 50)
    u = np.zeros(50)
    total, _ = dipole(e, n, u, (0.3, -0.2, -2.5), 2.0)
    f = unit_enu(*FIELD)
    be, bn, bu = hm.dipole_magnetic((e, n, u), ([0.3], [-0.2], [-2.5]), (2.0 * f).reshape(3, 1), field="b")
    # rtol 1e-9: the same formula in double precision, only the summation order differs
    np.testing.assert_allclose(total, be * f[0] + bn * f[1] + bu * f[2], rtol=1e-9)


def test_noise_estimate_within_20_percent(tmp_path, survey):
    """The measured noise level against the RMS total gradient amplitude of the noise alone (harmonica operators)."""
    ds, _, ref = survey
    res = _run(tmp_path, ds)
    got = res.summary["noise_nT_per_m"]
    # 20 %: the brief's tolerance; the dipoles' flanks and the regional make up a few per cent of the cells
    assert abs(got / ref - 1) < 0.20, (got, ref)
    meta = dict(zip(res.tables["picking_metadata"]["key"], res.tables["picking_metadata"]["value"]))
    assert float(meta["noise_level"]) == pytest.approx(got, rel=1e-6)
    assert float(meta["threshold"]) == pytest.approx(5.0 * got, rel=1e-6)
    assert "MAD" in meta["noise_method"]


def test_finds_every_dipole_with_snr_10_and_no_false_alarm(tmp_path, survey):
    ds, _, ref = survey
    picks = _run(tmp_path, ds).tables["picks"]
    xy = _rel(picks)
    strong = 0
    for src in DIPOLES:
        peak, offset = _peak(src)
        if peak / ref < 10:
            continue
        strong += 1
        d = np.hypot(xy[:, 0] - src[0], xy[:, 1] - src[1]).min()
        # the analytic-signal peak of an inclined dipole sits `offset` m from it (closed form, above);
        # plus one cell diagonal (0.35 m) for the lattice and the noise
        assert d <= offset + np.hypot(SPACING, SPACING) + 1e-9, (src, d, offset)
    assert strong == 5  # the set was made with five dipoles above SNR 10 (one at about 12) and one at about 2.5
    # every pick is near a dipole: at 5 x the noise level no maximum of noise alone passes
    near = np.array([min(np.hypot(p[0] - s[0], p[1] - s[1]) for s in DIPOLES) for p in xy])
    assert np.all(near < 1.0), near
    assert set(picks["kind"]) == {"point"}
    assert np.all(picks["snr"] >= 5.0)


def test_no_pick_in_blanks_or_within_the_edge_margin(tmp_path):
    # strong dipoles under the hole, just inside the edge margin, and one clear of both
    sources = [(42.0, 28.5, 2.0, 2.0), (0.5 + BORDER * SPACING + 1.0, 30.0, 2.0, 2.0), (20.0, 20.0, 2.0, 2.0)]
    ds, noise = enhanced_grid(sources, noise_nT=0.05, seed=4, blank_border=BORDER, hole=HOLE, chunks=(64, 64))
    margin = 2.0
    picks = _run(tmp_path, ds, edge_margin_m=margin).tables["picks"]
    mask = np.pad(noise["mask"], 1, constant_values=False)  # off-grid counts as blank
    dist = ndimage.distance_transform_edt(mask, sampling=SPACING)[1:-1, 1:-1]
    east, north = lattice(*noise["mask"].shape, SPACING)
    for e, n in zip(picks["easting_m"], picks["northing_m"]):
        i, j = int(np.argmin(np.abs(north - n))), int(np.argmin(np.abs(east - e)))
        assert noise["mask"][i, j]
        assert dist[i, j] >= margin
    xy = _rel(picks)
    assert np.hypot(xy[:, 0] - 20.0, xy[:, 1] - 20.0).min() < 0.7  # the clear dipole is still found


def _two_bumps(separation_m, plateau=False):
    """A hand-made enhanced grid: two Gaussian bumps of the total gradient amplitude (nT/m) on white derivatives."""
    ny = nx = 120
    east, north = lattice(ny, nx, SPACING)
    e, n = np.meshgrid(east - east.mean(), north - north.mean())
    tga = 10 * np.exp(-((e + separation_m / 2) ** 2 + n**2) / 0.18) + 10 * np.exp(-((e - separation_m / 2) ** 2 + n**2) / 0.18)
    if plateau:
        tga = np.minimum(tga, 8.0)  # a flat top of many equal cells
    rng = np.random.default_rng(1)
    ds, _ = enhanced_grid([], ny=ny, nx=nx, regional=False)
    for name in ("derivative_easting", "derivative_northing", "derivative_upward"):
        ds[name] = (("northing", "easting"), rng.normal(0, 0.05, (ny, nx)), {"units": "nT/m"})
    ds["total_gradient_amplitude"] = (("northing", "easting"), tga, {"units": "nT/m"})
    return ds


def test_min_separation_merges_duplicates(tmp_path):
    ds = _two_bumps(1.0)
    assert len(_run(tmp_path, ds, min_separation_m=0.5).tables["picks"]) == 2
    merged = _run(tmp_path, ds, min_separation_m=1.5).tables["picks"]
    assert len(merged) == 1
    flat = _run(tmp_path, _two_bumps(0.0, plateau=True), min_separation_m=1.0).tables["picks"]
    assert len(flat) == 1  # a plateau of equal cells is one pick


def test_tiles_give_the_same_picks_as_one_tile(tmp_path, survey):
    ds, _, _ = survey
    tiled = _run(tmp_path, ds.chunk({"northing": 40, "easting": 56})).tables["picks"]
    whole = _run(tmp_path, ds.chunk({"northing": -1, "easting": -1})).tables["picks"]
    pd.testing.assert_frame_equal(tiled, whole)


def test_pipeline_is_one_linear_feature_and_a_wreck_one_extended(tmp_path):
    rng = np.random.default_rng(5)
    az = np.deg2rad(30.0)
    line = [(8 + t * np.sin(az), 8 + t * np.cos(az), 1.5, 0.3) for t in np.arange(0, 35, 0.5)]  # 35 m pipeline
    wreck = [(45 + x, 40 + y, 2.0, rng.uniform(0.5, 4)) for x in np.arange(-4, 4.1, 1.0) for y in np.arange(-2.5, 2.6, 1.0)]
    ds, _ = enhanced_grid(line + wreck + [(50, 12, 2.5, 1.0)], nx=280, ny=240, noise_nT=0.05, seed=3, blank_border=4, chunks=(64, 64))
    res = _run(tmp_path, ds)
    picks = res.tables["picks"]
    assert sorted(picks["kind"]) == ["extended", "linear", "point"]
    lin = picks[picks["kind"] == "linear"].iloc[0]
    # azimuth within 3 degrees: picks wander by about a cell across a 30 m line (atan(0.5 / 30) = 1 degree)
    assert abs(lin["azimuth_deg"] - 30.0) < 3.0
    ends = sorted([(lin["end1_northing_m"] - ORIGIN[1], lin["end1_easting_m"] - ORIGIN[0]),
                   (lin["end2_northing_m"] - ORIGIN[1], lin["end2_easting_m"] - ORIGIN[0])])
    true_ends = [(8.0, 8.0), (8 + 34.5 * np.cos(az), 8 + 34.5 * np.sin(az))]
    for got, want in zip(ends, true_ends):
        # 2 m: the end maxima of a line source's gradient sit within about a depth (1.5 m) of its ends
        assert np.hypot(got[0] - want[0], got[1] - want[1]) < 2.0, (got, want)
    assert lin["width_m"] < 1.0
    assert lin["geometry_wkt"].startswith("LINESTRING")
    ext = picks[picks["kind"] == "extended"].iloc[0]
    # the block spans 8 m x 5 m about (45, 40); its picks lie within a cell or two of its outline
    assert np.hypot(ext["easting_m"] - ORIGIN[0] - 45, ext["northing_m"] - ORIGIN[1] - 40) < 1.5
    assert 6.0 < ext["length_m"] < 10.0
    assert ext["geometry_wkt"].startswith("POLYGON")
    members = res.tables["feature_picks"]
    assert set(members["feature_id"]) == {lin["feature_id"], ext["feature_id"]}
    assert res.summary["counts_by_kind"] == {"point": 1, "cluster": 0, "linear": 1, "extended": 1}


def test_row_of_separate_objects_is_not_a_linear_feature(tmp_path):
    row = [(8 + 7.0 * k, 20.0, 1.5, 1.0) for k in range(6)]  # 7 m apart: deep saddles between them
    ds, _ = enhanced_grid(row, nx=240, ny=160, noise_nT=0.05, seed=6, blank_border=4, chunks=(64, 64))
    picks = _run(tmp_path, ds).tables["picks"]
    assert len(picks) == 6
    assert set(picks["kind"]) <= {"point", "cluster"}


def test_abs_residual_mode_measures_the_residual_noise(tmp_path):
    ds, noise = enhanced_grid([(30, 30, 2.0, 1.0)], noise_nT=0.05, seed=8, blank_border=4, regional=False)
    # 10 x: the dipole's broad flank (about 0.1 nT at 9 m) plus noise passes 5 x the noise level far from it
    res = _run(tmp_path, ds, pick_on="abs_residual", threshold_noise_multiple=10.0)
    # reference: the standard deviation of the residual noise alone; 20 % as above (the smoothing of the
    # test noise over a cell correlates neighbours, which the white-noise factor does not undo)
    ref = float(np.std(noise["residual"]))
    assert abs(res.summary["noise_nT"] / ref - 1) < 0.20, (res.summary["noise_nT"], ref)
    xy = _rel(res.tables["picks"])
    # the positive lobe of an induced dipole at 68.7 degrees peaks about a quarter depth (0.5 m) south of it
    # (measured 0.5 m here); 1 m leaves two cells for the noise
    assert len(xy) <= 2 and np.hypot(xy[0, 0] - 30, xy[0, 1] - 30) < 1.0, xy


def test_bad_input_gives_clear_errors(tmp_path, survey):
    ds, _, _ = survey
    with pytest.raises(DataError, match="total_gradient_amplitude"):
        _run(tmp_path, ds.drop_vars("total_gradient_amplitude"))
    with pytest.raises(ParameterError, match="picking.min_separation_m"):
        _run(tmp_path, ds, min_separation_m=-1.0)
    with pytest.raises(ParameterError, match="pick_on"):
        _run(tmp_path, ds, pick_on="tilt")
    flat = ds.copy()
    for v in ("derivative_easting", "derivative_northing", "derivative_upward"):
        flat[v] = flat[v] * 0.0
    with pytest.raises(DataError, match="threshold_mode"):
        _run(tmp_path, flat)
    # the absolute threshold needs no noise level
    assert len(_run(tmp_path, flat, threshold_mode="absolute", threshold_nT_per_m=5.0).tables["picks"]) >= 3



def test_detector_statistic_is_chi_squared_3_on_white_noise():
    """Under white Gaussian noise of variance s^2 alone the matched subspace statistic T / s^2 follows the
    chi-squared law with 3 degrees of freedom (the dipole subspace's dimension), whatever the background
    (Scharf & Friedlander 1994; quantiles from scipy.stats.chi2)."""
    from scipy import stats

    from lodeline.steps._picking_detector import basis, tile_statistic

    f = unit_enu(68.7, 1.0)
    rng = np.random.default_rng(11)
    sigma = 0.05
    block = sigma * rng.standard_normal((400, 400)) + 0.02 * np.arange(400)[None, :]  # plus a regional slope
    grids = basis(2.5, 3.75, (SPACING, SPACING), f, order=2)
    t = tile_statistic(block, grids, 0.999)  # full windows (FFT round-off keeps the fill a hair below 1)
    k = grids.shape[1] // 2
    inner = t[k:-k, k:-k] / sigma**2  # cells whose window is full
    # overlapping windows make neighbouring cells dependent, not the marginal law. About 2,500 independent
    # windows fit in the block: the mean and median then carry ~2-3 % sampling error (tolerance 6 %), the
    # 95 % quantile ~4 % (tolerance 10 %)
    assert np.mean(inner) == pytest.approx(3.0, rel=0.06)
    assert np.quantile(inner, 0.5) == pytest.approx(stats.chi2(3).median(), rel=0.06)
    assert np.quantile(inner, 0.95) == pytest.approx(stats.chi2(3).ppf(0.95), rel=0.10)


def test_detector_finds_the_weak_dipoles_the_gradient_misses(tmp_path, survey):
    """The dipole detector (the default) finds every dipole of the synthetic survey above a peak-anomaly SNR
    of 5, including the one the gradient threshold cannot see, with no pick away from a dipole."""
    ds, _, _ = survey
    res = pk.run({"enhancement": {"grid": ds}}, {"detector_depths_m": [2.0, 2.5, 3.0], "min_separation_m": 1.5},
                 context(tmp_path))
    picks = res.tables["picks"]
    xy = _rel(picks)
    grad = _run(tmp_path, ds).tables["picks"]
    gxy = _rel(grad)
    found = []
    for src in DIPOLES:
        d = np.hypot(xy[:, 0] - src[0], xy[:, 1] - src[1]).min() if len(xy) else np.inf
        g = np.hypot(gxy[:, 0] - src[0], gxy[:, 1] - src[1]).min() if len(gxy) else np.inf
        found.append((d <= 1.5, g <= 1.5))
    # 1.5 m: the detector's maximum lies up to about a metre from the source (finite window, see
    # steps/_picking_detector.py) and the dipole fit places it; all six dipoles are found by the detector
    assert all(f for f, _ in found), found
    assert sum(g for _, g in found) < 6, found  # the gradient picker misses at least the weakest
    near = np.array([min(np.hypot(p[0] - s[0], p[1] - s[1]) for s in DIPOLES) for p in xy])
    assert np.all(near < 2.0), near
    meta = dict(zip(res.tables["picking_metadata"]["key"], res.tables["picking_metadata"]["value"]))
    assert meta["pick_on"] == "dipole_detector" and len(meta["detector_scales_nT2"].split(";")) == 3
