"""Specifications, lot verdicts and control charts (thinning.qc): pure functions, hand-checked cases."""

import math
import statistics

import numpy as np
import pytest
from scipy import stats as scipy_stats

from thinning import qc

SPEC_TOML = """
[[product]]
name = "ink-base-A"
relaxation_time_s = [0.008, 0.012]
filament_lifetime_s = [0.05, 0.20]
extensional_viscosity_max_Pa_s = [10.0, 1000.0]
replicates = 3
max_cv = 0.10

[[product]]
name = "open-ended"
relaxation_time_s = [nan, 0.012]
"""

SPEC = qc.Spec(name="ink", relaxation_time_s=(0.008, 0.012), replicates=3, max_cv=0.10,
               decision_rule="simple")
GUARDED = qc.Spec(name="ink", relaxation_time_s=(0.008, 0.012), replicates=3, max_cv=0.10)


def rep(label, lam, *, status="ok", quality="good", reason=None, **values):
    return qc.Replicate(label=label, status=status, quality=quality, reason=reason,
                        values={"relaxation_time_s": lam, **values})


# ---------------------------------------------------------------------------------------------- specs
def test_parse_specs_reads_the_contract_example():
    ink, open_ended = qc.parse_specs(SPEC_TOML)
    assert ink == qc.Spec(name="ink-base-A", relaxation_time_s=(0.008, 0.012), filament_lifetime_s=(0.05, 0.20),
                          extensional_viscosity_max_Pa_s=(10.0, 1000.0), replicates=3, max_cv=0.10)
    assert set(ink.limits) == {"relaxation_time_s", "filament_lifetime_s", "extensional_viscosity_max_Pa_s"}
    assert math.isnan(open_ended.relaxation_time_s[0]) and open_ended.relaxation_time_s[1] == 0.012
    assert set(open_ended.limits) == {"relaxation_time_s"}


@pytest.mark.parametrize("text, words", [
    ("[[product]]\nrelaxation_time_s = [1.0, 2.0]\n", "needs a name"),
    ('[[product]]\nname = "a"\n', "needs relaxation_time_s"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [2.0, 1.0]\n', "above its maximum"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0]\n', "two numbers"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0, 2.0]\nreplicate = 3\n', "unknown key 'replicate'"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0, 2.0]\nreplicates = 0\n', "from 1 to 100"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0, 2.0]\nreplicates = 1000000000\n',
     "from 1 to 100"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0, 2.0]\nmax_cv = -1\n', "above 0 and at most 1"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0, 2.0]\nmax_cv = 1e308\n', "at most 1"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [-5.0, -1.0]\n', "cannot be met"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [nan, 0.0]\n', "cannot be met"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1e400, 2.0]\n', "infinite"),
    ('[[product]]\nname = "a"\nrelaxation_time_s = [1.0, 2.0]\n[[product]]\nname = "a"\n'
     'relaxation_time_s = [1.0, 2.0]\n', "specified twice"),
    ("name = 'a'\n", "no [[product]]"),
    ("[[product]\n", "not valid TOML"),
])
def test_bad_specs_are_one_sentence_errors(text, words):
    with pytest.raises(qc.SpecError) as info:
        qc.parse_specs(text)
    assert words in str(info.value)
    assert "\n" not in str(info.value)


# ---------------------------------------------------------------------------------------------- verdicts
def test_three_good_replicates_inside_the_limits_pass():
    verdict = qc.lot_verdict(SPEC, [rep("a", 0.0100), rep("b", 0.0102), rep("c", 0.0098)])
    assert verdict.verdict == "pass" and verdict.reasons == ()
    assert verdict.n_valid == 3 and verdict.valid == (True, True, True)


