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

This notebook follows one high-speed recording of a capillary-thinning experiment through
`thinning`'s public functions (`import thinning`). First the whole analysis in three calls, then
the same stages opened one by one for those who want to see inside:

1. read the options with their units, 2. `thinning.analyse` the recording into a `Result`,
3. plot from the `Result`; then the stages: open the source, measure the **minimum neck diameter**
in every frame (pixels), convert with the **calibration**, **characterise** the thinning (regimes,
**relaxation time λ** with its 95 % interval, **strain rate**, **apparent extensional viscosity**).

The recording is one of the bundled demo files (`sample_videos/`): an invented water-based inkjet
ink, product `harbour-cyan`, a liquid bridge stretched between two 3 mm plates and filmed at
2,500 frames/s. Running the whole notebook takes a few seconds.'''),
    ("code", SETUP),
    ("code", '''\
%matplotlib inline
import math

import matplotlib.pyplot as plt
import pandas as pd

import thinning'''),
    ("md", '''\
## The whole analysis in three calls

The manifest lists each recording with what the analysis needs to know: the camera's **recording**
frame rate (the rate stored in a video container is usually a playback rate), the object size of one
pixel, and the liquid's surface tension. `options_from_text` reads them with their units, exactly as
the command line does, and keeps SI values; `analyse` returns a `Result`, the object every figure,
report and table is made from.'''),
    ("code", '''\
manifest = pd.read_csv(SAMPLES / "manifest.csv")
row = manifest.iloc[0]
path = SAMPLES / row["path"]

options = thinning.options_from_text({"fps": row["fps"], "pixel_size": row["pixel_size"],
                                      "surface_tension": row["surface_tension"]})
result = thinning.analyse(path, options)

c = result.characterisation
low, high = c.relaxation_time_ci95_s
print(f"{row['sample']}: regime {c.regime}, relaxation time λ = {c.relaxation_time_s * 1e3:.4g} ms "
      f"(95 % interval {low * 1e3:.4g}–{high * 1e3:.4g} ms), fitted on {c.fit_window_frames} frames; "
      f"quality {result.quality}")
for finding in result.findings:
    print(f"  [{finding.code.value}] {finding.message}")'''),
    ("code", '''\
fig, axes = plt.subplots(1, 3, figsize=(15, 3.9), layout="constrained")
thinning.plot_diameter(result, ax=axes[0])
thinning.plot_strain_rate(result, ax=axes[1])
thinning.plot_extensional_viscosity(result, ax=axes[2]);'''),
    ("md", '''\
Shaded: the located regimes; line: the elasto-capillary fit over its window; dotted: the
resolution floor; dashed: breakup. On a log axis the elasto-capillary stretch is a straight line of
slope −1/(3λ); the strain rate stays on the plateau 2/(3λ) there. Both derivatives come from sliding
line fits of ln D, not from differences of raw frames, and are left out below the resolution floor.

`thinning.write_outputs(result, folder)` writes `result.json`, `diameter.csv`, the figures and a
self-contained `report.html`; `thinning analyse FILE --out DIR --fps … --pixel-size …
--surface-tension …` is the same on the command line.'''),
    ("code", '''\
folder = thinning.write_outputs(result, OUT / row["sample"])
sorted(p.name for p in folder.iterdir())'''),
    ("md", '''\
## Inside: the stages one by one

### The recording and the neck in every frame

`measure_recording` streams the frames once (memory stays constant however long the recording):
it finds the layout (plates, axis, the band where the thread lives) in the first frame, then
locates both edges of the shadow with sub-pixel accuracy in every frame and keeps the narrowest
point, the **neck**. It also finds when the plates stop moving (the start of free thinning) and the
breakup frame. The findings are its own doubts, in plain sentences.'''),
    ("code", '''\
with thinning.open_source(path) as recording:
    print(f"{recording.n_frames} frames of {recording.shape[1]} × {recording.shape[0]} px, "
          f"{recording.bit_depth}-bit; the container claims {recording.fps} frames/s (a playback rate)")
    series = thinning.measure_recording(recording, geometry=options.geometry,
                                        n_frames=recording.n_frames)
