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
from dataclasses import asdict, dataclass

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
}


@functools.lru_cache(maxsize=1)
def _registry():
    import pint

    return pint.UnitRegistry()


_PER_PIXEL = re.compile(r"\s*/\s*(px|pixels?|pix)\s*$", re.IGNORECASE)
_BARE_NUMBER = re.compile(r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$")


def parse_quantity(text, name):
    """Read ``text`` as the option ``name`` (a key of :data:`QUANTITIES`), return SI float.

    Raises :class:`BadQuantity` with one sentence when the text is not a
    positive finite number with a unit of the right dimension.
    """
    spec = QUANTITIES[name]
    if isinstance(text, (int, float)) and not isinstance(text, bool):
        text = repr(float(text))
    raw = str(text).strip().replace("µ", "u").replace("μ", "u")
    raw = _PER_PIXEL.sub("", raw)
    if raw.lower().endswith("fps"):
        raw = raw[:-3] + "/s"
    if not raw:
        raise BadQuantity(f"--{name.replace('_', '-')} is empty; give a number with a unit, e.g. "
                          f"'{_example(name)}'.")
    ureg = _registry()
    try:
        if _BARE_NUMBER.match(raw):
            quantity = ureg.Quantity(float(raw), spec.default_unit)
        else:
            quantity = ureg.Quantity(raw)
            if quantity.dimensionless and not quantity.unitless:
                raise BadQuantity(f"'{text}' is not a {spec.label}.")
            if quantity.unitless:
                quantity = ureg.Quantity(quantity.magnitude, spec.default_unit)
        value = float(quantity.to(spec.si_unit).magnitude)
    except BadQuantity:
        raise
    except Exception:  # pint raises many kinds for nonsense input
        raise BadQuantity(f"'{text}' is not a {spec.label} (expected a number with a unit of "
                          f"{spec.default_unit}, e.g. '{_example(name)}').") from None
    if not math.isfinite(value) or value <= 0:
        raise BadQuantity(f"The {spec.label} must be a positive number, got '{text}'.")
    return value


def _example(name):
    return {"fps": "10kHz", "pixel_size": "4.2um", "reference_width": "3mm",
            "surface_tension": "35mN/m", "density": "998kg/m^3",
            "solvent_viscosity": "1.2mPa*s", "zero_shear_viscosity": "5mPa*s"}[name]


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
}


def parse_option(name, text):
    """Parse one option given as text (CLI or manifest cell) → its SI value."""
    if name == "geometry":
        return parse_geometry(text)
    if name == "roi":
        return parse_roi(text)
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
    """Camera frame rate (1/s) and object pixel size (m) actually used."""

    fps_hz: float
    pixel_size_m: float

    def time_s(self, frame):
        """Recording clock: t = frame / fps."""
        return frame / self.fps_hz
