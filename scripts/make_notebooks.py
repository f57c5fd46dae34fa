"""Build the tutorial notebooks in ``notebooks/`` from the Python source below.

The cells live here as plain strings, so a review reads a normal diff and the
``.ipynb`` files can be regenerated at any time; they are written without
outputs and with fixed cell ids (the same source gives the same bytes).
``tests/test_notebooks.py`` executes them and checks that the committed files
are what this script writes.

Usage:

    python scripts/make_notebooks.py          # (re)write notebooks/*.ipynb
    python scripts/make_notebooks.py --check  # exit 1 when a committed notebook is stale
"""

from __future__ import annotations

import sys
from pathlib import Path

import nbformat

NOTEBOOK_DIR = Path(__file__).resolve().parent.parent / "notebooks"

#: Shared first code cell: where the sample recordings are and where outputs go.
SETUP = '''\
import os
import tempfile
from pathlib import Path

# The bundled demo recordings sit beside this folder: ../sample_videos
SAMPLES = Path.cwd().parent / "sample_videos"
if not (SAMPLES / "manifest.csv").is_file():  # opened from elsewhere: the copy beside the package
    from thinning.demo import find_sample_videos
    SAMPLES = find_sample_videos()
assert SAMPLES is not None, "sample_videos/ not found: run python scripts/make_sample_videos.py, or set SAMPLES"

# Everything this notebook writes goes into one fresh folder (never into the repository).
OUT = Path(os.environ.get("THINNING_NOTEBOOK_OUT") or tempfile.mkdtemp(prefix="thinning-notebook-"))
OUT.mkdir(parents=True, exist_ok=True)
print("recordings:", SAMPLES)
print("outputs:   ", OUT)'''

