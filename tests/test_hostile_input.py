"""Hostile and careless input against every command (issue 13's list and more).

Each case runs in a copy of one workspace that already holds earlier results: a finished
``analyse`` folder, a finished one-row batch folder and a records database loaded from it. Every
case asserts the exit status, that the output is one sentence (or click's own three-line usage
message for a malformed command line) without a traceback, and that nothing already written
changed or gained debris beside it.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import struct
import subprocess
import sys
import zlib
from pathlib import Path

import numpy as np
import pytest
import tifffile
from click.testing import CliRunner

from thinning import synth
from thinning.cli import cli, main

SMALL = dict(frame_size_px=(160, 144), pixel_size_m=25e-6, fps_hz=2500.0, initial_diameter_m=0.9e-3)
CALIBRATION = ["--fps", "2.5kHz", "--pixel-size", "25um", "--surface-tension", "62mN/m"]
SPECS = '[[product]]\nname = "ink"\nrelaxation_time_s = [0.004, 0.02]\nreplicates = 1\nmax_cv = 0.2\n'


@pytest.fixture(scope="module")
def workspace(tmp_path_factory):
    """rec.avi; earlier/analysed (analyse), earlier/batch (a one-row batch), earlier/records.db."""
    ws = tmp_path_factory.mktemp("ws")
    synth.write_recording(synth.dilute_polymer_plates(**SMALL), synth.Optics(), ws / "rec.avi",
                          fmt="avi-raw", seed=7)
    (ws / "earlier").mkdir()
    (ws / "manifest.csv").write_text("path,sample,lot,product,replicate\nrec.avi,S1,L1,ink,1\n")
    (ws / "specs.toml").write_text(SPECS)
    db = f"sqlite:///{ws / 'earlier' / 'records.db'}"
    for args in (["analyse", ws / "rec.avi", "--out", ws / "earlier" / "analysed", *CALIBRATION],
                 ["batch", ws / "manifest.csv", "--out", ws / "earlier" / "batch", "--workers", "1",
                  *CALIBRATION],
                 ["records", "load-specs", ws / "specs.toml", "--db", db],
                 ["records", "load", ws / "earlier" / "batch", "--db", db]):
        result = CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)
        assert result.exit_code == 0, result.output
    return ws


def snapshot(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def png(width, height) -> bytes:
    """A PNG whose header claims width × height 8-bit grey pixels."""
    def chunk(kind, data):
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data))
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", width, height, 8, 0, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(b"\0" * 99)) + chunk(b"IEND", b""))


def analyse(ws, source, *extra, out="o", calibration=CALIBRATION):
    return ["analyse", source, "--out", ws / out, *calibration, *extra]


def with_option(name, value):
    """The calibration with one option replaced (or added)."""
    options = list(CALIBRATION)
    if name in options:
        options[options.index(name) + 1] = value
    else:
        options += [name, value]
    return options


def write(path: Path, data) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(data) if isinstance(data, bytes) else path.write_text(data)
    return path


def manifest(ws, text, *extra, check=False):
    path = write(ws / "m.csv", text) if isinstance(text, (str, bytes)) else text
    return ["batch", path, "--out", ws / "b", *(["--check"] if check else []), *CALIBRATION, *extra]


def specs(ws, text):
    return ["records", "load-specs", write(ws / "s.toml", text), "--db", db(ws)]


def db(ws):
    return f"sqlite:///{ws / 'earlier' / 'records.db'}"


def edited_batch(ws, edit):
    """A copy of the earlier batch folder with one change made by ``edit(row_folder)``."""
    copy = ws / "copy"
    shutil.copytree(ws / "earlier" / "batch", copy)
    edit(next(p for p in copy.iterdir() if p.is_dir()))
    return copy


def edit_lambda(folder):
    data = json.loads((folder / "result.json").read_text())
    data["relaxation_time_s"] *= 1.2
    (folder / "result.json").write_text(json.dumps(data))


def frames_folder(ws, name, images):
    import cv2

    folder = ws / name
    folder.mkdir()
    for i, image in enumerate(images):
        cv2.imwrite(str(folder / f"f{i:03d}.png"), image)
    return folder


def tiff_pages(ws):
    path = ws / "pages.tif"
    with tifffile.TiffWriter(path) as tif:
        tif.write(np.full((64, 64), 200, np.uint8), photometric="minisblack")
        tif.write(np.full((32, 48), 200, np.uint8), photometric="minisblack")
    return path


def backlight(ws):
    rng = np.random.default_rng(3)
    frames = 210.0 + rng.normal(0.0, 2.0, (30, 120, 100))
    path = ws / "lamp.tif"
    tifffile.imwrite(path, frames.clip(0, 255).astype(np.uint8), photometric="minisblack")
    return path


def grey_frames(ws):
    """The workspace recording's frames, grey."""
    import cv2

    cap = cv2.VideoCapture(str(ws / "rec.avi"))
    frames = []
    while True:
        ok, frame = cap.read()
        if not ok:
            break
        frames.append(cv2.cvtColor(frame, cv2.COLOR_BGR2GRAY))
    return frames


