"""Smoke test of scripts/accuracy_probe.py: its core function on two short cases per renderer.

Checks the shape of what the probe reports, never the accuracy (that is the probe's job).
"""

import importlib.util
import json
from pathlib import Path

import pytest

_spec = importlib.util.spec_from_file_location(
    "accuracy_probe", Path(__file__).resolve().parent.parent / "scripts" / "accuracy_probe.py")
accuracy_probe = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(accuracy_probe)

#: Seeds of "regular" cases with short records in small frames, per renderer.
SMALL_SEEDS = {"synth": (10, 26), "raysynth": (22, 15)}


@pytest.mark.slow
@pytest.mark.parametrize("renderer", list(SMALL_SEEDS))
def test_probe_reports_every_case_and_a_summary(renderer, tmp_path):
    lines = []
    report = accuracy_probe.probe([renderer], ["regular"], SMALL_SEEDS[renderer], keep=tmp_path,
                                  echo=lines.append)
    assert len(lines) == 2 and len(report["cases"]) == 2
    assert report["targets"] == accuracy_probe.TARGETS
    for case, seed in zip(report["cases"], SMALL_SEEDS[renderer]):
        assert (case["renderer"], case["family"], case["seed"]) == (renderer, "regular", seed)
        assert case["status"] in ("ok", "unusable", "crash", "timeout", "render-error")
        assert case["format"] in accuracy_probe.FORMATS
        assert Path(case["path"]).exists() and accuracy_probe.load_truth(case["path"])["seed"] == seed
        if case["status"] == "ok":
            assert set(case["diameter"]) == {"n", "median_signed", "median_abs", "p95_abs", "missed"}
            assert len(case["true_px"]) == len(case["error_px"]) == case["diameter"]["n"]
            assert min(case["true_px"], default=3.0) >= accuracy_probe.MIN_TRUE_PX
            assert case["regime"]["truth"] in accuracy_probe.TRUE_REGIME.values()
            assert case["quality"] in ("good", "doubtful")
    (summary,) = report["summaries"]
    assert (summary["renderer"], summary["family"], summary["n"]) == (renderer, "regular", 2)
    assert [b["band_px"][0] for b in summary["bands"]] == [lo for lo, _ in accuracy_probe.BANDS]
    for key in ("median_of_median_abs_px", "median_of_p95_px", "lambda", "regime", "viscosity",
                "breakup", "free_start", "quality", "formats", "wall_s"):
        assert key in summary
    assert summary["regime"]["total"] == 2 and sum(summary["quality"].values()) == 2
    text = accuracy_probe.summary_text(summary)
    assert text.startswith(f"== {renderer} / regular: 2 recordings") and "target" in text
    json.dumps(accuracy_probe.json_plain(report), allow_nan=False)


def test_format_rotation_covers_what_each_bit_depth_allows():
    assert {accuracy_probe.file_format(i, 8) for i in range(6)} == set(accuracy_probe.FORMATS)
    deep = {accuracy_probe.file_format(i, 12) for i in range(4)}
    assert deep == set(accuracy_probe.DEEP_FORMATS) and not deep & {"avi-raw", "avi-mjpg"}
