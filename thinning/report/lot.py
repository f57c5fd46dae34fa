"""The self-contained HTML report of one lot.

:func:`write_lot_report` reads a lot from the records (:class:`thinning.records.Records`)
and writes ``<LOT>.html``: the verdict and its reasons first, the replicates'
diameter curves overlaid, the numbers of every replicate and of the lot, the
product's control chart with this lot marked, warnings, cautions, tool
version and sources. Figures are PNGs from matplotlib's Agg canvas embedded
as base64; the page loads nothing else and needs no script. Everything that
comes from users (names, notes, warnings) is HTML-escaped by the template.
"""

from __future__ import annotations

import base64
import io
import json
from pathlib import Path

import jinja2
import numpy as np

from .. import __version__, atomic, display, qc
from ..display import MISSING
from ..values import utc_text

TEMPLATE_DIR = Path(__file__).parent / "templates"

CAUTIONS = (
    "Check the calibration of the set-up (pixel size, frame rate) regularly with a reference fluid of "
    "known relaxation time or viscosity; a wrong scale shifts every lot alike and no control chart "
    "will show it.",
    "Prepare, test and dispose of the liquids following your laboratory's own procedures and the local "
    "rules for hazardous substances.",
    "These numbers feed release decisions: a 'review' verdict asks a person to look at the replicates, "
    "and a chart flag asks whether the process has moved, even when the lot is within its limits.",
)

SOURCES = (
    ("Elasto-capillary thinning, D(t)/D0 = (G D0/(4σ))^(1/3) exp(−t/(3λ)), and the relaxation time "
     "from it", "Anna S.L., McKinley G.H. (2001), J. Rheol. 45:115–138; McKinley G.H. (2005), "
     "Rheology Reviews 2005"),
    ("Visco-capillary thinning, D(t) = 0.1418 (σ/η)(t_b − t)",
     "Papageorgiou D.T. (1995), Phys. Fluids 7; McKinley G.H., Tripathi A. (2000), J. Rheol. 44"),
    ("Inertio-capillary thinning, D ∝ (σ/ρ)^(1/3) (t_b − t)^(2/3)",
     "Eggers J., Villermaux E. (2008), Rep. Prog. Phys. 71:036601"),
    ("Apparent extensional viscosity η_E = σ/(−dD/dt) (force ratio X = 1)",
     "McKinley G.H., Tripathi A. (2000), J. Rheol. 44; McKinley G.H. (2005)"),
    ("Individuals and moving-range charts; constants d2 = 1.128 and D4 = 3.267 for ranges of two",
     "Montgomery D.C., Introduction to Statistical Quality Control (Wiley), tables of control-chart "
     "factors"),
    ("Baselines: limits computed from lots free of assignable causes (phase I), then held to judge "
     "later lots (phase II)", "Montgomery D.C., Introduction to Statistical Quality Control (Wiley), "
     "phase I and phase II of control-chart use"),
    ("Run rules beyond-3-sigma, 2-of-3-beyond-2-sigma, 4-of-5-beyond-1-sigma, 8-on-one-side",
     "Western Electric Co. (1956), Statistical Quality Control Handbook; as given by Montgomery"),
    ("Run rule 6-trending (six lots in a row rising or falling)",
     "Nelson L.S. (1984), The Shewhart control chart — tests for special causes, J. Qual. Technol. "
     "16(4):237–239"),
    ("95 % interval of a lot mean: mean ± t(0.975, n − 1) · sd/√n", "Student's t distribution"),
)

#: What each verdict means, in the words under the verdict (the lot report and the index of lots).
VERDICT_LINES = {
    "pass": "every replicate valid and every limit met",
    "fail": "a lot mean is outside its limit",
    "review": "a person should look at this lot",
}

def _png(figure) -> str:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(figure)
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=110, metadata={"Software": None})
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def curves_figure(detail) -> str | None:
    """The replicates' diameter curves (:func:`thinning.plots.plot_lot_curves`); base64 PNG or None."""
    from matplotlib.figure import Figure

    from ..plots import plot_lot_curves

    if not _drawable_curves(detail):
        return None
    figure = Figure(figsize=(7.0, 3.6), layout="constrained")
    plot_lot_curves(detail, ax=figure.add_subplot())
    return _png(figure)


def chart_figure(detail) -> str | None:
    """The product's control charts (:func:`thinning.plots.plot_control_chart`); base64 PNG or None."""
    from matplotlib.figure import Figure

    from ..plots import plot_control_chart

    if not detail.chart:
        return None
    figure = Figure(figsize=(7.0, 4.6), layout="constrained")
    plot_control_chart(detail, axes=figure.subplots(2, 1, sharex=True, height_ratios=(3, 2)))
    return _png(figure)


