"""Survey planning: the widest line spacing and the highest speed that still detect a target class.

Before a survey: a target class (a mass of iron or steel at a burial depth
below the seabed), the sensor altitude above the seabed, the noise, the
picking threshold as a multiple of it, the sample rate and speed. The
answers come from the point-dipole physics of the detectability stage
(``lodeline.steps._detectability_physics``; dipole field of Blakely 1995,
ch. 4) and the mass model of the sizing stage
(``lodeline.steps._dipole_mass``; ``docs/size_bands.md``):

1. Moment: ``m = mass x 3 B0 / (mu0 rho)`` (solid iron sphere, induced
   only), times ``elongation x hollowness x remanence`` for the optimistic
   bound.
2. Threshold: ``t = threshold_multiple x noise`` (nT for the total field,
   nT/m for the total gradient amplitude).
3. Height above the target: ``z = altitude + burial``.
4. Detection offset ``d``: the largest horizontal offset of a track at which
   the peak along it, ``C m F(phi) / r^n`` (``C = 100`` nT m^3 per A m^2,
   ``r = sqrt(d^2 + z^2)``, ``phi = atan(z / d)``, ``n`` = 3 or 4, ``F``
   the orientation factor), still reaches ``t``.
5. Track spacing ``2 d``: a target midway between two tracks is ``d`` from
   both. Line spacing: ``(sensors - 1) x sensor_spacing + 2 d`` (only when
   the sensors on the bar are themselves no farther apart than ``2 d``).
6. Anomaly width ``w``: the half-maximum width of the anomaly along the
   track at that marginal geometry, ``width_factor x r``; the highest speed
   that puts ``readings`` readings across it is ``w x sample_rate / readings``.

Three bases (as in the detectability stage): ``conservative`` (worst
orientation, solid sphere), ``typical`` (moment along the main field, solid
sphere) and ``optimistic`` (typical orientation, elongated hollow remanent
item). The worked example of ``docs/planning.md`` follows these steps with
every intermediate number.

The answers support, and never replace, the judgement of qualified
specialists; a planned spacing is no clearance certificate; local
regulations and licensed practice govern any reacquisition or disposal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .params import ParameterError
from .steps import _detectability_physics as phys
from .steps._dipole_mass import elongation_factor, hollow_factor, sphere_moment_per_kg

__all__ = ["PlanInputs", "Plan", "plan", "format_plan", "plot_plan", "add_plan_parser", "cmd_plan", "BASES"]

BASES = ("conservative", "typical", "optimistic")
CAUTION = ("These answers support, and never replace, the judgement of qualified specialists. A planned spacing "
           "is no clearance certificate. Local regulations and licensed practice govern any reacquisition or disposal.")


@dataclass(frozen=True)
class PlanInputs:
    """What the planner is asked (units in the names).

    ``criterion`` is ``"total_field"`` (``noise`` in nT) or ``"gradient"``
    (``noise`` in nT/m, the total gradient amplitude).
    """

    mass_kg: float
    burial_m: float
    altitude_m: float
    noise: float
    criterion: str = "total_field"
    threshold_multiple: float = 5.0
    sample_rate_hz: float = 10.0
    speed_m_s: float = 2.0
    readings_across: int = 5
    inclination_deg: float = 65.0
    main_field_nT: float = 50000.0
    density_kg_m3: float = 7850.0
    aspect_ratio: float = 5.0
    wall_fraction: float = 0.15
    remanence_factor: float = 2.0
    sensors: int = 1
    sensor_spacing_m: float = 0.0

    def check(self) -> None:
        """Raise ParameterError naming the first value out of range (by its command-line option)."""

        def opt(name):
            return "--noise-nT or --noise-nT-per-m" if name == "noise" else "--" + name.replace("_", "-")

        positive = ("mass_kg", "altitude_m", "noise", "threshold_multiple", "sample_rate_hz", "speed_m_s",
                    "main_field_nT", "density_kg_m3")
        for name in positive:
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ParameterError(f"plan: {opt(name)} = {v!r} must be a positive number")
        for name, low in (("burial_m", 0.0), ("sensor_spacing_m", 0.0)):
            v = getattr(self, name)
            if not (math.isfinite(v) and v >= low):
                raise ParameterError(f"plan: {opt(name)} = {v!r} must be a number >= {low:g}")
        if self.criterion not in phys.CRITERIA:
            raise ParameterError(f"plan: criterion = {self.criterion!r} must be one of {', '.join(phys.CRITERIA)}")
        if not -90.0 <= self.inclination_deg <= 90.0:
            raise ParameterError(f"plan: --inclination-deg = {self.inclination_deg!r} must lie in [-90, 90]")
        if int(self.readings_across) < 1 or int(self.sensors) < 1:
            raise ParameterError("plan: --readings-across and --sensors must be at least 1")
        if self.aspect_ratio < 1 or not 0 < self.wall_fraction <= 1 or self.remanence_factor < 1:
            raise ParameterError("plan: --aspect-ratio >= 1, 0 < --wall-fraction <= 1 and --remanence-factor >= 1 are needed")


@dataclass
class Plan:
    """The planner's answer: the inputs, the derived quantities and one row per basis."""

    inputs: PlanInputs
    moment_per_kg: float
    amplification: float
    threshold: float
    units: str
    z_m: float
    table: phys.FactorTable
    rows: dict = field(default_factory=dict)


