"""Build the tutorial notebooks in ``notebooks/`` from the Python source below, and their
executed copies in ``docs/notebooks/``.

The cells live here as plain strings, so a review reads a normal diff and the
``.ipynb`` files can be regenerated at any time; they are written without
outputs and with fixed cell ids (the same source gives the same bytes).
``tests/test_notebooks.py`` executes them and checks that the committed files
are what this script writes.

``--render`` also executes each notebook (nbclient on the ``python3`` kernel, both
installed with the ``test`` extra) in a scratch copy of the repository layout and writes
the executed notebook, figures embedded, to ``docs/notebooks/``: a reader without a kernel
sees every output (GitHub and any notebook viewer show them). The rendered copy is made as
reproducible as the outputs allow: no execution timestamps, the committed notebook's
metadata (no kernel or interpreter versions), and the scratch folders printed as
``../sample_videos`` and ``<outputs>``.

Usage:

    python scripts/make_notebooks.py           # (re)write notebooks/*.ipynb
    python scripts/make_notebooks.py --check   # exit 1 when a committed notebook is stale
    python scripts/make_notebooks.py --render  # also execute them into docs/notebooks/*.ipynb
"""

from __future__ import annotations

import os
import shutil
import sys
import tempfile
from pathlib import Path

import nbformat

ROOT = Path(__file__).resolve().parent.parent
NOTEBOOK_DIR = ROOT / "notebooks"
#: where ``--render`` writes the executed copies
RENDER_DIR = ROOT / "docs" / "notebooks"
SAMPLES_DIR = ROOT / "sample_videos"
#: longest a cell may run (s) before the execution is abandoned
TIMEOUT_S = 300
#: resolution of the figures embedded in a rendered copy (dots per inch)
RENDER_DPI = 100

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
`thinning`'s public functions (`import thinning`). It starts with the **one-call path** a QC
scientist uses every day:

1. `thinning.analyse` the recording with its options (read with their units) into a `Result`,
2. look at the `Result`: the **relaxation time λ** with its 95 % interval, the **quality** and
   the warnings,
3. plot from the `Result`.

Then, under **Opening the stages**, the same analysis stage by stage for those who want to see
inside: open the source, measure the **minimum neck diameter** in every frame (pixels), convert
with the **calibration**, **characterise** the thinning (regimes, λ, **strain rate**, **apparent
extensional viscosity**).

The recording is one of the bundled demo files (`sample_videos/`): an invented water-based inkjet
ink, product `harbour-cyan`, a liquid bridge stretched between two 3 mm plates and filmed at
2,500 frames/s. Running the whole notebook takes a few seconds. An executed copy, with every
figure, is in `docs/notebooks/01_one_recording.ipynb`.'''),
    ("code", SETUP),
    ("code", '''\
%matplotlib inline
import matplotlib.pyplot as plt
import pandas as pd

