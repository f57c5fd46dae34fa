"""The house style of numbers for people (thinning.display): a table of values and uncertainties
with the strings people must see, the issue's bad examples turned right, and where it is used."""

from __future__ import annotations

import math
from datetime import datetime, timedelta, timezone

import pytest

from thinning import display, qc
from thinning.display import MPA_S, MS, PA, PA_S, S, UM, US

# (value in SI, 95 % interval in SI, display unit, expected value, expected interval).
# Hand-worked: the half-width to two significant figures sets the decimal place of the value and
# of both ends (common practice of reporting, as in the GUM's 7.2.6: "at most two significant
# digits" of an uncertainty, the estimate rounded to match).
ESTIMATES = [
    # the "95 % interval 1.3–1.3 ms": half-width 0.02 ms → three decimal places
    (0.0013, (0.00128, 0.00132), MS, "1.300 ms", "1.280–1.320 ms"),
    # the "0.003837 s … (95 % interval 0.003656–0.004014 s)": half-width 0.179 ms → 0.18
    (0.003837, (0.003656, 0.004014), MS, "3.84 ms", "3.66–4.01 ms"),
    # half-width 0.497 ms → 0.50: two decimal places, the trailing zero kept
    (0.0129, (0.0124032, 0.0133968), MS, "12.90 ms", "12.40–13.40 ms"),
    # half-width 0.2 ms → 0.20
    (0.0052, (0.005, 0.0054), MS, "5.20 ms", "5.00–5.40 ms"),
    # half-width 10 Pa·s: no decimal place
    (99.0, (90.0, 110.0), PA_S, "99 Pa·s", "90–110 Pa·s"),
    # half-width 250 Pa·s → two figures at the tens: no e-notation ("6.72e+03 Pa·s")
    (6724.3, (6480.0, 6980.0), PA_S, "6720 Pa·s", "6480–6980 Pa·s"),
    # half-width 1.5 Pa → 1.5: one decimal place
    (12.5, (11.0, 14.0), PA, "12.5 Pa", "11.0–14.0 Pa"),
    # a half-width of 0.0996 rounds to 0.10: two decimal places, not three
    (1.0, (0.9004, 1.0996), S, "1.00 s", "0.90–1.10 s"),
    # an asymmetric interval (profile likelihood): the half of its width sets the place
    (0.00498, (0.00490, 0.00530), MS, "4.98 ms", "4.90–5.30 ms"),
    # an interval reaching zero keeps its decimal place: "0.0", not "0" or "-0.0"
    (0.0051, (-0.00002, 0.0102), MS, "5.1 ms", "0.0–10.2 ms"),
    # a small viscosity in mPa·s
    (0.00213, (0.00201, 0.00225), MPA_S, "2.13 mPa·s", "2.01–2.25 mPa·s"),
    # an interval far narrower than the value: never more than six significant figures
    (5.0, (4.9999999, 5.0000001), S, "5.00000 s", "5.00000–5.00000 s"),
]


@pytest.mark.parametrize(("value", "interval", "unit", "shown", "around"), ESTIMATES)
def test_a_value_is_printed_to_its_intervals_precision(value, interval, unit, shown, around):
    assert display.estimate(value, interval, unit) == (shown, around)
    assert display.with_interval(value, interval, unit) == f"{shown} (95 % interval {around})"


def test_the_ends_of_an_interval_never_print_alike():
    # whatever the width, two figures of the half-width part the ends by at least ten in the
    # last place (the "1.3–1.3 ms")
    for centre in (0.0013, 0.0049, 0.012, 2.7, 640.0):
        for relative in (1e-5, 1e-3, 0.015, 0.2, 0.9):
            low, high = centre * (1 - relative), centre * (1 + relative)
            _, around = display.estimate(centre, (low, high), display.time_unit(centre))
            ends = around.split()[0].split("–")
            assert ends[0] != ends[1], around


