"""Shared pytest set-up: the service fixtures (PostgreSQL, Chromium) from tests/services.py, and
rendered recordings for the checks that hold the compiled and the numpy path equal."""

import os

import pytest

os.environ.setdefault("MPLBACKEND", "Agg")

pytest_plugins = ["services"]


@pytest.fixture(params=[
    {},
    {"blur_sigma_px": 2.0, "dust_specks": 20, "streak_strength": 0.8, "bit_depth": 12},
    {"orientation": "horizontal", "tilt_deg": 3.0, "background_level": 0.99, "flicker": 0.08},
], ids=["plain", "12-bit-dust-streak", "horizontal-clipping"])
def beaded_recording(request):
    """The frames of a rendered beaded thread to breakup, under three sets of optics; skips where
    the compiled row pass was not built (these recordings compare it with the numpy path)."""
    from thinning import synth
    from thinning.measure import compiled

    if not compiled.COMPILED:
        pytest.skip("the compiled row pass was not built in this install")
    scene = synth.dilute_polymer_plates(fps_hz=1000.0, frame_size_px=(200, 160),
                                        pixel_size_m=25e-6, beads=True)
    frames, _ = synth.render_recording(scene, synth.Optics(**request.param), seed=3)
    return list(frames)


def pytest_collection_modifyitems(items):
    """Tests that start a service (PostgreSQL, Chromium) are slow: the fast subset leaves them out."""
    for item in items:
        if "postgresql" in item.name or item.get_closest_marker("chromium") or item.get_closest_marker("postgres"):
            item.add_marker(pytest.mark.slow)
