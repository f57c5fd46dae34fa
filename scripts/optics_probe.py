"""Diameter accuracy under optics that thinning.synth does not model, on frames from another renderer.

The frames come from ``tests/test_edges.render`` (analytic pixel coverage of a liquid bridge
between two plates, Gaussian blur, noise): independent of ``thinning.synth``. Each case thins
the neck from 30 to 3 px over 60 frames, changes the frames (crop, light, compression, clipping,
fringes …) and prints the median and 95th percentile of |measured − true| and the finding codes.

    python scripts/optics_probe.py
"""

import importlib.util
from pathlib import Path

import cv2
import numpy as np
from scipy.ndimage import binary_dilation, gaussian_filter, uniform_filter

from thinning.measure import measure_recording

_spec = importlib.util.spec_from_file_location(
    "_edge_frames", Path(__file__).resolve().parent.parent / "tests" / "test_edges.py")
_module = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(_module)
render = _module.render

NECKS = np.linspace(30.0, 3.0, 60)


def probe(change=lambda frame, i: frame, **render_options):
    frames = [np.ascontiguousarray(change(render(neck=d, seed=i, **render_options), i))
              for i, d in enumerate(NECKS)]
    series = measure_recording(frames, n_frames=len(frames))
    err = np.abs(series.table["diameter_px"].to_numpy() - NECKS)
    err = err[np.isfinite(err)]
    codes = sorted({f.code for f in series.findings} - {"contrast-loss"})
    if not err.size:
        return f"nothing measured {codes}"
    return (f"median {np.median(err):.3f} px  p95 {np.percentile(err, 95):.3f} px  "
            f"frames {err.size}/{NECKS.size}  {codes}")


def scaled(gain):
    return lambda f, i: np.clip(f * gain, 0, 255).astype(np.uint8)


def overlay(f, i):  # a camera's burned-in time stamp
    g = f.copy()
    g[2:18, 2:90] = 0
    cv2.putText(g, f"t={i * 0.1:.1f}ms", (4, 15), cv2.FONT_HERSHEY_SIMPLEX, 0.45, 255, 1)
    return g


def vignette(f, i):
    h, w = f.shape
    y, x = np.mgrid[:h, :w]
    return np.clip(f * (1 - 0.35 * (((x - w / 2) / (w / 2)) ** 2 + ((y - h / 2) / (h / 2)) ** 2)),
                   0, 255).astype(np.uint8)


def jpeg(quality):
    def change(f, i):
        return cv2.imdecode(cv2.imencode(".jpg", f, [cv2.IMWRITE_JPEG_QUALITY, quality])[1],
                            cv2.IMREAD_GRAYSCALE)
    return change


def fringe(f, i):  # a bright fringe just outside the shadow, +8 % of the light
    x = f.astype(float)
    dark = x < 100
    ring = binary_dilation(dark, iterations=3) & ~binary_dilation(dark, iterations=1)
    return np.clip(x + gaussian_filter(ring.astype(float), 0.8) * 16, 0, 255).round().astype(np.uint8)


def rotated(deg):
    def change(f, i):
        h, w = f.shape
        matrix = cv2.getRotationMatrix2D((w / 2, h / 2), deg, 1.0)
        return cv2.warpAffine(f, matrix, (w, h), flags=cv2.INTER_LINEAR,
                              borderMode=cv2.BORDER_REPLICATE)
    return change


CASES = [
    ("as rendered", {}),
    ("grey shadow (50 % of the light)",
     {"change": lambda f, i: np.clip(200 - (200 - f.astype(float)) * 0.5 / 0.95, 0, 255).astype(np.uint8)}),
    ("time stamp box in a corner", {"change": overlay}),
    ("vignetting 35 %", {"change": vignette}),
    ("noise 5 % of the light",
     {"change": lambda f, i: np.clip(f + np.random.default_rng(i).normal(0, 10, f.shape), 0, 255).astype(np.uint8)}),
    ("JPEG quality 50", {"change": jpeg(50)}),
    ("box blur 3 px", {"change": lambda f, i: uniform_filter(f.astype(float), 3).round().astype(np.uint8)}),
    ("underexposed (light at 50 grey levels)", {"change": scaled(0.25)}),
    ("10 % flicker", {"change": lambda f, i: np.clip(f * (1 + 0.1 * np.sin(i)), 0, 255).astype(np.uint8)}),
    ("whole frame rotated 6°", {"change": rotated(6)}),
    ("plates cut by the left side", {"change": lambda f, i: f[:, 35:]}),
    ("plates cut by the right side", {"change": lambda f, i: f[:, :125]}),
    ("only the top plate in view", {"change": lambda f, i: f[:170]}),
    ("no plate in view", {"change": lambda f, i: f[40:160]}),
    ("light just under the maximum (1.25×)", {"change": scaled(1.25)}),
    ("light at the maximum, noise clips (1.275×)", {"change": scaled(1.275), "noise": 0.02}),
    ("light above the maximum (1.3×)", {"change": scaled(1.3)}),
    ("light far above the maximum (1.6×)", {"change": scaled(1.6)}),
    ("light twice the maximum (2×)", {"change": scaled(2.0)}),
    ("bright edge fringe +8 %", {"change": fringe}),
]


if __name__ == "__main__":
    for name, options in CASES:
        options = {"noise": 0.005, **options}
        print(f"{name:44s} {probe(**options)}", flush=True)
