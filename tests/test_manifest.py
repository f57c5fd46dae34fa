"""Batch manifests: columns, relative paths, option fall-back, unusable manifests, --check."""

import math

import numpy as np
import pytest
import tifffile
from click.testing import CliRunner

from thinning.cli import cli
from thinning.batch.manifest import (MANIFEST_COLUMNS, UnusableManifest, check_manifest, read_manifest,
                               row_options)
from thinning.units import BadQuantity


def write_stack(path, rng, n_frames=4, shape=(16, 24)):
    """A tiny multi-page TIFF (TIFF carries no frame rate)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tifffile.imwrite(path, rng.integers(0, 256, (n_frames, *shape), dtype=np.uint8),
                     photometric="minisblack")
    return path


def test_columns_are_the_contracts():
    # docs/contract.md, `thinning batch`: path, identity columns, every analyse option (with the
    # version 2 additions --exposure and --fps-override)
    assert set(MANIFEST_COLUMNS) == {
        "path", "sample", "lot", "product", "replicate", "made_on", "notes", "fps", "pixel_size",
        "reference_width", "surface_tension", "density", "solvent_viscosity", "zero_shear_viscosity",
        "geometry", "roi", "exposure", "fps_override"}


def test_rows_paths_and_identity(tmp_path):
    manifest = tmp_path / "lots" / "m.csv"
    manifest.parent.mkdir()
    absolute = tmp_path / "elsewhere.tif"
    manifest.write_text(
        "\ufeffPath,sample,lot,fps\n"           # a spreadsheet's BOM and a capital letter
        "a/one.tif,S-1,L1,10kHz\n"
        "\n"                                    # a blank line is skipped, not counted
        f"{absolute},,L2,\n", encoding="utf-8")
    rows = read_manifest(manifest)
    assert [r.row for r in rows] == [1, 2]
    assert rows[0].source == manifest.parent / "a" / "one.tif"
    assert rows[0].path == "a/one.tif"
    assert rows[1].source == absolute
    assert rows[0].identity["sample"] == "S-1" and rows[0].identity["product"] == ""
    assert rows[0].name == "S-1"
    assert rows[1].name == "elsewhere"          # no sample: the file stem
    assert rows[0].cells["fps"] == "10kHz" and rows[1].cells["fps"] == ""


@pytest.mark.parametrize("text, words", [
    ("path,sampel\na.tif,x\n", "'sampel' \\(did you mean 'sample'\\?\\)"),
    ("Path,Surface Tension\na.tif,x\n", "'Surface Tension' \\(did you mean 'surface_tension'\\?\\)"),
    ("path\tsample\na.tif\tx\n", "not split into columns"),
    ("sample,lot\nx,L1\n", "no 'path' column"),
    ("path,fps,fps\na.tif,1,2\n", "'fps' appears more than once"),
    ("path,,fps\na.tif,,1\n", "column 2 has no name"),
    ("", "empty"),
])
def test_unusable_manifests_say_why(tmp_path, text, words):
    manifest = tmp_path / "m.csv"
    manifest.write_text(text)
    with pytest.raises(UnusableManifest, match=words) as caught:
        read_manifest(manifest)
    assert "\n" not in str(caught.value)


def test_unreadable_manifests(tmp_path):
    with pytest.raises(UnusableManifest, match="no such manifest"):
        read_manifest(tmp_path / "missing.csv")
    binary = tmp_path / "m.csv"
    binary.write_bytes(b"path\n\xff\xfe\x00garbage\n")
    with pytest.raises(UnusableManifest, match="not UTF-8"):
        read_manifest(binary)


def test_bad_row_shape_is_a_row_problem(tmp_path):
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,sample\na.tif,x,surplus\n,y\n")
    first, second = read_manifest(manifest)
    assert "3 cells" in first.problem
    assert "path cell is empty" in second.problem


def test_cell_then_batch_option_then_default(tmp_path):
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,fps,surface_tension,geometry\n"
                        "a.tif,2000,,\n"
                        "b.tif,,72,dripping\n")
    first, second = read_manifest(manifest)
    defaults = {"fps": "10kHz", "surface_tension": "35mN/m"}
    a, b = row_options(first, defaults), row_options(second, defaults)
    assert math.isclose(a.fps_hz, 2000.0) and math.isclose(b.fps_hz, 1e4)
    assert math.isclose(a.surface_tension_N_m, 0.035) and math.isclose(b.surface_tension_N_m, 0.072)
    assert a.geometry == "plates" and b.geometry == "dripping"   # contract default: plates
    assert a.density_kg_m3 is None


def test_bad_cell_names_its_column(tmp_path):
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,pixel_size\na.tif,35mN/m\n")
    (row,) = read_manifest(manifest)
    with pytest.raises(BadQuantity, match="column pixel_size"):
        row_options(row)


def test_check_reports_every_problem_by_row(tmp_path):
    rng = np.random.default_rng(1)
    write_stack(tmp_path / "good.tif", rng)
    write_stack(tmp_path / "nofps.tif", rng)
    (tmp_path / "empty").mkdir()
    (tmp_path / "corrupt.tif").write_bytes(rng.integers(0, 256, 500, dtype=np.uint8).tobytes())
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,fps,pixel_size\n"
                        "good.tif,10kHz,\n"          # 1: clean
                        "missing.avi,10kHz,\n"       # 2: no such file
                        "nofps.tif,,\n"              # 3: TIFF carries no rate, none given
                        "empty,10kHz,\n"             # 4: folder without images
                        "corrupt.tif,10kHz,\n"       # 5: not a TIFF
                        "good.tif,10 m,3 kg\n")      # 6: two bad cells, both reported
    problems = check_manifest(manifest, {"pixel_size": "10um", "surface_tension": "35mN/m"})
    by_row = {}
    for p in problems:
        by_row.setdefault(p.row, []).append(p.message)
    assert sorted(by_row) == [2, 3, 4, 5, 6]
    assert "no such file" in by_row[2][0]
    assert "frame rate" in by_row[3][0]
    assert "no image files" in by_row[4][0]
    assert "TIFF" in by_row[5][0]
    assert len(by_row[6]) == 2 and "column fps" in by_row[6][0] and "column pixel_size" in by_row[6][1]
    assert check_manifest(tmp_path / "m.csv", {"surface_tension": "35mN/m"})  # scale missing too
    clean = tmp_path / "clean.csv"
    clean.write_text("path,fps\ngood.tif,10kHz\n")
    assert check_manifest(clean, {"pixel_size": "10um", "surface_tension": "35mN/m"}) == []


def test_check_command_exit_status(tmp_path):
    rng = np.random.default_rng(2)
    write_stack(tmp_path / "good.tif", rng)
    clean, dirty = tmp_path / "clean.csv", tmp_path / "dirty.csv"
    clean.write_text("path\ngood.tif\n")
    dirty.write_text("path\ngood.tif\nmissing.tif\n")
    runner = CliRunner()
    common = ["--out", str(tmp_path / "out"), "--fps", "5kHz", "--pixel-size", "5um",
              "--surface-tension", "40mN/m"]
    ok = runner.invoke(cli, ["batch", str(clean), "--check", *common])
    assert ok.exit_code == 0, ok.output
    bad = runner.invoke(cli, ["batch", str(dirty), "--check", *common])
    assert bad.exit_code == 2
    assert "row 2:" in bad.output and "row 1:" not in bad.output
    assert not (tmp_path / "out").exists()      # --check analyses and writes nothing
    unknown = tmp_path / "unknown.csv"
    unknown.write_text("path,pixelsize\ngood.tif,5um\n")
    result = runner.invoke(cli, ["batch", str(unknown), "--check", *common])
    assert result.exit_code == 2 and "'pixelsize'" in result.output


def test_cells_keep_quoted_line_breaks_and_unicode_separators(tmp_path):
    # the csv module reads the file itself: a quoted newline stays in its cell, and U+2028 (a
    # line separator to str.splitlines) neither splits the row nor drops the options after it
    manifest = tmp_path / "m.csv"
    manifest.write_text('path,sample,notes,fps\n'
                        'a.tif,S-1,"first line\nsecond line",10kHz\n'
                        'b.tif,S-2,odd\u2028cell,20kHz\n', encoding="utf-8")
    rows = read_manifest(manifest)
    assert [r.identity["sample"] for r in rows] == ["S-1", "S-2"]
    assert rows[0].identity["notes"] == "first line\nsecond line"
    assert rows[1].identity["notes"] == "odd\u2028cell"
    assert [r.cells["fps"] for r in rows] == ["10kHz", "20kHz"]


def test_semicolon_separated_manifests_are_read(tmp_path):
    # what spreadsheets write in many locales; a decimal comma in a cell is then refused by name
    manifest = tmp_path / "m.csv"
    manifest.write_text("path;sample;lot;fps\na.tif;S-1;L1;10kHz\nb.tif;S-2;L1;2,5kHz\n",
                        encoding="utf-8")
    rows = read_manifest(manifest)
    assert [r.identity["sample"] for r in rows] == ["S-1", "S-2"]
    assert rows[0].cells["fps"] == "10kHz"
    with pytest.raises(BadQuantity, match="comma"):
        row_options(rows[1])


def test_bad_dates_and_duplicate_identities_are_row_problems_for_check_and_batch(tmp_path):
    # the same rule for --check, batch and records load: a row that records load would refuse
    # is refused at once, by row
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,sample,lot,product,replicate,made_on\n"
                        "a.tif,S1,L1,ink,1,2026-13-45\n"
                        "b.tif,S2,L1,ink,1,2026-03-01\n"
                        "c.tif,S2,L1,ink,1,2026-03-01\n"
                        "d.tif,S2,L1,ink,2,\n")
    rows = read_manifest(manifest)
    assert "not an ISO date" in rows[0].problem
    assert rows[1].problem is None and rows[3].problem is None
    assert "as row 2" in rows[2].problem
    problems = check_manifest(manifest)
    assert {p.row for p in problems if "ISO date" in p.message or "as row" in p.message} == {1, 3}