def _drawable_curves(detail):
    drawn = [m for m in detail.measurements if m["id"] in detail.curves]
    return [m for m in drawn if np.any(np.isfinite(detail.curves[m["id"]][1]) & (detail.curves[m["id"]][1] > 0))]


def display_units(detail) -> dict[str, display.Unit]:
    """The display unit of each limited quantity on this page (chosen with the verdict, from the
    lot's values and limits: :func:`thinning.qc.view_units`)."""
    return dict(detail.summary.verdict.units) or qc.view_units(detail.spec, [])


def _replicate_rows(detail) -> list[dict]:
    from ..records import replicate_label

    verdict = detail.summary.verdict
    units = display_units(detail)
    rows = []
    for m, is_valid, why in zip(detail.measurements, verdict.valid, verdict.invalid_reasons):
        lam, ci = display.estimate(m["relaxation_time_s"],
                                   (m["relaxation_time_ci95_low_s"], m["relaxation_time_ci95_high_s"]),
                                   units["relaxation_time_s"])
        rows.append({
            "label": replicate_label(m), "sample": m["sample"], "replicate": m["replicate"] or MISSING,
            "lam": lam, "ci": ci or MISSING,
            "quality": m["quality"] or MISSING, "regime": m["regime"] or MISSING,
            "lifetime": display.quantity(m["filament_lifetime_s"], units["filament_lifetime_s"]),
            "eta_e": display.quantity(m["extensional_viscosity_max_Pa_s"],
                                      units["extensional_viscosity_max_Pa_s"]),
            "valid": "yes" if is_valid else f"no: {why}", "is_valid": is_valid,
            "warnings": list(zip(m["warning_codes"].split("; "), json.loads(m["warnings"])))
            if m["warning_codes"] else [("", w) for w in json.loads(m["warnings"])],
            "sha256": m["sha256"], "analysed_at": display.timestamp(m["analysed_at"]),
            "tool_version": m["tool_version"] or MISSING, "notes": m["notes"] or "",
            "source_path": m["source_path"] or MISSING, "clock": clock_text(m),
        })
    for f in detail.failures:
        rows.append({"label": replicate_label(f), "sample": f["sample"], "replicate": f["replicate"] or MISSING,
                     "lam": MISSING, "ci": MISSING, "quality": "failed", "regime": MISSING,
                     "lifetime": MISSING, "eta_e": MISSING, "valid": "no", "is_valid": False,
                     "warnings": [("failed", f["reason"])], "sha256": f["sha256"] or MISSING,
                     "analysed_at": display.timestamp(f["analysed_at"]),
                     "tool_version": f["tool_version"] or MISSING,
                     "notes": f["notes"] or "", "source_path": f["source_path"] or MISSING,
                     "clock": MISSING})
    return rows


def clock_text(m) -> str:
    """How the recording was clocked and started, in words: ``header 4000 frames/s · trigger at
    frame 12 · exposure 20 µs`` (— for results stored before the clock was recorded)."""
    source = m.get("clock_source")
    if not source:
        return MISSING
    words = {"file": "header", "option": "--fps", "container": "container"}.get(source, source)
    parts = [f"{words} {display.frame_rate(m.get('fps_hz'))}"]
    trigger = m.get("trigger_frame")
    parts.append("trigger outside the record" if trigger is None and source == "file"
                 else (f"trigger at frame {trigger}" if trigger is not None else "no trigger recorded"))
    if m.get("exposure_s") is not None:
        parts.append(f"exposure {display.given(m['exposure_s'], display.US)}")
    return " · ".join(parts)


def _lot_rows(detail) -> list[dict]:
    limits = detail.spec.limits if detail.spec is not None else {}
    units = display_units(detail)
    rows = []
    for key, stats in detail.summary.verdict.stats.items():
        unit = units[key]
        mean, ci = display.estimate(stats.mean, stats.ci95, unit)
        rows.append({"name": qc.LIMITED_QUANTITIES[key][0], "n": stats.n, "mean": mean,
                     "sd": display.spread(stats.sd, unit), "cv": display.percent(stats.cv),
                     "ci": ci or MISSING,
                     "limits": display.limits(*limits[key], unit) if key in limits else "not limited"})
    return rows


def _baseline_context(detail) -> dict | None:
    """Which lots formed this lot's control limits and which earlier lots were left out, and why
    (an exclusion with who, when and why)."""
    point = detail.summary.chart
    if point is None:
        return None
    named = detail.spec.baseline if detail.spec is not None else None
    if point.baseline_name is None:
        named = None
    excluded = {e["lot"]: e for e in detail.exclusions}
    left_out = []
    for lot, why in point.left_out:
        e = excluded.get(lot)
        if e is not None and why.startswith("excluded: "):
            why = (f"excluded from the baseline by {e['excluded_by']} on "
                   f"{display.timestamp(e['excluded_at'])}: {e['reason']}")
        left_out.append((lot, why))
    charted = {summary.lot for summary, _ in detail.chart}
    return {"named": named is not None,
            "name": named.name if named is not None else None,
            "described": named.described() if named is not None else qc.DEFAULT_BASELINE,
            "lots": list(point.baseline), "left_out": left_out,
            # lots the specification names that have no lot mean in the records
            "missing": [lot for lot in (named.lots if named is not None else ()) if lot not in charted]}


