"""The one-page HTML report of one analysed recording.

:func:`write_recording_report` turns a :class:`~thinning.result.Result` and the PNGs of
:func:`thinning.plots.write_figures` into ``report.html``: self-contained (the
figures are embedded as base64, no external file, font or script), printable,
and escaped throughout (names and paths come from users). Numbers are shown
in the house style (:mod:`thinning.display`: one unit per quantity on the page,
a value to its interval's precision); a missing number is shown as "—" with
the reason. The file is written atomically and is the
same byte for byte for the same input.
"""

from __future__ import annotations

import base64
from pathlib import Path, PurePath

import jinja2

from .. import atomic, display
from ..display import MISSING
from ..result import RESULT_SCHEMA
from ..values import finite_number as _number

TEMPLATE_DIR = Path(__file__).parent / "templates"

#: The order and captions of the figures written by :func:`thinning.plots.write_figures`.
FIGURE_CAPTIONS = {
    "diameter": "Minimum neck diameter against time; filled points: in the fit window, open: outside "
                "it, grey triangles: below the resolution floor; shaded: the located regimes; lines: "
                "the fits.",
    "strain_rate": "Strain rate against time; the elasto-capillary plateau 2/(3λ) over the fit window.",
    "extensional_viscosity": "Apparent extensional viscosity η_E = σ/(−dD/dt) against Hencky strain "
                             "ε = 2 ln(D0/D).",
    "frames": "Frames from the start of free thinning through the fit window to the last frame with "
              "a thread, with the filament edges where they were measured; the bar gives the scale.",
}

CAUTIONS = (
    "Verify the calibration (pixel size and frame rate) with a reference fluid of known properties "
    "before relying on these numbers.",
    "Handle and dispose of the test liquids according to your laboratory's own procedures and the "
    "local rules for hazardous liquids.",
    "These results may feed quality decisions: read the quality flag and the warnings before acting "
    "on them.",
)

#: Known ``options`` keys → (label, display unit: a :class:`~thinning.display.Unit`, "shear" for
#: the page's unit of shear viscosities, or None for no number).
_OPTION_LABELS = {
    "fps_hz": ("frame rate (as given)", display.FRAMES_S),
    "pixel_size_m": ("pixel size (as given)", display.UM),
    "reference_width_m": ("reference width", display.MM),
    "surface_tension_N_m": ("surface tension σ", display.MN_M),
    "density_kg_m3": ("density ρ", display.KG_M3),
    "solvent_viscosity_Pa_s": ("solvent viscosity η_s", "shear"),
    "zero_shear_viscosity_Pa_s": ("zero-shear viscosity η_0", "shear"),
    "geometry": ("geometry", None),
    "roi_px": ("region of interest x0, y0, x1, y1 (px)", None),
    "exposure_s": ("exposure (as given)", display.US),
    "fps_override": ("--fps over a native file's clock", None),
}

#: ``clock_source`` → what set the clock, in words.
CLOCK_WORDS = {
    "file": "the camera file's header (its recording rate and per-frame time stamps where it has them)",
    "option": "--fps (time = frame / fps)",
    "container": "the video container's rate (time = frame / fps)",
}

def page_units(result) -> dict[str, display.Unit]:
    """The page's unit of each kind of quantity, from its values: ``time`` (λ, breakup, lifetimes,
    windows, regimes), ``extensional`` and ``shear`` viscosities; the others are fixed
    (:mod:`thinning.display`)."""
    c = result.characterisation
    fit = c.model_fit
    options = result.options.to_dict()
    times = [c.relaxation_time_s, c.breakup_time_s, c.filament_lifetime_s, c.filament_lifetime_min_s,
             c.free_thinning_start_s, *(c.fit_window_s or ())]
    times += [t for regime in c.regimes for t in (regime.t_start_s, regime.t_end_s)]
    shear = [c.shear_viscosity_Pa_s, options.get("solvent_viscosity_Pa_s"),
             options.get("zero_shear_viscosity_Pa_s")]
    if fit:
        times.append(fit.relaxation_time_s)
        shear.append(fit.solvent_viscosity_Pa_s)
    return {"time": display.time_unit(*times),
            "extensional": display.viscosity_unit(c.extensional_viscosity_max_Pa_s,
                                                  c.extensional_viscosity_terminal_Pa_s),
            "shear": display.viscosity_unit(*shear),
            "modulus": display.PA, "length": display.UM}


