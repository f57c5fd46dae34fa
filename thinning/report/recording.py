"""The one-page HTML report of one analysed recording.

:func:`write_recording_report` turns a :class:`~thinning.result.Result` and the PNGs of
:func:`thinning.plots.write_figures` into ``report.html``: self-contained (the
figures are embedded as base64, no external file, font or script), printable,
and escaped throughout (names and paths come from users). Numbers are shown
with three or four significant digits in convenient units; a missing number
is shown as "—" with the reason. The file is written atomically and is the
same byte for byte for the same input.
"""

from __future__ import annotations

import base64
from pathlib import Path, PurePath

import jinja2
from .. import atomic
from ..result import RESULT_SCHEMA
from ..values import finite_number as _number

TEMPLATE_DIR = Path(__file__).parent / "templates"

#: The order and captions of the figures written by :func:`thinning.plots.write_figures`.
FIGURE_CAPTIONS = {
    "diameter": "Minimum neck diameter against time; shaded: the located regimes; lines: the fits.",
    "strain_rate": "Strain rate against time; the elasto-capillary plateau 2/(3λ) over the fit window.",
    "extensional_viscosity": "Apparent extensional viscosity η_E = σ/(−dD/dt) against Hencky strain "
                             "ε = 2 ln(D0/D).",
    "frames": "Frames through the record with the detected filament edges.",
}

CAUTIONS = (
    "Verify the calibration (pixel size and frame rate) with a reference fluid of known properties "
    "before relying on these numbers.",
    "Handle and dispose of the test liquids according to your laboratory's own procedures and the "
    "local rules for hazardous liquids.",
    "These results may feed quality decisions: read the quality flag and the warnings before acting "
    "on them.",
)

#: Display units per SI unit: (scale, label), tried from the largest down.
_UNITS = {
    "s": ((1.0, "s"), (1e-3, "ms"), (1e-6, "µs")),
    "m": ((1e-3, "mm"), (1e-6, "µm"), (1e-9, "nm")),
    "Pa": ((1e6, "MPa"), (1e3, "kPa"), (1.0, "Pa"), (1e-3, "mPa")),
    "Pa·s": ((1e3, "kPa·s"), (1.0, "Pa·s"), (1e-3, "mPa·s")),
    "N/m": ((1e-3, "mN/m"),),
    "kg/m³": ((1.0, "kg/m³"),),
    "1/s": ((1.0, "1/s"),),
    "Hz": ((1e3, "kHz"), (1.0, "Hz")),
}

#: Known ``options`` keys → (label, SI unit or None).
_OPTION_LABELS = {
    "fps_hz": ("frame rate (as given)", "Hz"),
    "pixel_size_m": ("pixel size (as given)", "m"),
    "reference_width_m": ("reference width", "m"),
    "surface_tension_N_m": ("surface tension σ", "N/m"),
    "density_kg_m3": ("density ρ", "kg/m³"),
    "solvent_viscosity_Pa_s": ("solvent viscosity η_s", "Pa·s"),
    "zero_shear_viscosity_Pa_s": ("zero-shear viscosity η_0", "Pa·s"),
    "geometry": ("geometry", None),
    "roi_px": ("region of interest x0, y0, x1, y1 (px)", None),
    "exposure_s": ("exposure (as given)", "s"),
    "fps_override": ("--fps over a native file's clock", None),
}

#: ``clock_source`` → what set the clock, in words.
CLOCK_WORDS = {
    "file": "the camera file's header (its recording rate and per-frame time stamps where it has them)",
    "option": "--fps (time = frame / fps)",
    "container": "the video container's rate (time = frame / fps)",
}

MISSING = "—"

def _digits(x):
    """Four significant digits, with a ×10ⁿ exponent instead of e-notation."""
    text = f"{x:.4g}"
    if "e" not in text:
        return text
    mantissa, exponent = text.split("e")
    return f"{mantissa} × 10^{int(exponent)}"