def mixed_bits(ws):
    frames = grey_frames(ws)
    half = len(frames) // 2
    images = frames[:half] + [f.astype(np.uint16) * 257 for f in frames[half:]]
    return frames_folder(ws, "mixed", images)


def symlink_loop(ws):
    os.symlink(ws / "loop.avi", ws / "loop.avi")
    return ws / "loop.avi"


def doubtful(ws):
    return json.loads((ws / "o" / "result.json").read_text())["quality"] == "doubtful"


def row_failed(number, words):
    """A check: row ``number`` of the batch folder ws/b failed, its reason holding ``words``."""
    def check(ws):
        import csv

        with open(ws / "b" / "results.csv", newline="", encoding="utf-8-sig") as handle:
            row = list(csv.DictReader(handle))[number - 1]
        return row["status"] == "failed" and words.lower() in row["reason"].lower()
    return check


def rewrite_with_digests(folder):
    """A curve rewritten with its row.json made to agree: only the stored digests can tell."""
    from thinning.batch.rows import ROW_FILE, outputs_digest

    (folder / "diameter.csv").write_text((folder / "diameter.csv").read_text() + "\n")
    record = json.loads((folder / ROW_FILE).read_text())
    record["outputs"] = outputs_digest(folder)
    (folder / ROW_FILE).write_text(json.dumps(record))


def native(ws, kind):
    """The workspace's recording as a camera's own file: ``cine`` or ``mraw`` (+ ``.cih``)."""
    from thinning.frames.writers import write_cine, write_mraw

    frames = grey_frames(ws)
    if kind == "cine":
        write_cine(ws / "rec.cine", frames, fps=2500, bit_depth=8, packing="unpacked", exposure_s=40e-6)
        return ws / "rec.cine"
    write_mraw(ws / "rec.mraw", frames, fps=2500, bit_depth=8, shutter_s=40e-6)
    return ws / "rec.mraw"


def without_data(path: Path) -> Path:
    """The .cih of an .mraw whose data file was deleted."""
    path.unlink()
    return path.with_suffix(".cih")


def without_header(path: Path) -> Path:
    path.with_suffix(".cih").unlink()
    return path


GOOD_ROW = "path,sample,lot,product,replicate\nrec.avi,S1,L1,ink,1\n"

