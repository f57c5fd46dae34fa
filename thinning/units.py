"""Quantities with units, the analysis options, and the calibration.

Every physical option is a number with a unit, parsed with pint (``4.2um``,
``4.2 µm/px``, ``35mN/m``, ``10kHz``). A bare number is read in the option's
default unit; a unit of the wrong dimension is bad usage
(:class:`BadQuantity`). Everything leaves this module in SI.
"""

from __future__ import annotations

import functools
import math
import re
from dataclasses import asdict, dataclass, field

from .errors import ThinningError

GEOMETRIES = ("plates", "dripping")


class BadQuantity(ThinningError, ValueError):
    """A value that cannot be read as the quantity an option needs (one sentence)."""


@dataclass(frozen=True)
class QuantitySpec:
    """How one physical option is read: its default unit and its SI unit."""

    default_unit: str
    si_unit: str
    label: str


#: The physical options of ``thinning analyse`` (name as in the manifest → spec).
QUANTITIES = {
    "fps": QuantitySpec("1/s", "1/s", "camera frame rate"),
    "pixel_size": QuantitySpec("um", "m", "pixel size"),
    "reference_width": QuantitySpec("mm", "m", "reference width"),
    "surface_tension": QuantitySpec("mN/m", "N/m", "surface tension"),
    "density": QuantitySpec("kg/m^3", "kg/m^3", "density"),
    "solvent_viscosity": QuantitySpec("mPa*s", "Pa*s", "solvent viscosity"),
    "zero_shear_viscosity": QuantitySpec("mPa*s", "Pa*s", "zero-shear viscosity"),
    "exposure": QuantitySpec("us", "s", "exposure time"),
}


@functools.lru_cache(maxsize=1)
def _registry():
    import pint

    return pint.UnitRegistry()


#: Plausible range (SI) of each physical option for capillary-thinning recordings, with its reason.
#: A value outside is refused: it is a typing or unit mistake, never a measurement.
BOUNDS = {
    "fps": (0.1, 5e7, "from a frame every 10 s (the slowest Boger fluids) to the fastest "
                      "high-speed cameras"),
    "pixel_size": (0.1e-6, 1e-3, "finer than 0.1 µm no visible-light lens resolves; coarser than "
                                 "1 mm a millimetre bridge is not imaged"),
    "reference_width": (10e-6, 0.2, "plates and nozzles of this method are 10 µm to 200 mm wide"),
    "surface_tension": (1e-3, 1.0, "liquids lie between about 10 mN/m (fluorocarbons) and "
                                   "0.5 N/m (liquid metals)"),
    "density": (100.0, 25000.0, "liquids lie between about 600 kg/m³ and 13,600 kg/m³ (mercury)"),
    "solvent_viscosity": (1e-5, 1e6, "liquids lie above about 0.2 mPa·s; above 10⁶ Pa·s nothing "
                                     "thins in a recording"),
    "zero_shear_viscosity": (1e-5, 1e6, "liquids lie above about 0.2 mPa·s; above 10⁶ Pa·s "
                                        "nothing thins in a recording"),
    "exposure": (1e-8, 10.0, "high-speed cameras expose from about 0.1 µs; an exposure is never "
                             "longer than the 10 s between the slowest frames"),
}

_PER_PIXEL = re.compile(r"\s*/\s*(px|pixels?|pix)\s*$", re.IGNORECASE)
_BARE_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")
#: What a quantity may be written with: a number, then unit names, powers, products, quotients.
_QUANTITY_CHARS = re.compile(r"^[A-Za-z0-9 .+\-*/^()_·]+$")
_DECIMAL_COMMA = re.compile(r"\d,\d")