ONE_RECORDING = [
    ("md", '''\
# One recording, end to end

This notebook follows one high-speed recording of a capillary-thinning experiment through every
stage of `thinning`, with the public functions the `thinning analyse` command itself uses:

1. open the recording and look at a frame;
2. measure the **minimum neck diameter** of the liquid bridge in every frame (pixels);
3. convert to SI units with the **calibration** (frame rate, pixel size);
4. **characterise** the thinning: locate the regimes, fit the **relaxation time λ** with its 95 %
   interval, compute the **strain rate** and the **apparent extensional viscosity** η_E;
5. plot D(t), η_E against **Hencky strain** and the strain rate.

The recording is one of the bundled demo files (`sample_videos/`): an invented water-based inkjet
ink, product `harbour-cyan`, a liquid bridge stretched between two 3 mm plates and filmed at
2,500 frames/s. Running the whole notebook takes a few seconds.'''),
    ("code", SETUP),
    ("code", '''\
%matplotlib inline
import math

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from thinning.analysis import analyse, seed_from_sha256
from thinning.characterise import characterise
from thinning.frames import open_source
from thinning.neck import measure_recording, to_physical
from thinning.plots import (plot_diameter, plot_extensional_viscosity, plot_frame_strip,
                            plot_strain_rate)
from thinning.units import Calibration, options_from_text'''),
    ("md", '''\
## 1. The recording and its options

The manifest lists each recording with what the analysis needs to know: the camera's **recording**
frame rate (the rate stored in a video container is usually a playback rate), the object size of one
pixel, and the liquid's surface tension. `options_from_text` reads them with their units, exactly
as the command line does, and keeps SI values.'''),
    ("code", '''\
manifest = pd.read_csv(SAMPLES / "manifest.csv")
row = manifest.iloc[0]
options = options_from_text({"fps": row["fps"], "pixel_size": row["pixel_size"],
                             "surface_tension": row["surface_tension"]})
path = SAMPLES / row["path"]
print(f"{row['sample']}: {path.name}")
print(f"frame rate {options.fps_hz:g} /s, pixel size {options.pixel_size_m * 1e6:.3g} µm, "
      f"surface tension {options.surface_tension_N_m * 1e3:.3g} mN/m, geometry {options.geometry}")'''),
    ("code", '''\
recording = open_source(path)
print(f"{recording.n_frames} frames of {recording.shape[1]} × {recording.shape[0]} px, "
      f"{recording.bit_depth}-bit; the container claims {recording.fps} frames/s (a playback rate)")

first = next(iter(recording))
fig, ax = plt.subplots(figsize=(3, 3.3))
ax.imshow(first, cmap="gray")
ax.set_title("frame 0: the bridge between the plates")
ax.set_axis_off()'''),
    ("md", '''\
## 2. The neck in every frame

`measure_recording` streams the frames once (memory stays constant however long the recording):
it finds the layout (plates, axis, the band where the thread lives) in the first frame, then
locates both edges of the shadow with sub-pixel accuracy in every frame and keeps the narrowest
point, the **neck**. It also finds when the plates stop moving (the start of free thinning) and the
breakup frame. The findings are its own doubts, in plain sentences.'''),
    ("code", '''\
series = measure_recording(recording, geometry=options.geometry, n_frames=recording.n_frames)
recording.close()
if recording.broken_off:
    print(f"warning: the recording broke off after {recording.frames_read} frames")
print(f"free thinning starts at frame {series.free_thinning_start_frame:g}, "
      f"breakup at frame {series.breakup_frame}")
print(f"per-frame diameter noise ≈ {series.diameter_noise_px:.2f} px")
for finding in series.findings:
    print(f"[{finding.severity.value}] {finding.message}")
series.table[["frame", "diameter_px", "neck_position_px", "thread_connected", "plate_gap_px"]].iloc[::40]'''),
    ("code", '''\
plot_frame_strip(series.snapshots, orientation=series.layout.orientation, fps_hz=options.fps_hz)'''),
    ("md", '''\
Check the strip: the orange lines must sit on the edges of the shadow in every panel. If they cut
across a plate or miss the thread, give a region of interest (`roi=(x0, y0, x1, y1)`, the
`--roi` option).

## 3. Calibration: pixels and frames to metres and seconds

Every number that follows scales with these two values: λ with the frame rate, the diameters with
the pixel size, η_E with both. **Check the calibration regularly with a reference fluid** of known
relaxation time or viscosity, filmed with the same lens and camera settings; a wrong scale shifts
every lot alike, and no control chart will show it.'''),
    ("code", '''\
calibration = Calibration(fps_hz=options.fps_hz, pixel_size_m=options.pixel_size_m)
table = to_physical(series, calibration)
table[["frame", "time_s", "diameter_m", "thread_connected"]].iloc[::40]'''),
    ("md", '''\
## 4. Regimes, relaxation time and extensional viscosity

`characterise` ignores the frames before free thinning, locates the regimes of the thinning
(inertio-, visco- and elasto-capillary, finite extensibility) and fits each with its law. In the
**elasto-capillary** regime the diameter falls exponentially, D ∝ exp(−t / 3λ), which gives the
relaxation time λ; its 95 % interval comes from a bootstrap (seeded, so a rerun gives the same
interval; `thinning analyse` seeds it from the file's checksum, as here).

Frames thinner than the **resolution floor** (3 pixels by default) are left out of the fits: there
the shadow is blurred into a dip and the measured width is no longer the diameter.'''),
    ("code", '''\
free_start_s = series.free_thinning_start_frame / calibration.fps_hz
breakup_s = None if series.breakup_frame is None else series.breakup_frame / calibration.fps_hz
rheo = characterise(
    table["time_s"].to_numpy(), table["diameter_m"].to_numpy(),
    surface_tension=options.surface_tension_N_m, pixel_size_m=calibration.pixel_size_m,
    fps_hz=calibration.fps_hz, free_thinning_start_s=free_start_s, breakup_time_s=breakup_s,
    geometry=options.geometry, seed=seed_from_sha256(recording.sha256),
    diameter_noise_m=series.diameter_noise_px * calibration.pixel_size_m)

regimes = pd.DataFrame([{"regime": r.kind, "from (ms)": r.t_start_s * 1e3, "to (ms)": r.t_end_s * 1e3,
                         "frames": r.n_frames, "D start (µm)": r.diameter_start_m * 1e6,
                         "D end (µm)": r.diameter_end_m * 1e6, "ends at floor": r.cut_by_floor}
                        for r in rheo.regimes])
print(f"headline regime: {rheo.regime}; resolution floor {rheo.resolution_floor_m * 1e6:.3g} µm")
regimes'''),
    ("code", '''\
lam = rheo.relaxation_time_s
if lam is None:
    print("relaxation time: none (no elasto-capillary stretch located)")
else:
    low, high = rheo.relaxation_time_ci95_s
    print(f"relaxation time λ = {lam * 1e3:.4g} ms (95 % interval {low * 1e3:.4g}–{high * 1e3:.4g} ms), "
          f"fitted on {rheo.fit_window_frames} frames from {rheo.fit_window_s[0] * 1e3:.4g} to "
          f"{rheo.fit_window_s[1] * 1e3:.4g} ms")
print(f"elastic modulus G = {rheo.elastic_modulus_Pa:.3g} Pa" if rheo.elastic_modulus_Pa else "")
print(f"apparent extensional viscosity max η_E = {rheo.extensional_viscosity_max_Pa_s:.3g} Pa·s")
print(f"breakup at {rheo.breakup_time_s * 1e3:.4g} ms, filament lifetime {rheo.filament_lifetime_s * 1e3:.4g} ms")
for finding in rheo.findings:
    print(f"[{finding.severity.value}] {finding.message}")'''),
    ("md", '''\
What to check before trusting λ:

- **frames in the window**: the fit needs at least 10 frames inside the elasto-capillary stretch;
  fewer, and the number is marked doubtful. A faster camera (or a slower liquid) gives more.
- **the interval**: a 95 % interval much wider than a few per cent of λ means a short or noisy window.
- **the resolution floor**: when the window ends at the floor (as here), the thinner part of the
  thread was not used; a finer pixel size would extend the window.
- **findings** marked `doubtful` make the whole record `doubtful` in `result.json`.

The fits, each with its window, values, 95 % intervals and reduced χ²:'''),
    ("code", '''\
pd.DataFrame([{"fit": name, "model": f.model, "ok": f.success, "frames": f.n_points,
               "reduced χ²": f.reduced_chi2,
               **{f"{k}": v for k, v in f.values.items()},
               **{f"{k} 95% low": a for k, (a, b) in f.ci95.items()},
               **{f"{k} 95% high": b for k, (a, b) in f.ci95.items()}}
              for name, f in rheo.fits.items()]).T'''),
    ("md", '''\
## 5. Plots

The plotting functions take the per-frame table (with the derived curves: strain rate, Hencky
strain, η_E) and the result as a dict (the keys of `result.json`), so they work the same on a
`result.json` read back from disk.'''),
    ("code", '''\
full = table.copy()
for column in rheo.curves.columns:
    full[column] = rheo.curves[column].to_numpy()
result = {**rheo.result_fields(), "fps_hz": calibration.fps_hz,
          "pixel_size_m": calibration.pixel_size_m, "options": options.to_dict()}

fig, ax = plt.subplots(figsize=(7.6, 3.9), layout="constrained")
plot_diameter(full, result, ax=ax);'''),
    ("md", '''\
Shaded: the located regimes; line: the elasto-capillary fit over its window; dotted: the
resolution floor; dashed: breakup. On a log axis the elasto-capillary stretch is a straight line of
slope −1/(3λ).

The apparent extensional viscosity η_E = σ / (−dD/dt) against the Hencky strain ε = 2 ln(D₀/D),
and the strain rate ε̇ = −2 d ln D/dt, which stays on the plateau 2/(3λ) in the elasto-capillary
regime. Both derivatives come from sliding line fits of ln D, not from differences of raw frames,
and are left out below the resolution floor.'''),
    ("code", '''\
fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(12, 3.9), layout="constrained")
plot_extensional_viscosity(full, result, ax=ax1)
plot_strain_rate(full, result, ax=ax2);'''),
    ("md", '''\
## The same in one call

`analyse` does all of the above and writes `result.json`, `diameter.csv`, the figures and a
self-contained `report.html` into a folder; `thinning analyse FILE --out DIR --fps ... --pixel-size
... --surface-tension ...` is the same on the command line. Its λ matches the one computed step by
step.'''),
    ("code", '''\
whole = analyse(path, OUT / row["sample"], options)
print(f"analyse: λ = {whole['relaxation_time_s'] * 1e3:.4g} ms, quality {whole['quality']}; "
      f"step by step: λ = {lam * 1e3:.4g} ms")
assert math.isclose(whole["relaxation_time_s"], lam, rel_tol=1e-9)
sorted(p.name for p in (OUT / row["sample"]).iterdir())'''),
]

