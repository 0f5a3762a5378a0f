"""Detectability stage: dipole physics against closed forms and harmonica, the maps, gaps and sampling on an invented survey.

Outside references named beside each check:

* Blakely (1995), Potential Theory in Gravity and Magnetic Applications,
  ch. 4: the point-dipole field, differentiated by hand for the closed-form
  orientation factors (vertical field, straight overhead: induced 6 for the
  gradient and 2 for the total field; worst gradient 3) and the inverse-cube
  fall-off.
* harmonica 0.7 (``harmonica.dipole_magnetic``), a general-purpose library
  for the forward field: the field and gradient formulas, the typical
  factors and the fall-off law.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import shapely

from lodeline.steps import _detectability_detector as det
from lodeline.steps import _detectability_physics as phys
from lodeline.steps import detectability

import _detectability_synth as synth


def _harmonica_field(points, moment, f_hat):
    """Total-field anomaly (nT) at points (n, 3) east/north/up of a dipole at the origin: harmonica, projected on f."""
    import harmonica as hm

    coords = (points[:, 0], points[:, 1], points[:, 2])
    be, bn, bu = hm.dipole_magnetic(coords, (np.zeros(1), np.zeros(1), np.zeros(1)),
                                    tuple(np.array([c]) for c in moment), field="b")
    return f_hat[0] * be + f_hat[1] * bn + f_hat[2] * bu


def _harmonica_gradient(points, moment, f_hat, h=1e-4):
    cols = []
    for axis in range(3):
        step = np.zeros(3)
        step[axis] = h
        cols.append((_harmonica_field(points + step, moment, f_hat) - _harmonica_field(points - step, moment, f_hat)) / (2 * h))
    return np.column_stack(cols)


def test_closed_form_field_and_gradient_match_harmonica():
    """The hand-differentiated gradient and the field (Blakely 1995, ch. 4) against harmonica, random geometry.

    Tolerance 1e-6 relative: central differences with a 0.1 mm step on
    distances of metres leave about 1e-8.
    """
    rng = np.random.default_rng(3)
    p = rng.normal(size=(50, 3)) * 3.0
    p[:, 2] = np.abs(p[:, 2]) + 1.0
    f = phys.field_unit(63.0)
    m = rng.normal(size=3)
    a, g = phys.signal_matrices(p, f)
    np.testing.assert_allclose(a @ m, _harmonica_field(p, m, f), rtol=1e-6)
    np.testing.assert_allclose(g @ m, _harmonica_gradient(p, m, f), rtol=1e-6, atol=1e-9)


def test_orientation_factors_closed_forms_at_the_pole():
    """Vertical field, straight overhead (Blakely 1995, ch. 4, by hand): induced 6 (gradient), 2 (total field); worst gradient 3.

    The worst gradient factor is the smallest singular value of the
    gradient matrix overhead, ``3 C / z^4 (I - 3 u u')`` -> 3, reached by a
    horizontal moment across the track whose gradient peaks overhead.
    Tolerance 0.2 %: the worst is a numerical minimum (Nelder-Mead to 1e-6).
    """
    grad = phys.factor_table(90.0, "gradient")
    tf = phys.factor_table(90.0, "total_field")
    assert grad.factor("typical", 90.0) == pytest.approx(6.0, rel=1e-9)
    assert tf.factor("typical", 90.0) == pytest.approx(2.0, rel=1e-9)
    assert grad.factor("worst", 90.0) == pytest.approx(3.0, rel=2e-3)
    # the worst is never above the typical and never above the closed-form overhead value of any moment
    assert np.all(grad.worst <= grad.typical + 1e-12)


def test_typical_factor_matches_harmonica_profiles():
    """Typical (induced) factor at inclination 63 deg and elevation 50 deg: harmonica peaks along 18 track directions, median.

    Tolerance 0.3 %: the table is interpolated between 2-degree nodes
    (elevation 50 is a node) and the peaks are taken on 0.005 r0 steps.
    """
    table = phys.factor_table(63.0, "total_field")
    f = phys.field_unit(63.0)
    s = np.linspace(-4.0, 4.0, 1601)
    peaks = []
    for b in phys.TRACK_AZIMUTHS_DEG:
        ph, az = math.radians(50.0), math.radians(b)
        pts = (math.cos(ph) * np.array([math.sin(az), math.cos(az), 0.0]) + math.sin(ph) * np.array([0.0, 0.0, 1.0])
               + s[:, None] * np.array([math.cos(az), -math.sin(az), 0.0]))
        peaks.append(np.abs(_harmonica_field(pts, f, f)).max() / phys.C_NT)
    assert table.factor("typical", 50.0) == pytest.approx(float(np.median(peaks)), rel=3e-3)


def test_worst_gradient_factor_is_a_lower_bound():
    """No moment direction on a dense sphere gives a smaller gradient peak than the tabulated worst (inclination 90, elevation 50).

    3000 directions x 36 track directions with the closed form (checked
    against harmonica above). The tabulated worst must be at most the sampled
    minimum (+0.1 % for the interpolation between nodes) and within 2 % of it
    (the sampled minimum is never below the true one).
    """
    table = phys.factor_table(90.0, "gradient")
    f = phys.field_unit(90.0)
    i = np.arange(3000) + 0.5
    z = 1.0 - i / 3000
    rho = np.sqrt(1.0 - z * z)
    th = math.pi * (1.0 + math.sqrt(5.0)) * i
    m = np.column_stack([rho * np.cos(th), rho * np.sin(th), z])
    s = np.linspace(-3.0, 3.0, 161)
    least = min(phys._peak(50.0, b, f, "gradient", s, m).min() for b in np.arange(0.0, 360.0, 10.0))
    worst = float(table.factor("worst", 50.0))
    assert worst <= least * 1.001
    assert worst >= least * 0.98


def test_inverse_cube_fall_off_and_cube_root_of_two():
    """Halving the threshold multiplies the detection distance by 2^(1/3) (total field) or 2^(1/4) (gradient).

    The law: the dipole field falls as r^-3 (Blakely 1995, ch. 4), checked
    here with harmonica (the anomaly at 2^(1/3) r is half that at r, to
    1e-9), then the planner's distances to 1e-9.
    """
    f = phys.field_unit(70.0)
    r = 7.0
    near = _harmonica_field(np.array([[0.0, 0.0, r]]), f * 3.0, f)[0]
    far = _harmonica_field(np.array([[0.0, 0.0, r * 2 ** (1 / 3)]]), f * 3.0, f)[0]
    assert far / near == pytest.approx(0.5, rel=1e-9)
    for criterion, power in (("total_field", 3), ("gradient", 4)):
        table = phys.factor_table(90.0, criterion)
        d1 = phys.overhead_distance(table, "typical", 15.0, 1.0)
        d2 = phys.overhead_distance(table, "typical", 15.0, 0.5)
        assert d2 / d1 == pytest.approx(2 ** (1 / power), rel=1e-9)


@pytest.fixture(scope="module")
def stage_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("detect")
    params = {"class_name": "test class", "class_mass_kg": 40.0, "class_max_burial_m": 0.5, "area_wkt": synth.area_wkt(),
              "max_line_spacing_m": 5.0, "stretch_length_m": 10.0, "min_readings_per_anomaly": 5, "search_radius_m": 15.0,
              "geotiff": True, "quicklook": True}
    result = detectability.run(synth.data(), params, synth.context(tmp))
    return result, params


def _at(grid, name, x, y):
    return float(grid[name].sel(easting=synth.E0 + x, northing=synth.N0 + y, method="nearest").values)


def test_distances_on_known_tracks(stage_run):
    """Cells midway between tracks 12 m apart are 6 m from the nearest reading; a cell on a track 0 m (readings 0.2 m apart).

    Tolerance: half the along-track step (0.1 m) and a cell corner.
    """
    grid = stage_run[0].datasets["grid"]
    assert _at(grid, "horizontal_distance_m", 50.0, 10.0) == pytest.approx(6.0, abs=1e-6)
    assert _at(grid, "horizontal_distance_m", 30.0, 1.0) == pytest.approx(0.0, abs=0.1)
    assert _at(grid, "slant_distance_m", 50.0, 10.0) == pytest.approx(math.hypot(6.0, 3.0), abs=1e-4)
    assert math.isnan(_at(grid, "horizontal_distance_m", 50.0, 24.9)) is False  # 4.9 m off, within the 15 m radius


def test_least_moment_on_a_track_is_the_closed_form(stage_run):
    """On a track at the pole: least moment = threshold z^4 / (C 3) (worst) and / (C 6) (typical), z = 2.5 + 0.5 m (Blakely 1995).

    Tolerance 0.3 %: the worst factor is a numerical minimum (0.2 %) and the
    nearest reading of a cell is at most a cell corner off the track.
    """
    grid = stage_run[0].datasets["grid"]
    z = synth.ALTITUDE_M + 0.5
    assert _at(grid, "least_moment_worst_Am2", 30.0, 1.0) == pytest.approx(synth.THRESHOLD_NT_PER_M * z**4 / 300.0, rel=3e-3)
    assert _at(grid, "least_moment_typical_Am2", 30.0, 1.0) == pytest.approx(synth.THRESHOLD_NT_PER_M * z**4 / 600.0, rel=3e-3)


def test_class_map_gap_polygon_and_percentage(stage_run):
    """The strip without readings is a gap as wide as 12 m less twice the class's detection offset.

    The offset comes from the same physics on a straight track; tolerances:
    0.6 m on the width (two cells, the along-track step and the
    simplification of half a cell) and 1 percentage point on the coverage.
    """
    result, params = stage_run
    grid = result.datasets["grid"]
    assert _at(grid, "class_detectable", 50.0, 10.0) == 0.0
    assert _at(grid, "class_detectable", 30.0, 1.0) == 1.0
    assert math.isnan(_at(grid, "class_detectable", 2.0, 10.0))  # outside the area of interest
    table = phys.factor_table(synth.INCLINATION_DEG, "gradient")
    per_kg = 3 * synth.MAIN_FIELD_NT * 1e-9 / (4e-7 * math.pi * 7850.0)
    offsets = [phys.detection_offset(table, "worst", 40.0 * per_kg, synth.THRESHOLD_NT_PER_M, synth.ALTITUDE_M + b)
               for b in np.linspace(0.0, 0.5, 5)]
    d = min(offsets)
    assert 0.5 < d < 5.0
    gaps = result.tables["gaps"]
    big = gaps.iloc[0]
    assert big["width_m"] == pytest.approx(12.0 - 2 * d, abs=0.6)
    assert big["length_m"] == pytest.approx(90.0, abs=0.6)
    cover = result.tables["coverage_summary"].set_index("basis")
    expected = 100.0 * (1.0 - (12.0 - 2 * d) / 20.0)
    assert cover.loc["conservative", "percent_detectable"] == pytest.approx(expected, abs=1.0)
    assert cover.loc["optimistic", "percent_detectable"] >= cover.loc["conservative", "percent_detectable"]
    files = {p.name for p in result.files.values()}
    assert {"gaps.geojson", "gaps.gpkg", "class_detectable.tif", "class_detectable.png"} <= files


def test_gap_file_is_rfc7946_lonlat(stage_run):
    """Gaps in the GeoJSON are in longitude and latitude (RFC 7946), near the survey's UTM zone 31N site."""
    import json

    result = stage_run[0]
    path = next(p for p in result.files.values() if p.name == "gaps.geojson")
    doc = json.loads(path.read_text())
    lon, lat = np.asarray(doc["features"][0]["geometry"]["coordinates"][0]).T
    assert np.all((lon > 2.9) & (lon < 3.1)) and np.all((lat > 54.0) & (lat < 54.2))
    poly = shapely.geometry.shape(doc["features"][0]["geometry"])
    assert poly.is_valid


def test_sampling_flags(stage_run):
    """The fast stretch is too_fast, the dropout stretch too_sparse, the 12 m jump between lines spacing_exceeded, nothing else."""
    result = stage_run[0]
    st = result.tables["sampling_stretches"]
    fast = st[st["too_fast"]]
    assert set(fast["line"]) == {"L7"}
    assert fast["along_start_m"].min() >= 30.0 and fast["along_start_m"].max() <= 60.0
    sparse = st[st["too_sparse"]]
    assert set(sparse["line"]) == {"L2", "L7"}  # driven too fast is sampled too sparsely too
    assert not st.loc[st["line"] == "L2", "too_fast"].any()
    wide = result.tables["line_spacing"]
    flagged = set(wide.loc[wide["spacing_exceeded"], "line"])
    assert flagged == {"L4", "L5"}
    ok = wide[wide["line"] == "L2"]
    assert np.nanmax(np.fmax(ok["spacing_left_m"], ok["spacing_right_m"])) == pytest.approx(1.0, abs=0.01)
    lines = result.tables["sampling_lines"].set_index("line")
    assert "too_fast" in lines.loc["L7", "flags"] and "too_sparse" in lines.loc["L2", "flags"]
    assert lines.loc["L0", "flags"] == ""


def test_detector_model_matches_the_picker_statistic():
    """The detector least moments reproduce the picking stage's own statistic on an anomaly made with harmonica.

    For a window with a blank corner, the statistic T of the picker
    (``_picking_detector.tile_statistic``) for unit moments along each axis
    and their pairwise sums gives its quadratic form Q; the least moment
    threshold * sqrt(scale / lambda) must match ours to 1e-4 (both are exact
    sums; harmonica and our closed form agree to 1e-9).
    """
    import harmonica as hm

    from lodeline.steps import _picking_detector as pd_

    params = {"detector_depths_m": [2.0, 3.0], "detector_window_factor": 1.5, "detector_min_window_m": 1.5,
              "detector_background_order": 2, "detector_min_fill": 0.5}
    meta = {"threshold": 5.0, "detector_scales_nT2": "0.01;0.02"}
    st = det.detector_settings(params, meta, 68.0, 3.0)
    cell, z = 0.25, 2.7
    halo = det.halo_cells(st, (cell, cell), 1)
    ny = nx = 2 * halo[0] + 1
    filled = np.ones((ny, nx), dtype=bool)
    filled[: ny // 3, : nx // 2] = False  # blank corner inside the window
    ours = det.least_moments(filled, z, st, (cell, cell), 1, halo)[:, 0, 0]
    y, x = (np.mgrid[:ny, :nx] - ny // 2) * cell
    worst_lambda = []
    for k, (depth, radius) in enumerate(zip(st.depths_m, st.radii_m)):
        grids = pd_.basis(depth, radius, (cell, cell), st.f_hat, st.order)

        def stat(m):
            be, bn, bu = hm.dipole_magnetic((x.ravel(), y.ravel(), np.zeros(x.size)),
                                            (np.zeros(1), np.zeros(1), np.full(1, -z)),
                                            tuple(np.array([c]) for c in m), field="b")
            field = (st.f_hat[0] * be + st.f_hat[1] * bn + st.f_hat[2] * bu).reshape(ny, nx)
            return pd_.tile_statistic(np.where(filled, field, np.nan), grids, st.min_fill)[ny // 2, nx // 2]

        eye = np.eye(3)
        diag = [stat(eye[i]) for i in range(3)]
        q = np.diag(diag)
        for i in range(3):
            for j in range(i + 1, 3):
                q[i, j] = q[j, i] = 0.5 * (stat(eye[i] + eye[j]) - diag[i] - diag[j])
        worst_lambda.append((np.linalg.eigvalsh(q)[0], float(st.f_hat @ q @ st.f_hat)))
    want = [min(5.0 * math.sqrt(st.scales_nT2[k] / worst_lambda[k][o]) for k in range(2)) for o in range(2)]
    np.testing.assert_allclose(ours, want, rtol=1e-4)


def test_detector_coarse_lattice_never_invents_detection():
    """The 0.5 m lattice against full resolution on a window crossed by a 5 m blank strip.

    Away from blanks the two agree (median error below 0.3 %: the coarse
    discs' bias is removed by the wholly-filled-window ratio). Near a blank
    edge the answer changes quickly with position and the lattice places it
    up to a cell off; it must never be below the least full-resolution value
    within one cell (0.25 m) by more than 0.2 %, so it never shows a
    detection that full resolution would not show one cell away.
    """
    from scipy import ndimage

    params = {"detector_depths_m": [2.5, 3.5], "detector_window_factor": 1.5, "detector_min_window_m": 1.5,
              "detector_background_order": 2, "detector_min_fill": 0.5}
    st = det.detector_settings(params, {"threshold": 5.0, "detector_scales_nT2": "0.01;0.02"}, 68.0, 2.0)
    filled = np.ones((140, 140), dtype=bool)
    filled[60:80, :] = False
    halos = {stride: det.halo_cells(st, (0.25, 0.25), stride) for stride in (1, 2)}
    top = max(h[0] for h in halos.values())
    inner = 140 - 2 * top  # the same own cells for both strides
    out = {}
    for stride, (h, _) in halos.items():
        block = filled[top - h : top + inner + h, top - h : top + inner + h]
        out[stride] = det.least_moments(block, 3.5, st, (0.25, 0.25), stride, (h, h))
    for o in range(2):
        fine, coarse = out[1][o], out[2][o]
        lo = ndimage.minimum_filter(np.where(np.isfinite(fine), fine, np.inf), size=3)
        ok = np.isfinite(fine) & np.isfinite(coarse) & np.isfinite(lo)
        assert ok.sum() > 3000
        assert np.median(np.abs(coarse[ok] / fine[ok] - 1.0)) < 3e-3
        assert np.max((lo[ok] - coarse[ok]) / lo[ok]) < 2e-3


def test_stage_with_the_dipole_detector(tmp_path):
    """With the picker's matched subspace detector: wholly covered cells get the full-window answer; the blank strip is a gap.

    Cells at northing 2 m see wholly filled windows (trial depths 1 and
    1.5 m, radii up to 2.25 m, tracks 0 to 4 m filled to 1.5 m beyond), so
    their least moments must equal the direct full-window sums to 0.1 %
    (the coarse lattice is calibrated on exactly that case).
    """
    params = {"class_name": "detector class", "class_mass_kg": 5.0, "class_max_burial_m": 0.5,
              "area_wkt": synth.area_wkt(), "stretch_length_m": 10.0, "geotiff": False, "quicklook": False}
    result = detectability.run(synth.data("dipole_detector", blank_m=1.5), params,
                               synth.context(tmp_path, synth.detector_records()))
    grid = result.datasets["grid"]
    st = det.detector_settings(synth.DETECTOR_PARAMS, {"threshold": 5.0, "detector_scales_nT2": "0.004;0.006"},
                               synth.INCLINATION_DEG, 0.0)
    worst, typical = det.full_window_moments(st, synth.ALTITUDE_M + 0.5, (0.25, 0.25))
    assert _at(grid, "least_moment_worst_Am2", 50.0, 2.0) == pytest.approx(worst, rel=1e-3)
    assert _at(grid, "least_moment_typical_Am2", 50.0, 2.0) == pytest.approx(typical, rel=1e-3)
    assert _at(grid, "class_detectable", 50.0, 10.0) == 0.0  # blank: the picker cannot pick there
    assert result.summary["criterion"] == "detector"
    assert result.tables["gaps"]["area_m2"].iloc[0] > 12.0 * 80.0


DEMO_TABLE = {
    "class_name": '"50 kg item to 1.5 m"', "class_mass_kg": "50.0", "class_max_burial_m": "1.5",
    "area_wkt": '"POLYGON ((493444.869 5994677.867, 493953.698 5994995.819, 493985.493 5994944.936, '
                '493476.665 5994626.985, 493444.869 5994677.867))"',
    "max_line_spacing_m": "5.0", "geotiff": "false", "quicklook": "false",
}


@pytest.mark.slow
def test_demo_map_agrees_with_the_picker(tmp_path):
    """On the demo survey, an item the map calls detectable (worst orientation, pickable cell) is picked.

    The check is outside the model: the demo's truth table (invented items
    whose moments and depths the generator knows) and the picks the picking
    stage actually made. For each compact item the least moment of the
    picker's detector at its own depth (its nearest reading's altitude plus
    its burial) is computed on the grid's filled cells at full resolution.
    Every item predicted detectable must have a pick within 2.1 m (the
    picker's 1.5 m separation plus the grid's 0.25 m cells and the 0.3 m
    positioning of the demo's layback); most items predicted undetectable
    must have none (the model is conservative, so a few may be found).
    """
    import json
    import re
    from pathlib import Path

    import pandas as pd
    from scipy.spatial import cKDTree

    from lodeline.cli import main
    from lodeline.runner import load_stage_data

    root = Path(__file__).resolve().parents[1] / "demo_survey"
    text = (root / "survey.toml").read_text()
    text = re.sub(r'"data/', f'"{root}/data/', text)
    text = re.sub(r'^folder = "run"', f'folder = "{tmp_path / "run"}"', text, flags=re.M)
    if "[detectability]" not in text:
        text += "\n[detectability]\n" + "".join(f"{k} = {v}\n" for k, v in DEMO_TABLE.items())
    toml = tmp_path / "survey.toml"
    toml.write_text(text)
    assert main(["run", str(toml), "--until", "detectability", "--quiet"]) == 0
    run = tmp_path / "run"
    manifest = json.loads((run / "manifest.json").read_text())
    grid = load_stage_data((run / "gridding").resolve(), 1_000_000)["grid"]
    levelled = load_stage_data((run / "levelling").resolve(), 1_000_000)["readings"]
    meta = pd.read_csv(run / "picking" / "picking_metadata.csv")
    meta = dict(zip(meta["key"], meta["value"]))
    if meta["pick_on"] != "dipole_detector":
        pytest.skip("the demo picks on another grid")
    st = det.detector_settings(manifest["stages"]["picking"]["components"]["params"], meta,
                               grid.attrs["main_field_inclination_deg"], grid.attrs["main_field_grid_declination_deg"])
    maps = load_stage_data((run / "detectability").resolve(), 1_000_000)["grid"]
    filled = np.isfinite(grid["residual"].values)
    east, north = grid["easting"].values, grid["northing"].values
    alt_tree = cKDTree(np.column_stack([levelled["easting"].values, levelled["northing"].values]))
    altitude = levelled["altitude"].values
    picks = pd.concat([pd.read_csv(run / "picking" / f) for f in ("picks.csv", "feature_picks.csv")])
    pick_tree = cKDTree(picks[["easting_m", "northing_m"]].to_numpy(float))
    truth = pd.read_csv(root / "data" / "truth.csv")
    halo = det.halo_cells(st, (0.25, 0.25), 1)
    rows = []
    for item in truth[truth["kind"] == "point"].itertuples():
        i = int(round((item.easting_m - east[0]) / 0.25))
        j = int(round((item.northing_m - north[0]) / 0.25))
        if not (halo[0] <= j < north.size - halo[0] and halo[1] <= i < east.size - halo[1]):
            continue
        z = altitude[alt_tree.query([item.easting_m, item.northing_m])[1]] + item.burial_m
        block = filled[j - halo[0] : j + halo[0] + 1, i - halo[1] : i + halo[1] + 1]
        least = det.least_moments(block, z, st, (0.25, 0.25), 1, halo)[0, 0, 0]
        pickable = maps["pickable"].values[j, i] > 0
        rows.append((item.moment_Am2 >= least and pickable, pick_tree.query([item.easting_m, item.northing_m])[0] <= 2.1))
    rows = np.array(rows)
    predicted, picked = rows[:, 0], rows[:, 1]
    assert predicted.sum() >= 20
    assert picked[predicted].all()
    assert (~picked[~predicted]).mean() >= 0.8