def parse_quantity(text, name):
    """Read ``text`` as the option ``name`` (a key of :data:`QUANTITIES`), return SI float.

    Raises :class:`BadQuantity` with one sentence when the text is not a
    positive finite number with a unit of the right dimension.
    """
    spec = QUANTITIES[name]
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        text = repr(float(text))
    raw = str(text).strip().replace("µ", "u").replace("μ", "u")
    text = shown_text(text)   # as echoed in a message: one line, control characters escaped
    if _PER_PIXEL.search(raw):
        if name != "pixel_size":
            raise BadQuantity(f"'{text}' is given per pixel, but a {spec.label} is not a per-pixel "
                              f"quantity; write e.g. '{_example(name)}'.")
        raw = _PER_PIXEL.sub("", raw)
    if re.search(r"fps$", raw, re.IGNORECASE):
        raw = raw[:-3] + "Hz"
    if not raw:
        raise BadQuantity(f"--{name.replace('_', '-')} is empty; give a number with a unit, e.g. "
                          f"'{_example(name)}'.")
    if _DECIMAL_COMMA.search(raw):
        raise BadQuantity(f"'{text}' has a comma in the number, which is read neither as a "
                          f"decimal nor as a thousands separator: write '{shown_text(raw.replace(',', '.'))}' "
                          f"if the comma is a decimal, or the digits alone.")
    if not _QUANTITY_CHARS.match(raw):
        raise BadQuantity(f"'{text}' is not a {spec.label}: write a number and a unit, e.g. "
                          f"'{_example(name)}'.")
    ureg = _registry()
    bare = bool(_BARE_NUMBER.match(raw))
    try:
        if bare:
            quantity = ureg.Quantity(float(raw), spec.default_unit)
        else:
            quantity = ureg.Quantity(raw)
            if quantity.dimensionless and not quantity.unitless:
                raise BadQuantity(f"'{text}' is not a {spec.label}.")
            if quantity.unitless:
                quantity = ureg.Quantity(quantity.magnitude, spec.default_unit)
            for unit in quantity.unit_items() if hasattr(quantity, "unit_items") else \
                    quantity._units.items():
                if ureg.Quantity(1.0, unit[0]).dimensionless:
                    raise BadQuantity(f"'{text}' carries the dimensionless unit '{unit[0]}', "
                                      f"which a {spec.label} does not take; write e.g. "
                                      f"'{_example(name)}'.")
        value = float(quantity.to(spec.si_unit).magnitude)
    except BadQuantity:
        raise
    except Exception:  # pint raises many kinds for nonsense input
        raise BadQuantity(f"'{text}' is not a {spec.label} (expected a number with a unit of "
                          f"{spec.default_unit}, e.g. '{_example(name)}').") from None
    if not math.isfinite(value) or value <= 0:
        raise BadQuantity(f"The {spec.label} must be a positive number, got '{text}'.")
    lo, hi, reason = BOUNDS[name]
    if not lo <= value <= hi:
        hint = ""
        if bare:
            hint = (" Give the unit (a bare number is read in "
                    f"{_unit_text(spec.default_unit)}), e.g. '{_example(name)}'.")
        side = "below" if value < lo else "above"
        raise BadQuantity(f"The {spec.label} '{text}' is {side} the plausible range "
                          f"{plausible_range(name)}: {reason}.{hint}")
    return value


def shown_text(text) -> str:
    """``text`` as a message may echo it: control characters and line separators escaped, so the
    message stays one line."""
    return re.sub(r"[\x00-\x1f\x7f\u0085\u2028\u2029]", lambda m: f"\\x{ord(m.group()):02x}", str(text))


def plausible_range(name) -> str:
    """The option's plausible range in its default unit, e.g. ``'0.1–1000 µm'``."""
    spec = QUANTITIES[name]
    lo, hi, _ = BOUNDS[name]
    per = _DEFAULT_UNIT_IN_SI[spec.default_unit]
    lo, hi = lo / per, hi / per
    return f"{_plain_number(lo)}–{_plain_number(hi)} {_unit_text(spec.default_unit)}"


#: One default unit in SI (kept here so that --help needs no unit registry).
_DEFAULT_UNIT_IN_SI = {"1/s": 1.0, "um": 1e-6, "mm": 1e-3, "mN/m": 1e-3, "kg/m^3": 1.0,
                       "mPa*s": 1e-3, "us": 1e-6}


def _unit_text(unit):
    return {"um": "µm", "us": "µs", "kg/m^3": "kg/m³", "mPa*s": "mPa·s"}.get(unit, unit)