def _chart_context(detail) -> dict:
    point = detail.summary.chart
    unit = display_units(detail)["relaxation_time_s"]
    spec = detail.spec.limits.get("relaxation_time_s") if detail.spec is not None else None
    common = {"baseline": _baseline_context(detail),
              "spec_limits": display.limits(*spec, unit) if spec is not None else None}
    if point is None:
        return {"state": "no-mean", **common}
    if point.centre is None:
        return {"state": "too-few", "n_baseline": point.n_baseline, "needed": qc.MIN_BASELINE_LOTS, **common}
    shown = {name: display.quantity(getattr(point, name), unit)
             for name in ("centre", "ucl", "lcl", "mr_ucl", "moving_range")}
    return {"state": "limits", "n_baseline": point.n_baseline, **shown, **common}


def lot_report_html(detail, *, generated_at: str | None = None) -> str:
    """The report page for a :class:`thinning.records.LotDetail`, as HTML text."""
    environment = jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATE_DIR), autoescape=True,
                                     undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    summary = detail.summary
    replicates = _replicate_rows(detail)
    warnings = [(row["label"], code, w) for row in replicates for code, w in row["warnings"]]
    tool_versions = sorted({row["tool_version"] for row in replicates if row["tool_version"] != MISSING})
    units = display_units(detail)
    context = {
        "product": summary.product, "lot": summary.lot, "made_on": summary.made_on or MISSING,
        "first_analysed_at": display.timestamp(summary.first_analysed_at),
        "verdict": summary.verdict.verdict, "reasons": summary.verdict.shown_reasons,
        "verdict_line": VERDICT_LINES[summary.verdict.verdict],
        "n_valid": summary.verdict.n_valid, "n_replicates": summary.verdict.n_replicates,
        "required": detail.spec.replicates if detail.spec is not None else None,
        "max_cv": display.given_percent(detail.spec.max_cv) if detail.spec is not None else None,
        "has_spec": detail.spec is not None,
        "decision_rule": detail.spec.decision_rule if detail.spec is not None else None,
        "verdict_changes": [{**c, "changed_at": display.timestamp(c["changed_at"])}
                            for c in detail.verdict_changes],
        "chart_flags": [(name, qc.CHART_RULES[name]) for name in summary.chart_flags],
        "lam_mean": display.estimate(summary.relaxation_time.mean, summary.relaxation_time.ci95,
                                     units["relaxation_time_s"])[0],
        "lam_cv": display.percent(summary.relaxation_time.cv),
        "replicates": replicates, "lot_rows": _lot_rows(detail), "warnings": warnings,
        "notes": [(row["label"], row["notes"]) for row in replicates if row["notes"]],
        "curves_png": curves_figure(detail), "chart_png": chart_figure(detail),
        "chart": _chart_context(detail), "rules": qc.CHART_RULES,
        "history": [{"label": f"{h['sample']} #{h['replicate']}" if h["replicate"] else h["sample"],
                     "lam": display.quantity(h["relaxation_time_s"], units["relaxation_time_s"]),
                     "tool_version": h["tool_version"] or MISSING,
                     "analysed_at": display.timestamp(h["analysed_at"]),
                     "superseded_at": display.timestamp(h["superseded_at"]),
                     "options": h["options"]} for h in detail.history],
        "cautions": CAUTIONS, "sources": SOURCES, "version": __version__,
        "measurement_versions": ", ".join(tool_versions) or MISSING,
        "generated_at": display.timestamp(generated_at or utc_text()),
    }
    return environment.get_template("lot.html").render(**context)


def report_filename(lot: str) -> str:
    """``<LOT>.html`` with the batch folders' character rule applied to the lot id."""
    from ..values import safe_name

    return f"{safe_name(lot)}.html"


def write_lot_report(records, lot: str, *, product: str | None = None, out_dir: str | Path,
                     generated_at: str | None = None) -> Path:
    """Write ``out_dir/<LOT>.html`` for one lot of ``records``; returns its path (written atomically)."""
    detail = records.lot_detail(lot, product=product)
    html = lot_report_html(detail, generated_at=generated_at)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    path = out / report_filename(detail.summary.lot)
    atomic.write_text(path, html)
    return path