def plan(inputs: PlanInputs) -> Plan:
    """Answer the planning question (see the module docstring).

    Returns
    -------
    Plan
        ``rows[basis]`` holds ``moment_Am2``, ``orientation``,
        ``factor_overhead``, ``peak_overhead`` (nT or nT/m),
        ``offset_m`` (NaN: not detected even straight overhead),
        ``distance_m``, ``elevation_deg``, ``factor_at_offset``,
        ``peak_at_offset``, ``track_spacing_m``, ``line_spacing_m``
        (NaN when not achievable), ``width_factor``, ``anomaly_width_m``,
        ``max_speed_m_s``, ``readings_at_speed`` and ``enough`` (bool).
    """
    inputs.check()
    per_kg = sphere_moment_per_kg(inputs.main_field_nT, inputs.density_kg_m3)
    amp = elongation_factor(inputs.aspect_ratio) * hollow_factor(inputs.wall_fraction) * inputs.remanence_factor
    table = phys.factor_table(inputs.inclination_deg, inputs.criterion)
    threshold = inputs.threshold_multiple * inputs.noise
    z = inputs.altitude_m + inputs.burial_m
    out = Plan(inputs, per_kg, amp, threshold, "nT/m" if inputs.criterion == "gradient" else "nT", z, table)
    bar = (int(inputs.sensors) - 1) * inputs.sensor_spacing_m
    for basis in BASES:
        orient = phys.BASES[basis]
        moment = inputs.mass_kg * per_kg * (amp if basis == "optimistic" else 1.0)
        d = phys.detection_offset(table, orient, moment, threshold, z)
        at = d if math.isfinite(d) else 0.0
        r = math.hypot(at, z)
        phi = math.degrees(math.atan2(z, at))
        width = float(phys.anomaly_width(table, at, z))
        step = inputs.speed_m_s / inputs.sample_rate_hz
        track = 2.0 * d if math.isfinite(d) else float("nan")
        line = bar + track if math.isfinite(track) and (inputs.sensors == 1 or inputs.sensor_spacing_m <= track) \
            else float("nan")
        out.rows[basis] = {
            "moment_Am2": moment, "orientation": orient,
            "factor_overhead": float(table.factor(orient, 90.0)),
            "peak_overhead": float(phys.peak_signal(table, orient, moment, 0.0, z)),
            "offset_m": d, "distance_m": r if math.isfinite(d) else float("nan"), "elevation_deg": phi,
            "factor_at_offset": float(table.factor(orient, phi)),
            "peak_at_offset": float(phys.peak_signal(table, orient, moment, at, z)),
            "track_spacing_m": track, "line_spacing_m": line,
            "width_factor": float(table.width_factor(phi)), "anomaly_width_m": width,
            "max_speed_m_s": width * inputs.sample_rate_hz / int(inputs.readings_across),
            "readings_at_speed": width / step,
            "enough": bool(width / step >= int(inputs.readings_across)),
        }
    return out


def _fmt(x, unit="", digits=4):
    if isinstance(x, float) and not math.isfinite(x):
        return "none"
    return f"{x:.{digits}g}{(' ' + unit) if unit else ''}"