#: (id, arguments from the workspace, exit status, words the message holds, extra check or None)
CASES = [
    # ---- sources
    ("missing-file", lambda ws: analyse(ws, ws / "nope.avi"), 2, "no such file", None),
    ("empty-folder", lambda ws: analyse(ws, (ws / "e").mkdir() or ws / "e"), 2, "no image files", None),
    ("folder-of-text", lambda ws: analyse(ws, write(ws / "t" / "a.txt", "x").parent), 2, "no image files", None),
    ("junk-bytes-avi", lambda ws: analyse(ws, write(ws / "j.avi", b"\0junk" * 400)), 2, "", None),
    ("truncated-avi-header", lambda ws: analyse(ws, write(ws / "t.avi", (ws / "rec.avi").read_bytes()[:300])),
     2, "", None),
    ("folder-named-avi", lambda ws: analyse(ws, (ws / "d.avi").mkdir() or ws / "d.avi"), 2, "no image files", None),
    ("zero-byte-file", lambda ws: analyse(ws, write(ws / "z.avi", b"")), 2, "empty", None),
    ("symlink-loop", lambda ws: analyse(ws, symlink_loop(ws)), 2, "", None),
    ("huge-png-header", lambda ws: analyse(ws, write(ws / "h" / "f1.png", png(100000, 100000)).parent),
     2, "not a readable image", None),
    ("garbage-tiff", lambda ws: analyse(ws, write(ws / "g.tif", b"II*\0" + b"\xff" * 500)), 2, "", None),
    ("backlight-only", lambda ws: analyse(ws, backlight(ws)), 2, "no filament", None),
    ("tiff-pages-of-two-sizes", lambda ws: analyse(ws, tiff_pages(ws)), 2, "", None),
    ("mixed-8-and-16-bit-folder", lambda ws: analyse(ws, mixed_bits(ws)), 0, "", doubtful),
    ("video-folder-hints-batch", lambda ws: analyse(ws, shutil.copy(ws / "rec.avi", (ws / "v").mkdir() or ws / "v")
                                                     and ws / "v"), 2, "batch", None),
    ("tiff-without-frame-rate", lambda ws: analyse(ws, backlight(ws), calibration=CALIBRATION[2:]),
     2, "frame rate", None),
    # ---- the output folder
    ("out-name-300-bytes", lambda ws: analyse(ws, ws / "rec.avi", out="a" * 300), 2, "bytes", None),
    ("out-inside-image-folder", lambda ws: analyse(ws, mixed_bits(ws), out="mixed/results"), 2,
     "inside the image folder", None),
    ("out-is-the-image-folder", lambda ws: analyse(ws, mixed_bits(ws), out="mixed"), 2,
     "inside the image folder", None),
    ("out-is-a-file", lambda ws: analyse(ws, ws / "rec.avi", out="manifest.csv"), 2, "", None),
    ("out-on-a-read-only-file-system", lambda ws: ["analyse", ws / "rec.avi", "--out", "/sys/thinning-x",
                                                   *CALIBRATION], 2, "may not write", None),
    # ---- options and units
    ("fps-1e300", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "1e300")), 2, "", None),
    ("fps-zero", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "0")), 2, "", None),
    ("fps-negative", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "-5kHz")), 2, "", None),
    ("fps-nan", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "nan")), 2, "", None),
    ("fps-inf", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "inf Hz")), 2, "", None),
    ("fps-empty", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "")), 2, "", None),
    ("fps-decimal-comma", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "2,5kHz")),
     2, "comma", None),
    ("fps-bare-0.01", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "0.01")), 2,
     "plausible", None),
    ("fps-a-length", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--fps", "3 mm")), 2, "", None),
    ("pixel-size-1e300m", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--pixel-size", "1e300m")),
     2, "plausible", None),
    ("pixel-size-percent", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--pixel-size", "25%")),
     2, "", None),
    ("pixel-size-um-percent", lambda ws: analyse(ws, ws / "rec.avi",
                                                 calibration=with_option("--pixel-size", "25um%")), 2, "", None),
    ("pixel-size-angle", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--pixel-size", "25 um*rad")),
     2, "", None),
    ("pixel-size-bare-0.025", lambda ws: analyse(ws, ws / "rec.avi",
                                                 calibration=with_option("--pixel-size", "0.025")), 2,
     "plausible", None),
    ("pixel-size-decimal-comma", lambda ws: analyse(ws, ws / "rec.avi",
                                                    calibration=with_option("--pixel-size", "25,4um")), 2,
     "comma", None),
    ("surface-tension-per-pixel", lambda ws: analyse(ws, ws / "rec.avi",
                                                     calibration=with_option("--surface-tension", "41 mN/m/px")),
     2, "", None),
    ("surface-tension-1e308", lambda ws: analyse(ws, ws / "rec.avi",
                                                 calibration=with_option("--surface-tension", "1e308N/m")),
     2, "plausible", None),
    ("surface-tension-a-mass", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--surface-tension",
                                                                                              "3 kg")),
     2, "not a surface tension", None),
    ("surface-tension-missing", lambda ws: analyse(ws, ws / "rec.avi", calibration=CALIBRATION[:4]), 2,
     "surface tension", None),
    ("reference-width-1e30m", lambda ws: analyse(ws, ws / "rec.avi", calibration=[
        "--fps", "2.5kHz", "--reference-width", "1e30m", "--surface-tension", "62mN/m"]), 2, "plausible", None),
    ("density-negative", lambda ws: analyse(ws, ws / "rec.avi", "--density", "-1kg/m^3"), 2, "", None),
    ("viscosity-words", lambda ws: analyse(ws, ws / "rec.avi", "--solvent-viscosity", "thick"), 2, "", None),
    ("roi-outside-frame", lambda ws: analyse(ws, ws / "rec.avi", "--roi", "1000,1000,2000,2000"), 2,
     "8×8", None),
    ("roi-malformed", lambda ws: analyse(ws, ws / "rec.avi", "--roi", "a,b"), 2, "", None),
    ("geometry-unknown", lambda ws: analyse(ws, ws / "rec.avi", "--geometry", "banana"), 2, "banana", None),
    ("unknown-option", lambda ws: analyse(ws, ws / "rec.avi", "--bogus"), 2, "--bogus", None),
    # ---- manifests
    ("manifest-missing", lambda ws: manifest(ws, ws / "none.csv"), 2, "no such manifest", None),
    ("manifest-empty", lambda ws: manifest(ws, ""), 2, "", None),
    ("manifest-header-only", lambda ws: manifest(ws, "path,sample\n"), 2, "", None),
    ("manifest-a-folder", lambda ws: manifest(ws, (ws / "mf").mkdir() or ws / "mf"), 2, "", None),
    ("manifest-binary", lambda ws: manifest(ws, b"\x00\xff\xfe" * 300), 2, "", None),
    ("manifest-utf16", lambda ws: manifest(ws, GOOD_ROW.encode("utf-16")), 2, "", None),
    ("manifest-column-typo", lambda ws: manifest(ws, "pth,sample\nrec.avi,S1\n"), 2, "did you mean", None),
    ("manifest-no-path-column", lambda ws: manifest(ws, "sample,lot\nS1,L1\n"), 2, "path", None),
    # a bad row is a failed row of the batch, named with its reason (the batch goes on, exit 0);
    # --check refuses the manifest instead, listing every problem by row
    ("manifest-bad-date", lambda ws: manifest(ws, "path,sample,made_on\nrec.avi,S1,2026-13-45\n"), 0,
     "", row_failed(1, "made_on")),
    ("manifest-bad-date-check", lambda ws: manifest(ws, "path,sample,made_on\nrec.avi,S1,2026-13-45\n",
                                                    check=True), 2, "made_on", None),
    # a replicate is a label ("1", "A", "one"), the same for --check, batch and records load
    ("manifest-word-replicate", lambda ws: manifest(ws, "path,sample,replicate\nrec.avi,S1,one\n", "--db",
                                                    f"sqlite:///{ws / 'other.db'}"), 0, "", None),
    ("manifest-duplicate-identity", lambda ws: manifest(ws, GOOD_ROW + "rec.avi,S1,L1,ink,1\n"), 0, "",
     row_failed(2, "same product, lot, sample and replicate")),
    ("manifest-duplicate-identity-check", lambda ws: manifest(ws, GOOD_ROW + "rec.avi,S1,L1,ink,1\n", check=True),
     2, "same product, lot, sample and replicate", None),
    ("manifest-bad-cell-unit", lambda ws: manifest(ws, "path,sample,fps\nrec.avi,S1,fast\n"), 0, "",
     row_failed(1, "column fps")),
    ("manifest-decimal-comma-cell", lambda ws: manifest(ws, 'path,sample,fps\nrec.avi,S1,"2,5kHz"\n'), 0,
     "", row_failed(1, "comma")),
    ("manifest-escaping-path", lambda ws: manifest(ws, "path,sample\n../../../../etc/passwd,S1\n"), 0, "",
     row_failed(1, "")),
    ("batch-out-is-a-file", lambda ws: ["batch", write(ws / "m.csv", GOOD_ROW), "--out", ws / "manifest.csv",
                                        *CALIBRATION], 2, "", None),
    ("batch-out-name-300-bytes", lambda ws: ["batch", write(ws / "m.csv", GOOD_ROW), "--out", ws / ("b" * 300),
                                             *CALIBRATION], 2, "bytes", None),
    ("batch-specs-without-db", lambda ws: manifest(ws, GOOD_ROW, "--specs", ws / "specs.toml"), 2, "--db", None),
    ("batch-db-nonsense-url", lambda ws: manifest(ws, GOOD_ROW, "--db", "nonsense://x"), 2, "", None),
    ("batch-workers-zero", lambda ws: manifest(ws, GOOD_ROW, "--workers", "0"), 2, "", None),
    # ---- specifications
    ("specs-binary", lambda ws: specs(ws, b"\x00\x01\xff" * 100), 2, "", None),
    ("specs-not-toml", lambda ws: specs(ws, "[[product]\nname = 'x'\n"), 2, "", None),
    ("specs-overflowing-number", lambda ws: specs(ws, SPECS.replace("0.02]", "1e999]")), 2, "", None),
    ("specs-negative-limits", lambda ws: specs(ws, SPECS.replace("[0.004, 0.02]", "[-5, -1]")), 2, "", None),
    ("specs-min-above-max", lambda ws: specs(ws, SPECS.replace("[0.004, 0.02]", "[0.02, 0.004]")), 2, "", None),
    ("specs-a-billion-replicates", lambda ws: specs(ws, SPECS.replace("replicates = 1", "replicates = 1000000000")),
     2, "", None),
    ("specs-max-cv-1e308", lambda ws: specs(ws, SPECS.replace("max_cv = 0.2", "max_cv = 1e308")), 2, "", None),
    ("specs-unknown-key", lambda ws: specs(ws, SPECS + "colour = 'blue'\n"), 2, "", None),
    ("specs-no-product-name", lambda ws: specs(ws, SPECS.replace('name = "ink"\n', "")), 2, "", None),
    ("specs-unknown-decision-rule", lambda ws: specs(ws, SPECS + 'decision_rule = "lenient"\n'), 2, "", None),
    ("specs-missing-file", lambda ws: ["records", "load-specs", ws / "none.toml", "--db", db(ws)], 2, "", None),
    # ---- records and reports
    ("db-a-text-file", lambda ws: ["records", "lots", "--db", f"sqlite:///{write(ws / 'x.db', 'not a db' * 50)}"],
     2, "", None),
    ("db-a-folder", lambda ws: ["records", "lots", "--db", f"sqlite:///{ws / 'earlier'}"], 2, "", None),
    ("db-nonsense-url", lambda ws: ["records", "lots", "--db", "foo://bar"], 2, "", None),
    ("records-load-edited-lambda", lambda ws: ["records", "load", edited_batch(ws, edit_lambda), "--db", db(ws)],
     2, "result.json", None),
    ("records-load-result-a-list", lambda ws: ["records", "load", edited_batch(
        ws, lambda f: (f / "result.json").write_text("[1, 2]")), "--db", db(ws)], 2, "result.json", None),
    ("records-load-row-record-garbled", lambda ws: ["records", "load", edited_batch(
        ws, lambda f: (f / "row.json").write_text("{{{")), "--db", db(ws)], 2, "row.json", None),
    ("records-load-curve-removed", lambda ws: ["records", "load", edited_batch(
        ws, lambda f: (f / "diameter.csv").unlink()), "--db", db(ws)], 2, "diameter.csv", None),
    ("records-load-no-results-table", lambda ws: ["records", "load", (ws / "nb").mkdir() or ws / "nb",
                                                  "--db", db(ws)], 2, "results.csv", None),
    ("records-load-missing-folder", lambda ws: ["records", "load", ws / "none", "--db", db(ws)], 2, "", None),
    ("records-verify-rewritten-folder", lambda ws: ["records", "verify", "--db", db(ws), "--folder", edited_batch(
        ws, rewrite_with_digests)], 2, "digests stored", None),
    ("records-show-unknown-lot", lambda ws: ["records", "show", "NOPE", "--db", db(ws)], 2, "NOPE", None),
    ("records-show-lot-case", lambda ws: ["records", "show", "l1", "--db", db(ws)], 2, "L1", None),
    ("records-lots-unknown-product", lambda ws: ["records", "lots", "--product", "inc", "--db", db(ws)], 2, "", None),
    ("records-export-missing-folder", lambda ws: ["records", "export", "--out", ws / "no" / "x.csv", "--db", db(ws)],
     2, "", None),
    ("report-unknown-lot", lambda ws: ["report", "NOPE", "--out", ws / "r", "--db", db(ws)], 2, "NOPE", None),
    ("report-out-is-a-file", lambda ws: ["report", "L1", "--out", ws / "manifest.csv", "--db", db(ws)], 2, "", None),
    ("demo-out-not-a-demo-folder", lambda ws: ["demo", "--out", ws / "earlier"], 2, "not a previous demo", None),
    ("demo-samples-missing", lambda ws: ["demo", "--out", ws / "d", "--samples", ws / "none"], 2, "", None),
    ("unknown-command", lambda ws: ["analyze", ws / "rec.avi"], 2, "analyze", None),
    # ---- native camera files and their clock (issue 15)
    ("cine-fps-disagrees", lambda ws: analyse(ws, native(ws, "cine"), calibration=with_option("--fps", "2.6kHz")),
     2, "differs from the recording rate in the file's header", None),
    ("cine-fps-override-without-fps", lambda ws: analyse(ws, native(ws, "cine"), "--fps-override",
                                                          calibration=CALIBRATION[2:]), 2, "without --fps", None),
    ("cine-cut-in-its-header", lambda ws: analyse(ws, write(ws / "c.cine", native(ws, "cine").read_bytes()[:100])),
     2, "c.cine", None),
    ("cine-of-junk", lambda ws: analyse(ws, write(ws / "j.cine", b"CI" + b"\xff" * 3000)), 2, "j.cine", None),
    ("mraw-without-its-header", lambda ws: analyse(ws, without_header(native(ws, "mraw"))), 2,
     "no .cih or .cihx header", None),
    ("cih-naming-no-data", lambda ws: analyse(ws, without_data(native(ws, "mraw"))), 2, "rec.cih", None),
    ("mraw-fps-disagrees", lambda ws: analyse(ws, native(ws, "mraw"), calibration=with_option("--fps", "5kHz")),
     2, "differs from the recording rate", None),
    ("exposure-percent", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--exposure", "20%")),
     2, "exposure time", None),
    ("exposure-zero", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--exposure", "0us")),
     2, "positive", None),
    ("exposure-a-length", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--exposure", "3mm")),
     2, "exposure time", None),
    ("exposure-an-hour", lambda ws: analyse(ws, ws / "rec.avi", calibration=with_option("--exposure", "1h")),
     2, "plausible range", None),
    ("manifest-fps-override-maybe", lambda ws: manifest(ws, GOOD_ROW.replace("replicate", "replicate,fps_override")
                                                        .replace(",1\n", ",1,maybe\n"), check=True),
     2, "", None),
    # ---- this stop's commands and options: report --all, records exclude, baselines, --figures
    ("report-all-and-a-lot", lambda ws: ["report", "L1", "--all", "--db", db(ws), "--out", ws / "r"], 2, "", None),
    ("report-neither-lot-nor-all", lambda ws: ["report", "--db", db(ws), "--out", ws / "r"], 2, "", None),
    ("report-all-batch-not-a-batch", lambda ws: ["report", "--all", "--db", db(ws), "--out", ws / "r",
                                                 "--batch", (ws / "nb").mkdir() or ws / "nb"], 2, "", None),
    ("exclude-unknown-lot", lambda ws: ["records", "exclude", "NOPE", "--reason", "x", "--db", db(ws)], 2,
     "NOPE", None),
    ("exclude-empty-reason", lambda ws: ["records", "exclude", "L1", "--reason", " ", "--db", db(ws)], 2,
     "reason", None),
    ("withdraw-never-excluded", lambda ws: ["records", "exclude", "L1", "--withdraw", "--reason", "x",
                                            "--db", db(ws)], 2, "", None),
    ("baseline-lots-not-a-list", lambda ws: specs(ws, SPECS + '[product.baseline]\nname = "b"\nlots = "L1"\n'),
     2, "", None),
    ("baseline-bad-date", lambda ws: specs(ws, SPECS + '[product.baseline]\nname = "b"\nfrom = "2026-13-45"\n'),
     2, "", None),
    ("baseline-unknown-key", lambda ws: specs(ws, SPECS + '[product.baseline]\nname = "b"\nlot = ["L1"]\n'),
     2, "", None),
    ("figures-gif", lambda ws: analyse(ws, ws / "rec.avi", "--figures", "gif"), 2, "--figures", None),
    ("batch-figures-gif", lambda ws: manifest(ws, GOOD_ROW, "--figures", "gif"), 2, "--figures", None),
    ("manifest-cine-fps-disagrees", lambda ws: manifest(
        ws, f"path,sample,lot,product,replicate,fps\n{native(ws, 'cine')},S1,L1,ink,1,3kHz\n", check=True),
     2, "", None),
]


