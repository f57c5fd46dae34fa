"""The lot report (thinning.report.lot): content, escaping, self-containment, and how Chromium shows it."""

import base64
import html as html_module
import re

import numpy as np
import pytest
from click.testing import CliRunner

from services import fake_result, run_chromium, source_hash, write_batch
from thinning import records as rec
from thinning.cli_records import report as report_cli
from thinning.report.lot import lot_report_html, report_filename, write_lot_report

pytestmark = pytest.mark.slow  # renders or runs whole recordings, batches or services

SPECS = '[[product]]\nname = "ink-A"\nrelaxation_time_s = [0.008, 0.012]\nreplicates = 3\nmax_cv = 0.10\n'
HOSTILE_SAMPLE = '<script>alert("x")</script>'
HOSTILE_NOTE = '<img src=x onerror="alert(1)"> & more'

#: background of the verdict banner per verdict (the template's --pass/--review/--fail colours)
BANNER_RGB = {"pass": (0x1E, 0x7B, 0x34), "review": (0xA1, 0x5C, 0x00), "fail": (0xB4, 0x23, 0x18)}


def _lot(lot, lams, made_on, *, sample="S", notes=""):
    return [dict(sample=sample, lot=lot, product="ink-A", replicate=str(i), made_on=made_on, notes=notes,
                 analysed_at="2026-02-01T10:00:00Z",
                 result=fake_result(relaxation_time_s=lam, sha256=source_hash(lot, i),
                                    warnings=["few frames in the fit window"] if i == 2 else []))
            for i, lam in enumerate(lams, start=1)]


def _filled(url, tmp_path):
    rng = np.random.default_rng(5)
    rows = []
    for k in range(6):
        rows += _lot(f"L{k}", list(rng.normal(0.010, 0.0002, size=3)), f"2026-01-{k + 1:02d}")
    rows += _lot("A/B 7", [0.0131, 0.0129, 0.0127], "2026-01-20", sample=HOSTILE_SAMPLE, notes=HOSTILE_NOTE)
    rows += _lot("NEW", [0.0100, 0.0101], "2026-01-21")
    write_batch(tmp_path / "batch", rows)
    (tmp_path / "specs.toml").write_text(SPECS)
    records = rec.open_records(url)
    records.load_specs(tmp_path / "specs.toml")
    records.load_batch(tmp_path / "batch")
    return records


@pytest.fixture
def store(db_url, tmp_path):
    with _filled(db_url, tmp_path) as records:
        yield records


@pytest.fixture
def sqlite_store(tmp_path):
    """The same records in SQLite only: for checks of the page itself, which no database changes."""
    with _filled(f"sqlite:///{tmp_path / 'records.db'}", tmp_path) as records:
        yield records


def _external_references(html):
    """Anything the page would fetch or run: scripts, links, non-data sources, CSS urls."""
    found = re.findall(r"<script|<link|<iframe|<object|@import", html, flags=re.I)
    found += [s for s in re.findall(r'(?:src|href)\s*=\s*"([^"]*)"', html)
              if not s.startswith(("data:image/png;base64,", "#"))]
    found += [u for u in re.findall(r"url\(([^)]*)\)", html)]
    return found


def test_the_report_states_the_verdict_first_and_escapes_user_text(store, tmp_path):
    path = write_lot_report(store, "A/B 7", out_dir=tmp_path / "out", generated_at="2026-02-02T00:00:00Z")
    assert path == tmp_path / "out" / "A_B_7.html"
    html = path.read_text(encoding="utf-8")
    verdict_at = html.index('id="verdict"')
    assert verdict_at < html.index("<h2>")
    assert 'class="verdict verdict-fail"' in html
    # guard-band rule (the default): 12.9 ± 0.497 ms (t-interval, 2 dof) lies wholly above 12 ms;
    # shown in the house style: ms, to two figures of the half-width (0.50 ms)
    assert ("lot mean relaxation time 12.90 ms (95 % interval 12.40–13.40 ms) is wholly above the "
            "maximum 12 ms") in html[verdict_at:html.index("<h2>")]
    assert HOSTILE_SAMPLE not in html and "<img src=x" not in html
    assert "&lt;script&gt;alert(&#34;x&#34;)&lt;/script&gt;" in html
    assert "&lt;img src=x onerror=&#34;alert(1)&#34;&gt; &amp; more" in html
    assert _external_references(html) == []
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', html)
    assert len(images) == 2  # diameter curves and control chart
    assert all(base64.b64decode(image)[:8] == b"\x89PNG\r\n\x1a\n" for image in images)
    for words in ("few frames in the fit window", "reference fluid", "hazardous", "thinning 0.1.0",
                  "Western Electric", "Nelson", "Montgomery", "@media print"):
        assert words in html, words
    # limits for this lot come from its 6 earlier lots
    assert "Control limits for this lot from 6 earlier lots" in html


def test_the_report_is_the_same_for_the_same_records(store, tmp_path):
    one = lot_report_html(store.lot_detail("L5"), generated_at="t")
    two = lot_report_html(store.lot_detail("L5"), generated_at="t")
    assert one == two