def test_lot_statistics_match_independent_formulas():
    rng = np.random.default_rng(11)
    values = list(rng.normal(0.010, 0.0004, size=4))
    lam = qc.lot_verdict(SPEC, [rep(str(i), v) for i, v in enumerate(values)]).stats["relaxation_time_s"]
    # sample statistics from the standard library; interval from scipy's t distribution (library values)
    assert lam.mean == pytest.approx(statistics.fmean(values), rel=1e-12)
    assert lam.sd == pytest.approx(statistics.stdev(values), rel=1e-12)
    assert lam.cv == pytest.approx(statistics.stdev(values) / statistics.fmean(values), rel=1e-12)
    low, high = scipy_stats.t.interval(0.95, len(values) - 1, loc=statistics.fmean(values),
                                       scale=statistics.stdev(values) / math.sqrt(len(values)))
    assert lam.ci95 == pytest.approx((low, high), rel=1e-12)


def test_limits_are_inclusive_and_nan_is_an_open_end():
    at_edges = qc.lot_verdict(SPEC, [rep("a", 0.008), rep("b", 0.008), rep("c", 0.008)])
    assert at_edges.verdict == "pass"
    open_low = qc.Spec(name="o", relaxation_time_s=(math.nan, 0.012), replicates=1,
                       decision_rule="simple")
    assert qc.lot_verdict(open_low, [rep("a", 1e-6)]).verdict == "pass"
    assert qc.lot_verdict(open_low, [rep("a", 0.0121)]).verdict == "fail"


def test_a_lot_mean_outside_a_limit_fails_and_lists_every_other_reason_too():
    reps = [rep("a", 0.0130), rep("b", 0.0135), rep("c", 0.0100, quality="doubtful")]
    verdict = qc.lot_verdict(SPEC, reps)
    assert verdict.verdict == "fail"
    text = " | ".join(verdict.reasons)
    assert "lot mean relaxation time 0.01325 s is above the maximum 0.012 s" in text
    assert "2 valid replicates of 3 required" in text
    assert "replicate a: relaxation time 0.013 s is above the maximum 0.012 s" in text
    assert "replicate b" in text
    assert "replicate c is not valid: quality doubtful" in text
    assert all("; " not in reason for reason in verdict.reasons)


@pytest.mark.parametrize("reps, expected", [
    ([rep("a", 0.010), rep("b", 0.010)], "2 valid replicates of 3 required"),
    ([rep("a", 0.0085), rep("b", 0.0100), rep("c", 0.0118)], "coefficient of variation of the relaxation time"),
    ([rep("a", 0.0079), rep("b", 0.0100), rep("c", 0.0100)], "replicate a: relaxation time 0.0079 s is below"),
    ([rep("a", 0.010), rep("b", 0.010), rep("c", 0.010), rep("d", None, status="failed", reason="no frame rate")],
     "replicate d is not valid: failed (no frame rate)"),
    ([rep("a", 0.010), rep("b", 0.010), rep("c", 0.010), rep("d", None)],
     "replicate d is not valid: no relaxation time"),
])
def test_review_reasons(reps, expected):
    verdict = qc.lot_verdict(SPEC, reps)
    assert verdict.verdict == "review"
    assert any(expected in reason for reason in verdict.reasons), verdict.reasons


def test_every_limited_quantity_counts():
    spec = qc.Spec(name="x", relaxation_time_s=(0.008, 0.012), filament_lifetime_s=(0.05, 0.20), replicates=2,
                   decision_rule="simple")
    missing = qc.lot_verdict(spec, [rep("a", 0.01, filament_lifetime_s=0.1), rep("b", 0.01)])
    assert missing.verdict == "review" and missing.n_valid == 1
    assert any("replicate b is not valid: no filament lifetime" in r for r in missing.reasons)
    long = qc.lot_verdict(spec, [rep("a", 0.01, filament_lifetime_s=0.3), rep("b", 0.01, filament_lifetime_s=0.25)])
    assert long.verdict == "fail"
    assert long.stats["filament_lifetime_s"].mean == pytest.approx(0.275)


