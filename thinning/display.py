"""The house style of numbers that people read: CLI printouts, the HTML reports, the demo's lines
and the verdict reasons as shown (pure functions; files stay SI at full precision).

The rules (``DEVELOPERS.md``, "Numbers for people"):

* One unit per quantity in one view, chosen from the view's values: times (λ, breakup time,
  lifetimes, windows) in ms when every one is below 1 s, else s (:func:`time_unit`); viscosities
  in mPa·s when every one is below 1 Pa·s, else Pa·s (:func:`viscosity_unit`); diameters and pixel
  sizes in µm, exposures in µs, moduli in Pa, surface tension in mN/m, frame rates in frames/s.
* A value with a 95 % interval is printed to the interval's precision: two significant figures
  of the half-width, the value and both ends to that decimal place (:func:`estimate`). A value
  without one gets three significant figures (:func:`quantity`); a number somebody chose (a
  limit, an option) is printed as given (:func:`given`).
* A coefficient of variation is a percentage with two significant figures (:func:`percent`).
* Never e-notation: fixed decimals, no digit grouping; a plain space between number and unit;
  an interval as ``low–high unit`` with an en dash.
* Time stamps as ``2026-12-04 18:39 UTC`` (:func:`timestamp`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timezone

from .values import finite_number

#: what people see for a number that is missing
MISSING = "—"
#: between the ends of an interval
DASH = "–"
#: most significant figures ever printed for one number
MAX_FIGURES = 6


@dataclass(frozen=True)
class Unit:
    """A display unit: ``label`` and ``scale``, the SI value of one of it (ms: 1e-3)."""

    label: str
    scale: float

    def of(self, si_value: float) -> float:
        """``si_value`` in this unit."""
        return si_value / self.scale

    @property
    def bare(self) -> "Unit":
        """The same scale without its label: for the cells of a column whose heading names it."""
        return Unit("", self.scale)


S = Unit("s", 1.0)
MS = Unit("ms", 1e-3)
US = Unit("µs", 1e-6)
UM = Unit("µm", 1e-6)
MM = Unit("mm", 1e-3)
PA_S = Unit("Pa·s", 1.0)
MPA_S = Unit("mPa·s", 1e-3)
PA = Unit("Pa", 1.0)
MN_M = Unit("mN/m", 1e-3)
KG_M3 = Unit("kg/m³", 1.0)
FRAMES_S = Unit("frames/s", 1.0)
NONE = Unit("", 1.0)


def _finite(values) -> list[float]:
    return [abs(x) for x in (finite_number(v) for v in values) if x is not None]


def time_unit(*values_s) -> Unit:
    """ms when every given time (s) is below 1 s (or none is given), else s."""
    return S if any(x >= 1.0 for x in _finite(values_s)) else MS


def viscosity_unit(*values_Pa_s) -> Unit:
    """mPa·s when every given viscosity (Pa·s) is below 1 Pa·s, else Pa·s (also for none)."""
    finite = _finite(values_Pa_s)
    return MPA_S if finite and all(x < 1.0 for x in finite) else PA_S


#: SI unit text → the display unit (or how to choose it from the view's values)
_VIEW_UNITS = {"s": time_unit, "Pa·s": viscosity_unit, "m": lambda *v: UM, "Pa": lambda *v: PA,
               "N/m": lambda *v: MN_M, "kg/m³": lambda *v: KG_M3, "Hz": lambda *v: FRAMES_S,
               "1/s": lambda *v: FRAMES_S}


def view_unit(si_unit: str, *values) -> Unit:
    """The display unit of a quantity in SI ``si_unit`` ("s", "Pa·s", "m", …) for a view holding
    ``values`` (SI); an unknown unit is shown as it is."""
    choose = _VIEW_UNITS.get(si_unit)
    return choose(*values) if choose is not None else Unit(si_unit, 1.0)


# --- digits --------------------------------------------------------------------------------

def _exponent(x: float) -> int:
    return math.floor(math.log10(abs(x)))


def fixed(x: float, decimals: int) -> str:
    """``x`` with ``decimals`` places (a negative count rounds to tens, hundreds …), no e-notation."""
    if decimals >= 0:
        text = f"{x:.{decimals}f}"
    else:
        step = 10 ** -decimals
        text = f"{round(x / step) * step:.0f}"
    if text.startswith("-") and float(text) == 0:
        text = text[1:]
    return text


def figures_decimals(x: float, figures: int) -> int:
    """The decimal places that give ``x`` ``figures`` significant figures (after rounding)."""
    if x == 0:
        return 0
    decimals = figures - 1 - _exponent(x)
    rounded = float(fixed(x, decimals))
    if rounded != 0 and _exponent(rounded) > _exponent(x):  # 9.996 → 10.0: one figure more
        decimals -= 1
    return decimals


def significant(x: float, figures: int = 3) -> str:
    """``x`` to ``figures`` significant figures in fixed notation: 6724.3 → ``6720``,
    0.003837 → ``0.00384``, 5.2 → ``5.20``."""
    return fixed(x, figures_decimals(x, figures))


def plain(x: float) -> str:
    """``x`` as somebody wrote it: at most six significant figures, no trailing zeros
    (0.0045 → ``0.0045``, 6.0 → ``6``, 2500.0 → ``2500``)."""
    text = significant(x, MAX_FIGURES)
    return text.rstrip("0").rstrip(".") if "." in text else text


def uncertainty_decimals(half_width: float) -> int:
    """Decimal places of two significant figures of ``half_width`` (0.0497 → 3, 0.0996 → 2)."""
    return figures_decimals(half_width, 2)


# --- quantities ----------------------------------------------------------------------------

def _missing(reason: str | None) -> str:
    return f"{MISSING} ({reason})" if reason else MISSING


def _with_unit(text: str, unit: Unit) -> str:
    return f"{text} {unit.label}" if unit.label else text


def quantity(value, unit: Unit, *, figures: int = 3, missing: str | None = None) -> str:
    """A measured value without an interval (SI) in ``unit``, three significant figures:
    ``quantity(0.0831, MS)`` → ``83.1 ms``; ``—`` (with `` (reason)``) when missing."""
    x = finite_number(value)
    if x is None:
        return _missing(missing)
    return _with_unit(significant(unit.of(x), figures), unit)


def given(value, unit: Unit, *, missing: str | None = None) -> str:
    """A number somebody chose (a limit, an option, a camera setting; SI) as written:
    ``given(0.0045, MS)`` → ``4.5 ms``."""
    x = finite_number(value)
    if x is None:
        return _missing(missing)
    return _with_unit(plain(unit.of(x)), unit)


def _interval_decimals(value, low: float, high: float) -> int | None:
    half = (high - low) / 2
    if not half > 0:
        return None
    decimals = uncertainty_decimals(half)
    largest = max(abs(v) for v in (value, low, high) if v is not None)
    if largest > 0:  # never more than MAX_FIGURES significant figures
        decimals = min(decimals, MAX_FIGURES - 1 - _exponent(largest))
    return decimals


def _ends(interval):
    if not interval or len(interval) != 2:
        return None
    low, high = (finite_number(v) for v in interval)
    if low is None or high is None:
        return None
    return min(low, high), max(low, high)


def estimate(value, interval, unit: Unit, *, missing: str | None = None) -> tuple[str, str | None]:
    """A value and its 95 % interval (SI), both at the interval's precision:
    ``estimate(0.0052, (0.005, 0.0054), MS)`` → ``("5.20 ms", "5.00–5.40 ms")``.

    The interval text is None when there is no usable interval (the value then has three
    significant figures); a missing value gives ``—`` and no interval."""
    x = finite_number(value)
    if x is None:
        return _missing(missing), None
    ends = _ends(interval)
    if ends is None:
        return quantity(x, unit), None
    low, high = unit.of(ends[0]), unit.of(ends[1])
    decimals = _interval_decimals(unit.of(x), low, high)
    if decimals is None:  # a zero-width interval: nothing to take the precision from
        return quantity(x, unit), span(ends, unit)
    return (_with_unit(fixed(unit.of(x), decimals), unit),
            _with_unit(f"{fixed(low, decimals)}{DASH}{fixed(high, decimals)}", unit))


def span(interval, unit: Unit) -> str | None:
    """A stretch (a fit window, a regime; SI), both ends at the decimal place of three
    significant figures of the larger: ``(0.004, 0.028)`` in ms → ``4.0–28.0 ms``; None when
    unusable."""
    ends = _ends(interval)
    if ends is None:
        return None
    low, high = unit.of(ends[0]), unit.of(ends[1])
    decimals = figures_decimals(max(abs(low), abs(high)), 3)
    return _with_unit(f"{fixed(low, decimals)}{DASH}{fixed(high, decimals)}", unit)


def with_interval(value, interval, unit: Unit, *, missing: str | None = None) -> str:
    """``5.20 ms (95 % interval 5.00–5.40 ms)``, or the value alone without an interval."""
    shown, around = estimate(value, interval, unit, missing=missing)
    return f"{shown} (95 % interval {around})" if around else shown


def spread(value, unit: Unit) -> str:
    """A standard deviation (SI) to two significant figures: ``0.00019`` s in ms → ``0.19 ms``."""
    return quantity(value, unit, figures=2)


def percent(fraction, *, figures: int = 2) -> str:
    """A fraction as a percentage, two significant figures: 0.019 → ``1.9 %``, 0.0462 → ``4.6 %``,
    0.00392 → ``0.39 %``, 0.1 → ``10 %``."""
    x = finite_number(fraction)
    if x is None:
        return MISSING
    return f"{significant(100 * x, figures) if x != 0 else '0'} %"


def given_percent(fraction) -> str:
    """A chosen fraction (a limit) as a percentage as written: 0.10 → ``10 %``."""
    x = finite_number(fraction)
    return MISSING if x is None else f"{plain(100 * x)} %"


def distinct(value, limit, unit: Unit, *, figures: int = 3) -> str:
    """A measured value beside a limit it is compared with: three significant figures, more
    (up to six) where fewer would print it as the limit itself (4.4996 ms against 4.5 ms →
    ``4.4996 ms``, not ``4.50 ms``)."""
    x, bound = finite_number(value), finite_number(limit)
    if x is None:
        return MISSING
    while figures < MAX_FIGURES and bound is not None and x != bound and \
            float(significant(unit.of(x), figures)) == float(plain(unit.of(bound))):
        figures += 1
    return quantity(x, unit, figures=figures)


def frame_rate(value_hz, *, missing: str | None = None) -> str:
    """A frame rate (1/s) as written: ``2500 frames/s``."""
    return given(value_hz, FRAMES_S, missing=missing)


def limits(low, high, unit: Unit) -> str:
    """A specification's inclusive limits (SI; NaN an open end): ``4.5 to 6 ms``,
    ``at most 6 ms``, ``at least 4.5 ms``."""
    lo, hi = finite_number(low), finite_number(high)
    if lo is None and hi is None:
        return "no limit (must be measured)"
    if lo is None:
        return f"at most {given(hi, unit)}"
    if hi is None:
        return f"at least {given(lo, unit)}"
    return f"{plain(unit.of(lo))} to {given(hi, unit)}"


# --- time stamps ---------------------------------------------------------------------------

#: the one form of a time stamp for people
STAMP_FORMAT = "%Y-%m-%d %H:%M UTC"


def timestamp(moment) -> str:
    """A moment (ISO 8601 text, e.g. ``2026-12-04T18:39:49Z``, or a datetime) as
    ``2026-12-04 18:39 UTC``; a time without a zone is taken as UTC; text that is no time is
    returned as it is, and nothing as ``—``."""
    if moment is None or moment == "":
        return MISSING
    if isinstance(moment, str):
        text = moment.strip()
        try:
            moment = datetime.fromisoformat(text[:-1] + "+00:00" if text.endswith(("Z", "z")) else text)
        except ValueError:
            return text
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.astimezone(timezone.utc).strftime(STAMP_FORMAT)


__all__ = ["Unit", "MISSING", "DASH", "S", "MS", "US", "UM", "MM", "PA_S", "MPA_S", "PA", "MN_M", "KG_M3",
           "FRAMES_S", "NONE", "time_unit", "viscosity_unit", "view_unit", "fixed", "significant",
           "plain", "uncertainty_decimals", "quantity", "given", "estimate", "span",
           "with_interval", "spread", "percent", "given_percent", "distinct", "frame_rate", "limits",
           "timestamp"]
