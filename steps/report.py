"""Report: one self-contained HTML page per run, with its figures as PNG files.

The report gathers what the upstream stages wrote and shows it to a
person: the residual and total-gradient maps with the targets and the
reacquisition route, the detectability map and the coverage gaps, the
diurnal curve against its rate limit, the crossover differences before and
after levelling, what each correction removed (from the run's manifest
records), the reading noise (fourth differences; see
:mod:`lodeline.steps._report_noise`) beside the noise level of the picked
grid, and for each of the best-ranked fitted targets a profile of the
readings against its fitted dipole (:mod:`lodeline.steps._report_profiles`),
then the tables of targets, seed checks and the plan, and how the run was
made (version, configuration hash, stage keys and parameters).

Figures are drawn with matplotlib (:mod:`lodeline.steps._report_figures`),
written as PNG files of the stage and embedded in ``report.html`` as data
URIs (:mod:`lodeline.steps._report_html`): the page needs no network and
no other file. Grids are read as a strided subsample (``map_pixels``).
Every string from an input file or upstream table is HTML-escaped.

The report states, in its own words, that its outputs support and never
replace the judgement of qualified specialists, that a target list or a
coverage figure is no clearance certificate, and that local regulations
and licensed practice govern any reacquisition or disposal.

References
----------
Blakely, R. J. (1995). Potential Theory in Gravity and Magnetic
    Applications. Cambridge University Press. [Blakely1995]_ (the dipole
    anomaly of the profiles)
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from lodeline.model import DEFAULT_EXCLUDE, DataError, Stage, StageContext, StageResult, flag_mask
from lodeline.params import Param, validate_table

from . import _report_figures as figs
from ._report_html import esc, figure_html, page_html, pairs_html, table_html
from ._report_noise import difference_noise
from ._report_profiles import target_profiles

__all__ = ["PARAMS", "STAGE", "run", "CAUTION_HTML", "removal_table", "stage_table"]

PARAMS = (
    Param("profile_targets", 6, "Best-ranked fitted targets that get a profile figure.", kind=int, minimum=0, maximum=50),
    Param("table_rows", 50, "Most rows of the target and plan tables shown (the CSV files hold all).", kind=int, minimum=1),
    Param("map_pixels", 1200, "Most grid cells along the longer side of a map figure (the grid is subsampled).",
          kind=int, minimum=100, maximum=5000),
    Param("label_targets", 15, "Best-ranked targets labelled on the maps.", kind=int, minimum=0),
    Param("figure_dpi", 100, "Resolution of the PNG figures, dots per inch.", kind=int, minimum=50, maximum=300),
    Param("profile_radius_m", None, "Radius of the readings in a profile, m; default the dipole_fit radius_m.",
          minimum=0, exclusive_minimum=True, optional=True),
)

CAUTION_HTML = (
    '<div class="caution"><p><strong>Read this before using any result.</strong> Everything in this report and in '
    "the files beside it is an aid for people qualified to judge it: geophysicists and explosive ordnance "
    "specialists. It never takes the place of their judgement.</p>"
    "<p>The target list and the coverage figures are not a clearance certificate. Objects may have been missed, "
    "put in the wrong place or judged wrongly, and ground shown as covered may still hold ordnance.</p>"
    "<p>Any reacquisition, investigation or disposal must follow the regulations in force where the work is done "
    "and be carried out under licensed practice.</p></div>"
)

TARGET_COLUMNS = ("rank", "target_id", "kind", "score", "status", "easting_m", "northing_m", "longitude", "latitude",
                  "depth_below_sensor_m", "burial_m", "moment_Am2", "remanence_angle_deg", "mass_min_kg", "mass_max_kg",
                  "peak_anomaly_nT", "peak_gradient_nT_per_m", "snr", "fit_r2", "position_sigma_m")
PLAN_COLUMNS = ("visit", "target_id", "rank", "kind", "easting_m", "northing_m", "longitude", "latitude",
                "search_radius_m", "containment_probability", "leg_m", "cumulative_m")


def _stage_order(context: StageContext) -> list[str]:
    names = list((context.lineage or {}).get("stages", {}))
    return [n for n in names if n in context.records] + [n for n in context.records if n not in names]


def removal_table(context: StageContext) -> pd.DataFrame:
    """What each correction removed, by stage, from the manifest records (nT)."""
    rows = []
    for name in _stage_order(context):
        for var, r in ((context.records[name].get("ledger") or {}).get("removed") or {}).items():
            rows.append({"stage": name, "correction": var, "readings": r.get("readings"), "min_nT": r.get("min_nT"),
                         "max_nT": r.get("max_nT"), "rms_nT": r.get("rms_nT")})
    return pd.DataFrame(rows, columns=["stage", "correction", "readings", "min_nT", "max_nT", "rms_nT"])


def stage_table(context: StageContext) -> pd.DataFrame:
    """Per stage: time, readings in and out, rejected and newly flagged readings, cache key."""
    rows = []
    keys = (context.lineage or {}).get("stages", {})
    for name in _stage_order(context):
        rec = context.records[name]
        ledger = rec.get("ledger") or {}
        rows.append({
            "stage": name, "wall_s": rec.get("wall_s"),
            "readings_in": ledger.get("readings_in"), "readings_out": ledger.get("readings_out"),
            "rejected": sum((ledger.get("rejected") or {}).values()) if ledger else None,
            "newly_flagged": "; ".join(f"{k} {v}" for k, v in (ledger.get("new_flags") or {}).items()),
            "key": str(keys.get(name, rec.get("key", "")))[:16],
        })
    table = pd.DataFrame(rows, columns=["stage", "wall_s", "readings_in", "readings_out", "rejected", "newly_flagged", "key"])
    for col in ("readings_in", "readings_out", "rejected"):
        table[col] = table[col].astype("Int64")
    return table


def _param(context: StageContext, stage: str, key: str, default=None):
    return ((context.records.get(stage) or {}).get("components") or {}).get("params", {}).get(key, default)


def _metadata(table: pd.DataFrame | None) -> dict:
    if table is None or not {"key", "value"} <= set(table.columns):
        return {}
    return dict(zip(table["key"].astype(str), table["value"]))


def _gradient_levels(meta: dict) -> tuple:
    """Noise level and threshold of the total gradient amplitude (nT/m) from the picking metadata, and the
    threshold's name: the picking threshold when picks were made on that grid, else the feature threshold."""
    if meta.get("pick_on") == "total_gradient_amplitude":
        return _number(meta.get("noise_level")), _number(meta.get("threshold")), "picking threshold"
    return (_number(meta.get("gradient_noise_nT_per_m")), _number(meta.get("feature_threshold_nT_per_m")),
            "feature threshold")