def test_guard_band_reviews_a_lot_whose_interval_straddles_a_limit_that_the_simple_rule_passes():
    # mean 0.0113 s inside [0.008, 0.012]; t-interval (2 dof, t = 4.303): 0.0113 ± 0.00123 s
    reps = [rep("a", 0.0105), rep("b", 0.0113), rep("c", 0.0121 - 0.0000)]
    lam = qc.quantity_stats([0.0105, 0.0113, 0.0121])
    assert lam.ci95[0] < 0.012 < lam.ci95[1]
    simple = qc.lot_verdict(SPEC, [rep("a", 0.0105), rep("b", 0.0113), rep("c", 0.0119)])
    assert simple.verdict == "pass"
    guarded = qc.lot_verdict(GUARDED, [rep("a", 0.0105), rep("b", 0.0113), rep("c", 0.0119)])
    assert guarded.verdict == "review"
    assert any("straddles the maximum 0.012 s" in r for r in guarded.reasons), guarded.reasons
    assert qc.lot_verdict(GUARDED, reps).verdict == "review"


def test_guard_band_fails_only_an_interval_wholly_outside_and_passes_one_wholly_inside():
    out = qc.lot_verdict(GUARDED, [rep("a", 0.0130), rep("b", 0.0131), rep("c", 0.0132)])
    assert out.verdict == "fail"
    assert any("wholly above the maximum 0.012 s" in r for r in out.reasons), out.reasons
    inside = qc.lot_verdict(GUARDED, [rep("a", 0.0099), rep("b", 0.0100), rep("c", 0.0101)])
    assert inside.verdict == "pass" and inside.reasons == ()
    # a mean outside whose interval still reaches inside: review, not fail
    near = qc.lot_verdict(GUARDED, [rep("a", 0.0115), rep("b", 0.0125), rep("c", 0.0130)])
    assert near.stats["relaxation_time_s"].mean > 0.012 and near.verdict == "review"


def test_guard_band_cannot_judge_a_single_replicate():
    one = qc.Spec(name="o", relaxation_time_s=(0.008, 0.012), replicates=1)
    verdict = qc.lot_verdict(one, [rep("a", 0.010)])
    assert verdict.verdict == "review"
    assert any("single valid replicate gives no 95 % interval" in r for r in verdict.reasons)


def test_decision_rule_is_read_from_the_specification_and_checked():
    text = SPEC_TOML.replace('name = "open-ended"', 'name = "open-ended"\ndecision_rule = "simple"')
    ink, open_ended = qc.parse_specs(text)
    assert ink.decision_rule == "guard-band" and open_ended.decision_rule == "simple"
    with pytest.raises(qc.SpecError, match="decision_rule must be one of"):
        qc.parse_specs(SPEC_TOML.replace('max_cv = 0.10', 'max_cv = 0.10\ndecision_rule = "lenient"'))


def test_no_specification_means_review():
    verdict = qc.lot_verdict(None, [rep("a", 0.01)], product="mystery")
    assert verdict.verdict == "review"
    assert verdict.reasons == ("no specification loaded for product 'mystery'",)


def test_no_valid_replicate_gives_no_mean_and_review():
    verdict = qc.lot_verdict(SPEC, [rep("a", None, status="failed", reason="unreadable")])
    assert verdict.verdict == "review" and verdict.stats["relaxation_time_s"].mean is None
    assert verdict.reasons[0] == "0 valid replicates of 3 required"


# ---------------------------------------------------------------------------------------------- run rules
@pytest.mark.parametrize("values, expected", [
    ([0, 0, 3.5], {"beyond-3-sigma"}),
    ([0, 0, -3.5], {"beyond-3-sigma"}),
    ([0, 0, 3.0], set()),                      # on the limit is not beyond it
    ([0, 2.5, 2.5], {"2-of-3-beyond-2-sigma"}),
    ([2.5, 0, 2.5], {"2-of-3-beyond-2-sigma"}),
    ([-2.5, 0, 2.5], set()),                   # opposite sides
    ([2.5, 2.5, 0], set()),                    # the lot itself is not part of the pattern
    ([1.5, 1.5, 0, 1.5, 1.5], {"4-of-5-beyond-1-sigma"}),
    ([1.5, 0, 0, 1.5, 1.5], set()),
    ([0.5] * 8, {"8-on-one-side"}),
    ([-0.5] + [0.5] * 7, set()),
    ([-0.1, -0.2, -0.3, -0.4, -0.5, -0.6], {"6-trending"}),
    ([0.1, 0.2, 0.3, 0.4, 0.5, 0.5], set()),   # a tie breaks the trend
    ([0.2, 0.3, 0.4, 0.5, 0.6], set()),        # five are not six
])
def test_run_rules_by_hand(values, expected):
    # Western Electric (1956) zone rules and Nelson (1984) test 3, with centre 0 and sigma 1
    assert set(qc.run_rule_flags(values, 0.0, 1.0)) == expected


