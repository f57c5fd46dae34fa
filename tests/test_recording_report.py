"""The one-page HTML report of one recording."""

from __future__ import annotations

import base64
import re

import numpy as np
import pytest

from thinning.report import recording
from thinning.result import Result
from thinning.report.recording import write_recording_report

EVIL = "<script>alert('x')</script>"


def _png(path, rng):
    """A small real PNG (random pixels) written with matplotlib."""
    import matplotlib.image

    matplotlib.image.imsave(path, rng.random((8, 8)), metadata={"Software": None})
    return path


@pytest.fixture
def figures(tmp_path):
    rng = np.random.default_rng(7)
    fig_dir = tmp_path / "figs"
    fig_dir.mkdir()
    return {name: _png(fig_dir / f"{name}.png", rng)
            for name in ("diameter", "strain_rate", "extensional_viscosity", "frames")}


def _result(**changes):
    result = {
        "schema": "thinning.result/1", "tool_version": "0.1.0",
        "source": {"path": f"/lab/{EVIL}.avi", "sha256": "0123456789abcdef" * 4, "n_frames": 400,
                   "width_px": 256, "height_px": 512, "bit_depth": 8},
        "fps_hz": 10000.0, "pixel_size_m": 4.2e-6,
        "options": {"fps_hz": 10000.0, "pixel_size_m": 4.2e-6, "reference_width_m": None,
                    "surface_tension_N_m": 0.035, "density_kg_m3": None,
                    "solvent_viscosity_Pa_s": None, "zero_shear_viscosity_Pa_s": None,
                    "geometry": "plates", "roi_px": None},
        "regime": "elasto-capillary",
        "regimes": [{"kind": "visco-capillary", "t_start_s": 0.0, "t_end_s": 0.002},
                    {"kind": "elasto-capillary", "t_start_s": 0.003, "t_end_s": 0.03}],
        "relaxation_time_s": 0.0052, "relaxation_time_ci95_s": [0.005, 0.0054],
        "fit_window_s": [0.004, 0.028], "fit_window_frames": 241,
        "free_thinning_start_s": 0.001, "initial_diameter_m": 4.5e-4,
        "elastic_modulus_Pa": 12.5, "shear_viscosity_Pa_s": None,
        "extensional_viscosity_max_Pa_s": 84.2, "extensional_viscosity_terminal_Pa_s": None,
        "breakup_time_s": 0.0831, "filament_lifetime_s": 0.0821,
        "findings": [{"code": "beads", "severity": "note", "t_range_s": None,
                      "message": "Beads form on the thread after 25 ms."}],
    }
    result.update(changes)
    return Result.from_json(result)


def _visible(html):
    """The page without its embedded images (base64 may spell anything)."""
    return re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "data:…", html)


def test_report_is_written_with_the_numbers(tmp_path, figures):
    path = write_recording_report(tmp_path / "out", _result(), figures, name=EVIL)
    assert path == tmp_path / "out" / "report.html"
    html = _visible(path.read_text(encoding="utf-8"))
    # the house style (thinning.display): λ to its interval's precision (half-width 0.20 ms), the
    # other values to three figures, every time in ms, a window's ends at one decimal place
    for text in ("5.20 ms", "5.00–5.40 ms", "12.5 Pa", "84.2 Pa·s", "83.1 ms", "82.1 ms", "450 µm",
                 "4.0–28.0 ms (241 frames)", "35 mN/m", "4.2 µm", "10000 frames/s", "0.1.0",
                 "0123456789abcdef" * 4, "elasto-capillary", "Beads form on the thread after 25 ms."):
        assert text in html, text
    for caution in ("reference fluid", "hazardous liquids", "quality decisions"):
        assert caution in html
    assert sorted(p.name for p in path.parent.iterdir()) == ["report.html"]  # no temp left


