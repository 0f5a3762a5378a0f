"""Tests of the report stage: figures, escaping, self-containment, and the page in a browser.

Outside references named beside each check: the dipole field of the
general-purpose library harmonica for the profiles' forward model; the
variance of the fourth difference of white noise, C(8, 4) sigma^2 = 70
sigma^2 (Tintner 1940, The Variate Difference Method, cited from memory),
checked on simulated noise of known sigma; the PNG file signature and
IHDR header (ISO/IEC 15948:2004, Portable Network Graphics) for the
embedded figures; and headless Chromium (Debian packages chromium and
chromium-driver) as the reader a person would use.
"""

from __future__ import annotations

import base64
import re
import struct

import harmonica as hm
import numpy as np
import pytest

from lodeline.model import DataError
from lodeline.steps import report as stage
from lodeline.steps._dipole_model import field_unit_vector
from lodeline.steps._report_noise import difference_noise
from lodeline.steps._report_profiles import dipole_anomaly

import _report_synth as synth
from _chromium import browser_paths, render

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (ISO/IEC 15948: bytes 16-24, big-endian)."""
    assert data[:8] == PNG_SIGNATURE
    return struct.unpack(">II", data[16:24])


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    """The report of the invented run (made once for the module: about 5 s)."""
    folder = tmp_path_factory.mktemp("report")
    result = stage.run(synth.upstream(folder), {"profile_targets": 3}, synth.context(folder))
    return result, result.files["report"].read_text(encoding="utf-8")


def test_every_figure_is_a_png_file_and_embedded_in_the_page(made):
    result, html = made
    pngs = {name: path for name, path in result.files.items() if name.endswith(".png")}
    assert {"map_residual.png", "map_total_gradient.png", "map_route.png", "map_detectability.png", "diurnal.png",
            "crossovers.png", "removal.png", "noise.png", "profile_01.png"} <= set(pngs)
    embedded = dict(re.findall(r'<img src="data:image/png;base64,([A-Za-z0-9+/=]+)"[^>]*data-file="([^"]+)"', html))
    embedded = {name: base64.b64decode(data) for data, name in embedded.items()}
    assert set(embedded) == set(pngs)
    for name, path in pngs.items():
        data = path.read_bytes()
        assert embedded[name] == data                   # the page holds exactly the file
        width, height = png_size(data)
        assert width >= 500 and height >= 200           # a drawn figure, not an empty placeholder
    assert result.summary["figures"] == len(pngs)


def test_page_needs_no_network_and_no_script(made):
    _, html = made
    assert not re.search(r'(src|href)\s*=\s*"(https?:)?//', html)
    assert "<script" not in html.lower() and "<link" not in html.lower()
    assert "@import" not in html and "url(" not in html


def test_strings_from_input_files_are_escaped(made):
    _, html = made
    for raw in (synth.HOSTILE_ID, synth.HOSTILE_NAME, "<script>alert('seed')</script>", "<linear>", "invented <class>"):
        assert raw not in html
    assert "&lt;img src=x onerror=&quot;alert(1)&quot;&gt;&amp;T2" in html
    assert "Invented &lt;b&gt;survey&lt;/b&gt; &amp; &#x27;route&#x27;" in html
    assert "&lt;script&gt;alert(&#x27;seed&#x27;)&lt;/script&gt;" in html


def test_cautions_are_in_the_report(made):
    _, html = made
    text = " ".join(re.sub(r"<[^>]+>", " ", html).lower().split())
    assert "never takes the place of their judgement" in text
    assert "not a clearance certificate" in text
    assert "regulations in force" in text and "licensed practice" in text


def test_removal_summary_comes_from_the_records(made):
    result, _ = made
    removal = result.tables["removal_summary"]
    assert list(removal["stage"]) == ["diurnal", "levelling"]
    assert removal.set_index("correction").loc["diurnal", "rms_nT"] == pytest.approx(2.83)


def test_reading_noise_of_the_invented_run(made):
    # the invented readings carry 0.05 nT of white noise beside one dipole whose anomaly is smooth over the
    # 0.4 m span of a fourth difference; 2,400 differences per sensor: the robust level's standard error is
    # about 3 %, so 10 % is three of them
    result, _ = made
    noise = result.tables["noise_by_sensor"]
    assert list(noise["sensor"]) == ["S1", "S2"]
    assert noise["noise_nT"].to_numpy() == pytest.approx([synth.NOISE_NT] * 2, rel=0.10)


def test_fourth_difference_noise_of_known_sigma():
    # Tintner (1940): var of the 4th difference of white noise is 70 sigma^2; a cubic trend vanishes
    # (Hildebrand 1974). 120,000 readings of sigma 0.08 nT on a cubic: the robust level (MAD, efficiency 37 %,
    # overlapping differences) has a standard error near 1 %, so 4 % is four of them
    ds, segs, _ = synth.readings()
    rng = np.random.default_rng(3)
    n = ds.sizes["reading"]
    big = ds.isel(reading=np.arange(n).repeat(25)[: 120_000]).drop_vars("residual")
    x = np.linspace(-1, 1, big.sizes["reading"])
    trend = 30 * x**3 - 5 * x
    line = np.repeat(np.arange(60), 2000).astype(np.int32)
    big = big.assign_coords(line_index=("reading", line), sensor_index=("reading", np.zeros(line.size, np.int16)))
    big = big.assign(residual=("reading", trend + rng.normal(0, 0.08, line.size), {"units": "nT"}))
    out = difference_noise(big.chunk({"reading": 20_000}), "residual", 0)
    assert out["sigma_nT"][0] == pytest.approx(0.08, rel=0.04)
    assert out["differences"] == 60 * (2000 - 4)         # no difference crosses a segment end


def test_profile_model_against_harmonica():
    # harmonica's dipole_magnetic gives the field vector (nT); its projection on the main-field direction is the
    # total-field anomaly (Blakely 1995, ch. 12). Same formula, independent code: 1e-9 relative is rounding
    rng = np.random.default_rng(9)
    obs = np.column_stack([synth.E0 + rng.uniform(-5, 5, 200), synth.N0 + rng.uniform(-5, 5, 200), np.full(200, -10.0)])
    f_hat = field_unit_vector(synth.INC, synth.DEC)
    ours = dipole_anomaly(obs, synth.SOURCE[None], synth.MOMENT[None], f_hat)
    be, bn, bu = hm.dipole_magnetic(tuple(obs.T), tuple(synth.SOURCE[:, None]), tuple(synth.MOMENT[:, None]), field="b")
    theirs = be * f_hat[0] + bn * f_hat[1] + bu * f_hat[2]
    assert ours == pytest.approx(theirs, rel=1e-9, abs=1e-9)


def test_profile_of_the_fitted_dipole_explains_the_readings(made, tmp_path):
    # the dipole table holds the true source: the readings less the model leave the 0.05 nT noise; an RMS within
    # 15 % of it is five standard errors for about 600 readings
    from lodeline.steps._report_profiles import target_profiles

    data = synth.upstream(tmp_path)
    level = data["levelling"]
    shown = data["ranking"]["targets"].head(1)
    (prof,) = target_profiles(level["readings"], level["segments"], shown, [data["dipole_fit"]["dipoles"].head(1)],
                              radius_m=5.0, exclude=0)
    assert prof["n_readings"] > 500
    assert prof["rms_nT"] == pytest.approx(synth.NOISE_NT, rel=0.15)
    assert prof["r2"] > 0.999
    assert prof["passes"][0]["offset_m"] <= 0.25      # the closest track runs 0.1 m from the source


def test_missing_target_column_is_a_clear_error(tmp_path):
    data = synth.upstream(tmp_path)
    data["ranking"]["targets"] = data["ranking"]["targets"].drop(columns="rank")
    with pytest.raises(DataError, match="lacks the column 'rank'"):
        stage.run(data, {}, synth.context(tmp_path))


def test_report_renders_in_headless_chromium(made, tmp_path):
    browser, driver = browser_paths()
    if not (browser and driver):
        pytest.skip("headless Chromium not installed (Debian: apt-get install chromium chromium-driver; .ci/run "
                    "installs them): the report's browser check did not run")
    result, _ = made
    shot = tmp_path / "report.png"
    images = render(result.files["report"], shot, 1280, 1600)
    pngs = {name: png_size(path.read_bytes()) for name, path in result.files.items() if name.endswith(".png")}
    assert sorted(i["file"] for i in images) == sorted(pngs)
    for image in images:
        assert image["complete"] and (image["width"], image["height"]) == pngs[image["file"]], image
    from matplotlib.image import imread

    pixels = imread(shot)
    assert pixels.shape[0] > 1000 and pixels.shape[1] > 1000
    # not blank: a page of text, tables and the first map has many grey levels and a spread of brightness
    grey = pixels[..., :3].mean(axis=2)
    assert grey.std() > 0.05 and len(np.unique(np.round(grey, 2))) > 20