print(f"free thinning starts at frame {series.free_thinning_start_frame:g}, "
      f"breakup at frame {series.breakup_frame}; per-frame noise ≈ {series.diameter_noise_px:.2f} px")
series.table[["frame", "diameter_px", "neck_position_px", "thread_connected", "plate_gap_px"]].iloc[::40]'''),
    ("code", '''\
thinning.plot_frame_strip(series.snapshots, orientation=series.layout.orientation, fps_hz=options.fps_hz)'''),
    ("md", '''\
Check the strip: the orange lines must sit on the edges of the shadow in every panel. If they cut
across a plate or miss the thread, give a region of interest (`roi=(x0, y0, x1, y1)`, the
`--roi` option).

### Calibration: pixels and frames to metres and seconds

Every number that follows scales with these two values: λ with the frame rate, the diameters with
the pixel size, η_E with both. **Check the calibration regularly with a reference fluid** of known
relaxation time or viscosity, filmed with the same lens and camera settings; a wrong scale shifts
every lot alike, and no control chart will show it.'''),
    ("code", '''\
calibration = thinning.Calibration(fps_hz=options.fps_hz, pixel_size_m=options.pixel_size_m)
table = thinning.to_physical(series, calibration)
table[["frame", "time_s", "diameter_m", "thread_connected"]].iloc[::40]'''),
    ("md", '''\
### Regimes, relaxation time and extensional viscosity

`characterise` ignores the frames before free thinning, locates the regimes (inertio-, visco- and
elasto-capillary, finite extensibility) and fits each with its law. In the **elasto-capillary**
regime the diameter falls exponentially, D ∝ exp(−t / 3λ), which gives λ; its 95 % interval comes
from a bootstrap seeded from the file's checksum, so a rerun gives the same interval. Frames
thinner than the **resolution floor** (3 pixels by default) are left out of the fits. These are the
numbers `analyse` gave above.'''),
    ("code", '''\
rheo = result.characterisation
regimes = pd.DataFrame([{"regime": r.kind, "from (ms)": r.t_start_s * 1e3, "to (ms)": r.t_end_s * 1e3}
                        for r in rheo.regimes])
print(f"headline regime: {rheo.regime}; resolution floor {rheo.resolution_floor_m * 1e6:.3g} µm; "
      f"{rheo.fit_window_frames} frames in the fit window")
pd.DataFrame([{"fit": name, "model": f.model, "ok": f.success, "frames": f.n_points,
               "reduced χ²": f.reduced_chi2, **f.values} for name, f in rheo.fits.items()]).T'''),
    ("md", '''\
What to check before trusting λ:

- **frames in the window**: the fit needs at least 10 frames inside the elasto-capillary stretch;
  fewer, and the number is marked doubtful. A faster camera (or a slower liquid) gives more.
- **the interval**: a 95 % interval much wider than a few per cent of λ means a short or noisy window.
- **the resolution floor**: when the window ends at the floor, the thinner part of the thread was
  not used; a finer pixel size would extend the window.
- **findings** marked `doubtful` make the whole record `doubtful` in `result.json`.'''),
]

BATCH_AND_QC = [
    ("md", '''\
# A batch with its QC

In production each lot of a product is measured on several replicate bridges. This notebook runs a
batch on part of the demo manifest through `thinning`'s public functions, stores every result in a
records database as it finishes, and reads back what a quality lab needs: the per-recording table,
the **lot verdicts** against the product specification, the **control chart**, and one lot report.

The demo product `harbour-cyan` (an invented ink) is specified in `sample_videos/specs.toml`
(printed below): limits on the relaxation time and the filament lifetime, the number of replicates
per lot, and the largest coefficient of variation of λ allowed. Lot HC-0107 was made with a degraded
polymer. Everything is written into a fresh temporary folder with its own SQLite database.'''),
    ("code", SETUP),
    ("code", '''\
%matplotlib inline
import time

import matplotlib.pyplot as plt
import pandas as pd