def _scale_for(value, unit):
    for scale, label in _UNITS.get(unit, ((1.0, unit),)):
        if abs(value) >= scale:
            return scale, label
    return _UNITS.get(unit, ((1.0, unit),))[-1]


def format_quantity(value, unit, *, missing=None):
    """``value`` (SI, in ``unit``) for display, e.g. ``format_quantity(0.0052, "s")`` → ``"5.2 ms"``.

    Returns ``"—"``, followed by `` (missing)`` when a reason is given, for a
    missing or non-finite value.
    """
    x = _number(value)
    if x is None:
        return f"{MISSING} ({missing})" if missing else MISSING
    if x == 0:
        return f"0 {unit}"
    scale, label = _scale_for(x, unit)
    return f"{_digits(x / scale)} {label}"


def format_interval(interval, unit, like=None):
    """``[low, high]`` (SI) for display in the units of ``like`` (or of ``low``), else None."""
    if not interval or len(interval) != 2:
        return None
    low, high = (_number(v) for v in interval)
    if low is None or high is None:
        return None
    ref = _number(like) or low or high
    scale, label = _scale_for(ref, unit) if ref else (1.0, unit)
    return f"{_digits(low / scale)} – {_digits(high / scale)} {label}"


def _headline(result):
    """Rows of the headline table: dicts with label, value, interval (strings)."""
    c = result.characterisation
    broke = _number(c.breakup_time_s) is not None
    lam = _number(c.relaxation_time_s) is not None
    #: (label, key, SI unit, reason when missing); an interval is expected for the first five
    rows = [
        ("relaxation time λ", "relaxation_time_s", "s",
         "no elasto-capillary fit in this record"),
        ("apparent elastic modulus G", "elastic_modulus_Pa", "Pa",
         "needs an elasto-capillary fit"),
        ("largest apparent extensional viscosity η_E,max", "extensional_viscosity_max_Pa_s", "Pa·s",
         "none resolved above the resolution floor"),
        ("terminal extensional viscosity η_E,∞", "extensional_viscosity_terminal_Pa_s", "Pa·s",
         "no finite-extensibility stretch located"),
        ("shear viscosity from visco-capillary thinning", "shear_viscosity_Pa_s", "Pa·s",
         "no visco-capillary fit"),
        ("breakup time" + (" (lower bound: the thread faded first)"
                           if c.breakup_seen == "faded" else ""),
         "breakup_time_s", "s", "the filament did not break within the record"),
        ("filament lifetime" + (" (extrapolated)" if c.filament_lifetime_basis == "extrapolated"
                                else ""), "filament_lifetime_s", "s",
         "no breakup within the record" if not broke else
         (f"at least {format_quantity(c.filament_lifetime_min_s, 's')}: the thread faded below the "
          "optical resolution with no law to extrapolate" if c.filament_lifetime_basis == "lower-bound"
          else "start of free thinning unknown")),
        ("initial diameter D0", "initial_diameter_m", "m", "not measured"),
        ("start of free thinning", "free_thinning_start_s", "s", "not located"),
    ]
    out = []
    for i, (label, key, unit, reason) in enumerate(rows):
        value = getattr(c, key)
        interval = format_interval(c.interval(key), unit, like=value)
        if interval is None and _number(value) is not None and i < 5:
            interval = f"{MISSING} (not computed)"
        out.append({"label": label, "value": format_quantity(value, unit, missing=reason),
                    "interval": interval or "", "missing": _number(value) is None})
    out += _model_rows(c)
    window = c.fit_window_s
    window_text = format_interval(window, "s", like=(window or [None, None])[1])
    frames = c.fit_window_frames
    if window_text and frames is not None:
        window_text += f" ({frames} frames)"
    out.append({"label": "headline fit window", "value": window_text or
                f"{MISSING} ({'no headline fit' if not lam else 'not recorded'})",
                "interval": "", "missing": window_text is None})
    return out