def test_rule_names_are_documented():
    assert set(qc.CHART_RULES) == {"beyond-3-sigma", "2-of-3-beyond-2-sigma", "4-of-5-beyond-1-sigma",
                                   "8-on-one-side", "6-trending", "moving-range-above-limit"}


# ---------------------------------------------------------------------------------------------- charts
def test_control_limits_come_from_at_least_five_earlier_lots_only():
    values = [10.0, 11.0, 10.0, 11.0, 10.0, 100.0]
    points = qc.control_chart([(f"L{i}", v) for i, v in enumerate(values)])
    assert all(p.centre is None and p.flags == () for p in points[:5])
    last = points[5]
    # hand-computed: centre = 52/5, mean moving range = 1, sigma = 1/d2 with d2 = 1.128 (Montgomery, n = 2)
    assert last.centre == pytest.approx(10.4)
    assert last.sigma == pytest.approx(1 / 1.128)
    assert last.ucl == pytest.approx(10.4 + 3 / 1.128)
    assert last.mr_ucl == pytest.approx(3.267)  # D4 = 3.267 for n = 2 (Montgomery)
    assert last.n_baseline == 5
    assert {"beyond-3-sigma", "moving-range-above-limit"} <= set(last.flags)


def test_each_lot_is_judged_against_the_lots_before_it():
    rng = np.random.default_rng(3)
    values = list(rng.normal(0.010, 0.0003, size=15))
    points = qc.control_chart([(i, v) for i, v in enumerate(values)])
    for i, point in enumerate(points[5:], start=5):
        earlier = values[:i]
        assert point.centre == pytest.approx(statistics.fmean(earlier), rel=1e-12)
        mr = statistics.fmean(abs(b - a) for a, b in zip(earlier, earlier[1:]))
        assert point.sigma == pytest.approx(mr / 1.128, rel=1e-12)
        assert point.moving_range == pytest.approx(abs(values[i] - values[i - 1]))


def test_a_drifting_product_gets_trend_and_shift_flags_while_a_steady_one_does_not():
    steady = [0.010, 0.0102, 0.0099, 0.0101, 0.0100, 0.0098, 0.0101, 0.0100]
    assert all(p.flags == () for p in qc.control_chart(list(enumerate(steady))))
    drifting = steady[:5] + [0.0103, 0.0106, 0.0109, 0.0112, 0.0115, 0.0118]
    flags = qc.control_chart(list(enumerate(drifting)))[-1].flags
    assert "6-trending" in flags and "beyond-3-sigma" in flags


def test_a_binary_specifications_file_is_one_sentence_and_exit_2(tmp_path):
    import subprocess
    import sys

    specs = tmp_path / "specs.toml"
    specs.write_bytes(bytes(range(256)) * 3)
    proc = subprocess.run([sys.executable, "-m", "thinning.cli", "records", "load-specs", str(specs),
                           "--db", f"sqlite:///{tmp_path / 'r.db'}"], capture_output=True, text=True)
    assert proc.returncode == 2 and "not UTF-8 text" in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1


# ---------------------------------------------------------------------------------------------- baselines
STEADY = [0.0100, 0.0102, 0.0099, 0.0101, 0.0100, 0.0098]


def _limits(point):
    return point.centre, point.sigma, point.mr_mean, point.mr_ucl