def _number(value):
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if np.isfinite(v) else None


class _Figures:
    """Saves each figure as a PNG file of the stage and keeps its HTML."""

    def __init__(self, folder, dpi):
        self.folder, self.dpi, self.files, self.html = folder, dpi, {}, {}

    def add(self, name: str, fig, alt: str, caption: str) -> str:
        path = figs.save(fig, self.folder / f"{name}.png", self.dpi)
        self.files[f"{name}.png"] = path
        self.html[name] = figure_html(path.read_bytes(), alt, caption, f"{name}.png")
        return self.html[name]


def run(data: dict, params: dict, context: StageContext) -> StageResult:
    """Write the report of the run.

    Parameters
    ----------
    data : dict
        Outputs of the stages in ``after``: ``ranking`` (``targets``,
        ``seed_checks``), ``reacquisition`` (``reacquisition_plan``),
        ``enhancement`` (``grid``: ``residual`` nT,
        ``total_gradient_amplitude`` nT/m), ``levelling`` (``readings``,
        ``segments``, ``crossovers``), ``diurnal`` (``diurnal_curve``,
        ``base_station_gaps``), ``picking`` (``picking_metadata``),
        ``dipole_fit`` (``dipoles``), ``detectability``.
    params : dict
        The ``[report]`` table (see :data:`PARAMS`).
    context : lodeline.model.StageContext
        Run context; ``records`` and ``lineage`` give the per-stage figures.

    Returns
    -------
    lodeline.model.StageResult
        Files ``report.html`` and one PNG per figure; tables
        ``removal_summary`` and ``noise_by_sensor``.
    """
    settings = validate_table(PARAMS, params, "report")
    targets = data["ranking"]["targets"]
    for col in ("target_id", "rank", "kind", "easting_m", "northing_m"):
        if col not in targets.columns:
            raise DataError(f"report: the target table (ranking/targets.csv) lacks the column {col!r}: check the ranking stage output")
    targets = targets.sort_values("rank", kind="stable").reset_index(drop=True)
    plan = data["reacquisition"].get("reacquisition_plan")
    grid = data["enhancement"]["grid"]
    level = data["levelling"]
    readings, segments = level["readings"], level["segments"]
    sensor_names = list(readings.attrs.get("sensor_names", []))
    line_names = list(readings.attrs.get("line_names", []))
    picking_meta = _metadata(data["picking"].get("picking_metadata"))
    out = _Figures(context.scratch, settings["figure_dpi"])
    survey_name = str(context.survey.get("name", "survey"))

    # Maps
    route_xy = plan[["easting_m", "northing_m"]].to_numpy(float) if plan is not None and len(plan) else None
    image, extent, step = figs.grid_image(grid["residual"], settings["map_pixels"])
    out.add("map_residual", figs.map_figure(image, extent, title="Residual anomaly with targets", units="nT",
                                            targets=targets, label_n=settings["label_targets"]),
            "map of the residual anomaly with the targets",
            f"Levelled residual anomaly (every {step}th cell shown), with every target by kind and the "
            f"{settings['label_targets']} best ranked labelled.")
    pick_on, pick_units = str(picking_meta.get("pick_on", "")), str(picking_meta.get("pick_value_units", ""))
    gradient_noise, gradient_threshold, threshold_name = _gradient_levels(picking_meta)
    tga, extent_t, step_t = figs.grid_image(grid["total_gradient_amplitude"], settings["map_pixels"])
    tga_units = str(grid["total_gradient_amplitude"].attrs.get("units", "nT/m"))
    out.add("map_total_gradient", figs.map_figure(tga, extent_t, title="Total gradient amplitude with targets",
                                                  units=tga_units, targets=targets, label_n=settings["label_targets"],
                                                  scale="log", noise_level=gradient_noise, ink="w"),
            "map of the total gradient amplitude with the targets",
            f"Total gradient amplitude (3-D analytic signal amplitude; every {step_t}th cell shown, log colour scale).")
    if route_xy is not None:
        circles = list(zip(plan["easting_m"], plan["northing_m"], plan["search_radius_m"]))
        out.add("map_route", figs.map_figure(image, extent, title="Reacquisition route and search circles", units="nT",
                                             targets=targets, label_n=settings["label_targets"], route_xy=route_xy,
                                             circles=circles),
                "map of the reacquisition route",
                f"Visiting order of the {len(plan)} waypoints (star: start) and the search circle of each, over the residual.")

    detect_html = _detectability(data.get("detectability") or {}, targets, settings, out)

    # Processing checks
    curve = data["diurnal"].get("diurnal_curve")
    if curve is not None and len(curve):
        limit = _number(_param(context, "diurnal", "rate_limit_nT_per_min"))
        out.add("diurnal", figs.diurnal_figure(curve, limit, data["diurnal"].get("base_station_gaps")),
                "diurnal variation and its rate against time",
                "Base-station variation about its datum and its rate of change; readings taken while the rate "
                "exceeded the limit are flagged, readings in base-station gaps are not corrected.")
    crossovers = level.get("crossovers")
    if crossovers is not None and len(crossovers):
        out.add("crossovers", figs.crossover_figure(crossovers), "histograms of crossover differences",
                "Differences between survey lines and tie lines where they cross, before and after levelling.")
    removal = removal_table(context)
    out.add("removal", figs.removal_figure(removal), "bar chart of the RMS each correction removed",
            "RMS of each correction over the readings it applied to (log scale), from the run's records.")
    exclude = flag_mask(*(_param(context, "dipole_fit", "exclude_flags") or DEFAULT_EXCLUDE))
    noise = difference_noise(readings, "residual", exclude)
    out.add("noise", figs.noise_figure(noise, sensor_names, tga, gradient_noise, gradient_threshold, tga_units,
                                       threshold_name),
            "histograms of the reading noise and of the total gradient amplitude",
            "Left: fourth differences of the levelled readings along each line and sensor, scaled to the noise of "
            "one reading (robust level per sensor in the legend). Right: the total gradient amplitude grid against "
            f"its noise level and the {threshold_name}.")
    noise_table = pd.DataFrame({"sensor": sensor_names or [str(k) for k in range(len(noise["sigma_nT"]))],
                                "noise_nT": noise["sigma_nT"], "differences": noise["counts"].sum(axis=1)})

    # Profiles
    profile_html = _profiles(data, targets, readings, segments, line_names, sensor_names, settings, context, exclude, out)

    # The page
    lineage = context.lineage or {}
    ranking_summary = (context.records.get("ranking") or {}).get("summary") or {}
    level_summary = (context.records.get("levelling") or {}).get("summary") or {}
    plan_summary = (context.records.get("reacquisition") or {}).get("summary") or {}
    ingest = (context.records.get("ingest") or {}).get("ledger") or {}
    glance = [
        ("survey", survey_name), ("coordinate reference system", context.survey.get("crs", "")),
        ("readings stored", ingest.get("readings_out")), ("rows rejected on reading", sum((ingest.get("rejected") or {}).values()) if ingest else None),
        ("targets", len(targets)),
        ("targets by kind", ", ".join(f"{k} {v}" for k, v in targets["kind"].astype(str).value_counts().items())),
        ("crossover RMS before levelling, nT", level_summary.get("crossover_rms_before_nT")),
        ("crossover RMS after tie-line levelling, nT", level_summary.get("crossover_rms_after_tie_nT")),
        ("reading noise (fourth differences), nT", noise["sigma_all_nT"]),
        ("picking on", pick_on),
        ("picking threshold", f"{picking_meta.get('threshold', '')} {'' if pick_units == '1' else pick_units}".strip()),
        ("residual noise of the grid, nT", _number(picking_meta.get("residual_noise_nT"))),
        ("total gradient amplitude noise", f"{gradient_noise:.4g} {tga_units}" if gradient_noise else ""),
        ("reacquisition waypoints", plan_summary.get("waypoints", len(plan) if plan is not None else None)),
        ("route length, m", plan_summary.get("route_m")), ("same targets in rank order, m", plan_summary.get("rank_order_m")),
    ]
    glance += [(f"ranking: {k}", v) for k, v in ranking_summary.items() if isinstance(v, (int, float, str))][:8]
    seeds = data["ranking"].get("seed_checks")
    sections = [
        ("cautions", "Read this first", CAUTION_HTML),
        ("glance", "At a glance", pairs_html(glance)),
        ("maps", "Maps", out.html["map_residual"] + out.html["map_total_gradient"] + out.html.get("map_route", "")),
        ("coverage", "Coverage and gaps", detect_html),
        ("targets", "Targets", table_html(targets, TARGET_COLUMNS, settings["table_rows"]) +
         '<p class="note">All columns of every target: ranking/targets.csv, .geojson, .gpkg.</p>'),
        ("seeds", "Seed checks", table_html(seeds, None, None, "seed checks") if seeds is not None else
         '<p class="note">This run has no seed table.</p>'),
        ("plan", "Reacquisition plan", pairs_html([(k, v) for k, v in plan_summary.items() if isinstance(v, (int, float, str))]) +
         table_html(plan, PLAN_COLUMNS, settings["table_rows"]) +
         '<p class="note">Files: reacquisition/reacquisition_plan.csv, .geojson and .gpx.</p>'),
        ("profiles", "Target profiles", profile_html),
        ("checks", "Processing checks", out.html.get("diurnal", "") + out.html.get("crossovers", "") +
         out.html["removal"] + table_html(removal, None, None, "corrections removed") + out.html["noise"] +
         table_html(noise_table, None, None, "reading noise by sensor")),
        ("provenance", "How this run was made", _provenance(context)),
    ]
    subtitle = (f"lodeline {lineage.get('lodeline_version', '')}, configuration {str(lineage.get('config_hash', ''))[:16]}; "
                f"report key {str(lineage.get('stages', {}).get('report', ''))[:16]}")
    text = page_html(f"{survey_name}: run report", subtitle, sections)
    path = context.scratch / "report.html"
    path.write_text(text, encoding="utf-8")
    files = {"report": path, **out.files}
    summary = {"figures": len(out.files), "report_bytes": path.stat().st_size, "profiles": sum(n.startswith("profile_") for n in out.html), "reading_noise_nT": noise["sigma_all_nT"]}
    context.log.info("report: %d figures, report.html %.1f kB", summary["figures"], summary["report_bytes"] / 1e3)
    return StageResult(tables={"removal_summary": removal, "noise_by_sensor": noise_table}, files=files, summary=summary)