BATCH_AND_QC = [
    ("md", '''\
# A batch with its QC

In production each lot of a product is measured on several replicate bridges. This notebook runs
`thinning batch` on part of the demo manifest, stores every result in a records database, and reads
back what a quality lab needs: the per-recording table, the **lot verdicts** against the product
specification, the **control chart**, and one lot report.

The demo product `harbour-cyan` (an invented ink) is specified in `sample_videos/specs.toml`
(printed below): limits on the relaxation time and the filament lifetime, the number of replicates
per lot, and the largest coefficient of variation of λ allowed. Lot HC-0107 was made with a degraded
polymer.

Everything is written into a fresh temporary folder with its own SQLite database. On two cores the
notebook runs in well under a minute.'''),
    ("code", SETUP),
    ("code", '''\
import subprocess
import sys
import time

import matplotlib.pyplot as plt
import pandas as pd

from thinning.records import open_records

%matplotlib inline

PRODUCT = "harbour-cyan"
# Six lots: five routine ones and the drifted HC-0107, so that HC-0107 has the five earlier lots its
# control-chart limits need. Set LOTS = None to run all eight lots (HC-0108 has a spoiled recording).
LOTS = ["HC-0101", "HC-0102", "HC-0103", "HC-0104", "HC-0106", "HC-0107"]
REPORT_LOT = "HC-0107"'''),
    ("md", '''\
## The manifest

One row per recording: `path` (relative to the manifest's folder, or absolute), `sample`, `lot`,
`product`, `replicate`, `made_on` (production date: it orders the lots on the control chart),
`notes`, and any analysis option as a column (`fps`, `pixel_size`, `surface_tension`, ...). Here we
keep the rows of the chosen lots and write them into a new manifest with absolute paths.'''),
    ("code", '''\
manifest = pd.read_csv(SAMPLES / "manifest.csv", dtype=str, keep_default_na=False)
subset = manifest if LOTS is None else manifest[manifest["lot"].isin(LOTS)].copy()
subset["path"] = [str((SAMPLES / p).resolve()) for p in subset["path"]]
subset_csv = OUT / "manifest.csv"
subset.to_csv(subset_csv, index=False)
print((SAMPLES / "specs.toml").read_text(encoding="utf-8"))
print(f"{len(subset)} recordings of {subset['lot'].nunique()} lots")
subset.drop(columns="path").head(6)'''),
    ("md", '''\
## The batch

The same as typing, in a terminal:

```sh
thinning batch manifest.csv --out batch --db sqlite:///records.db --specs specs.toml
```

Rows are analysed in parallel (one worker per core by default); each row gets its own folder with
`result.json`, `diameter.csv`, figures and `report.html`, and `batch/results.csv` collects one line
per row. A second run skips the rows whose recording and options did not change. `--db` also stores
every row in the records database, `--specs` loads the product specifications into it first.'''),
    ("code", '''\
DB_URL = f"sqlite:///{OUT / 'records.db'}"
BATCH = OUT / "batch"


def thinning(*args):
    """Run the thinning command line with this kernel's Python; return its printed output."""
    done = subprocess.run([sys.executable, "-m", "thinning.cli", *map(str, args)],
                          capture_output=True, text=True)
    if done.returncode != 0:
        raise RuntimeError(f"thinning {args[0]} failed ({done.returncode}): {done.stderr.strip()}")
    return done.stdout


started = time.perf_counter()
printed = thinning("batch", subset_csv, "--out", BATCH, "--db", DB_URL, "--specs", SAMPLES / "specs.toml")
print(printed.strip().splitlines()[-1])
print(f"batch took {time.perf_counter() - started:.1f} s")'''),
    ("md", '''\
## The per-recording table

`results.csv` has one row per manifest row, in manifest order: status (`ok` or `failed` with a
one-sentence reason), quality (`good` or `doubtful`), the headline numbers in SI units with the
95 % interval of λ, and the warnings.'''),
    ("code", '''\
results = pd.read_csv(BATCH / "results.csv")
view = results[["sample", "lot", "status", "quality", "regime"]].copy()
view["λ (ms)"] = results["relaxation_time_s"] * 1e3
view["λ 95% low (ms)"] = results["relaxation_time_ci95_low_s"] * 1e3
view["λ 95% high (ms)"] = results["relaxation_time_ci95_high_s"] * 1e3
view["lifetime (ms)"] = results["filament_lifetime_s"] * 1e3
view["η_E max (Pa·s)"] = results["extensional_viscosity_max_Pa_s"]
view.round(3)'''),
    ("md", '''\
## Lot verdicts

The verdict rules (the contract of `thinning records lots`):

- a replicate is **valid** when its status is `ok`, its quality `good`, and the limited quantities
  (here λ and the filament lifetime) are not empty;
- the lot's value of each limited quantity is the **mean of its valid replicates** (standard
  deviation with n − 1);
- **fail** when a lot mean is outside a specification limit;
- otherwise **review** when there are fewer valid replicates than required, the coefficient of
  variation of λ exceeds `max_cv`, any single valid replicate is outside a limit, or a replicate is
  invalid;
- otherwise **pass**. `fail` outranks `review`, and every `fail` and `review` lists all its reasons.

A lot that breaks a control-chart rule keeps its verdict and gets **chart flags**.'''),
    ("code", '''\
with open_records(DB_URL) as records:
    lots = records.lots(product=PRODUCT)
    spec = records.specs()[PRODUCT]
verdicts = pd.DataFrame([lot.as_row() for lot in lots])
verdicts["λ mean (ms)"] = verdicts["relaxation_time_mean_s"] * 1e3
verdicts["λ CV (%)"] = verdicts["relaxation_time_cv"] * 100
verdicts[["lot", "made_on", "n_valid", "λ mean (ms)", "λ CV (%)", "verdict", "chart_flags"]].round(3)'''),
    ("code", '''\
for lot in lots:
    if lot.verdict.verdict != "pass":
        print(f"{lot.lot}: {lot.verdict.verdict}")
        for reason in lot.verdict.reasons:
            print(f"  - {reason}")
        for flag in lot.chart_flags:
            print(f"  chart: {flag}")'''),
    ("md", '''\
## The control chart

An individuals (X) and moving-range (MR) chart of the lot means of λ, in production order. The
limits for a lot come **only from the product's earlier lots** (at least 5 of them; the lot itself
is never included): centre line = their mean, σ estimated from their mean moving range, limits =
centre ± 3σ. The run rules are the Western Electric zone rules and a six-point trend rule. The
first five lots therefore carry no limits; HC-0107 is judged against the five before it.'''),
    ("code", '''\
chart = pd.DataFrame([{"lot": lot.lot, "made_on": lot.made_on, "λ mean (ms)": p.value * 1e3,
                       "moving range (ms)": None if p.moving_range is None else p.moving_range * 1e3,
                       "earlier lots": p.n_baseline,
                       "LCL (ms)": None if p.lcl is None else p.lcl * 1e3,
                       "centre (ms)": None if p.centre is None else p.centre * 1e3,
                       "UCL (ms)": None if p.ucl is None else p.ucl * 1e3,
                       "MR UCL (ms)": None if p.mr_ucl is None else p.mr_ucl * 1e3,
                       "flags": ", ".join(p.flags)}
                      for lot in lots if (p := lot.chart) is not None])
chart.round(3)'''),
    ("code", '''\
fig, ax = plt.subplots(figsize=(7.6, 3.6), layout="constrained")
ax.plot(chart["lot"], chart["λ mean (ms)"], "o-", color="#22303c", label="lot mean λ")
ax.step(chart["lot"], chart["UCL (ms)"], where="mid", color="#a23b54", ls="--", label="UCL / LCL")
ax.step(chart["lot"], chart["LCL (ms)"], where="mid", color="#a23b54", ls="--")
ax.step(chart["lot"], chart["centre (ms)"], where="mid", color="#3d7a1c", label="centre")
low_s, high_s = spec.relaxation_time_s
ax.axhspan(low_s * 1e3, high_s * 1e3, color="#d3ecc1", alpha=0.5, lw=0, label="specification")
flagged = chart[chart["flags"] != ""]
ax.plot(flagged["lot"], flagged["λ mean (ms)"], "o", ms=11, mfc="none", mec="#a23b54", label="chart flag")
ax.set_ylabel("relaxation time λ (ms)")
ax.set_title(f"{PRODUCT}: X chart of the lot means")
ax.legend(loc="lower left", fontsize=8);'''),
    ("md", '''\
## One lot report

`thinning report LOT --product P --db URL --out DIR` writes a self-contained HTML page: the verdict
and its reasons first, the replicates' curves, every number, the control chart with the lot marked,
the warnings and the cautions. Open it in any browser; it loads nothing from the network.'''),
    ("code", '''\
REPORTS = OUT / "reports"
print(thinning("report", REPORT_LOT, "--product", PRODUCT, "--db", DB_URL, "--out", REPORTS).strip())
report = REPORTS / f"{REPORT_LOT}.html"
print(f"{report.name}: {report.stat().st_size / 1024:.0f} kB")'''),
    ("md", '''\
The same verdicts on the command line: `thinning records lots --db URL`; one lot in detail:
`thinning records show LOT --db URL`. To keep records across batches, use one database for all of
them (the default is a file in your user data folder; `--db` names another, also PostgreSQL).'''),
]