def test_a_failed_flagged_lot_leaves_the_baseline_of_the_lots_after_it():
    # six steady lots, L6 far above them (it fails its specification and breaks the 3-sigma rule),
    # then L7: its limits are those computed as if L6 had never been made (Montgomery, phase I)
    values = STEADY + [0.0125, 0.0101]
    lots = [(f"L{i}", v) for i, v in enumerate(values)]
    verdicts = {key: "pass" for key, _ in lots} | {"L6": "fail"}
    points = qc.control_chart(lots, verdicts=verdicts)
    assert "beyond-3-sigma" in points[6].flags
    without = qc.control_chart([lot for lot in lots if lot[0] != "L6"])
    assert _limits(points[7]) == _limits(without[6])
    assert points[7].centre == pytest.approx(statistics.fmean(STEADY), rel=1e-12)
    assert points[7].baseline == tuple(f"L{i}" for i in range(6)) and points[7].n_baseline == 6
    assert points[7].left_out == (("L6", "verdict fail; chart flags beyond-3-sigma, moving-range-above-limit"),)
    assert points[7].baseline_name is None
    # the lot's own moving range is still its change from the lot charted before it
    assert points[7].moving_range == pytest.approx(0.0125 - 0.0101)
    # with every earlier lot in the baseline (the old rule) L6 would have pulled the centre up
    assert qc.control_chart(lots, verdicts=verdicts)[7].centre < statistics.fmean(values[:7])


def test_a_lot_in_review_or_flagged_alone_stays_out_and_a_product_without_spec_keeps_its_chart():
    values = STEADY + [0.0101, 0.0100]
    lots = [(f"L{i}", v) for i, v in enumerate(values)]
    points = qc.control_chart(lots, verdicts={key: "pass" for key, _ in lots} | {"L2": "review"})
    assert points[-1].baseline == ("L0", "L1", "L3", "L4", "L5", "L6")
    assert points[-1].left_out == (("L2", "verdict review"),)
    # no verdicts (a product without a specification, whose lots cannot pass): flags alone decide
    assert qc.control_chart(lots)[-1].baseline == tuple(f"L{i}" for i in range(7))


def test_an_excluded_lot_changes_the_limits_and_says_why():
    values = STEADY + [0.0104, 0.0100]
    lots = [(f"L{i}", v) for i, v in enumerate(values)]
    plain = qc.control_chart(lots)
    excluded = qc.control_chart(lots, excluded={"L3": "pump seal replaced mid-lot"})
    assert _limits(excluded[-1]) != _limits(plain[-1])
    assert _limits(excluded[-1]) == _limits(qc.control_chart([lot for lot in lots if lot[0] != "L3"])[-1])
    assert excluded[-1].left_out == (("L3", "excluded: pump seal replaced mid-lot"),)
    # five lots are still needed: with L3 out, L5 has only four before it
    assert excluded[5].centre is None and excluded[5].n_baseline == 4


def test_a_phase_one_baseline_fixes_the_limits_for_the_lots_after_it():
    values = STEADY + [0.0125, 0.0101, 0.0103]
    lots = [(f"L{i}", v) for i, v in enumerate(values)]
    named = ["L0", "L1", "L2", "L3", "L4"]
    points = qc.control_chart(lots, verdicts={k: "fail" for k, _ in lots}, phase_one=("Q1 2026", named))
    fixed = qc.control_limits(values[:5])
    # phase II: every lot after the baseline is judged against the same limits, whatever the verdicts
    assert all(_limits(p) == fixed for p in points[5:])
    assert all(p.baseline == tuple(named) and p.baseline_name == "Q1 2026" for p in points[5:])
    assert points[-1].left_out == (("L5", "not in the baseline 'Q1 2026'"), ("L6", "not in the baseline 'Q1 2026'"),
                                   ("L7", "not in the baseline 'Q1 2026'"))
    # a baseline lot itself is judged only against the baseline lots before it (never itself)
    assert points[4].centre is None and points[4].n_baseline == 4


BASELINE_TOML = SPEC_TOML.replace('max_cv = 0.10\n', 'max_cv = 0.10\n\n[product.baseline]\nname = "phase I"\n'
                                  'lots = ["A1", "A2"]\n', 1)