def format_plan(result: Plan) -> str:
    """The answer as plain text, each intermediate number shown."""
    i = result.inputs
    crit = "total gradient amplitude" if i.criterion == "gradient" else "total-field anomaly"
    lines = [
        f"Target class: {i.mass_kg:g} kg of iron or steel, buried up to {i.burial_m:g} m below the seabed",
        f"Sensor {i.altitude_m:g} m above the seabed: height above the target z = {result.z_m:.4g} m",
        f"Criterion: peak {crit} >= {i.threshold_multiple:g} x {i.noise:g} = {result.threshold:.4g} {result.units}"
        f" (fall-off r^-{result.table.exponent})",
        f"Main field {i.main_field_nT:g} nT, inclination {i.inclination_deg:g} deg; solid iron sphere "
        f"{result.moment_per_kg:.5g} A m2/kg (density {i.density_kg_m3:g} kg/m3); optimistic factor "
        f"{result.amplification:.4g} (elongation {elongation_factor(i.aspect_ratio):.4g} x hollowness "
        f"{hollow_factor(i.wall_fraction):.4g} x remanence {i.remanence_factor:g})",
        f"Sampling: {i.sample_rate_hz:g} Hz at {i.speed_m_s:g} m/s = one reading every "
        f"{i.speed_m_s / i.sample_rate_hz:.4g} m; wanted {int(i.readings_across)} readings across the anomaly; "
        f"{int(i.sensors)} sensor(s) {i.sensor_spacing_m:g} m apart",
        "",
    ]
    head = ["", *BASES]
    rows = [
        ("moment (A m2)", "moment_Am2", ""),
        ("orientation factor overhead", "factor_overhead", ""),
        (f"peak overhead ({result.units})", "peak_overhead", ""),
        ("detection offset d (m)", "offset_m", ""),
        ("distance r there (m)", "distance_m", ""),
        ("elevation angle there (deg)", "elevation_deg", ""),
        ("orientation factor there", "factor_at_offset", ""),
        (f"peak there ({result.units})", "peak_at_offset", ""),
        ("track spacing 2 d (m)", "track_spacing_m", ""),
        ("max line spacing (m)", "line_spacing_m", ""),
        ("width factor there", "width_factor", ""),
        ("anomaly width w (m)", "anomaly_width_m", ""),
        ("max speed (m/s)", "max_speed_m_s", ""),
        ("readings across at the speed", "readings_at_speed", ""),
    ]
    width = max(len(r[0]) for r in rows) + 2
    lines.append("".join(f"{h:<{width}}" if k == 0 else f"{h:>14}" for k, h in enumerate(head)))
    for label, key, unit in rows:
        vals = [_fmt(result.rows[b][key], unit) for b in BASES]
        lines.append(f"{label:<{width}}" + "".join(f"{v:>14}" for v in vals))
    lines.append("")
    c = result.rows["conservative"]
    if math.isfinite(c["offset_m"]):
        lines.append(f"Answer (conservative): line spacing at most {_fmt(c['line_spacing_m'], 'm')}, speed at most "
                     f"{_fmt(c['max_speed_m_s'], 'm/s')}; at {i.speed_m_s:g} m/s there are "
                     f"{c['readings_at_speed']:.3g} readings across the anomaly "
                     f"({'enough' if c['enough'] else 'too few'}).")
    else:
        lines.append("Answer (conservative): not detectable even straight over the target; fly lower, lower the "
                     "noise or threshold, or choose a heavier or shallower class.")
    lines += ["", CAUTION]
    return "\n".join(lines) + "\n"