def test_a_lot_without_enough_history_says_so(store):
    html = lot_report_html(store.lot_detail("L2"), generated_at="t")
    assert "No control limits yet: the baseline of this lot holds 2 earlier lots, and 5 are needed." in html
    assert 'class="verdict verdict-pass"' in html


def test_report_filename_rule():
    assert report_filename("lot 7/ä:b") == "lot_7___b.html"
    assert report_filename("L-1.2_x") == "L-1.2_x.html"


def test_report_command(store, db_url, tmp_path):
    result = CliRunner().invoke(report_cli, ["NEW", "--db", db_url, "--out", str(tmp_path / "r")])
    assert result.exit_code == 0, result.output
    html = (tmp_path / "r" / "NEW.html").read_text()
    assert "2 valid replicates of 3 required" in html and "verdict-review" in html
    missing = CliRunner().invoke(report_cli, ["NOPE", "--db", db_url, "--out", str(tmp_path / "r")])
    assert missing.exit_code == 2 and missing.output.strip() == "thinning: no lot 'NOPE' in the records."


def _console_messages(stderr: str) -> list[str]:
    return [line for line in stderr.splitlines() if ":CONSOLE" in line or "Uncaught" in line]


@pytest.mark.chromium
def test_chromium_shows_the_verdict_on_the_first_screen(sqlite_store, tmp_path, chromium_path):
    from matplotlib.image import imread

    page = write_lot_report(sqlite_store, "A/B 7", out_dir=tmp_path / "out")
    shot = tmp_path / "first-screen.png"
    process = run_chromium(chromium_path, page, tmp_path / "profile", f"--screenshot={shot}")
    assert process.returncode == 0, process.stderr[-2000:]
    pixels = imread(shot)[..., :3]
    assert pixels.shape[:2] == (768, 1024)
    assert pixels.std() > 0.05  # not a blank page
    # the verdict banner (its background colour) is on the 1024×768 first screen, near the top
    banner = np.all(np.abs(pixels * 255 - np.array(BANNER_RGB["fail"])) < 6, axis=-1)
    rows = np.nonzero(banner.sum(axis=1) > 500)[0]
    assert rows.size > 30 and rows.min() < 400
    assert _console_messages(process.stderr) == []
    dom = run_chromium(chromium_path, page, tmp_path / "profile", "--dump-dom")
    assert dom.returncode == 0 and 'id="verdict"' in dom.stdout and ">fail<" in dom.stdout
    assert _console_messages(dom.stderr) == []
    pdf = tmp_path / "printed.pdf"
    printed = run_chromium(chromium_path, page, tmp_path / "profile", f"--print-to-pdf={pdf}",
                           "--no-pdf-header-footer")
    assert printed.returncode == 0 and pdf.read_bytes()[:5] == b"%PDF-"


@pytest.mark.chromium
def test_the_console_check_sees_errors(tmp_path, chromium_path):
    # control for the check above: a page with a script error must be caught
    page = tmp_path / "broken.html"
    page.write_text("<html><body><script>undefinedFunction();</script></body></html>")
    process = run_chromium(chromium_path, page, tmp_path / "profile", "--dump-dom")
    assert any("Uncaught" in line for line in _console_messages(process.stderr))


# ---------------------------------------------------------------------------------------------- the control chart
def _artefact_dir():
    import os
    from pathlib import Path

    folder = Path(os.environ.get("THINNING_TEST_ARTEFACTS") or Path(__file__).parent / "artefacts")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


def _baseline_paragraph(html):
    start = html.index('id="baseline"')
    text = re.sub(r"<[^>]+>", "", html[html.index(">", start) + 1:html.index("Run rules checked", start)])
    return re.sub(r"\s+", " ", html_module.unescape(text)).strip()


def test_a_failed_flagged_lot_stays_out_of_the_next_lots_limits_and_the_report_says_so(sqlite_store):
    from thinning import qc

    summaries = {s.lot: s for s in sqlite_store.lots()}
    failed = summaries["A/B 7"]
    assert failed.verdict.verdict == "fail" and "beyond-3-sigma" in failed.chart_flags
    detail = sqlite_store.lot_detail("NEW")
    history = [(s.lot, s.relaxation_time.mean) for s, _ in detail.chart]
    assert [lot for lot, _ in history] == ["L0", "L1", "L2", "L3", "L4", "L5", "A/B 7", "NEW"]
    # NEW's limits are those computed as if A/B 7 had never been charted
    without = qc.control_chart([lot for lot in history if lot[0] != "A/B 7"])[-1]
    point = detail.summary.chart
    assert (point.centre, point.sigma, point.mr_mean, point.mr_ucl) == (
        without.centre, without.sigma, without.mr_mean, without.mr_ucl)
    html = lot_report_html(detail, generated_at="t")
    words = _baseline_paragraph(html)
    assert ("The default baseline: earlier lots that passed without a chart flag, and not excluded. "
            "Formed by 6 lots: L0, L1, L2, L3, L4, L5. Left out: A/B 7: verdict fail; chart flags "
            "beyond-3-sigma, moving-range-above-limit") in words
    assert "Control limits for this lot from 6 earlier lots" in html
    assert "Specification limits of λ: 8 to 12 ms." in html