def _plain_number(v):
    """``1000``, ``0.01``, ``5×10⁷``: plain digits between 10⁻³ and 10⁶, else a power of ten."""
    if 1e-3 <= v < 1e6:
        return f"{v:g}"
    exp = int(math.floor(math.log10(v)))
    mant = f"{v / 10 ** exp:g}"
    sup = str(exp).translate(str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹"))
    return f"10{sup}" if mant == "1" else f"{mant}×10{sup}"


def _example(name):
    return {"fps": "10kHz", "pixel_size": "4.2um", "reference_width": "3mm",
            "surface_tension": "35mN/m", "density": "998kg/m^3",
            "solvent_viscosity": "1.2mPa*s", "zero_shear_viscosity": "5mPa*s",
            "exposure": "20us"}[name]


def parse_roi(text):
    """``"x0,y0,x1,y1"`` → tuple of ints with x0 < x1, y0 < y1 (pixels, numpy slicing)."""
    try:
        parts = [int(p) for p in str(text).replace(" ", "").split(",")]
    except ValueError:
        parts = []
    if len(parts) != 4 or parts[0] < 0 or parts[1] < 0 or parts[2] <= parts[0] or parts[3] <= parts[1]:
        raise BadQuantity(f"--roi '{text}' is not x0,y0,x1,y1 in pixels with x0 < x1 and y0 < y1, "
                          "e.g. '100,0,400,256'.")
    return tuple(parts)


#: How a yes/no option may be written (a manifest cell; on the command line it is a flag).
SWITCH_WORDS = {"yes": True, "true": True, "1": True, "on": True,
                "no": False, "false": False, "0": False, "off": False}


def parse_switch(text, name):
    """A yes/no option: True or False from ``yes``/``no``, ``true``/``false``, ``1``/``0``, ``on``/``off``."""
    if isinstance(text, bool):
        return text
    value = SWITCH_WORDS.get(str(text).strip().lower())
    if value is None:
        raise BadQuantity(f"'{shown_text(text)}' is not yes or no (for {name.replace('_', '-')}: "
                          "write yes or no).")
    return value


def parse_geometry(text):
    """``plates`` or ``dripping``."""
    value = str(text).strip().lower()
    if value not in GEOMETRIES:
        raise BadQuantity(f"--geometry '{text}' is not one of: {', '.join(GEOMETRIES)}.")
    return value


@dataclass(frozen=True)
class AnalysisOptions:
    """Every analysis option, in SI, as used (None where not given).

    Field names are the keys of ``result.json`` ``options``.
    """

    fps_hz: float | None = None
    pixel_size_m: float | None = None
    reference_width_m: float | None = None
    surface_tension_N_m: float | None = None
    density_kg_m3: float | None = None
    solvent_viscosity_Pa_s: float | None = None
    zero_shear_viscosity_Pa_s: float | None = None
    geometry: str = "plates"
    roi_px: tuple[int, int, int, int] | None = None
    exposure_s: float | None = None
    fps_override: bool = False

    def to_dict(self):
        d = asdict(self)
        if d["roi_px"] is not None:
            d["roi_px"] = list(d["roi_px"])
        return d


#: option name (manifest column / CLI option with dashes) → AnalysisOptions field
OPTION_FIELDS = {
    "fps": "fps_hz",
    "pixel_size": "pixel_size_m",
    "reference_width": "reference_width_m",
    "surface_tension": "surface_tension_N_m",
    "density": "density_kg_m3",
    "solvent_viscosity": "solvent_viscosity_Pa_s",
    "zero_shear_viscosity": "zero_shear_viscosity_Pa_s",
    "geometry": "geometry",
    "roi": "roi_px",
    "exposure": "exposure_s",
    "fps_override": "fps_override",
}


def parse_option(name, text):
    """Parse one option given as text (CLI or manifest cell) → its SI value."""
    if name == "geometry":
        return parse_geometry(text)
    if name == "roi":
        return parse_roi(text)
    if name == "fps_override":
        return parse_switch(text, name)
    return parse_quantity(text, name)


def options_from_text(values: dict) -> AnalysisOptions:
    """Build :class:`AnalysisOptions` from ``{option name: text or None}``; empty means not given."""
    kwargs = {}
    for name, text in values.items():
        if name not in OPTION_FIELDS:
            raise BadQuantity(f"Unknown option '{name}'.")
        if text is None or (isinstance(text, str) and not text.strip()):
            continue
        kwargs[OPTION_FIELDS[name]] = parse_option(name, text)
    return AnalysisOptions(**kwargs)


def check_required(options: AnalysisOptions, *, container_fps=None):
    """Raise :class:`BadQuantity` naming the first missing required value."""
    if options.surface_tension_N_m is None:
        raise BadQuantity("No surface tension given; pass --surface-tension, e.g. '35mN/m'.")
    if options.pixel_size_m is None and options.reference_width_m is None:
        raise BadQuantity("No image scale given; pass --pixel-size (e.g. '4.2um') or "
                          "--reference-width (the plate or nozzle width, e.g. '3mm').")
    if options.fps_hz is None and container_fps is None:
        raise BadQuantity("The recording carries no frame rate; pass --fps, e.g. '10kHz'.")


@dataclass(frozen=True)
class Calibration:
    """Camera frame rate (1/s) and object pixel size (m) actually used, and the per-frame times
    (s from frame 0) where a native file's time stamps are the clock (else None)."""

    fps_hz: float
    pixel_size_m: float
    frame_times_s: object = field(default=None, compare=False, repr=False)

    def time_s(self, frame):
        """Time (s) of frame index ``frame`` (number or array) on the recording's clock: the
        stamp where there are stamps (interpolated between, and beyond the last at the nominal
        rate), else frame / fps."""
        import numpy as np

        frames = np.asarray(frame, dtype=float)
        times = self.frame_times_s
        if times is None:
            return frames / self.fps_hz
        inside = np.interp(frames, np.arange(len(times), dtype=float), times)
        beyond = times[-1] + (frames - (len(times) - 1)) / self.fps_hz
        return np.where(frames > len(times) - 1, beyond, inside)