def test_user_names_are_escaped(tmp_path, figures):
    html = write_recording_report(tmp_path, _result(), figures,
                                  details={"lot": EVIL, "product": "ink & co"}).read_text("utf-8")
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(&#39;x&#39;)&lt;/script&gt;" in html
    assert "ink &amp; co" in html


def test_no_external_resource_and_figures_embedded(tmp_path, figures):
    html = write_recording_report(tmp_path, _result(), figures).read_text("utf-8")
    for forbidden in ("http://", "https://", "<link", "<script", "url(", "@import", "href="):
        assert forbidden not in html.lower(), forbidden
    sources = re.findall(r'src="([^"]*)"', html)
    assert len(sources) == 4
    assert all(s.startswith("data:image/png;base64,") for s in sources)
    embedded = base64.b64decode(sources[0].split(",", 1)[1])
    assert embedded == figures["diameter"].read_bytes()  # diameter comes first


def test_newtonian_result_shows_dashes_with_reasons_not_nan(tmp_path, figures):
    result = _result(regime="visco-capillary", relaxation_time_s=None, relaxation_time_ci95_s=None,
                     elastic_modulus_Pa=None, shear_viscosity_Pa_s=0.48, breakup_time_s=None,
                     filament_lifetime_s=None, extensional_viscosity_max_Pa_s=float("nan"),
                     fit_window_s=[0.001, 0.01], fit_window_frames=91)
    html = _visible(write_recording_report(tmp_path, result, figures).read_text("utf-8"))
    assert "— (no elasto-capillary fit in this record)" in html
    assert "— (the filament did not break within the record)" in html
    assert "— (none resolved above the resolution floor)" in html  # NaN shown as missing
    assert "480 mPa·s" in html
    text = re.sub(r"<[^>]*>", " ", re.sub(r"<style>.*?</style>", "", html, flags=re.DOTALL))
    assert not re.search(r"\b(nan|null|inf|infinity)\b", text, flags=re.IGNORECASE)
    assert not re.search(r"\bNone\b", text)


def test_doubtful_quality_reasons_are_prominent(tmp_path, figures):
    reason = "Only 6 frames in the fit window."
    result = _result(findings=[{"code": "few-frames-in-window", "severity": "doubtful",
                                "message": reason, "t_range_s": None}])
    html = write_recording_report(tmp_path, result, figures).read_text("utf-8")
    alert = re.search(r'<div class="alert".*?</div>', html, flags=re.DOTALL)
    assert alert and reason in alert.group(0)
    assert html.index(reason) < html.index("Headline numbers")  # before the numbers
    good = write_recording_report(tmp_path / "g", _result(), figures).read_text("utf-8")
    assert 'class="alert"' not in good


def test_report_is_byte_identical_on_repeat(tmp_path, figures):
    a = write_recording_report(tmp_path / "a", _result(), figures).read_bytes()
    b = write_recording_report(tmp_path / "b", _result(), figures).read_bytes()
    assert a == b


def test_missing_figure_file_is_reported_not_fatal(tmp_path, figures):
    figures = dict(figures, frames=tmp_path / "gone.png")
    html = write_recording_report(tmp_path, _result(), figures).read_text("utf-8")
    assert "— (figure file not found)" in html


def test_name_falls_back_to_the_source_file_name():
    source = {"path": "/lab/run 7/lot-3_a.avi", "sha256": "0" * 64}
    assert recording.recording_name(_result(source=source)) == "lot-3_a.avi"
    assert recording.recording_name(_result(source={"path": "", "sha256": ""})) == "recording"


def test_one_time_unit_on_a_page_of_slow_liquid(tmp_path, figures):
    # a Boger-like record: the breakup comes after 12 s, so every time on the page is in s,
    # λ of 0.4 s included (thinning.display.time_unit)
    result = _result(relaxation_time_s=0.4, relaxation_time_ci95_s=[0.38, 0.42], breakup_time_s=12.3,
                     filament_lifetime_s=12.2, fit_window_s=[0.5, 4.0])
    html = _visible(write_recording_report(tmp_path, result, figures).read_text("utf-8"))
    for text in ("0.400 s", "0.380–0.420 s", "12.3 s", "12.2 s", "0.50–4.00 s (241 frames)"):
        assert text in html, text
    assert " ms<" not in html and "400 ms" not in html


def test_intervals_come_from_the_headline_fits(tmp_path, figures):
    from thinning.fits import Fit

    ec = Fit(model="elasto-capillary", values={"relaxation_time_s": 0.0052, "elastic_modulus_Pa": 12.5},
             ci95={"relaxation_time_s": (0.005, 0.0054), "elastic_modulus_Pa": (11.0, 14.0)},
             window_s=(0.004, 0.028), n_points=241, success=True).to_dict()
    fe = Fit(model="finite-extensibility", values={"terminal_extensional_viscosity_Pa_s": 99.0},
             ci95={"terminal_extensional_viscosity_Pa_s": (90.0, 110.0)}, window_s=(0.03, 0.08),
             n_points=20, success=True).to_dict()
    other = dict(ec, model="visco-capillary", values={"elastic_modulus_Pa": 50.0},
                 ci95={"elastic_modulus_Pa": [1.0, 2.0]})
    result = _result(fits={"visco-capillary": other, "elasto-capillary": ec, "finite-extensibility": fe},
                     extensional_viscosity_terminal_Pa_s=99.0)
    html = write_recording_report(tmp_path, result, figures).read_text("utf-8")
    assert "11.0–14.0 Pa" in html  # the half-width 1.5 Pa: two figures, one decimal place
    assert "90–110 Pa·s" in html and "99 Pa·s" in html  # half-width 10 Pa·s: no decimal place
    assert "1.0–2.0 Pa" not in html and "1–2 Pa" not in html  # another value's interval is never borrowed