def test_an_exclusion_with_its_reason_changes_the_limits_and_is_named_in_the_report(sqlite_store):
    before = sqlite_store.lot_detail("NEW").summary.chart
    sqlite_store.exclude("L3", reason='viscometer out of calibration <see CAPA 7>', by="A. Chemist")
    detail = sqlite_store.lot_detail("NEW")
    assert detail.summary.chart.baseline == ("L0", "L1", "L2", "L4", "L5")
    assert detail.summary.chart.centre != before.centre
    html = lot_report_html(detail, generated_at="t")
    words = _baseline_paragraph(html)
    assert "Formed by 5 lots: L0, L1, L2, L4, L5." in words
    assert re.search(r"L3: excluded from the baseline by A\. Chemist on \d{4}-\d\d-\d\d \d\d:\d\d UTC: "
                     r"viscometer out of calibration <see CAPA 7>", words), words
    assert "viscometer out of calibration &lt;see CAPA 7&gt;" in html   # escaped, as all user text
    assert "Control limits for this lot from 5 earlier lots" in html


def test_a_phase_one_baseline_of_the_specification_is_named_in_the_report(sqlite_store, tmp_path):
    (tmp_path / "phase-one.toml").write_text(SPECS + '\n[product.baseline]\nname = "validation 2026"\n'
                                             'lots = ["L0", "L1", "L2", "L3", "L4", "GONE"]\n')
    sqlite_store.load_specs(tmp_path / "phase-one.toml")
    html = lot_report_html(sqlite_store.lot_detail("NEW"), generated_at="t")
    words = _baseline_paragraph(html)
    assert ("The phase-I baseline “validation 2026” of the specification (lots L0, L1, L2, L3, L4, GONE): "
            "its lots made before this one. Formed by 5 lots: L0, L1, L2, L3, L4.") in words
    assert "L5: not in the baseline 'validation 2026'" in words
    assert "Named in the baseline but without a lot mean in the records: GONE." in words


def test_the_chart_draws_specification_and_control_limits_apart(sqlite_store):
    from matplotlib.colors import to_hex

    from thinning.plots import plot_control_chart

    detail = sqlite_store.lot_detail("NEW")
    ax_x, ax_mr = plot_control_chart(detail)
    legend = [text.get_text() for text in ax_x.get_legend().get_texts()]
    assert "specification limit" in legend and "control limit (3σ)" in legend
    handles = dict(zip(*reversed(ax_x.get_legend_handles_labels())))
    spec, control = handles["specification limit"], handles["control limit (3σ)"]
    assert spec.get_linestyle() == "-" and control.get_linestyle() == "--"
    assert to_hex(spec.get_color()) != to_hex(control.get_color())
    # both from the Okabe–Ito colour-blind-safe palette
    okabe_ito = {"#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7", "#000000"}
    assert {to_hex(spec.get_color()), to_hex(control.get_color())} <= okabe_ito
    # the specification limits at 8 and 12 ms, both drawn, one legend entry
    spec_lines = [line for line in ax_x.get_lines() if to_hex(line.get_color()) == to_hex(spec.get_color())]
    assert sorted(line.get_ydata()[0] for line in spec_lines) == [8.0, 12.0]
    assert legend.count("specification limit") == 1
    assert "lot mean λ (ms)" == ax_x.get_ylabel()
    assert "control limit (D4 × mean MR)" in [t.get_text() for t in ax_mr.get_legend().get_texts()]
    # the lot left out of NEW's baseline is marked
    assert "left out of this lot's baseline" in legend


@pytest.mark.chromium
def test_chromium_shows_the_control_chart_with_both_limits(sqlite_store, tmp_path, chromium_path):
    from matplotlib.image import imread, imsave

    page = write_lot_report(sqlite_store, "NEW", out_dir=tmp_path / "out")
    shot = tmp_path / "whole-page.png"
    process = run_chromium(chromium_path, page, tmp_path / "profile", f"--screenshot={shot}", window=(1280, 4200))
    assert process.returncode == 0, process.stderr[-2000:]
    assert _console_messages(process.stderr) == []
    pixels = imread(shot)[..., :3] * 255

    def near(rgb):
        return np.all(np.abs(pixels - np.array(rgb)) < 12, axis=-1)

    spec_blue, control_red = near((0x00, 0x72, 0xB2)), near((0xD5, 0x5E, 0x00))
    assert spec_blue.sum() > 300 and control_red.sum() > 100
    rows = np.nonzero(spec_blue.any(axis=1) | control_red.any(axis=1))[0]
    cols = np.nonzero(spec_blue.any(axis=0) | control_red.any(axis=0))[0]
    top, bottom = max(rows.min() - 60, 0), min(rows.max() + 120, pixels.shape[0])
    left, right = max(cols.min() - 90, 0), min(cols.max() + 40, pixels.shape[1])
    chart = pixels[top:bottom, left:right] / 255
    assert chart.shape[0] > 200 and chart.shape[1] > 400
    imsave(_artefact_dir() / "lot-report-control-chart.png", chart)