NOTEBOOKS = {
    "01_one_recording.ipynb": ONE_RECORDING,
    "02_batch_and_qc.ipynb": BATCH_AND_QC,
}


def build(cells, stem: str) -> nbformat.NotebookNode:
    """A notebook without outputs from ``[(kind, source), ...]``; cell ids ``<stem>-<nn>``."""
    nb = nbformat.v4.new_notebook()
    nb.metadata = {
        "kernelspec": {"name": "python3", "display_name": "Python 3", "language": "python"},
        "language_info": {"name": "python"},
    }
    for i, (kind, source) in enumerate(cells):
        make = nbformat.v4.new_markdown_cell if kind == "md" else nbformat.v4.new_code_cell
        cell = make(source)
        cell.id = f"{stem[:40]}-{i:02d}"
        nb.cells.append(cell)
    nbformat.validate(nb)
    return nb


def notebook_texts() -> dict[str, str]:
    """File name → the text of each notebook as written to disk."""
    return {name: nbformat.writes(build(cells, name.split("_")[0])) + "\n"
            for name, cells in NOTEBOOKS.items()}


def main(argv: list[str]) -> int:
    check = "--check" in argv
    stale = []
    for name, text in notebook_texts().items():
        path = NOTEBOOK_DIR / name
        if check:
            if not path.is_file() or path.read_text(encoding="utf-8") != text:
                stale.append(name)
        else:
            NOTEBOOK_DIR.mkdir(exist_ok=True)
            path.write_text(text, encoding="utf-8")
            print(f"wrote {path}")
    for name in stale:
        print(f"{name} differs from scripts/make_notebooks.py; run it to regenerate", file=sys.stderr)
    return 1 if stale else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