def _headline(result, units):
    """Rows of the headline table: dicts with label, value, interval (strings)."""
    c = result.characterisation
    broke = _number(c.breakup_time_s) is not None
    lam = _number(c.relaxation_time_s) is not None
    time = units["time"]
    #: (label, key, kind of unit, reason when missing); an interval is expected for the first five
    rows = [
        ("relaxation time λ", "relaxation_time_s", "time",
         "no elasto-capillary fit in this record"),
        ("apparent elastic modulus G", "elastic_modulus_Pa", "modulus",
         "needs an elasto-capillary fit"),
        ("largest apparent extensional viscosity η_E,max", "extensional_viscosity_max_Pa_s", "extensional",
         "none resolved above the resolution floor"),
        ("terminal extensional viscosity η_E,∞", "extensional_viscosity_terminal_Pa_s", "extensional",
         "no finite-extensibility stretch located"),
        ("shear viscosity from visco-capillary thinning", "shear_viscosity_Pa_s", "shear",
         "no visco-capillary fit"),
        ("breakup time" + (" (lower bound: the thread faded first)"
                           if c.breakup_seen == "faded" else ""),
         "breakup_time_s", "time", "the filament did not break within the record"),
        ("filament lifetime" + (" (extrapolated)" if c.filament_lifetime_basis == "extrapolated"
                                else ""), "filament_lifetime_s", "time",
         "no breakup within the record" if not broke else
         (f"at least {display.quantity(c.filament_lifetime_min_s, time)}: the thread faded below the "
          "optical resolution with no law to extrapolate" if c.filament_lifetime_basis == "lower-bound"
          else "start of free thinning unknown")),
        ("initial diameter D0", "initial_diameter_m", "length", "not measured"),
        ("start of free thinning", "free_thinning_start_s", "time", "not located"),
    ]
    out = []
    for i, (label, key, kind, reason) in enumerate(rows):
        value = getattr(c, key)
        shown, interval = display.estimate(value, c.interval(key), units[kind], missing=reason)
        if interval is None and _number(value) is not None and i < 5:
            interval = f"{MISSING} (not computed)"
        out.append({"label": label, "value": shown, "interval": interval or "",
                    "missing": _number(value) is None})
    out += _model_rows(c, units)
    window_text = display.span(c.fit_window_s, time)
    frames = c.fit_window_frames
    if window_text and frames is not None:
        window_text += f" ({frames} frames)"
    out.append({"label": "headline fit window", "value": window_text or
                f"{MISSING} ({'no headline fit' if not lam else 'not recorded'})",
                "interval": "", "missing": window_text is None})
    return out


def _model_rows(c, units):
    """Headline rows of the whole-curve filament model fit, beside the local-slope numbers."""
    fit = c.model_fit
    if not fit:
        return [{"label": "whole-curve filament model", "value": f"{MISSING} (no fit could be made)",
                 "interval": "", "missing": True}]
    chi2 = _number(fit.reduced_chi2)
    note = (f" ({fit.model}, reduced χ² {display.significant(chi2)})" if chi2 is not None
            else f" ({fit.model})")
    if not fit.describes_record:
        return [{"label": "whole-curve filament model" + note,
                 "value": f"{MISSING} (the model does not describe this record)", "interval": "",
                 "missing": True}]
    rows = []
    if fit.model == "viscoelastic":
        shown, interval = display.estimate(fit.relaxation_time_s, fit.relaxation_time_ci95_s,
                                           units["time"])
        rows.append({"label": "relaxation time λ, whole-curve filament model" + note,
                     "value": shown, "interval": interval or "", "missing": False})
    label = "solvent viscosity η_s, whole-curve filament model"
    shown, interval = display.estimate(fit.solvent_viscosity_Pa_s, fit.solvent_viscosity_ci95_Pa_s,
                                       units["shear"])
    rows.append({"label": label + (" (given, held fixed)" if fit.solvent_viscosity_fixed else
                                   ("" if rows else note)),
                 "value": shown, "interval": "" if fit.solvent_viscosity_fixed else interval or "",
                 "missing": _number(fit.solvent_viscosity_Pa_s) is None})
    return rows


def _regimes(result, units):
    c = result.characterisation
    headline = c.regime
    window = [_number(w) for w in (c.fit_window_s or [])]
    time = units["time"]
    rows = []
    for regime in c.regimes:
        t0, t1 = _number(regime.t_start_s), _number(regime.t_end_s)
        in_fit = (regime.kind == headline and len(window) == 2 and None not in window
                  and t0 is not None and t1 is not None and t0 < window[1] and window[0] < t1)
        rows.append({
            "kind": regime.kind,
            "start": display.quantity(t0, time),
            "end": display.quantity(t1, time),
            "duration": display.quantity(t1 - t0, time) if t0 is not None and t1 is not None else MISSING,
            "headline": in_fit,
        })
    return rows