@pytest.mark.parametrize(("value", "unit", "text"), [
    # values without an interval: three significant figures, fixed notation
    (0.0831, MS, "83.1 ms"),        # the "breakup time 6620 ms" shown as s below
    (6.62, S, "6.62 s"),
    (6724.3, PA_S, "6720 Pa·s"),    # not "6.72e+03 Pa·s"
    (1.2e6, PA_S, "1200000 Pa·s"),  # never e-notation, however large
    (4.5e-4, UM, "450 µm"),
    (0.48, MPA_S, "480 mPa·s"),
    (0.0052, MS, "5.20 ms"),        # a trailing zero is a significant figure
    (0.009996, MS, "10.0 ms"),      # rounding up keeps three figures: "10.0", not "10.00"
    (0.009996, MS.bare, "10.0"),    # a column whose heading names the unit
    (0.0, MS, "0 ms"),
    (-0.0000001, MS, "-0.000100 ms"),
    (None, MS, "—"),
    (math.nan, PA, "—"),
    (math.inf, PA, "—"),
    ("", PA, "—"),
])
def test_a_value_without_an_interval(value, unit, text):
    assert display.quantity(value, unit) == text


def test_a_missing_value_says_why():
    assert display.quantity(None, MS, missing="not given") == "— (not given)"
    assert display.estimate(None, (0.001, 0.002), MS, missing="no fit") == ("— (no fit)", None)
    # an interval without both ends is no interval: the value keeps three figures
    assert display.estimate(0.0052, (0.005, None), MS) == ("5.20 ms", None)
    assert display.estimate(0.0052, None, MS) == ("5.20 ms", None)
    # a zero-width interval gives no precision: three figures, the interval as a stretch
    assert display.estimate(0.0052, (0.0052, 0.0052), MS) == ("5.20 ms", "5.20–5.20 ms")


@pytest.mark.parametrize(("fraction", "text"), [
    # the three CV styles (0.019, 0.00392, 0.0462) as one: a percentage, two figures
    (0.019, "1.9 %"),
    (0.00392, "0.39 %"),
    (0.0462, "4.6 %"),
    (0.10, "10 %"),
    (0.1234, "12 %"),
    (0.0, "0 %"),
    (None, "—"),
])
def test_a_coefficient_of_variation_is_a_percentage(fraction, text):
    assert display.percent(fraction) == text


@pytest.mark.parametrize(("values", "unit"), [
    ((0.0045, 0.006, 0.0038), MS),   # all below 1 s: ms
    ((0.0045, 6.62), S),             # one time of a second or more: the whole view in s
    ((None, math.nan), MS),
    ((), MS),
])
def test_one_time_unit_per_view(values, unit):
    assert display.time_unit(*values) == unit


def test_one_viscosity_unit_per_view():
    assert display.viscosity_unit(0.0012, 0.48) == MPA_S
    assert display.viscosity_unit(0.0012, 6720.0) == PA_S   # one large value: all in Pa·s
    assert display.viscosity_unit() == PA_S


def test_numbers_somebody_chose_are_shown_as_written():
    # the 'specification "0.0045 to 0.006 (s)" next to means in ms'
    assert display.limits(0.0045, 0.006, MS) == "4.5 to 6 ms"
    assert display.limits(math.nan, 0.006, MS) == "at most 6 ms"
    assert display.limits(0.0045, math.nan, MS) == "at least 4.5 ms"
    assert display.limits(math.nan, math.nan, MS) == "no limit (must be measured)"
    assert display.given(2e-5, US) == "20 µs"
    assert display.given(4.2e-6, UM) == "4.2 µm"
    assert display.given_percent(0.10) == "10 %"
    assert display.frame_rate(2500.0) == "2500 frames/s"
    assert display.frame_rate(25000.0) == "25000 frames/s"


def test_a_value_beside_its_limit_is_never_printed_as_the_limit():
    assert display.distinct(0.003837, 0.0045, MS) == "3.84 ms"
    assert display.distinct(0.0044996, 0.0045, MS) == "4.4996 ms"   # not "4.50 ms"
    assert display.distinct(0.0045, 0.0045, MS) == "4.50 ms"         # equal is shown equal