def test_a_phase_one_baseline_is_read_from_the_specification_file():
    ink, open_ended = qc.parse_specs(BASELINE_TOML)
    assert ink.baseline == qc.Baseline(name="phase I", lots=("A1", "A2")) and open_ended.baseline is None
    assert ink.baseline.covers("A2", None) and not ink.baseline.covers("A3", "2026-01-01")
    table = '[product.baseline]\nname = "Q1"\nfrom = 2026-01-01\nto = "2026-03-31"\n'
    dated = qc.parse_specs(SPEC_TOML.replace('max_cv = 0.10\n', f'max_cv = 0.10\n{table}', 1))[0]
    assert dated.baseline == qc.Baseline(name="Q1", made_from="2026-01-01", made_to="2026-03-31")
    assert dated.baseline.covers("X", "2026-03-31") and not dated.baseline.covers("X", "2026-04-01")
    assert not dated.baseline.covers("X", None)
    assert dated.baseline.described() == "lots made 2026-01-01 to 2026-03-31"
    assert qc.baseline_from_mapping("p", dated.baseline.as_mapping()) == dated.baseline
    assert qc.baseline_from_mapping("p", ink.baseline.as_mapping()) == ink.baseline


@pytest.mark.parametrize("table, words", [
    ('lots = ["A1"]', "needs a name"),
    ('name = "b"', "needs lots"),
    ('name = "b"\nlots = ["A1"]\nfrom = 2026-01-01', "not both"),
    ('name = "b"\nlots = []', "list of lot ids"),
    ('name = "b"\nlots = ["A1", "A1"]', "twice"),
    ('name = "b"\nfrom = "January"', "must be a date"),
    ('name = "b"\nfrom = 2026-02-01\nto = 2026-01-01', "is after"),
    ('name = "b"\nlot = ["A1"]', "unknown baseline key 'lot'"),
])
def test_bad_baselines_are_one_sentence_errors(table, words):
    text = SPEC_TOML.replace('max_cv = 0.10\n', f'max_cv = 0.10\n[product.baseline]\n{table}\n', 1)
    with pytest.raises(qc.SpecError) as caught:
        qc.parse_specs(text)
    assert words in str(caught.value) and "\n" not in str(caught.value)


def _summary_inputs(values, *, made_on=None, verdict_of=None):
    rows, measurements, failures = [], {}, {}
    for i, v in enumerate(values):
        key = ("ink", f"L{i}")
        rows.append({"product": "ink", "lot": f"L{i}", "made_on": (made_on or {}).get(i, f"2026-01-{i + 1:02d}"),
                     "first_analysed_at": "2026-02-01T00:00:00Z"})
        measurements[key] = [{"sample": "S", "replicate": str(r), "sha256": f"{i}{r}", "status": "ok",
                              "quality": "good", "relaxation_time_s": v, "filament_lifetime_s": None,
                              "extensional_viscosity_max_Pa_s": None} for r in range(3)]
        failures[key] = []
    return rows, measurements, failures


def test_lot_summaries_use_the_specification_baseline_and_the_exclusions():
    values = STEADY + [0.0125, 0.0101]
    rows, measurements, failures = _summary_inputs(values)
    spec = qc.Spec(name="ink", relaxation_time_s=(0.008, 0.012))
    default = qc.lot_summaries(rows, measurements, failures, {"ink": spec})
    assert default[6].verdict.verdict == "fail" and default[7].chart.baseline == tuple(f"L{i}" for i in range(6))
    dated = qc.Spec(name="ink", relaxation_time_s=(0.008, 0.012),
                    baseline=qc.Baseline(name="Jan", made_from="2026-01-02", made_to="2026-01-07"))
    by_date = qc.lot_summaries(rows, measurements, failures, {"ink": dated})
    # L6 (made 2026-01-07, failed) is in the named range: a named baseline takes its lots as named
    assert by_date[7].chart.baseline == ("L1", "L2", "L3", "L4", "L5", "L6")
    assert by_date[7].chart.left_out == (("L0", "not in the baseline 'Jan'"),)
    excluded = qc.lot_summaries(rows, measurements, failures, {"ink": dated}, {("ink", "L6"): "seal"})
    assert excluded[7].chart.baseline == ("L1", "L2", "L3", "L4", "L5")
    assert dict(excluded[7].chart.left_out)["L6"] == "excluded: seal"
    # the verdicts never move with the baseline
    assert [s.verdict for s in default] == [s.verdict for s in by_date] == [s.verdict for s in excluded]
