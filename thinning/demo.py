"""``thinning demo``: the whole job on the bundled sample recordings, and how they are made.

The scenario is invented: a water-based inkjet ink, product ``harbour-cyan``,
made in lots of which three replicate bridges are filmed between 3 mm plates
at 2,500 frames/s. Lots HC-0101 … HC-0106 are routine; HC-0107 drifted (its
polymer degraded, the relaxation time fell below specification); HC-0108 has
one spoiled recording (the camera stopped mid-record); in HC-0109 the third
replicate was saved straight from the camera as a 12-bit packed ``.cine``
(its header carries the clock, so its ``fps`` cell is empty). The recordings
come from :mod:`thinning.synth` (the ``.cine`` through
:func:`thinning.frames.writers.write_cine`); ``scripts/make_sample_videos.py``
regenerates them.
"""

from __future__ import annotations

import csv
import shutil
from pathlib import Path

import click
import numpy as np

from .cli import FriendlyCommand

PRODUCT = "harbour-cyan"
SURFACE_TENSION = "41mN/m"
FRAME_RATE = "2.5kHz"
PIXEL_SIZE = "25um"
#: (lot, made on, relaxation time of the lot in s); replicates scatter by 3 % around it.
LOTS = [
    ("HC-0101", "2026-09-07", 5.1e-3),
    ("HC-0102", "2026-09-14", 4.9e-3),
    ("HC-0103", "2026-09-21", 5.2e-3),
    ("HC-0104", "2026-09-28", 5.0e-3),
    ("HC-0105", "2026-10-05", 4.95e-3),
    ("HC-0106", "2026-10-12", 5.05e-3),
    ("HC-0107", "2026-10-19", 3.9e-3),
    ("HC-0108", "2026-10-26", 5.0e-3),
    ("HC-0109", "2026-11-02", 5.05e-3),
]
REPLICATES = 3
SPOILED = ("HC-0108", 2)  # this replicate's file breaks off partway
NATIVE = ("HC-0109", 3)   # this replicate is the camera's own .cine file
#: The native recording's exposure (s) and its trigger: the plates' stop, the start of free thinning.
NATIVE_EXPOSURE_S = 100e-6

SPECS_TOML = f"""# Product specifications for the demo (invented). Keep the real one under version control.
[[product]]
name = "{PRODUCT}"
relaxation_time_s = [0.0045, 0.0060]
# No limit on filament_lifetime_s: these threads fade below the optical resolution before they
# part (finding breakup-faded), so their lifetime is only a lower bound and would void every
# replicate. Limit it for a liquid whose thread is seen to part or whose lifetime is extrapolated.
replicates = {REPLICATES}
max_cv = 0.10
"""


def _scene(relaxation_time_s):
    from . import laws, synth

    fluid = laws.Fluid(surface_tension=0.041, solvent_viscosity=2.0e-3, density=1040.0,
                       polymer_modulus=4.0, relaxation_time=relaxation_time_s, extensibility=2.0e4)
    return synth.Scene(fluid=fluid, geometry="plates", plate_diameter_m=3e-3,
                       initial_diameter_m=0.9e-3, pixel_size_m=25e-6, fps_hz=2500.0,
                       frame_size_px=(160, 144), stretch_duration_s=2e-3, pre_roll_s=1e-3)


def write_sample_videos(folder) -> Path:
    """Render the demo recordings, ``manifest.csv`` and ``specs.toml`` into ``folder``.

    Deterministic: the same code gives the same files.
    """
    from . import synth

    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(20261202)
    rows = []
    for lot_index, (lot, made_on, lam) in enumerate(LOTS):
        for replicate in range(1, REPLICATES + 1):
            lam_rep = lam * (1.0 + 0.03 * rng.standard_normal())
            optics = synth.Optics(blur_sigma_px=float(rng.uniform(0.7, 1.4)),
                                  tilt_deg=float(rng.uniform(-1.0, 1.0)))
            seed = 1000 * lot_index + replicate
            native = (lot, replicate) == NATIVE
            name = f"{lot}-r{replicate}.{'cine' if native else 'avi'}"
            if native:
                _write_native(_scene(lam_rep), optics, folder / name, seed=seed)
            else:
                synth.write_recording(_scene(lam_rep), optics, folder / name, fmt="avi-mjpg",
                                      seed=seed, quality=80)
            if (lot, replicate) == SPOILED:
                data = (folder / name).read_bytes()
                (folder / name).write_bytes(data[: int(len(data) * 0.35)])
            notes = {SPOILED: "camera stopped early", NATIVE: "saved as the camera's .cine file"}
            rows.append({"path": name, "sample": f"{lot}-r{replicate}", "lot": lot,
                         "product": PRODUCT, "replicate": replicate, "made_on": made_on,
                         "notes": notes.get((lot, replicate), ""),
                         "fps": "" if native else FRAME_RATE})
    with open(folder / "manifest.csv", "w", newline="", encoding="utf-8") as fh:
        writer = csv.DictWriter(fh, fieldnames=list(rows[0]) + ["pixel_size", "surface_tension"])
        writer.writeheader()
        for row in rows:
            writer.writerow({**row, "pixel_size": PIXEL_SIZE, "surface_tension": SURFACE_TENSION})
    (folder / "specs.toml").write_text(SPECS_TOML, encoding="utf-8")
    return folder