@pytest.mark.parametrize(("moment", "text"), [
    ("2026-12-04T18:39:49Z", "2026-12-04 18:39 UTC"),
    ("2026-12-04T19:39:49+01:00", "2026-12-04 18:39 UTC"),
    ("2026-12-04T18:39:49", "2026-12-04 18:39 UTC"),   # no zone: taken as UTC
    (datetime(2026, 12, 4, 20, 39, tzinfo=timezone(timedelta(hours=2))), "2026-12-04 18:39 UTC"),
    ("not a time", "not a time"),
    (None, "—"),
])
def test_one_form_of_time_stamp(moment, text):
    assert display.timestamp(moment) == text


def test_no_e_notation_anywhere_in_the_number_table():
    for value, interval, unit, _, _ in ESTIMATES:
        assert "e" not in display.with_interval(value, interval, unit).split()[0]
    for x in (1e-9, 3.3e-7, 1e12, 123456789.0):
        assert "e" not in display.significant(x) and "e" not in display.plain(x)


def _rep(label, lam):
    return qc.Replicate(label, "ok", "good", {"relaxation_time_s": lam, "filament_lifetime_s": None,
                                              "extensional_viscosity_max_Pa_s": None})


def test_verdict_reasons_are_shown_in_the_house_style_and_kept_in_si():
    # the "0.003837 s is below the minimum 0.0045 s" beside tables in ms
    spec = qc.Spec("ink", (0.0045, 0.006), max_cv=0.02)
    reps = [_rep("S #1", 0.00370), _rep("S #2", 0.00385), _rep("S #3", 0.00390),
            qc.Replicate("S #4", "failed", None, {}, reason="the camera stopped early")]
    verdict = qc.lot_verdict(spec, reps)
    assert verdict.verdict == "fail"
    shown = verdict.shown_reasons
    assert shown[0] == ("lot mean relaxation time 3.82 ms (95 % interval 3.56–4.08 ms) is wholly below "
                        "the minimum 4.5 ms")
    assert "coefficient of variation of the relaxation time 2.7 % exceeds 2 %" in shown
    assert "replicate S #1: relaxation time 3.70 ms is below the minimum 4.5 ms" in shown
    assert "replicate S #4 is not valid: failed (the camera stopped early)" in shown
    assert verdict.units["relaxation_time_s"] == MS
    # the stored sentences (records lots and its CSV) keep their SI text, one for one
    assert len(verdict.reasons) == len(shown)
    assert verdict.reasons[0] == ("lot mean relaxation time 0.003817 s (95 % interval 0.003558–0.004075 s) "
                                  "is wholly below the minimum 0.0045 s")
    assert "coefficient of variation of the relaxation time 0.0273 exceeds 0.02" in verdict.reasons


def test_a_straddled_limit_is_shown_in_the_lots_unit():
    spec = qc.Spec("ink", (0.0045, 0.006))
    verdict = qc.lot_verdict(spec, [_rep("a", 0.0044), _rep("b", 0.0052), _rep("c", 0.0060)])
    assert verdict.shown_reasons[0] == ("the 95 % interval of the lot mean relaxation time (3.2–7.2 ms) "
                                        "straddles the minimum 4.5 and the maximum 6 ms")
    assert "coefficient of variation of the relaxation time 15 % exceeds 10 %" in verdict.shown_reasons


def test_a_cv_just_over_its_limit_is_not_shown_as_the_limit():
    spec = qc.Spec("ink", (0.001, 0.1), max_cv=0.10)
    # sd/mean = 0.1002: two figures would print "10 % exceeds 10 %"
    sd = 0.1002
    verdict = qc.lot_verdict(spec, [_rep("a", 0.01 * (1 - sd)), _rep("b", 0.01), _rep("c", 0.01 * (1 + sd))])
    (cv_reason,) = [r for r in verdict.shown_reasons if "coefficient" in r]
    assert cv_reason == "coefficient of variation of the relaxation time 10.02 % exceeds 10 %"
