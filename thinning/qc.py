"""Product specifications, lot verdicts and control charts (pure: no files, no database).

The rules are those of the contract (``docs/contract.md``, "Verdicts"):

* A replicate is one manifest row. It is **valid** when its status is ``ok``,
  its quality ``good`` and every quantity the product's specification limits
  is present.
* A lot's value for each limited quantity is the mean of its valid
  replicates, with the sample standard deviation (n − 1).
* ``fail`` when a lot mean lies outside a limit (limits are inclusive; a NaN
  end is open). Otherwise ``review`` when there are fewer valid replicates
  than required, the coefficient of variation of λ exceeds ``max_cv``, any
  single valid replicate lies outside a limit, or any replicate is invalid.
  Otherwise ``pass``. Every ``fail`` and ``review`` lists all its reasons.
* A lot of a product without a specification is ``review`` ("no
  specification").
* The **decision rule** of a specification (``decision_rule``) says how a lot
  mean meets a limit. ``"simple"``: the mean itself, as above. ``"guard-band"``
  (the default): the mean's 95 % interval, the Student-t interval of the valid
  replicates' values (n − 1 degrees of freedom), following the guard-band
  practice for conformity decisions (ISO 14253-1; JCGM 106:2012, "Evaluation of
  measurement data — The role of measurement uncertainty in conformity
  assessment"): ``fail`` when the interval lies wholly outside a limit,
  ``review`` when it straddles one (or when a single valid replicate gives no
  interval), the other ``review`` reasons as above.

Control charts (:func:`control_chart`) are individuals (X) and moving-range
(MR) charts of the lot means of λ, one product at a time, in production order
(Montgomery D.C., *Introduction to Statistical Quality Control*, Wiley: the
Shewhart control chart for individual measurements and its moving-range chart).
The limits for a lot come from its **baseline**: earlier lots of the product
only (at least :data:`MIN_BASELINE_LOTS` of them), never the lot itself. By
default the baseline is every earlier lot that passed without a chart flag and
is not excluded (Montgomery's phase I practice: points with an assignable
cause are removed before the limits are computed, so that a failed, flagged
lot does not pull the centre line or widen the limits for the lots after it).
A product's specification may instead fix a named phase-I baseline
(:class:`Baseline`: lots listed, or a ``made_on`` date range); the lots after it
are then judged against limits that no longer move (phase II). A lot excluded
from baselines with a recorded reason (``records exclude``) enters none. A lot
that breaks a run rule keeps its verdict and gets ``chart_flags``; the rule
names are :data:`CHART_RULES`.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass, field
from typing import Iterable, Mapping, Sequence

import numpy as np
from scipy import stats

from . import display
from .errors import ThinningError

#: quantities a specification may limit: key → (plain name for sentences, SI unit)
LIMITED_QUANTITIES = {
    "relaxation_time_s": ("relaxation time", "s"),
    "filament_lifetime_s": ("filament lifetime", "s"),
    "extensional_viscosity_max_Pa_s": ("maximum apparent extensional viscosity", "Pa·s"),
}

VERDICTS = ("pass", "review", "fail")

#: decision rules a specification may name; the first is the default
DECISION_RULES = ("guard-band", "simple")

#: lots before this one needed for control limits (contract: at least 5)
MIN_BASELINE_LOTS = 5

# Control-chart constants for moving ranges of two consecutive points (n = 2):
# d2 = 1.128 (mean of the range of two standard normal values, 2/sqrt(pi)) and
# D4 = 3.267 (upper limit factor for the range chart). Source: Montgomery D.C.,
# Introduction to Statistical Quality Control, Appendix table "Factors for
# constructing variables control charts" (also ASTM Manual on Presentation of
# Data and Control Chart Analysis).
D2 = 1.128
D4 = 3.267

#: run rules, our names → one plain sentence each (documented in the README).
CHART_RULES = {
    "beyond-3-sigma": "the lot mean lies more than 3 sigma from the centre line",
    "2-of-3-beyond-2-sigma": "2 of the last 3 lot means lie more than 2 sigma from the centre, on the "
                             "same side as this lot",
    "4-of-5-beyond-1-sigma": "4 of the last 5 lot means lie more than 1 sigma from the centre, on the "
                             "same side as this lot",
    "8-on-one-side": "the last 8 lot means all lie on the same side of the centre line",
    "6-trending": "the last 6 lot means rise steadily or fall steadily",
    "moving-range-above-limit": "the change from the previous lot exceeds the moving-range limit "
                                "D4 × mean moving range",
}


class SpecError(ThinningError, ValueError):
    """A specifications file that cannot be used; the message is one sentence."""


@dataclass(frozen=True)
class Spec:
    """The specification of one product.

    Limits are ``(min, max)`` inclusive in SI units; ``nan`` marks an open end.
    ``None`` means the quantity is not limited.
    """

    name: str
    relaxation_time_s: tuple[float, float]
    filament_lifetime_s: tuple[float, float] | None = None
    extensional_viscosity_max_Pa_s: tuple[float, float] | None = None
    replicates: int = 3
    max_cv: float = 0.10
    decision_rule: str = DECISION_RULES[0]
    #: a fixed phase-I baseline for the control chart (``[product.baseline]``), else None: the
    #: default baseline (earlier lots that passed without a chart flag)
    baseline: "Baseline | None" = None

    @property
    def limits(self) -> dict[str, tuple[float, float]]:
        """The limited quantities: key → (min, max)."""
        return {key: getattr(self, key) for key in LIMITED_QUANTITIES if getattr(self, key) is not None}


#: More valid replicates per lot than this is no lab's plan: a typing mistake.
MAX_REPLICATES = 100


@dataclass(frozen=True)
class Baseline:
    """A named phase-I baseline of a product's control chart (``[product.baseline]``).

    Either ``lots`` (lot ids, as in the manifest) or a ``made_on`` range
    ``made_from`` … ``made_to`` (ISO dates, inclusive; one end may be open).
    A lot is judged against the baseline lots that come before it in production
    order (the contract: limits come from earlier lots, never the lot itself), so
    every lot after the baseline sees the same, fixed limits (Montgomery's phase II).
    """

    name: str
    lots: tuple[str, ...] = ()
    made_from: str | None = None
    made_to: str | None = None

    def covers(self, lot: str, made_on: str | None) -> bool:
        """Whether the lot belongs to the baseline."""
        if self.lots:
            return lot in self.lots
        if made_on is None:
            return False
        return ((self.made_from is None or made_on >= self.made_from)
                and (self.made_to is None or made_on <= self.made_to))

    def described(self) -> str:
        """``lots A, B, C`` or ``lots made 2026-01-01 to 2026-01-31`` (for sentences)."""
        if self.lots:
            return "lots " + ", ".join(self.lots)
        if self.made_from and self.made_to:
            return f"lots made {self.made_from} to {self.made_to}"
        if self.made_from:
            return f"lots made on or after {self.made_from}"
        return f"lots made on or before {self.made_to}"

    def as_mapping(self) -> dict:
        """The TOML keys (``name``, ``lots`` or ``from`` / ``to``), e.g. to store as JSON."""
        found: dict = {"name": self.name}
        if self.lots:
            found["lots"] = list(self.lots)
        if self.made_from:
            found["from"] = self.made_from
        if self.made_to:
            found["to"] = self.made_to
        return found


def _iso_date(name: str, key: str, value) -> str:
    import datetime as _dt

    if isinstance(value, _dt.datetime):
        value = value.date()
    if isinstance(value, _dt.date):
        return value.isoformat()
    if isinstance(value, str):
        try:
            return _dt.date.fromisoformat(value.strip()).isoformat()
        except ValueError:
            pass
    raise SpecError(f"product {name!r}: baseline {key} must be a date such as 2026-01-31.")


def baseline_from_mapping(name: str, entry) -> Baseline:
    """One ``[product.baseline]`` table → :class:`Baseline`, checking every field."""
    if not isinstance(entry, Mapping):
        raise SpecError(f"product {name!r}: baseline must be a table ([product.baseline]) with a name "
                        "and lots = [...] or from = / to = dates.")
    known = {"name", "lots", "from", "to"}
    unknown = sorted(set(entry) - known)
    if unknown:
        raise SpecError(f"product {name!r}: unknown baseline key {unknown[0]!r} (known: "
                        f"{', '.join(sorted(known))}).")
    label = entry.get("name")
    if not isinstance(label, str) or not label.strip():
        raise SpecError(f"product {name!r}: the baseline needs a name (text), such as \"phase I 2026\".")
    lots = entry.get("lots")
    has_range = "from" in entry or "to" in entry
    if lots is not None and has_range:
        raise SpecError(f"product {name!r}: give the baseline either lots = [...] or from = / to = "
                        "dates, not both.")
    if lots is not None:
        if (not isinstance(lots, list) or not lots
                or not all(isinstance(lot, str) and lot.strip() for lot in lots)):
            raise SpecError(f"product {name!r}: baseline lots must be a list of lot ids (text).")
        lots = [lot.strip() for lot in lots]
        if len(set(lots)) != len(lots):
            raise SpecError(f"product {name!r}: baseline lots name a lot twice.")
        return Baseline(name=label.strip(), lots=tuple(lots))
    if not has_range:
        raise SpecError(f"product {name!r}: the baseline needs lots = [...] or from = / to = dates.")
    made_from = _iso_date(name, "from", entry["from"]) if "from" in entry else None
    made_to = _iso_date(name, "to", entry["to"]) if "to" in entry else None
    if made_from and made_to and made_from > made_to:
        raise SpecError(f"product {name!r}: baseline from {made_from} is after to {made_to}.")
    return Baseline(name=label.strip(), made_from=made_from, made_to=made_to)


def _limit(name: str, key: str, value) -> tuple[float, float]:
    if (not isinstance(value, (list, tuple)) or len(value) != 2
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)):
        raise SpecError(f"product {name!r}: {key} must be a list of two numbers [min, max] "
                        "(use nan for an open end).")
    low, high = float(value[0]), float(value[1])
    if math.isinf(low) or math.isinf(high):
        raise SpecError(f"product {name!r}: {key} uses an infinite limit; use nan for an open end.")
    if not math.isnan(low) and not math.isnan(high) and low > high:
        raise SpecError(f"product {name!r}: {key} has its minimum {low:g} above its maximum {high:g}.")
    if (not math.isnan(low) and low < 0) or (not math.isnan(high) and high <= 0):
        raise SpecError(f"product {name!r}: {key} = [{low:g}, {high:g}] cannot be met: the quantity "
                        "is positive (use nan for an open end).")
    return low, high


def spec_from_mapping(entry: Mapping) -> Spec:
    """One ``[[product]]`` table → :class:`Spec`, checking every field."""
    name = entry.get("name")
    if not isinstance(name, str) or not name.strip():
        raise SpecError("every [[product]] needs a name (text).")
    known = {"name", "replicates", "max_cv", "decision_rule", "baseline", *LIMITED_QUANTITIES}
    unknown = sorted(set(entry) - known)
    if unknown:
        raise SpecError(f"product {name!r}: unknown key {unknown[0]!r} (known: {', '.join(sorted(known))}).")
    if "relaxation_time_s" not in entry:
        raise SpecError(f"product {name!r} needs relaxation_time_s = [min, max].")
    replicates = entry.get("replicates", 3)
    if not isinstance(replicates, int) or isinstance(replicates, bool) or \
            not 1 <= replicates <= MAX_REPLICATES:
        raise SpecError(f"product {name!r}: replicates must be a whole number from 1 to "
                        f"{MAX_REPLICATES}.")
    max_cv = entry.get("max_cv", 0.10)
    if not isinstance(max_cv, (int, float)) or isinstance(max_cv, bool) or not 0 < max_cv <= 1:
        raise SpecError(f"product {name!r}: max_cv must be a fraction above 0 and at most 1, such "
                        "as 0.10 (10 %).")
    rule = entry.get("decision_rule", DECISION_RULES[0])
    if rule not in DECISION_RULES:
        raise SpecError(f"product {name!r}: decision_rule must be one of "
                        f"{', '.join(repr(r) for r in DECISION_RULES)}, not {rule!r}.")
    limits = {key: _limit(name, key, entry[key]) for key in LIMITED_QUANTITIES if key in entry}
    baseline = baseline_from_mapping(name, entry["baseline"]) if "baseline" in entry else None
    return Spec(name=name, replicates=replicates, max_cv=float(max_cv), decision_rule=rule,
                baseline=baseline, **limits)


def parse_specs(text: str) -> list[Spec]:
    """The text of a specifications TOML file → one :class:`Spec` per ``[[product]]``."""
    try:
        document = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"the specifications file is not valid TOML ({exc}).") from None
    products = document.get("product")
    if not isinstance(products, list) or not products:
        raise SpecError("the specifications file has no [[product]] table.")
    specs = [spec_from_mapping(entry) for entry in products]
    names = [spec.name for spec in specs]
    duplicated = sorted({n for n in names if names.count(n) > 1})
    if duplicated:
        raise SpecError(f"product {duplicated[0]!r} is specified twice.")
    return specs


@dataclass(frozen=True)
class Replicate:
    """One replicate (manifest row) of a lot, as the verdict sees it.

    ``label`` names it in sentences (e.g. ``"S1 #2"``); ``reason`` is the
    failure sentence of a failed row; ``values`` holds the quantities in SI
    (None where the analysis gave none); ``doubtful_codes`` the codes of the
    findings that made its record doubtful.
    """

    label: str
    status: str
    quality: str | None
    values: Mapping[str, float | None]
    reason: str | None = None
    doubtful_codes: tuple[str, ...] = ()


@dataclass(frozen=True)
class QuantityStats:
    """Statistics of one quantity over a lot's valid replicates (SI units).

    ``sd`` uses n − 1 (None for n < 2); ``cv`` = sd / mean; ``ci95`` is the
    Student-t 95 % interval of the mean (None for n < 2).
    """

    n: int
    mean: float | None
    sd: float | None
    cv: float | None
    ci95: tuple[float, float] | None


@dataclass(frozen=True)
class LotVerdict:
    """A lot's verdict (``pass`` / ``review`` / ``fail``) with all its reasons."""

    verdict: str
    reasons: tuple[str, ...]
    n_replicates: int
    n_valid: int
    valid: tuple[bool, ...]
    stats: Mapping[str, QuantityStats] = field(default_factory=dict)
    #: per replicate, why it is not valid (None for a valid one)
    invalid_reasons: tuple[str | None, ...] = ()
    #: the specification's decision rule (None without a specification)
    decision_rule: str | None = None
    #: ``reasons`` with their numbers in the house style (:mod:`thinning.display`), for people
    shown_reasons: tuple[str, ...] = ()
    #: the display unit of each limited quantity in this lot's views
    units: Mapping[str, "display.Unit"] = field(default_factory=dict)


def quantity_stats(values: Sequence[float]) -> QuantityStats:
    """Mean, sd (n − 1), CV and Student-t 95 % interval of the mean of ``values``."""
    x = np.asarray(values, dtype=float)
    n = int(x.size)
    if n == 0:
        return QuantityStats(0, None, None, None, None)
    mean = float(np.mean(x))
    if n < 2:
        return QuantityStats(n, mean, None, None, None)
    sd = float(np.std(x, ddof=1))
    cv = sd / abs(mean) if mean != 0 else None
    half = float(stats.t.ppf(0.975, n - 1)) * sd / math.sqrt(n)
    return QuantityStats(n, mean, sd, cv, (mean - half, mean + half))


def _outside(value: float, limits: tuple[float, float]) -> tuple[str, float] | None:
    """('below the minimum', min) / ('above the maximum', max), or None inside (inclusive)."""
    low, high = limits
    if not math.isnan(low) and value < low:
        return "below the minimum", low
    if not math.isnan(high) and value > high:
        return "above the maximum", high
    return None


class _StoredWords:
    """How the ``reasons`` of a verdict write numbers: SI, four significant figures (the text of
    ``records lots`` and its CSV, which the contract keeps)."""

    def unit(self, key) -> str:
        return LIMITED_QUANTITIES[key][1]

    def bare(self, key, x) -> str:
        return f"{x:.4g}"

    def value(self, key, x, limit=None) -> str:
        return f"{x:.4g} {self.unit(key)}"

    def limit(self, key, x) -> str:
        return f"{x:.4g} {self.unit(key)}"

    def mean_interval(self, key, st) -> tuple[str, str]:
        low, high = st.ci95
        return f"{st.mean:.4g} {self.unit(key)}", f"{low:.4g}–{high:.4g} {self.unit(key)}"

    def cv(self, x, limit) -> str:
        return f"{x:.3g}"

    def max_cv(self, x) -> str:
        return f"{x:.3g}"


class _ShownWords(_StoredWords):
    """How the ``shown_reasons`` write numbers: the house style (:mod:`thinning.display`) in the
    lot's view units."""

    def __init__(self, units):
        self.units = units

    def unit(self, key) -> str:
        return self.units[key].label

    def bare(self, key, x) -> str:
        return display.plain(self.units[key].of(x))

    def value(self, key, x, limit=None) -> str:
        return display.distinct(x, limit, self.units[key])

    def limit(self, key, x) -> str:
        return display.given(x, self.units[key])

    def mean_interval(self, key, st) -> tuple[str, str]:
        return display.estimate(st.mean, st.ci95, self.units[key])

    def cv(self, x, limit) -> str:
        figures = 2  # more where two would print the limit itself ("10 % exceeds 10 %")
        while figures < display.MAX_FIGURES and \
                float(display.significant(100 * x, figures)) == float(display.plain(100 * limit)):
            figures += 1
        return display.percent(x, figures=figures)

    def max_cv(self, x) -> str:
        return display.given_percent(x)


def view_units(spec: "Spec | None", replicates: Sequence["Replicate"]) -> dict[str, display.Unit]:
    """The display unit of each limited quantity for one lot's view (its replicates' values and
    its limits), by the rules of :func:`thinning.display.view_unit`."""
    units = {}
    for key, (_, si_unit) in LIMITED_QUANTITIES.items():
        values = [rep.values.get(key) for rep in replicates]
        limits = spec.limits.get(key) if spec is not None else None
        units[key] = display.view_unit(si_unit, *values, *(limits or ()))
    return units


def _invalid_because(rep: Replicate, limited: Iterable[str]) -> str | None:
    if rep.status != "ok":
        return f"failed ({rep.reason})" if rep.reason else "failed"
    if rep.quality != "good":
        why = f" ({', '.join(rep.doubtful_codes)})" if rep.doubtful_codes else ""
        return f"quality {rep.quality or 'unknown'}{why}"
    missing = [LIMITED_QUANTITIES[k][0] for k in limited if rep.values.get(k) is None]
    if missing:
        return "no " + " and no ".join(missing)
    return None


def _clean(text: str) -> str:
    """Reasons are joined by '; ', so a reason must not contain that separator."""
    return " ".join(str(text).replace(";", ",").split())


def _simple_judgement(key, st: QuantityStats, limits, words) -> list[str]:
    """The simple rule: the lot mean itself against the limits (fail reasons)."""
    name = LIMITED_QUANTITIES[key][0]
    where = _outside(st.mean, limits) if st.mean is not None else None
    if not where:
        return []
    side, limit = where
    return [f"lot mean {name} {words.value(key, st.mean, limit)} is {side} {words.limit(key, limit)}"]


def _guard_band_judgement(key, st: QuantityStats, limits, words) -> tuple[list[str], list[str]]:
    """The guard-band rule: the lot mean's 95 % interval against the limits (fail and review
    reasons). A limit inside the interval is straddled: the lot may lie on either side."""
    name = LIMITED_QUANTITIES[key][0]
    if st.mean is None:
        return [], []
    if st.ci95 is None:  # a single valid replicate
        where = _outside(st.mean, limits)
        if where:
            side, limit = where
            mean, state = words.value(key, st.mean, limit), f"is {side} {words.limit(key, limit)}"
        else:
            mean, state = words.value(key, st.mean), "lies inside the limits"
        return [], [f"lot mean {name} {mean} {state}, but a single valid replicate "
                    "gives no 95 % interval to judge it by"]
    low, high = st.ci95
    lo_limit, hi_limit = limits
    mean, interval = words.mean_interval(key, st)
    if not math.isnan(lo_limit) and high < lo_limit:
        return [f"lot mean {name} {mean} (95 % interval {interval}) is wholly below the "
                f"minimum {words.limit(key, lo_limit)}"], []
    if not math.isnan(hi_limit) and low > hi_limit:
        return [f"lot mean {name} {mean} (95 % interval {interval}) is wholly above the "
                f"maximum {words.limit(key, hi_limit)}"], []
    straddled = []
    if not math.isnan(lo_limit) and low < lo_limit:
        straddled.append(f"the minimum {words.bare(key, lo_limit)}")
    if not math.isnan(hi_limit) and high > hi_limit:
        straddled.append(f"the maximum {words.bare(key, hi_limit)}")
    if straddled:
        return [], [f"the 95 % interval of the lot mean {name} ({interval}) straddles "
                    f"{' and '.join(straddled)} {words.unit(key)}"]
    return [], []


def _reasons(spec, replicates, invalid, good, lot_stats, product, words) -> tuple[list[str], list[str]]:
    """The fail and review reasons of one lot, their numbers written by ``words``."""
    fails: list[str] = []
    reviews: list[str] = []
    if spec is None:
        reviews.append(f"no specification loaded for product {product!r}")
    else:
        for key, limits in spec.limits.items():
            if spec.decision_rule == "simple":
                fails += _simple_judgement(key, lot_stats[key], limits, words)
            else:
                failed, reviewed = _guard_band_judgement(key, lot_stats[key], limits, words)
                fails += failed
                reviews += reviewed
        if len(good) < spec.replicates:
            reviews.append(f"{len(good)} valid replicate{'s' if len(good) != 1 else ''} "
                           f"of {spec.replicates} required")
        cv = lot_stats["relaxation_time_s"].cv
        if cv is not None and cv > spec.max_cv:
            reviews.append(f"coefficient of variation of the relaxation time {words.cv(cv, spec.max_cv)} "
                           f"exceeds {words.max_cv(spec.max_cv)}")
        for rep in good:
            for key, limits in spec.limits.items():
                where = _outside(rep.values[key], limits)
                if where:
                    side, limit = where
                    name = LIMITED_QUANTITIES[key][0]
                    reviews.append(f"replicate {rep.label}: {name} {words.value(key, rep.values[key], limit)} "
                                   f"is {side} {words.limit(key, limit)}")
    for rep, why in zip(replicates, invalid):
        if why is not None:
            reviews.append(f"replicate {rep.label} is not valid: {why}")
    return fails, reviews


def lot_verdict(spec: Spec | None, replicates: Sequence[Replicate], *, product: str = "") -> LotVerdict:
    """The verdict of one lot from its replicates (contract "Verdicts").

    Without a specification the lot is ``review`` and its statistics are those
    of λ over the replicates that are ``ok`` and ``good``.
    """
    limited = tuple(spec.limits) if spec is not None else ("relaxation_time_s",)
    invalid = [_invalid_because(rep, limited) for rep in replicates]
    valid = tuple(reason is None for reason in invalid)
    good = [rep for rep, ok in zip(replicates, valid) if ok]
    quantities = tuple(dict.fromkeys(("relaxation_time_s", *limited)))
    lot_stats = {key: quantity_stats([rep.values[key] for rep in good if rep.values.get(key) is not None])
                 for key in quantities}
    fails, reviews = _reasons(spec, replicates, invalid, good, lot_stats, product, _StoredWords())
    units = view_units(spec, replicates)
    shown = _reasons(spec, replicates, invalid, good, lot_stats, product, _ShownWords(units))
    verdict = "fail" if fails else ("review" if reviews else "pass")
    return LotVerdict(verdict=verdict, reasons=tuple(_clean(r) for r in fails + reviews),
                      shown_reasons=tuple(_clean(r) for r in shown[0] + shown[1]), units=units,
                      n_replicates=len(replicates), n_valid=len(good), valid=valid, stats=lot_stats,
                      invalid_reasons=tuple(invalid),
                      decision_rule=None if spec is None else spec.decision_rule)


@dataclass(frozen=True)
class ChartPoint:
    """One lot on the X / MR charts of its product.

    ``value`` is the lot mean of λ (s); ``moving_range`` its absolute change from
    the previous charted lot. The limits (None until the baseline holds enough
    lots) come from the lot's baseline, earlier lots only: ``centre`` ± 3
    ``sigma`` for X, ``mr_ucl`` for MR. ``flags`` are the names of
    :data:`CHART_RULES` the lot breaks. ``baseline`` holds the keys of the
    earlier lots that formed the limits (``n_baseline`` of them), ``left_out``
    each earlier charted lot that did not, with why; ``baseline_name`` names a
    fixed phase-I baseline (None: the default baseline).
    """

    key: object
    value: float
    moving_range: float | None
    n_baseline: int
    centre: float | None
    sigma: float | None
    mr_mean: float | None
    mr_ucl: float | None
    flags: tuple[str, ...]
    baseline: tuple = ()
    left_out: tuple[tuple[object, str], ...] = ()
    baseline_name: str | None = None

    @property
    def ucl(self) -> float | None:
        return None if self.centre is None else self.centre + 3 * self.sigma

    @property
    def lcl(self) -> float | None:
        return None if self.centre is None else self.centre - 3 * self.sigma


#: how the default baseline is described in sentences (README, lot report)
DEFAULT_BASELINE = "earlier lots that passed without a chart flag"


def _zone_side(value: float, centre: float, sigma: float, k: float) -> int:
    """+1 / −1 when ``value`` lies more than k sigma above / below ``centre``, else 0."""
    if value > centre + k * sigma:
        return 1
    if value < centre - k * sigma:
        return -1
    return 0


def run_rule_flags(values: Sequence[float], centre: float, sigma: float) -> tuple[str, ...]:
    """The run rules broken at the LAST of ``values`` (the lot being judged).

    ``values`` are the lot means in production order ending with this lot;
    ``centre`` and ``sigma`` come from the lots before it. A rule is reported
    only when this lot is part of the pattern (the signal falls on the point
    that completes it, as the rules are applied point by point).

    Rules 1–4 are the Western Electric zone rules (Western Electric Co., 1956,
    Statistical Quality Control Handbook; as given in Montgomery,
    Introduction to Statistical Quality Control, section on sensitizing rules
    for Shewhart charts); "6-trending" is the trend rule of Nelson L.S. (1984),
    The Shewhart control chart: tests for special causes, J. Qual. Technol.
    16(4):237–239 (test 3).
    """
    x = [float(v) for v in values]
    last = x[-1]
    flags = []
    # Western Electric rule 1: one point beyond the 3-sigma limits.
    if _zone_side(last, centre, sigma, 3.0) != 0:
        flags.append("beyond-3-sigma")
    # Western Electric rule 2: 2 of 3 consecutive points beyond 2 sigma, same side.
    side = _zone_side(last, centre, sigma, 2.0)
    if side and len(x) >= 3 and sum(_zone_side(v, centre, sigma, 2.0) == side for v in x[-3:]) >= 2:
        flags.append("2-of-3-beyond-2-sigma")
    # Western Electric rule 3: 4 of 5 consecutive points beyond 1 sigma, same side.
    side = _zone_side(last, centre, sigma, 1.0)
    if side and len(x) >= 5 and sum(_zone_side(v, centre, sigma, 1.0) == side for v in x[-5:]) >= 4:
        flags.append("4-of-5-beyond-1-sigma")
    # Western Electric rule 4: 8 consecutive points on one side of the centre line.
    side = _zone_side(last, centre, sigma, 0.0)
    if side and len(x) >= 8 and all(_zone_side(v, centre, sigma, 0.0) == side for v in x[-8:]):
        flags.append("8-on-one-side")
    # Nelson (1984) test 3: 6 points in a row steadily increasing or decreasing.
    if len(x) >= 6:
        steps = np.diff(x[-6:])
        if np.all(steps > 0) or np.all(steps < 0):
            flags.append("6-trending")
    return tuple(flags)


def control_limits(baseline_values: Sequence[float]) -> tuple[float, float, float, float]:
    """``(centre, sigma, mr_mean, mr_ucl)`` of an individuals / moving-range chart from the
    baseline's lot means in production order (Montgomery, *Introduction to Statistical Quality
    Control*, control chart for individual measurements): centre = their mean, MR̄ = the mean of
    the moving ranges of two consecutive baseline lots, sigma = MR̄ / d2, MR upper limit D4 · MR̄.
    """
    baseline = np.asarray(baseline_values, dtype=float)
    mr_mean = float(np.mean(np.abs(np.diff(baseline))))
    centre = float(np.mean(baseline))
    sigma = mr_mean / D2  # sigma estimated from the mean moving range (d2 for n = 2)
    return centre, sigma, mr_mean, D4 * mr_mean  # D4: upper limit of the MR chart for n = 2


def control_chart(lots: Sequence[tuple[object, float]], *,
                  min_baseline: int = MIN_BASELINE_LOTS,
                  verdicts: Mapping[object, str] | None = None,
                  excluded: Mapping[object, str] | None = None,
                  phase_one: tuple[str, Iterable[object]] | None = None) -> list[ChartPoint]:
    """X and MR chart points for one product's lots, given in production order.

    ``lots`` holds ``(key, lot mean of λ in s)`` ordered by made_on, then by
    first analysis time; lots without a mean are left out by the caller. For
    lot i the limits come from its baseline, a subset of lots 0 … i−1
    (:func:`control_limits`; the moving ranges are those of consecutive
    baseline lots, so a lot left out is as if it had never been charted); a lot
    whose baseline holds fewer than ``min_baseline`` lots gets no limits and no
    flags. The baseline (Montgomery's phase I: remove the points with an
    assignable cause, then compute the limits):

    * by default, the earlier lots that passed (``verdicts[key] == "pass"``;
      ``verdicts`` None: every lot counts as passed, e.g. a product without a
      specification, whose lots cannot pass) and got no chart flag themselves;
    * with ``phase_one = (name, keys)``, a fixed phase-I baseline: the earlier
      lots among ``keys``, whatever their verdict, so that the lots after it
      are judged against fixed limits (phase II);
    * never a lot of ``excluded`` (key → the recorded reason).

    The run rules (:func:`run_rule_flags`) look at every charted lot in order.
    """
    verdicts = verdicts or {}
    excluded = excluded or {}
    named = None if phase_one is None else (phase_one[0], set(phase_one[1]))
    values = [float(v) for _, v in lots]
    keys = [key for key, _ in lots]
    points: list[ChartPoint] = []
    why_not: list[str | None] = []  # per charted lot: why it enters no later baseline (None: it does)
    for i, (key, value) in enumerate(lots):
        moving_range = abs(values[i] - values[i - 1]) if i > 0 else None
        baseline = tuple(j for j in range(i) if why_not[j] is None)
        left_out = tuple((keys[j], why_not[j]) for j in range(i) if why_not[j] is not None)
        common = dict(baseline=tuple(keys[j] for j in baseline), left_out=left_out,
                      baseline_name=None if named is None else named[0])
        if len(baseline) < min_baseline:
            point = ChartPoint(key, float(value), moving_range, len(baseline), None, None, None, None, (),
                               **common)
        else:
            centre, sigma, mr_mean, mr_ucl = control_limits([values[j] for j in baseline])
            flags = list(run_rule_flags(values[: i + 1], centre, sigma))
            if moving_range > mr_ucl:
                flags.append("moving-range-above-limit")
            point = ChartPoint(key, float(value), moving_range, len(baseline), centre, sigma, mr_mean,
                               mr_ucl, tuple(flags), **common)
        points.append(point)
        why_not.append(_left_out_because(key, point.flags, verdicts, excluded, named))
    return points


def _left_out_because(key, flags, verdicts, excluded, named) -> str | None:
    """Why a lot enters no later lot's baseline, in words (None: it enters)."""
    if key in excluded:
        return f"excluded: {excluded[key]}"
    if named is not None:
        return None if key in named[1] else f"not in the baseline {named[0]!r}"
    why = []
    verdict = verdicts.get(key, "pass")
    if verdict != "pass":
        why.append(f"verdict {verdict}")
    if flags:
        why.append(f"chart flag{'s' if len(flags) > 1 else ''} {', '.join(flags)}")
    return "; ".join(why) or None


# --- lots of a product ----------------------------------------------------------------

@dataclass(frozen=True)
class LotSummary:
    """One lot: identity, verdict (with statistics) and its control-chart point (or None)."""

    product: str
    lot: str
    made_on: str | None
    first_analysed_at: str
    verdict: LotVerdict
    chart: ChartPoint | None

    @property
    def chart_flags(self) -> tuple[str, ...]:
        return self.chart.flags if self.chart is not None else ()

    @property
    def relaxation_time(self) -> QuantityStats:
        return self.verdict.stats["relaxation_time_s"]

    def as_row(self) -> dict:
        """The ``records lots`` row (contract columns)."""
        lam = self.relaxation_time
        return {"product": self.product, "lot": self.lot, "made_on": self.made_on,
                "n_valid": self.verdict.n_valid, "relaxation_time_mean_s": lam.mean,
                "relaxation_time_sd_s": lam.sd, "relaxation_time_cv": lam.cv,
                "verdict": self.verdict.verdict, "reasons": "; ".join(self.verdict.reasons),
                "chart_flags": "; ".join(self.chart_flags), "decision_rule": self.verdict.decision_rule}


def natural_key(value: str):
    return [int(part) if part.isdigit() else part.lower() for part in re.split(r"(\d+)", value or "")]


def row_order(row: Mapping):
    return (natural_key(row["sample"]), natural_key(row["replicate"]), row["sha256"])


def production_order(row: Mapping):
    """made_on first (lots without one last), then first analysis time, then lot id."""
    return (row["made_on"] is None, row["made_on"] or "", row["first_analysed_at"], natural_key(row["lot"]))


def replicate_label(row: Mapping) -> str:
    """How a replicate is named in sentences: ``sample #replicate``."""
    return f"{row['sample']} #{row['replicate']}" if row["replicate"] else row["sample"]


def replicates_of(rows: Sequence[Mapping], failed: Sequence[Mapping]) -> list[Replicate]:
    labels = [replicate_label(r) for r in list(rows) + list(failed)]
    reps = []
    for row, label in zip(list(rows) + list(failed), labels):
        if labels.count(label) > 1:
            label = f"{label} (source {row['sha256'][:8] or 'unknown'})"
        if "reason" in row:
            reps.append(Replicate(label=label, status="failed", quality=None, values={},
                                  reason=row["reason"]))
        else:
            reps.append(Replicate(label=label, status=row["status"], quality=row["quality"],
                                  values={key: row[key] for key in LIMITED_QUANTITIES},
                                  doubtful_codes=tuple(row.get("doubtful_codes") or ())))
    return reps


def lot_summaries(lot_rows, measurements, failures, specs, exclusions=None) -> list[LotSummary]:
    """Every lot's verdict and control-chart point, by product then production order (pure).

    ``lot_rows``: mappings with ``product, lot, made_on, first_analysed_at``;
    ``measurements`` / ``failures``: ``{(product, lot): [row mapping, …]}`` of
    the current measurements (``sample, replicate, sha256, status, quality`` and
    the limited quantities) and the open failures (with ``reason``);
    ``specs``: ``{product: Spec}``; ``exclusions``: ``{(product, lot): reason}``
    of the lots excluded from control-chart baselines. A lot's chart point takes
    its limits from its baseline of earlier lots (:func:`control_chart`): the
    specification's phase-I baseline when it names one, else the earlier lots
    that passed without a chart flag (any lot without a flag for a product
    without a specification); never an excluded lot.
    """
    exclusions = exclusions or {}
    verdicts = {key: lot_verdict(specs.get(key[0]), replicates_of(measurements[key], failures[key]),
                                 product=key[0]) for key in measurements}
    summaries = []
    for product in sorted({r["product"] for r in lot_rows}):
        ordered = sorted((r for r in lot_rows if r["product"] == product), key=production_order)
        charted = [(r["lot"], verdicts[(product, r["lot"])].stats["relaxation_time_s"].mean) for r in ordered]
        spec = specs.get(product)
        phase_one = None
        if spec is not None and spec.baseline is not None:
            phase_one = (spec.baseline.name,
                         [r["lot"] for r in ordered if spec.baseline.covers(r["lot"], r["made_on"])])
        points = {p.key: p for p in control_chart(
            [(k, v) for k, v in charted if v is not None],
            verdicts=None if spec is None else {r["lot"]: verdicts[(product, r["lot"])].verdict
                                                for r in ordered},
            excluded={lot: why for (name, lot), why in exclusions.items() if name == product},
            phase_one=phase_one)}
        summaries += [LotSummary(product, r["lot"], r["made_on"], r["first_analysed_at"],
                                 verdicts[(product, r["lot"])], points.get(r["lot"])) for r in ordered]
    return summaries