def _model_rows(c):
    """Headline rows of the whole-curve filament model fit, beside the local-slope numbers."""
    fit = c.model_fit
    if not fit:
        return [{"label": "whole-curve filament model", "value": f"{MISSING} (no fit could be made)",
                 "interval": "", "missing": True}]
    chi2 = _number(fit.reduced_chi2)
    note = f" ({fit.model}, reduced χ² {_digits(chi2)})" if chi2 is not None else f" ({fit.model})"
    if not fit.describes_record:
        return [{"label": "whole-curve filament model" + note,
                 "value": f"{MISSING} (the model does not describe this record)", "interval": "",
                 "missing": True}]
    rows = []
    if fit.model == "viscoelastic":
        rows.append({"label": "relaxation time λ, whole-curve filament model" + note,
                     "value": format_quantity(fit.relaxation_time_s, "s"),
                     "interval": format_interval(fit.relaxation_time_ci95_s, "s",
                                                 like=fit.relaxation_time_s) or "",
                     "missing": False})
    label = "solvent viscosity η_s, whole-curve filament model"
    rows.append({"label": label + (" (given, held fixed)" if fit.solvent_viscosity_fixed else
                                   ("" if rows else note)),
                 "value": format_quantity(fit.solvent_viscosity_Pa_s, "Pa·s"),
                 "interval": "" if fit.solvent_viscosity_fixed else
                 format_interval(fit.solvent_viscosity_ci95_Pa_s, "Pa·s",
                                 like=fit.solvent_viscosity_Pa_s) or "",
                 "missing": _number(fit.solvent_viscosity_Pa_s) is None})
    return rows


def _regimes(result):
    c = result.characterisation
    headline = c.regime
    window = [_number(w) for w in (c.fit_window_s or [])]
    rows = []
    for regime in c.regimes:
        t0, t1 = _number(regime.t_start_s), _number(regime.t_end_s)
        in_fit = (regime.kind == headline and len(window) == 2 and None not in window
                  and t0 is not None and t1 is not None and t0 < window[1] and window[0] < t1)
        rows.append({
            "kind": regime.kind,
            "start": format_quantity(t0, "s"),
            "end": format_quantity(t1, "s"),
            "duration": format_quantity(t1 - t0, "s") if t0 is not None and t1 is not None else MISSING,
            "headline": in_fit,
        })
    return rows


def _option_value(value, unit):
    if value is None:
        return f"{MISSING} (not given)"
    if unit is not None:
        return format_quantity(value, unit)
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)):
        return ", ".join(str(v) for v in value)
    return str(value)


def _calibration(result):
    rows = [
        {"label": "frame rate used", "value": format_quantity(result.calibration.fps_hz, "Hz",
                                                              missing="not recorded")},
        {"label": "pixel size used", "value": format_quantity(result.calibration.pixel_size_m, "m",
                                                              missing="not recorded")},
    ]
    clock = result.clock
    if clock is not None:
        rows[1:1] = [
            {"label": "clock", "value": CLOCK_WORDS.get(clock.source, clock.source)},
            {"label": "exposure", "value": format_quantity(clock.exposure_s, "s", missing="not known")},
            {"label": "trigger frame", "value": MISSING if clock.trigger_frame is None
             else f"frame {clock.trigger_frame} of the record"},
        ]
    for key, value in result.options.to_dict().items():
        label, unit = _OPTION_LABELS.get(key, (str(key), None))
        rows.append({"label": label, "value": _option_value(value, unit)})
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
    context = {
        "name": name if name is not None else recording_name(result),
        "details": [{"label": str(k), "value": MISSING if v is None else str(v)}
                    for k, v in (details or {}).items()],
        "regime": result.characterisation.regime,
        "quality": quality,
        "doubtful": quality != "good",
        "quality_reasons": list(result.quality_reasons),
        "headline": _headline(result),
        "regimes": _regimes(result),
        "figures": _embed(figures or {}),
        "warnings": [{"code": code, "message": message}
                     for code, message in zip(result.warning_codes, result.warnings)],
        "calibration": _calibration(result),
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
