"""Survey planning (``lodeline plan``): the worked example of docs/planning.md by hand, the rule of thumb, the command.

Outside references named beside each check:

* Blakely (1995), Potential Theory in Gravity and Magnetic Applications,
  ch. 4: the induced moment of an iron sphere ``3 V B0 / mu0`` and the
  point-dipole fall-off, used for the hand computation.
* The trade's rule of thumb that one tonne of iron gives about 1 nT at
  about 30 m (100 ft): common practice, no published source.
"""

from __future__ import annotations

import math
import re
from pathlib import Path

import pytest

from lodeline.cli import main
from lodeline.planning import PlanInputs, format_plan, plan
from lodeline.steps import _detectability_physics as phys

DOCS = Path(__file__).resolve().parents[1] / "docs" / "planning.md"
EXAMPLE = PlanInputs(mass_kg=50.0, burial_m=1.5, altitude_m=2.5, noise=0.05, criterion="total_field",
                     threshold_multiple=5.0, sample_rate_hz=10.0, speed_m_s=2.0, readings_across=5,
                     inclination_deg=68.7, main_field_nT=49925.0, sensors=5, sensor_spacing_m=1.0)


@pytest.fixture(scope="module")
def example():
    return plan(EXAMPLE)


def test_worked_example_by_hand(example):
    """Each step of the conservative column from the formulas (Blakely 1995, ch. 4), with the printed factors.

    Tolerance 1e-9 relative where the computation is the same arithmetic,
    1e-6 where the detection offset was found by bisection (60 halvings).
    """
    c = example.rows["conservative"]
    k = 3 * 49925e-9 / (4e-7 * math.pi * 7850.0)
    assert example.moment_per_kg == pytest.approx(k, rel=1e-12)
    assert k == pytest.approx(0.015183, abs=5e-7)  # the number printed in docs/planning.md
    m = 50.0 * k
    assert c["moment_Am2"] == pytest.approx(m, rel=1e-12)
    assert example.threshold == pytest.approx(0.25, rel=1e-12)
    z = 4.0
    assert c["peak_overhead"] == pytest.approx(100.0 * m * c["factor_overhead"] / z**3, rel=1e-9)
    d = c["offset_m"]
    r = math.hypot(d, z)
    assert c["distance_m"] == pytest.approx(r, rel=1e-12)
    assert c["elevation_deg"] == pytest.approx(math.degrees(math.atan2(z, d)), rel=1e-12)
    assert 100.0 * m * c["factor_at_offset"] / r**3 == pytest.approx(0.25, rel=1e-6)
    assert c["line_spacing_m"] == pytest.approx(4.0 + 2.0 * d, rel=1e-12)
    assert c["anomaly_width_m"] == pytest.approx(c["width_factor"] * r, rel=1e-9)
    assert c["max_speed_m_s"] == pytest.approx(c["anomaly_width_m"] * 10.0 / 5.0, rel=1e-12)
    assert c["readings_at_speed"] == pytest.approx(c["anomaly_width_m"] / 0.2, rel=1e-12)
    opt = example.rows["optimistic"]
    assert opt["moment_Am2"] == pytest.approx(m * 5.971 * 2.592 * 2.0, rel=1e-3)  # factors to 4 figures
    assert opt["offset_m"] > example.rows["typical"]["offset_m"] > c["offset_m"]


def test_docs_show_what_the_command_prints(example):
    """docs/planning.md carries the command's table and answer for the worked example: regenerate it when they change."""
    text = DOCS.read_text()
    printed = format_plan(example)
    table = printed[printed.index("                                conservative"):printed.index("Answer")].rstrip()
    assert table in text
    for key in ("line_spacing_m", "max_speed_m_s", "offset_m"):
        assert f"{example.rows['conservative'][key]:.4g}" in text


def test_rule_of_thumb_one_tonne_one_nT():
    """One tonne at a 1 nT threshold: about 30 m (100 ft) (common practice, no published source).

    The rule is a single round figure for real items; the model must bracket
    it: no farther than the optimistic bound and no nearer than the
    induced-only solid sphere of typical orientation (and the worst
    orientation nearer still). A factor-of-ten error in the moment per
    kilogram or in C would move the bracket by 2.15x and fail this.
    """
    table = phys.factor_table(68.7, "total_field")
    k = 3 * 49925e-9 / (4e-7 * math.pi * 7850.0)
    m = 1000.0 * k
    amp = 5.971 * 2.592 * 2.0
    typical = phys.overhead_distance(table, "typical", m, 1.0)
    optimistic = phys.overhead_distance(table, "typical", m * amp, 1.0)
    worst = phys.overhead_distance(table, "worst", m, 1.0)
    assert worst < typical < 30.48 < optimistic
    assert typical == pytest.approx(13.7, abs=0.05)  # the numbers quoted in docs/planning.md
    assert optimistic == pytest.approx(43.1, abs=0.05)
    # halving the threshold: the cube root of two (inverse-cube fall-off, Blakely 1995)
    assert phys.overhead_distance(table, "typical", m, 0.5) / typical == pytest.approx(2 ** (1 / 3), rel=1e-9)


def test_gradient_criterion_closed_form_at_the_pole():
    """Gradient criterion, vertical field: straight overhead the induced peak is 6 C m / z^4 (Blakely 1995, by hand)."""
    inputs = PlanInputs(mass_kg=100.0, burial_m=1.0, altitude_m=2.0, noise=0.1, criterion="gradient",
                        inclination_deg=90.0, main_field_nT=50000.0)
    result = plan(inputs)
    m = 100.0 * 3 * 50000e-9 / (4e-7 * math.pi * 7850.0)
    assert result.rows["typical"]["peak_overhead"] == pytest.approx(6 * 100.0 * m / 3.0**4, rel=1e-9)
    assert result.units == "nT/m"


def test_not_detectable_is_said_plainly():
    result = plan(PlanInputs(mass_kg=0.5, burial_m=3.0, altitude_m=5.0, noise=0.5, inclination_deg=60.0,
                             main_field_nT=50000.0))
    assert all(math.isnan(r["offset_m"]) for b, r in result.rows.items() if b != "optimistic")
    assert "not detectable even straight over the target" in format_plan(result)


def test_command_prints_and_plots(tmp_path, capsys):
    png = tmp_path / "plan.png"
    code = main(["plan", "--mass-kg", "50", "--burial-m", "1.5", "--altitude-m", "2.5", "--noise-nT", "0.05",
                 "--sample-rate-hz", "10", "--speed-m-s", "2", "--inclination-deg", "68.7", "--main-field-nT", "49925",
                 "--sensors", "5", "--sensor-spacing-m", "1", "--plot", str(png)])
    out = capsys.readouterr().out
    assert code == 0
    assert re.search(r"line spacing at most 9\.54\d* m", out)
    assert "never replace" in out and "clearance certificate" in out
    assert png.stat().st_size > 10_000


def test_command_refuses_bad_values_in_one_line(capsys):
    code = main(["plan", "--mass-kg", "-1", "--burial-m", "1.5", "--altitude-m", "2.5", "--noise-nT", "0.05",
                 "--sample-rate-hz", "10", "--speed-m-s", "2", "--inclination-deg", "68.7", "--main-field-nT", "49925",
                 "--plot", ""])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "--mass-kg" in err