import thinning
from thinning import display  # the house style of numbers people read'''),
    ("md", '''\
## The one-call path

`options_from_text` reads the options with their units, exactly as the command line does, and
keeps SI values: the camera's **recording** frame rate (the rate stored in a video container is
usually a playback rate), the object size of one pixel, and the liquid's surface tension. Here they
are the recording's row of `sample_videos/manifest.csv`. `analyse` returns a `Result`, the object
every figure, report and table is made from.'''),
    ("code", '''\
options = thinning.options_from_text({"fps": "2.5 kHz", "pixel_size": "25 um", "surface_tension": "41 mN/m"})
result = thinning.analyse(SAMPLES / "HC-0101-r1.avi", options)'''),
    ("md", '''\
### The `Result`

The headline numbers are in `result.characterisation` (SI units); `result.quality` is `good` or
`doubtful`, `result.warnings` the findings in plain sentences (`result.warning_codes` their codes).
`thinning.display` prints them as the reports do: a value to the precision of its 95 % interval,
one unit per view.'''),
    ("code", '''\
c = result.characterisation
ms = display.time_unit(c.relaxation_time_s)
lam = display.with_interval(c.relaxation_time_s, c.relaxation_time_ci95_s, ms)
print(f"HC-0101-r1: regime {c.regime}, relaxation time λ = {lam}, fitted on {c.fit_window_frames} frames")
print(f"quality: {result.quality}")
for reason in result.quality_reasons:
    print(f"  doubtful because: {reason}")
print("warnings:" if result.warnings else "warnings: none")
for code, sentence in zip(result.warning_codes, result.warnings):
    print(f"  [{code}] {sentence}")'''),
    ("code", '''\
fig, ax = plt.subplots(figsize=(7.6, 3.9), layout="constrained")
thinning.plot_diameter(result, ax=ax);'''),
    ("md", '''\
Shaded: the located regimes; line: the elasto-capillary fit over its window; dotted: the
resolution floor; dashed: breakup. On a log axis the elasto-capillary stretch is a straight line of
slope −1/(3λ). The strain rate stays on the plateau 2/(3λ) there; it and the apparent extensional
viscosity come from sliding line fits of ln D, not from differences of raw frames, and are left
out below the resolution floor.'''),
    ("code", '''\
fig, axes = plt.subplots(1, 2, figsize=(11, 3.9), layout="constrained")
thinning.plot_strain_rate(result, ax=axes[0])
thinning.plot_extensional_viscosity(result, ax=axes[1]);'''),
    ("md", '''\
`thinning.write_outputs(result, folder)` files it all: `result.json`, `diameter.csv`, the figures
and a self-contained `report.html` (`thinning.analyse_to(path, folder, options)` analyses and writes
in one call; `thinning analyse FILE --out DIR --fps … --pixel-size … --surface-tension …` is the
same on the command line).'''),
    ("code", '''\
folder = thinning.write_outputs(result, OUT / "HC-0101-r1")
sorted(p.name for p in folder.iterdir())'''),
    ("md", '''\
## Opening the stages

`analyse` is these stages in a row: **open the source → measure the neck (pixels) → convert to SI
with the calibration → characterise**. Each is a public function; call them yourself to look at a
stage's output, to give a stage other settings, or to check a doubtful record.

### The recording and the neck in every frame

`measure_recording` streams the frames once (memory stays constant however long the recording):
it finds the layout (plates, axis, the band where the thread lives) in the first frame, then
locates both edges of the shadow with sub-pixel accuracy in every frame and keeps the narrowest
point, the **neck**. It also finds when the plates stop moving (the start of free thinning) and the
breakup frame. The findings are its own doubts, in plain sentences.'''),
    ("code", '''\
path = SAMPLES / "HC-0101-r1.avi"
with thinning.open_source(path) as recording:
    print(f"{recording.n_frames} frames of {recording.shape[1]} × {recording.shape[0]} px, "
          f"{recording.bit_depth}-bit; the container claims {display.frame_rate(recording.fps)} (a playback rate)")
    series = thinning.measure_recording(recording, geometry=options.geometry,
                                        n_frames=recording.n_frames)
noise = display.quantity(series.diameter_noise_px, display.Unit("px", 1.0), figures=2)
print(f"free thinning starts at frame {series.free_thinning_start_frame:g}, "
      f"breakup at frame {series.breakup_frame}; per-frame noise ≈ {noise}")
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
print(f"{display.frame_rate(calibration.fps_hz)}, {display.given(calibration.pixel_size_m, display.UM)} per pixel")
table = thinning.to_physical(series, calibration)
table[["frame", "time_s", "diameter_m", "thread_connected"]].iloc[::40]'''),
    ("md", '''\
### Characterise: regimes, relaxation time and extensional viscosity

`characterise` ignores the frames before free thinning, locates the regimes (inertio-, visco- and
elasto-capillary, finite extensibility) and fits each with its law. In the **elasto-capillary**
regime the diameter falls exponentially, D ∝ exp(−t / 3λ), which gives λ; its 95 % interval comes
from a bootstrap seeded from the file's checksum, so a rerun gives the same interval. Frames
thinner than the **resolution floor** (3 pixels by default) are left out of the fits. `analyse`
called it on the table above with the options and that seed; its output is
`result.characterisation`, read here.'''),
    ("code", '''\
rheo = result.characterisation
unit = display.time_unit(*[t for r in rheo.regimes for t in (r.t_start_s, r.t_end_s)])
regimes = pd.DataFrame([{"regime": r.kind, f"stretch ({unit.label})": display.span((r.t_start_s, r.t_end_s), unit.bare)}
                        for r in rheo.regimes])
print(f"headline regime: {rheo.regime}; resolution floor {display.quantity(rheo.resolution_floor_m, display.UM)}; "
      f"{rheo.fit_window_frames} frames in the fit window")
regimes'''),
    ("code", '''\
# The fits with their parameters as fitted (SI units, full precision)
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

In production each lot of a product is measured on several replicate bridges. This notebook starts
with the **one-call path**: `thinning.run_batch` analyses a manifest of recordings into a records
database, and the records give the **lot verdicts** against the product specification. Then it
opens the pieces: the manifest, the per-recording table, the verdict rules, the **control chart**
and one lot report.

The demo product `harbour-cyan` (an invented ink) is specified in `sample_videos/specs.toml`:
limits on the relaxation time, the number of replicates per lot, and the largest coefficient of
variation of λ allowed. Lot HC-0107 was made with a degraded polymer. Everything is written into a
fresh temporary folder with its own SQLite database. An executed copy, with every figure, is in
`docs/notebooks/02_batch_and_qc.ipynb`.'''),
    ("code", SETUP),
    ("code", '''\
%matplotlib inline
import matplotlib.pyplot as plt
import pandas as pd

import thinning
from thinning import display  # the house style of numbers people read

PRODUCT = "harbour-cyan"
# Six lots: five routine ones and the drifted HC-0107, so that HC-0107 has the five earlier lots its
# control-chart limits need. Set LOTS = None to run all eight lots (HC-0108 has a spoiled recording).
LOTS = ["HC-0101", "HC-0102", "HC-0103", "HC-0104", "HC-0106", "HC-0107"]
REPORT_LOT = "HC-0107"'''),
    ("md", '''\
## The one-call path: a batch and its lot verdicts

`run_batch` is `thinning batch manifest.csv --out batch --db URL` from Python. With all eight lots
it is one call on `SAMPLES / "manifest.csv"`; here the manifest is first cut to the chosen lots
(the two lines below). `records.load_specs` stores the product specification, `records=` stores
every finished row as it finishes, and `records.lots` judges every lot of the product.'''),
    ("code", '''\
manifest = pd.read_csv(SAMPLES / "manifest.csv", dtype=str, keep_default_na=False)
subset = manifest if LOTS is None else manifest[manifest["lot"].isin(LOTS)].copy()
subset["path"] = [str((SAMPLES / p).resolve()) for p in subset["path"]]
subset.to_csv(OUT / "manifest.csv", index=False)

DB_URL = f"sqlite:///{OUT / 'records.db'}"
with thinning.open_records(DB_URL) as records:
    records.load_specs(SAMPLES / "specs.toml")
    report = thinning.run_batch(OUT / "manifest.csv", OUT / "batch", records=records)
    lots = records.lots(product=PRODUCT)

print(f"{report.n_rows} recordings: {report.n_ok} ok, {report.n_failed} failed")
for lot in lots:
    print(f"{lot.lot}: {lot.verdict.verdict}")
    for reason in lot.verdict.shown_reasons:
        print(f"  - {reason}")
    for flag in lot.chart_flags:
        print(f"  chart: {flag}")'''),
    ("md", '''\
## Opening the pieces

### The manifest and the specification

One row per recording: `path` (relative to the manifest's folder, or absolute), `sample`, `lot`,
`product`, `replicate`, `made_on` (production date: it orders the lots on the control chart),
`notes`, and any analysis option as a column (`fps`, `pixel_size`, `surface_tension`, ...). The
specification is a TOML file kept under version control; the records keep every version of it.'''),
    ("code", '''\
print((SAMPLES / "specs.toml").read_text(encoding="utf-8"))
print(f"{len(subset)} recordings of {subset['lot'].nunique()} lots")
subset.drop(columns="path").head(6)'''),
    ("md", '''\
### The per-recording table

Each row got its own folder in `batch/` with `result.json`, `diameter.csv`, figures and
`report.html`; `batch/results.csv` (`report.table`) has one line per manifest row, in manifest
order: status (`ok` or `failed` with a one-sentence reason), quality (`good` or `doubtful`), the
headline numbers in SI units at full precision with the 95 % interval of λ, the warnings and their
codes. A second run skips the rows whose recording and options did not change. Shown here in the
house style, one unit per column:'''),
    ("code", '''\
results = report.table
unit = display.time_unit(*results["relaxation_time_s"], *results["filament_lifetime_s"])
lam = [display.estimate(v, (lo, hi), unit.bare) for v, lo, hi in
       zip(results["relaxation_time_s"], results["relaxation_time_ci95_low_s"], results["relaxation_time_ci95_high_s"])]
view = results[["sample", "lot", "status", "quality", "regime"]].copy()
view[f"λ ({unit.label})"] = [shown for shown, _ in lam]
view[f"λ 95 % interval ({unit.label})"] = [around or display.MISSING for _, around in lam]
view[f"lifetime ({unit.label})"] = [display.quantity(v, unit.bare) for v in results["filament_lifetime_s"]]
view["warnings"] = results["warning_codes"]
view'''),
    ("md", '''\
### Lot verdicts: the rules

The verdict rules (the contract of `thinning records lots`):

- a replicate is **valid** when its status is `ok`, its quality `good`, and the limited quantities
  (here λ) are not empty;
- the lot's value of each limited quantity is the **mean of its valid replicates** (standard
  deviation with n − 1);
- **fail** when a lot mean is outside a specification limit;
- otherwise **review** when there are fewer valid replicates than required, the coefficient of
  variation of λ exceeds `max_cv`, any single valid replicate is outside a limit, or a replicate is
  invalid;
- otherwise **pass**. `fail` outranks `review`, and every `fail` and `review` lists all its reasons.

A lot that breaks a control-chart rule keeps its verdict and gets **chart flags**. The table of
the verdicts above (`lot.as_row()` has the columns of `thinning records lots`, in SI):'''),
    ("code", '''\
unit = display.time_unit(*[lot.relaxation_time.mean for lot in lots])
pd.DataFrame([{"lot": lot.lot, "made on": lot.made_on, "valid replicates": lot.verdict.n_valid,
               f"λ mean ({unit.label})": display.estimate(lot.relaxation_time.mean, lot.relaxation_time.ci95,
                                                          unit.bare)[0],
               "λ CV": display.percent(lot.relaxation_time.cv), "verdict": lot.verdict.verdict,
               "chart flags": "; ".join(lot.chart_flags)} for lot in lots])'''),
    ("md", '''\
### The control chart

An individuals (X) and moving-range (MR) chart of the lot means of λ, in production order. The
limits for a lot come **only from its baseline**: by default the product's earlier lots that passed
without a chart flag (at least 5 of them; the lot itself is never included), or a named phase-I
baseline fixed in the specification file: centre line = their mean, σ estimated from their mean
moving range, limits = centre ± 3σ. The run rules are the Western Electric zone rules and a
six-point trend rule. The first five lots therefore carry no limits; HC-0107 is judged against the
five before it. The chart draws the specification limits beside the control limits: the control
limits say whether the process changed; the specification limits whether a lot is fit to ship.'''),
    ("code", '''\
with thinning.open_records(DB_URL) as records:
    detail = records.lot_detail(REPORT_LOT, product=PRODUCT)
fig, axes = plt.subplots(2, 1, sharex=True, figsize=(7.6, 4.8), height_ratios=(3, 2), layout="constrained")
thinning.plot_control_chart(detail, axes=axes)
low, high = detail.spec.relaxation_time_s
point = detail.summary.chart
print(f"{REPORT_LOT}: limits from {point.n_baseline} earlier lots, "
      f"centre {display.quantity(point.centre, display.MS)}, "
      f"control limits {display.span((point.lcl, point.ucl), display.MS)}; "
      f"specification {display.limits(low, high, display.MS)}; flags {', '.join(point.flags) or 'none'}")'''),
    ("md", '''\
### One lot report

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

#: the notebook-level metadata of every notebook written here (no kernel or interpreter versions)
METADATA = {
    "kernelspec": {"name": "python3", "display_name": "Python 3", "language": "python"},
    "language_info": {"name": "python"},
}


def build(cells, stem: str) -> nbformat.NotebookNode:
    """A notebook without outputs from ``[(kind, source), ...]``; cell ids ``<stem>-<nn>``."""
    nb = nbformat.v4.new_notebook()
    nb.metadata = nbformat.from_dict(METADATA)
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


# --- executing and rendering -------------------------------------------------------------------

def scratch_layout(scratch: Path, name: str, text: str) -> Path:
    """``scratch/notebooks/name`` (holding ``text``) beside a link ``scratch/sample_videos`` to the
    bundled recordings, as the notebooks expect them; returns the notebook's folder."""
    work = scratch / "notebooks"
    work.mkdir(parents=True)
    (scratch / "sample_videos").symlink_to(SAMPLES_DIR, target_is_directory=True)
    (work / name).write_text(text, encoding="utf-8")
    return work


def execute(path: Path, *, timeout_s: float = TIMEOUT_S, dpi: float | None = None) -> nbformat.NotebookNode:
    """Run the notebook at ``path`` top to bottom in its folder on the ``python3`` kernel and return it
    with its outputs (the file is not changed). The kernel inherits this process's environment:
    set ``THINNING_NOTEBOOK_OUT`` for where the notebook writes. ``dpi`` sets the inline figures'
    resolution. Raises ``nbclient.exceptions.CellExecutionError`` on the first failing cell."""
    from nbclient import NotebookClient

    nb = nbformat.read(path, as_version=4)
    if dpi is not None:  # an extra first cell, removed again below
        nb.cells.insert(0, nbformat.v4.new_code_cell(
            f"%config InlineBackend.print_figure_kwargs = {{'bbox_inches': 'tight', 'dpi': {dpi!r}}}"))
    client = NotebookClient(nb, kernel_name="python3", timeout=timeout_s, record_timing=False,
                            resources={"metadata": {"path": str(path.parent)}})
    client.execute()
    if dpi is not None:
        del nb.cells[0]
        for cell in nb.cells:  # numbered as if it had not been there
            if cell.get("execution_count"):
                cell.execution_count -= 1
    return nb


def _replace_text(value, replacements):
    if isinstance(value, list):
        return [_replace_text(v, replacements) for v in value]
    if isinstance(value, str):
        for old, new in replacements:
            value = value.replace(old, new)
    return value


def cleaned(nb: nbformat.NotebookNode, replacements) -> nbformat.NotebookNode:
    """``nb`` made reproducible for committing: the committed notebook's metadata, no per-cell
    execution metadata (timestamps), and each ``(old, new)`` of ``replacements`` applied to every
    textual output (scratch folders)."""
    nb.metadata = nbformat.from_dict(METADATA)
    for cell in nb.cells:
        cell.metadata.pop("execution", None)
        for output in cell.get("outputs", []):
            if "text" in output:
                output["text"] = _replace_text(output["text"], replacements)
            for mime, value in output.get("data", {}).items():
                if mime.startswith("text/"):
                    output["data"][mime] = _replace_text(value, replacements)
    nbformat.validate(nb)
    return nb


def render(name: str, text: str, out_dir: Path = RENDER_DIR, *, dpi: float = RENDER_DPI) -> Path:
    """Execute notebook ``name`` (its ``text``) in a scratch copy of the repository layout and write
    the executed, cleaned notebook to ``out_dir/name``; returns that path."""
    with tempfile.TemporaryDirectory(prefix="thinning-render-") as tmp:
        scratch = Path(tmp).resolve()
        work = scratch_layout(scratch, name, text)
        out = scratch / "out"
        saved = os.environ.get("THINNING_NOTEBOOK_OUT")
        os.environ["THINNING_NOTEBOOK_OUT"] = str(out)
        try:
            nb = execute(work / name, dpi=dpi)
        finally:
            if saved is None:
                os.environ.pop("THINNING_NOTEBOOK_OUT", None)
            else:
                os.environ["THINNING_NOTEBOOK_OUT"] = saved
        # the longest first: the outputs folder before the scratch folder it lies in
        replacements = [(str(out), "<outputs>"), (str(scratch / "sample_videos"), "../sample_videos"),
                        (str(SAMPLES_DIR), "../sample_videos"), (str(scratch), "<scratch>")]
        nb = cleaned(nb, replacements)
        shutil.rmtree(out, ignore_errors=True)
    out_dir.mkdir(parents=True, exist_ok=True)
    target = out_dir / name
    target.write_text(nbformat.writes(nb) + "\n", encoding="utf-8")
    return target


def main(argv: list[str]) -> int:
    unknown = [a for a in argv if a not in ("--check", "--render")]
    if unknown:
        print(__doc__, file=sys.stderr)
        return 2
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
    if stale:
        return 1
    if "--render" in argv:
        for name, text in notebook_texts().items():
            target = render(name, text)
            print(f"rendered {target} ({target.stat().st_size / 1024:.0f} kB)")
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