def run_main(args: list[str]) -> tuple[int, str]:
    """Run the command line's entry point (thinning.cli.main, with its exit statuses) in this
    process; returns the exit status and what it printed (stdout and stderr interleaved)."""
    with CliRunner().isolation() as (_, _, output):
        try:
            main(args)
            code = 0
        except SystemExit as exc:
            code = exc.code if isinstance(exc.code, int) else 1
        return code, output.getvalue().decode("utf-8", "replace")


def one_sentence(output: str) -> bool:
    """One line of our own, or click's usage message (Usage, Try, one Error line)."""
    lines = [line for line in output.strip().splitlines() if line.strip()]
    if len(lines) == 1:
        return True
    return len(lines) == 3 and lines[0].startswith("Usage:") and lines[2].startswith("Error:")


def test_every_issue_item_has_a_case_and_there_are_forty_more():
    assert len(CASES) >= 20 + 40 and len({c[0] for c in CASES}) == len(CASES)


@pytest.mark.parametrize("name, make, status, words, check", CASES, ids=[c[0] for c in CASES])
def test_hostile_input(workspace, tmp_path, name, make, status, words, check):
    ws = tmp_path / "ws"
    shutil.copytree(workspace, ws, symlinks=True)
    before = snapshot(ws / "earlier")
    args = [str(a) for a in make(ws)]
    code, output = run_main(args)
    assert "Traceback" not in output, output
    assert code == status, (code, output)
    if status and "--check" in args:
        lines = output.strip().splitlines()   # every problem by row, then the count
        assert all(line.startswith(("row ", "thinning: ")) for line in lines), output
    elif status:
        assert one_sentence(output), output
        assert words.lower() in output.lower(), output
    if check is not None:
        assert check(ws), output
    assert snapshot(ws / "earlier") == before
    debris = [p.name for p in ws.rglob("*") if p.name.endswith((".tmp", ".thinning-tmp"))]
    assert not debris, debris


def test_a_name_that_is_not_utf8_is_refused_by_a_real_process(workspace, tmp_path):
    # OpenCV's reader once died of a segfault on such a name; a real process shows that it does not
    ws = tmp_path / "ws"
    shutil.copytree(workspace, ws, symlinks=True)
    bad = os.fsdecode(os.fsencode(str(ws)) + b"/caf\xe9\xff.avi")
    shutil.copy(ws / "rec.avi", bad)
    before = snapshot(ws / "earlier")
    proc = subprocess.run([sys.executable, "-m", "thinning.cli", "analyse", bad, "--out", str(ws / "o"),
                           *CALIBRATION], capture_output=True, cwd=ws)
    err = proc.stderr.decode("utf-8", "replace")
    assert proc.returncode == 2 and "not valid UTF-8" in err and one_sentence(err), err
    assert snapshot(ws / "earlier") == before and not (ws / "o").exists()