def _option_value(value, unit):
    if value is None:
        return f"{MISSING} (not given)"
    if unit is not None:
        return display.given(value, unit)
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)):
        return ", ".join(str(v) for v in value)
    return str(value)


def _calibration(result, units):
    rows = [
        {"label": "frame rate used", "value": display.frame_rate(result.calibration.fps_hz,
                                                                 missing="not recorded")},
        {"label": "pixel size used", "value": display.given(result.calibration.pixel_size_m, display.UM,
                                                            missing="not recorded")},
    ]
    clock = result.clock
    if clock is not None:
        rows[1:1] = [
            {"label": "clock", "value": CLOCK_WORDS.get(clock.source, clock.source)},
            {"label": "exposure", "value": display.given(clock.exposure_s, display.US, missing="not known")},
            {"label": "trigger frame", "value": MISSING if clock.trigger_frame is None
             else f"frame {clock.trigger_frame} of the record"},
        ]
    for key, value in result.options.to_dict().items():
        label, unit = _OPTION_LABELS.get(key, (str(key), None))
        rows.append({"label": label, "value": _option_value(value, units.get(unit, unit)
                                                             if isinstance(unit, str) else unit)})
    return rows


def _provenance(result):
    source = result.source
    size = None
    if source.width_px is not None and source.height_px is not None:
        size = f"{source.width_px} × {source.height_px} px"
    rows = [
        ("source", source.path),
        ("source sha256", source.sha256),
        ("frames", source.n_frames),
        ("frame size", size),
        ("bit depth", source.bit_depth),
        ("tool version", result.tool_version or None),
        ("result schema", RESULT_SCHEMA),
    ]
    return [{"label": k, "value": MISSING if v is None else str(v)} for k, v in rows]


def _embed(figures):
    items = []
    order = list(FIGURE_CAPTIONS) + [k for k in figures if k not in FIGURE_CAPTIONS]
    for name in order:
        if name not in figures:
            continue
        path = Path(figures[name])
        try:
            data = base64.b64encode(path.read_bytes()).decode("ascii")
        except OSError:
            items.append({"name": name, "caption": FIGURE_CAPTIONS.get(name, name), "data": None})
            continue
        items.append({"name": name, "caption": FIGURE_CAPTIONS.get(name, name),
                      "data": f"data:image/png;base64,{data}"})
    return items


def recording_name(result):
    """A display name: the source's file name."""
    path = result.source.path
    return PurePath(str(path)).name if path else "recording"


def _environment():
    return jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATE_DIR), autoescape=True,
                              undefined=jinja2.StrictUndefined, trim_blocks=True,
                              lstrip_blocks=True, keep_trailing_newline=True)


def render_recording_report(result, figures, *, name=None, details=None):
    """The report's HTML text (see :func:`write_recording_report`)."""
    quality = result.quality
    units = page_units(result)
    context = {
        "name": name if name is not None else recording_name(result),
        "details": [{"label": str(k), "value": MISSING if v is None else str(v)}
                    for k, v in (details or {}).items()],
        "regime": result.characterisation.regime,
        "quality": quality,
        "doubtful": quality != "good",
        "quality_reasons": list(result.quality_reasons),
        "headline": _headline(result, units),
        "regimes": _regimes(result, units),
        "figures": _embed(figures or {}),
        "warnings": [{"code": code, "message": message}
                     for code, message in zip(result.warning_codes, result.warnings)],
        "calibration": _calibration(result, units),
        "provenance": _provenance(result),
        "cautions": CAUTIONS,
    }
    return _environment().get_template("recording.html").render(context)


def write_recording_report(out_dir, result, figures, *, name=None, details=None):
    """Write ``out_dir/report.html`` for one recording and return its path.

    ``result`` is the :class:`~thinning.result.Result`, ``figures`` maps figure names
    (``diameter``, ``strain_rate``, ``extensional_viscosity``, ``frames``) to
    PNG paths, which are embedded. ``name`` is the heading (default
    :func:`recording_name`); ``details`` an optional mapping shown under it
    (sample, lot, product, replicate …).
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    html = render_recording_report(result, figures, name=name, details=details)
    path = out_dir / "report.html"
    atomic.write_text(path, html)
    return path