def plot_plan(result: Plan, path: Path) -> Path:
    """Write the amplitude-versus-offset curves and the along-track profile at the marginal geometry (PNG)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    i = result.inputs
    colours = {"conservative": "#b2182b", "typical": "#2166ac", "optimistic": "#1b7837"}
    finite = [r["offset_m"] for r in result.rows.values() if math.isfinite(r["offset_m"])]
    far = max([5.0 * result.z_m] + [1.5 * d for d in finite])
    d = np.linspace(0.0, far, 400)
    fig, (ax, bx) = plt.subplots(1, 2, figsize=(12, 5))
    for basis in BASES:
        row = result.rows[basis]
        peak = phys.peak_signal(result.table, row["orientation"], row["moment_Am2"], d, result.z_m)
        label = {"conservative": "conservative (worst orientation, solid sphere)",
                 "typical": "typical (induced, solid sphere)",
                 "optimistic": "optimistic (induced, elongated hollow remanent)"}[basis]
        ax.semilogy(d, peak, color=colours[basis], label=label)
        if math.isfinite(row["offset_m"]):
            ax.axvline(row["offset_m"], color=colours[basis], linestyle=":", linewidth=1)
    ax.axhline(result.threshold, color="black", linestyle="--",
               label=f"threshold {i.threshold_multiple:g} x noise = {result.threshold:.3g} {result.units}")
    ax.set_xlabel("horizontal offset of the track from the target (m)")
    ax.set_ylabel(f"peak along the track ({result.units})")
    ax.set_title(f"{i.mass_kg:g} kg at {i.burial_m:g} m burial, sensor {i.altitude_m:g} m above the seabed")
    ax.legend(fontsize=8)
    ax.grid(True, which="both", alpha=0.3)
    # along-track profile of the typical anomaly at the conservative marginal geometry
    row = result.rows["conservative"]
    at = row["offset_m"] if math.isfinite(row["offset_m"]) else 0.0
    phi = math.degrees(math.atan2(result.z_m, at))
    r0 = math.hypot(at, result.z_m)
    s = np.linspace(-4.0, 4.0, 1601)
    # the track direction whose half-maximum width is nearest the median one (the width reported)
    profiles = [phys.induced_profile(i.inclination_deg, i.criterion, phi, b, s) for b in phys.TRACK_AZIMUTHS_DEG]
    widths = np.array([phys.half_maximum_width(p, s) for p in profiles])
    prof = profiles[int(np.argmin(np.abs(widths - np.median(widths))))]
    prof = prof / prof.max()
    span = min(4.0 * r0, 3.0 * max(row["anomaly_width_m"], 1e-6))
    keep = np.abs(s * r0) <= span
    bx.plot(s[keep] * r0, prof[keep], color=colours["typical"], label="induced anomaly, normalised")
    step = i.speed_m_s / i.sample_rate_hz
    xs = np.arange(-span, span + 1e-9, step)
    bx.plot(xs, np.interp(xs, s * r0, prof), "o", markersize=3, color="black",
            label=f"readings at {i.speed_m_s:g} m/s, {i.sample_rate_hz:g} Hz")
    bx.axhline(0.5, color="grey", linestyle=":", linewidth=1, label=f"half maximum: width {row['anomaly_width_m']:.3g} m")
    bx.set_xlabel("distance along the track (m)")
    bx.set_ylabel("signal / peak")
    bx.set_title(f"along the track at the conservative detection offset {at:.3g} m")
    bx.legend(fontsize=8)
    bx.grid(True, alpha=0.3)
    fig.suptitle("Supports, never replaces, qualified specialists; no clearance certificate", fontsize=9)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return Path(path)


def add_plan_parser(sub) -> None:
    """Add the ``plan`` subcommand to the command line's subparsers."""
    p = sub.add_parser("plan", help="before a survey: the widest line spacing and highest speed that detect a target class",
                       description="Survey planning from point-dipole physics (see docs/planning.md). " + CAUTION)
    p.add_argument("--mass-kg", type=float, required=True, help="mass of the target class (iron or steel), kg")
    p.add_argument("--burial-m", type=float, required=True, help="deepest burial below the seabed, m")
    p.add_argument("--altitude-m", type=float, required=True, help="sensor height above the seabed, m")
    noise = p.add_mutually_exclusive_group(required=True)
    noise.add_argument("--noise-nT", type=float, help="noise of the total field, nT (peak total-field criterion)")
    noise.add_argument("--noise-nT-per-m", type=float,
                       help="noise of the total gradient amplitude, nT/m (peak gradient criterion)")
    p.add_argument("--threshold-multiple", type=float, default=5.0, help="threshold as a multiple of the noise (default 5)")
    p.add_argument("--sample-rate-hz", type=float, required=True, help="readings per second of each sensor, Hz")
    p.add_argument("--speed-m-s", type=float, required=True, help="planned speed over the ground, m/s")
    p.add_argument("--readings-across", type=int, default=5, help="readings wanted across the anomaly's half-maximum width (default 5)")
    p.add_argument("--inclination-deg", type=float, required=True, help="main-field inclination at the site, degrees (positive down)")
    p.add_argument("--main-field-nT", type=float, required=True, help="main-field intensity at the site, nT")
    p.add_argument("--sensors", type=int, default=1, help="sensors side by side on the bar (default 1)")
    p.add_argument("--sensor-spacing-m", type=float, default=0.0, help="across-track spacing of the sensors on the bar, m")
    p.add_argument("--density-kg-m3", type=float, default=7850.0, help="density of the iron or steel (default 7850)")
    p.add_argument("--aspect-ratio", type=float, default=5.0, help="optimistic bound: long over short axis (default 5)")
    p.add_argument("--wall-fraction", type=float, default=0.15, help="optimistic bound: wall over outer radius (default 0.15)")
    p.add_argument("--remanence-factor", type=float, default=2.0, help="optimistic bound: total over induced moment (default 2)")
    p.add_argument("--plot", default="plan.png", help="PNG of the amplitude-versus-offset curves (default plan.png; '' for none)")


def cmd_plan(args) -> int:
    """Run the ``plan`` subcommand: print the answer and write the plot."""
    gradient = args.noise_nT_per_m is not None
    inputs = PlanInputs(
        mass_kg=args.mass_kg, burial_m=args.burial_m, altitude_m=args.altitude_m,
        noise=args.noise_nT_per_m if gradient else args.noise_nT, criterion="gradient" if gradient else "total_field",
        threshold_multiple=args.threshold_multiple, sample_rate_hz=args.sample_rate_hz, speed_m_s=args.speed_m_s,
        readings_across=args.readings_across, inclination_deg=args.inclination_deg, main_field_nT=args.main_field_nT,
        density_kg_m3=args.density_kg_m3, aspect_ratio=args.aspect_ratio, wall_fraction=args.wall_fraction,
        remanence_factor=args.remanence_factor, sensors=args.sensors, sensor_spacing_m=args.sensor_spacing_m,
    )
    result = plan(inputs)
    print(format_plan(result), end="")
    if args.plot:
        path = plot_plan(result, Path(args.plot))
        print(f"plot: {path}")
    return 0