def _profiles(data, targets, readings, segments, line_names, sensor_names, settings, context, exclude, out) -> str:
    dipoles = data["dipole_fit"]["dipoles"]
    fitted = dipoles[np.isfinite(dipoles["moment_Am2"].to_numpy(float))] if "moment_Am2" in dipoles else dipoles.iloc[:0]
    has_fit = np.isfinite(targets["moment_Am2"].to_numpy(float)) if "moment_Am2" in targets else np.zeros(len(targets), bool)
    shown = targets[has_fit].head(settings["profile_targets"])
    if not len(shown) or not len(fitted):
        return '<p class="note">No fitted target to profile.</p>'
    radius = settings["profile_radius_m"] or float(_param(context, "dipole_fit", "radius_m", 5.0))
    background = str(_param(context, "dipole_fit", "background", "plane"))
    picks = data["picking"].get("picks")
    shown = shown.copy()
    if picks is not None and "pick_id" in shown.columns and {"pick_id", "easting_m", "northing_m"} <= set(picks.columns):
        at = picks.assign(key=picks["pick_id"].astype(str)).set_index("key")
        keys = shown["pick_id"].astype(str)
        shown["centre_easting_m"] = keys.map(at["easting_m"]).astype(float).to_numpy()
        shown["centre_northing_m"] = keys.map(at["northing_m"]).astype(float).to_numpy()
    sources = [_model_sources(row, fitted) for _, row in shown.iterrows()]
    profiles = target_profiles(readings, segments, shown, sources, radius_m=radius, exclude=exclude, background=background)
    parts = []
    for (_, row), prof in zip(shown.iterrows(), profiles):
        name = f"profile_{len(parts) + 1:02d}"
        parts.append(out.add(name, figs.profile_figure(prof, row, line_names, sensor_names),
                             f"profile of the readings across target {row['target_id']}",
                             f"Target {row['target_id']}: levelled readings of the closest passes within {radius:g} m "
                             f"(dots) and the anomaly of the {prof['sources']} dipole(s) fitted with it plus a {background} "
                             f"background (lines); "
                             f"right: every reading within the radius, observed against modelled."))
    return "".join(parts)