def _write_native(scene, optics, path, *, seed):
    """The recording as the camera saves it: 12-bit packed .cine, the header's clock, exposure and
    trigger (the frame where the plates stop); the truth beside it."""
    from dataclasses import replace

    from . import synth
    from .frames.writers import write_cine
    from .synth_io import truth_path, write_truth

    frames, truth = synth.render_recording(scene, replace(optics, bit_depth=12), seed=seed)
    trigger = int(round((scene.pre_roll_s + scene.stretch_duration_s) * scene.fps_hz))
    write_cine(path, frames, fps=int(scene.fps_hz), bit_depth=12, packing="packed",
               exposure_s=NATIVE_EXPOSURE_S, trigger_frame=trigger,
               timestamps_s=np.arange(truth.n_frames) / scene.fps_hz)
    write_truth(truth, truth_path(path))


def find_sample_videos() -> Path | None:
    """The bundled ``sample_videos/`` folder: in the working directory or beside the source tree."""
    for candidate in (Path.cwd() / "sample_videos", Path(__file__).resolve().parent.parent / "sample_videos"):
        if (candidate / "manifest.csv").is_file():
            return candidate
    return None


MARKER = ".thinning-demo"


@click.command(cls=FriendlyCommand)
@click.option("--out", "out_dir", default="thinning-demo", show_default=True,
              type=click.Path(file_okay=False),
              help="Fresh folder for the demo's batch, database and reports (a previous demo "
                   "folder there is replaced).")
@click.option("--samples", type=click.Path(file_okay=False, exists=True), default=None,
              help="Folder with manifest.csv, specs.toml and the recordings; default: the bundled "
                   "sample_videos/ (rendered into OUT if it cannot be found).")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help="Local worker processes (default: the number of cores).")
def demo(out_dir, samples, workers):
    """Run the whole job on the bundled sample recordings: batch, records, verdicts, reports.

    Uses its own SQLite database inside OUT, never the default records database.

    Example:

      thinning demo --out thinning-demo
    """
    from .cli import FriendlyError

    out = Path(out_dir)
    if out.exists() and any(out.iterdir()) and not (out / MARKER).exists():
        raise FriendlyError(f"{out} exists and is not a previous demo folder; pass --out with a new folder.")
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    (out / MARKER).write_text("made by thinning demo\n")
    sample_dir = Path(samples) if samples else find_sample_videos()
    if sample_dir is None:
        click.echo("Sample recordings not found beside the tool; rendering them (about a minute)…")
        sample_dir = write_sample_videos(out / "sample_videos")
    db_url = f"sqlite:///{(out / 'records.db').resolve()}"
    from .batch import run_batch
    from .cli_batch import Progress
    from .records import open_records
    from .report.index import write_reports

    with open_records(db_url) as records:
        records.load_specs(sample_dir / "specs.toml")
        manifest = sample_dir / "manifest.csv"
        with Progress(_row_count(manifest)) as progress:
            report = run_batch(manifest, out / "batch", workers=workers, records=records,
                               on_row=lambda row, outcome, folder: progress.advance(row, outcome))
        click.echo(f"{report.n_rows} rows: {report.n_ok} ok, {report.n_failed} failed; "
                   f"table in {Path(report.results_csv).resolve()}")
        lots = records.lots()
        click.echo("\nLot verdicts:")
        for line in verdict_lines(lots):
            click.echo(line)
        index = write_reports(records, out / "reports", batch_dirs=[out / "batch"], database=db_url).index
    click.echo("")
    click.echo(f"Lot reports: {(out / 'reports').resolve()}/<lot>.html")
    click.echo(f"Index of the lots: {index.resolve()}")
    click.echo(f"Per-recording results: {(out / 'batch').resolve()}")
    click.echo(f"Records database: {db_url}")


def verdict_lines(lots) -> list[str]:
    """The demo's lines for lot verdicts: ``HC-0101  pass``, and under a ``review`` or ``fail``
    each reason as shown to people (naming the replicate where one is the cause) and the
    control-chart flags."""
    width = max((len(lot.lot) for lot in lots), default=0)
    lines = []
    for lot in lots:
        lines.append(f"  {lot.lot:<{width}}  {lot.verdict.verdict}")
        lines += [f"      - {reason}" for reason in lot.verdict.shown_reasons]
        if lot.chart_flags:
            lines.append(f"      - control chart: {', '.join(lot.chart_flags)}")
    return lines


def _row_count(manifest) -> int:
    from .batch.manifest import read_manifest

    return len(read_manifest(manifest))


__all__ = ["demo", "write_sample_videos", "find_sample_videos", "LOTS", "PRODUCT"]