import thinning

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
## The batch, into the records

`run_batch` is `thinning batch manifest.csv --out batch --db URL` from Python: rows are analysed
in parallel (one worker per core by default); each row gets its own folder with `result.json`,
`diameter.csv`, figures and `report.html`, `batch/results.csv` collects one line per row, and with
`records=` every finished row is stored in the records database as it finishes. A second run skips
the rows whose recording and options did not change.'''),
    ("code", '''\
DB_URL = f"sqlite:///{OUT / 'records.db'}"
BATCH = OUT / "batch"
started = time.perf_counter()
with thinning.open_records(DB_URL) as records:
    records.load_specs(SAMPLES / "specs.toml")
    report = thinning.run_batch(subset_csv, BATCH, records=records)
print(f"{report.n_rows} rows: {report.n_ok} ok, {report.n_failed} failed "
      f"({time.perf_counter() - started:.1f} s)")'''),
    ("md", '''\
## The per-recording table

`results.csv` has one row per manifest row, in manifest order: status (`ok` or `failed` with a
one-sentence reason), quality (`good` or `doubtful`), the headline numbers in SI units with the
95 % interval of λ, the warnings and their codes.'''),
    ("code", '''\
results = report.table
view = results[["sample", "lot", "status", "quality", "regime", "warning_codes"]].copy()
view["λ (ms)"] = results["relaxation_time_s"] * 1e3
view["λ 95% low (ms)"] = results["relaxation_time_ci95_low_s"] * 1e3
view["λ 95% high (ms)"] = results["relaxation_time_ci95_high_s"] * 1e3
view["lifetime (ms)"] = results["filament_lifetime_s"] * 1e3
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
with thinning.open_records(DB_URL) as records:
    lots = records.lots(product=PRODUCT)
    detail = records.lot_detail(REPORT_LOT, product=PRODUCT)
verdicts = pd.DataFrame([lot.as_row() for lot in lots])
verdicts["λ mean (ms)"] = verdicts["relaxation_time_mean_s"] * 1e3
verdicts["λ CV (%)"] = verdicts["relaxation_time_cv"] * 100
for lot in lots:
    if lot.verdict.verdict != "pass":
        print(f"{lot.lot}: {lot.verdict.verdict}")
        for reason in lot.verdict.reasons:
            print(f"  - {reason}")
        for flag in lot.chart_flags:
            print(f"  chart: {flag}")
verdicts[["lot", "made_on", "n_valid", "λ mean (ms)", "λ CV (%)", "verdict", "chart_flags"]].round(3)'''),
    ("md", '''\
## The control chart

An individuals (X) and moving-range (MR) chart of the lot means of λ, in production order. The
limits for a lot come **only from the product's earlier lots** (at least 5 of them; the lot itself
is never included): centre line = their mean, σ estimated from their mean moving range, limits =
centre ± 3σ. The run rules are the Western Electric zone rules and a six-point trend rule. The
first five lots therefore carry no limits; HC-0107 is judged against the five before it.'''),
    ("code", '''\
fig, axes = plt.subplots(2, 1, sharex=True, figsize=(7.6, 4.8), height_ratios=(3, 2), layout="constrained")
thinning.plot_control_chart(detail, axes=axes)
point = detail.summary.chart
print(f"{REPORT_LOT}: limits from {point.n_baseline} earlier lots, centre {point.centre * 1e3:.4g} ms, "
      f"flags {', '.join(point.flags) or 'none'}")'''),
    ("md", '''\
## One lot report

`write_lot_report` (`thinning report LOT --product P --db URL --out DIR` on the command line)
writes a self-contained HTML page: the verdict and its reasons first, the replicates' curves, every
number, the control chart with the lot marked, the warnings and the cautions. Open it in any
browser; it loads nothing from the network.'''),
    ("code", '''\
with thinning.open_records(DB_URL) as records:
    page = thinning.write_lot_report(records, REPORT_LOT, product=PRODUCT, out_dir=OUT / "reports")
print(f"{page.name}: {page.stat().st_size / 1024:.0f} kB")'''),
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
