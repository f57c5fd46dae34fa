"""Quantities with units: the contract's examples, dimension checks, options."""

import math

import pytest

from thinning.units import (AnalysisOptions, BadQuantity, check_required, options_from_text,
                            parse_quantity, parse_roi)


@pytest.mark.parametrize("name, text, expected", [
    # the contract's own examples (docs/contract.md, Conventions)
    ("pixel_size", "4.2um", 4.2e-6),
    ("pixel_size", "4.2 µm/px", 4.2e-6),
    ("surface_tension", "35mN/m", 0.035),
    ("surface_tension", "0.035 N/m", 0.035),
    ("solvent_viscosity", "1.2mPa*s", 1.2e-3),
    ("density", "998kg/m^3", 998.0),
    ("fps", "10000/s", 1e4),
    ("fps", "10kHz", 1e4),
    # bare numbers are read in the option's default unit
    ("fps", "2500", 2500.0),
    ("pixel_size", "8", 8e-6),
    ("reference_width", "3", 3e-3),
    ("surface_tension", "72", 0.072),
    ("zero_shear_viscosity", "5", 5e-3),
    ("reference_width", "0.25 in", 6.35e-3),
])
def test_contract_examples(name, text, expected):
    assert math.isclose(parse_quantity(text, name), expected, rel_tol=1e-12)


@pytest.mark.parametrize("name, text", [
    ("pixel_size", "3 s"), ("fps", "4 mm"), ("surface_tension", "5 m"), ("density", "abc"),
    ("fps", "-5"), ("fps", "0"), ("fps", "nan"), ("pixel_size", ""), ("density", "1e999"),
])
def test_nonsense_is_one_sentence(name, text):
    with pytest.raises(BadQuantity) as info:
        parse_quantity(text, name)
    message = str(info.value)
    assert "\n" not in message and message.endswith(".")


@pytest.mark.parametrize("name, text, words", [
    # decimal commas are refused, never read as thousands separators (issue: 2,5kHz ran at 25 kHz)
    ("fps", "2,5kHz", "comma"), ("pixel_size", "25,4um", "comma"),
    ("surface_tension", "41,5mN/m", "comma"), ("fps", "1,000", "comma"),
    # dimensionless units where they make no sense, and per-pixel units outside the image scale
    ("pixel_size", "25%", "number and a unit"), ("pixel_size", "25um%", "number and a unit"),
    ("pixel_size", "25 um*rad", "dimensionless"), ("reference_width", "3 mm*deg", "dimensionless"),
    ("surface_tension", "41 mN/m/px", "per pixel"),
    # outside the plausible range of this experiment (units.BOUNDS, with reasons)
    ("pixel_size", "1e300m", "plausible range"), ("surface_tension", "1e308N/m", "plausible range"),
    ("reference_width", "1e30m", "plausible range"), ("fps", "1e300", "plausible range"),
    ("pixel_size", "0.025", "Give the unit"), ("density", "1", "plausible range"),
    ("solvent_viscosity", "1e12 Pa*s", "plausible range"),
])
def test_mistyped_values_are_refused_with_the_reason(name, text, words):
    with pytest.raises(BadQuantity) as info:
        parse_quantity(text, name)
    message = str(info.value)
    assert words in message and "\n" not in message and message.endswith(".")


@pytest.mark.parametrize("name, text, expected", [
    ("fps", "10 kfps", 1e4), ("fps", "500fps", 500.0), ("pixel_size", "4.2 um/pixel", 4.2e-6),
    ("fps", "20/s", 20.0), ("pixel_size", "0.1um", 1e-7), ("surface_tension", "485mN/m", 0.485),
])
def test_plausible_values_near_the_edges_pass(name, text, expected):
    assert math.isclose(parse_quantity(text, name), expected, rel_tol=1e-12)


def test_plausible_ranges_read_in_the_default_unit():
    from thinning.units import plausible_range
    assert plausible_range("pixel_size") == "0.1–1000 µm"
    assert plausible_range("fps") == "0.1–5×10⁷ 1/s"


def test_roi():
    assert parse_roi("10,0,200,256") == (10, 0, 200, 256)
    for bad in ("10,0,5,256", "1,2,3", "a,b,c,d", "-1,0,5,5"):
        with pytest.raises(BadQuantity):
            parse_roi(bad)


def test_options_and_required():
    opts = options_from_text({"fps": "5kHz", "pixel_size": "", "reference_width": "3mm",
                              "surface_tension": "40", "geometry": "dripping", "roi": None})
    assert opts == AnalysisOptions(fps_hz=5000.0, reference_width_m=3e-3,
                                   surface_tension_N_m=0.04, geometry="dripping")
    check_required(opts)
    with pytest.raises(BadQuantity, match="frame rate"):
        check_required(AnalysisOptions(pixel_size_m=1e-5, surface_tension_N_m=0.04))
    with pytest.raises(BadQuantity, match="surface tension"):
        check_required(AnalysisOptions(fps_hz=1e3, pixel_size_m=1e-5))
    with pytest.raises(BadQuantity, match="scale"):
        check_required(AnalysisOptions(fps_hz=1e3, surface_tension_N_m=0.04))
    with pytest.raises(BadQuantity, match="geometry"):
        options_from_text({"geometry": "cup"})


def test_every_option_has_one_field_of_the_analysis_options():
    from dataclasses import fields

    from thinning.units import OPTION_FIELDS, AnalysisOptions

    assert set(OPTION_FIELDS.values()) == {f.name for f in fields(AnalysisOptions)}


def test_readme_lists_every_plausible_range_with_its_reason():
    from pathlib import Path

    from thinning.units import BOUNDS, QUANTITIES, plausible_range
    readme = Path(__file__).resolve().parents[1].joinpath("README.md").read_text(encoding="utf-8")
    for name in QUANTITIES:
        row = f"| `--{name.replace('_', '-')}` | {plausible_range(name)} | {BOUNDS[name][2]} |"
        assert row in readme, row