def _model_sources(target: pd.Series, fitted: pd.DataFrame) -> pd.DataFrame:
    """The dipoles fitted together with a target: its own row of the dipole table (by ``pick_id``) or every
    member of its joint fit; the target's own columns when the dipole table has no such row."""
    if "pick_id" in fitted.columns and "pick_id" in target.index:
        own = fitted[fitted["pick_id"].astype(str) == str(target["pick_id"])]
        if len(own):
            group = own["joint_group"].iloc[0] if "joint_group" in own.columns else -1
            if pd.notna(group) and int(group) >= 0:
                return fitted[fitted["joint_group"] == group]
            return own
    return target.to_frame().T.reset_index(drop=True)


def _detectability(outputs: dict, targets, settings, out) -> str:
    """The least detectable mass map with the edges of the class's gaps, and the coverage and gap tables."""
    grid = outputs.get("grid")
    parts = []
    if grid is not None and "least_mass_high_kg" in grid:
        attrs = grid.attrs
        image, extent, step = figs.grid_image(grid["least_mass_high_kg"], settings["map_pixels"])
        outline = figs.grid_image(grid["class_detectable"], settings["map_pixels"])[0] if "class_detectable" in grid else None
        gaps = outputs.get("gaps")
        points = []
        if gaps is not None and {"gap_id", "centroid_easting_m", "centroid_northing_m"} <= set(gaps.columns):
            points = [(x, y, f"gap {g}") for g, x, y in
                      zip(gaps["gap_id"], gaps["centroid_easting_m"], gaps["centroid_northing_m"])][:30]
        name, mass = attrs.get("class_name", "target class"), attrs.get("class_mass_kg", "")
        burial = attrs.get("burial_m", attrs.get("class_max_burial_m", ""))
        units = str(grid["least_mass_high_kg"].attrs.get("units", "kg"))
        out.add("map_detectability", figs.map_figure(
            image, extent, title=f"Least detectable mass (conservative) at {burial} m burial; red: edge of the gaps "
                                 f"for {name} ({mass} kg)", units=units, targets=targets, label_n=0, scale="log",
            outline=outline, points=points),
            "map of the least detectable mass with the coverage gaps",
            f"Least mass the survey would have detected in each cell (worst orientation, solid iron sphere; every "
            f"{step}th cell shown, log colour scale). Inside the red lines the target class {name} of {mass} kg is "
            f"not detectable; the gaps are in detectability/gaps.geojson and gaps.gpkg.")
        parts.append(out.html["map_detectability"])
    coverage = outputs.get("coverage_summary")
    parts.append(table_html(coverage, None, None, "coverage of the target class") if coverage is not None else "")
    gaps = outputs.get("gaps")
    if gaps is not None:
        parts.append(table_html(gaps, None, settings["table_rows"], "gaps, largest first"))
    sampling = outputs.get("sampling_lines")
    if sampling is not None and "flags" in sampling.columns:
        flagged = sampling[sampling["flags"].fillna("").astype(str) != ""]
        parts.append(table_html(flagged, None, settings["table_rows"], "lines with sampling flags"))
    if not any(parts):
        return '<p class="note">The detectability stage gave no outputs.</p>'
    return "".join(parts)


def _provenance(context: StageContext) -> str:
    lineage = context.lineage or {}
    head = pairs_html([("lodeline version", lineage.get("lodeline_version", "")),
                       ("configuration hash", lineage.get("config_hash", ""))])
    params = []
    for name in _stage_order(context):
        p = ((context.records[name].get("components") or {}).get("params")) or {}
        rows = pd.DataFrame({"key": list(p), "value": [str(v) for v in p.values()]})
        params.append(f"<details><summary>{esc(name)}</summary>{table_html(rows)}</details>")
    return head + table_html(stage_table(context), None, None, "stages") + "<h3>Parameters of each stage</h3>" + "".join(params)


STAGE = Stage(
    name="report",
    run=run,
    params=PARAMS,
    after=("ranking", "reacquisition", "detectability", "enhancement", "levelling", "diurnal", "picking", "dipole_fit"),
    order=200,
    summary="Self-contained HTML report of the run with its PNG figures",
)
