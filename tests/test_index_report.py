"""The index of lots (thinning.report.index, ``thinning report --all``): every lot listed with its
verdict, links that resolve inside the folder, hostile names escaped, bad usage, and how Chromium
shows and prints the page (its screenshot kept as a test artefact)."""

import os
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import unquote

import numpy as np
import pytest
from click.testing import CliRunner

from services import fake_result, run_chromium, source_hash, write_batch
from thinning import records as rec
from thinning.cli_records import report as report_cli
from thinning.report.index import lot_report_names, write_reports

pytestmark = pytest.mark.slow  # writes every lot's report (figures) and runs services

#: Where the Chromium screenshots of the pages are kept after the run (default: tests/artefacts/).
ARTEFACTS_ENV = "THINNING_TEST_ARTEFACTS"

SPECS = '[[product]]\nname = "ink-A"\nrelaxation_time_s = [0.008, 0.012]\nreplicates = 3\nmax_cv = 0.10\n'
HOSTILE_LOT = "../../x"
SCRIPT_LOT = '<script>alert("lot")</script>'
HOSTILE_PRODUCT = '<img src=x onerror="alert(2)">'
HOSTILE_NOTE = '<b onclick="alert(3)">note</b>'


def _lot(lot, lams, made_on, *, product="ink-A", sample="S", failed=False):
    rows = [dict(sample=sample, lot=lot, product=product, replicate=str(i), made_on=made_on, notes=HOSTILE_NOTE,
                 analysed_at="2026-02-01T10:00:00Z",
                 result=fake_result(relaxation_time_s=lam, sha256=source_hash(product, lot, i)))
            for i, lam in enumerate(lams, start=1)]
    if failed:
        rows.append(dict(sample=sample, lot=lot, product=product, replicate=str(len(lams) + 1), made_on=made_on,
                         analysed_at="2026-02-01T10:00:00Z", status="failed", reason="camera stopped early",
                         sha256=source_hash(product, lot, "failed")))
    return rows


def _fill(url, tmp_path):
    rng = np.random.default_rng(11)
    rows = []
    for k in range(5):
        rows += _lot(f"L{k}", list(rng.normal(0.010, 0.0002, size=3)), f"2026-01-{k + 1:02d}")
    rows += _lot("DRIFT", [0.0131, 0.0129, 0.0127], "2026-01-10")            # fail
    rows += _lot("SHORT", [0.0100, 0.0101], "2026-01-11", failed=True)       # review
    rows += _lot(HOSTILE_LOT, [0.0100, 0.0102, 0.0101], "2026-01-12", sample="<s>")
    rows += _lot(SCRIPT_LOT, [0.0100, 0.0102, 0.0101], "2026-01-13")
    rows += _lot("L0", [0.0100, 0.0102, 0.0101], "2026-01-14", product=HOSTILE_PRODUCT)  # a shared lot id
    rows += _lot("index", [0.0100, 0.0102, 0.0101], "2026-01-15")
    batch = write_batch(tmp_path / "batch", rows)
    # the fake batch writes no recording pages: give every finished row but one its report.html
    finished = sorted(p for p in batch.iterdir() if (p / "result.json").is_file())
    for folder in finished[1:]:
        (folder / "report.html").write_text("<!DOCTYPE html><title>recording</title>")
    (tmp_path / "specs.toml").write_text(SPECS)
    with rec.open_records(url) as records:
        records.load_specs(tmp_path / "specs.toml")
        records.load_batch(batch)
    return batch, finished[0]


@pytest.fixture
def filled(db_url, tmp_path):
    batch, unlinked = _fill(db_url, tmp_path)
    return db_url, batch, unlinked


@pytest.fixture
def sqlite_filled(tmp_path):
    """The same records in SQLite only: for the page itself, which no database changes."""
    url = f"sqlite:///{tmp_path / 'records.db'}"
    batch, unlinked = _fill(url, tmp_path)
    return url, batch, unlinked


class _Page(HTMLParser):
    """The index's links and the rows of its table of lots, as the browser would read them."""

    def __init__(self):
        super().__init__()
        self.hrefs, self.rows, self._row, self._cell, self._in_lots = [], [], None, None, False

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "a" and "href" in attrs:
            self.hrefs.append(attrs["href"])
        if tag == "table":
            self._in_lots = attrs.get("id") == "lots"
        if self._in_lots and tag == "tr":
            self._row = []
        if self._row is not None and tag == "td":
            self._cell = []
        if tag == "br" and self._cell is not None:
            self._cell.append(" ")

    def handle_endtag(self, tag):
        if tag == "td" and self._cell is not None:
            self._row.append(" ".join("".join(self._cell).split()))
            self._cell = None
        if tag == "tr" and self._row:
            self.rows.append(self._row)
            self._row = None
        if tag == "table":
            self._in_lots = False

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _parsed(html):
    page = _Page()
    page.feed(html)
    return page


def _run(*args):
    return CliRunner().invoke(report_cli, [str(a) for a in args])


def test_the_index_lists_every_lot_with_its_verdict_and_links_that_resolve(filled, tmp_path):
    url, batch, unlinked = filled
    out = tmp_path / "reports"
    result = _run("--all", "--db", url, "--out", out, "--batch", batch)
    assert result.exit_code == 0, result.output
    assert result.output.splitlines()[-1] == f"wrote {out / 'index.html'}"
    html = (out / "index.html").read_text(encoding="utf-8")
    page = _parsed(html)
    with rec.open_records(url) as records:
        summaries = records.lots()
    assert len(page.rows) == len(summaries) == 11
    for summary, row in zip(summaries, page.rows):
        product, lot, made_on, verdict = row[:4]
        assert (product, lot, made_on) == (summary.product, summary.lot, summary.made_on)
        assert verdict.split()[0] == summary.verdict.verdict
        assert row[4].startswith(f"{summary.verdict.n_valid} of {summary.verdict.n_replicates}")
    verdicts = {s.lot: s.verdict.verdict for s in summaries}
    assert verdicts["DRIFT"] == "fail" and verdicts["SHORT"] == "review" and verdicts["L1"] == "pass"
    assert html.count('class="badge verdict-fail"') == 2  # table and section of DRIFT
    assert "a lot mean is outside its limit" in html and "a person should look at this lot" in html
    # every link is relative and resolves to an existing file: lot reports inside the folder
    files = [h for h in page.hrefs if not h.startswith("#")]
    assert files and all(not re.match(r"^[a-z][a-z0-9+.-]*:|^/", h, flags=re.I) for h in files)
    targets = [(out / unquote(h)).resolve() for h in files]
    assert all(t.is_file() for t in targets), [h for h, t in zip(files, targets) if not t.is_file()]
    lot_pages = {t for t in targets if t.parent == out.resolve()}
    assert lot_pages == {p.resolve() for p in out.glob("*.html")} - {(out / "index.html").resolve()}
    assert len(lot_pages) == len(summaries)  # one report per lot, none overwritten by another
    recordings = {t for t in targets if t.name == "report.html"}
    assert all(t.parent.parent == batch.resolve() for t in recordings)
    n_finished = sum(1 for p in batch.iterdir() if (p / "result.json").is_file())
    assert len(recordings) == n_finished - 1 and (unlinked / "report.html").resolve() not in recordings
    assert "linked 31 of 33 recordings" in result.output  # one without a page, one failed
    # the lot reports are the ones `thinning report LOT` writes
    single = _run("L1", "--db", url, "--out", tmp_path / "single")
    assert single.exit_code == 0, single.output
    strip = lambda text: re.sub(r"at \d{4}-\d\d-\d\dT[\d:]+Z", "", text)  # noqa: E731
    assert strip((out / "L1.html").read_text()) == strip((tmp_path / "single" / "L1.html").read_text())


def test_hostile_names_are_escaped_and_their_links_stay_inside_the_folder(sqlite_filled, tmp_path):
    url, batch, _ = sqlite_filled
    out = tmp_path / "deep" / "reports"
    with rec.open_records(url) as records:
        written = write_reports(records, out, batch_dirs=[batch], generated_at="t")
        names = lot_report_names(records.lots())
    assert {p.parent for p in written.lot_reports} == {out}
    assert sorted(os.listdir(out)) == sorted([*names.values(), "index.html"])
    assert not (tmp_path / "x.html").exists() and not list(tmp_path.glob("*.html"))
    assert names[("ink-A", HOSTILE_LOT)] == ".._.._x.html"
    assert names[("ink-A", SCRIPT_LOT)] == "_script_alert__lot____script_.html"
    # a lot id two products share, and a lot named "index", get the product in their name
    assert names[("ink-A", "L0")] == "ink-A_L0.html" and names[(HOSTILE_PRODUCT, "L0")].endswith("_L0.html")
    assert names[("ink-A", "index")] == "ink-A_index.html"
    html = written.index.read_text(encoding="utf-8")
    for text in (SCRIPT_LOT, HOSTILE_PRODUCT, HOSTILE_NOTE, "<s>"):
        assert text not in html
    assert "&lt;script&gt;alert(&#34;lot&#34;)&lt;/script&gt;" in html
    assert "&lt;img src=x onerror=&#34;alert(2)&#34;&gt;" in html
    assert "Lot ../../x — ink-A" in html
    assert re.findall(r"<script|<link|<iframe|<object|@import|url\(", html, flags=re.I) == []
    for href in _parsed(html).hrefs:
        if href.startswith("#"):
            continue
        target = (out / unquote(href)).resolve()
        assert target.is_file(), href
        inside_out = target.parent == out.resolve()
        assert inside_out or (target.name == "report.html" and target.parent.parent == batch.resolve()), href


def test_without_batch_folders_the_recordings_are_listed_unlinked(sqlite_filled, tmp_path):
    url, _, _ = sqlite_filled
    result = _run("--all", "--db", url, "--out", tmp_path / "r", "--product", "ink-A")
    assert result.exit_code == 0, result.output
    assert "the records do not keep their batch folders; give them with --batch DIR" in result.output
    html = (tmp_path / "r" / "index.html").read_text(encoding="utf-8")
    assert "report.html" not in re.sub(r"<code>report.html</code>", "", html)
    assert len(_parsed(html).rows) == 10  # the other product's lot left out
    assert "none was given" in html


def test_a_batch_folder_without_its_table_is_exit_2(sqlite_filled, tmp_path):
    url, _, _ = sqlite_filled
    (tmp_path / "not-a-batch").mkdir()
    result = _run("--all", "--db", url, "--out", tmp_path / "out", "--batch", tmp_path / "not-a-batch")
    assert result.exit_code == 2
    assert result.output.strip() == (f"thinning: {tmp_path / 'not-a-batch'} has no readable results.csv; give the "
                                     "folder of a finished batch.")
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("args, message", [
    (["L1", "--all"], "thinning: give either a lot id or --all, not both."),
    ([], "thinning: name the lot to report, or give --all for every lot and an index of them."),
    (["L1", "--batch", "."], "thinning: --batch tells the index where the recording reports are: give it with --all."),
])
def test_bad_usage_is_exit_2_with_one_sentence(args, message, tmp_path):
    result = _run(*args, "--db", f"sqlite:///{tmp_path / 'r.db'}", "--out", tmp_path / "out")
    assert result.exit_code == 2 and result.output.strip() == message
    assert not (tmp_path / "out").exists()


def test_an_empty_database_is_exit_2_naming_it(db_url, tmp_path):
    result = _run("--all", "--db", db_url, "--out", tmp_path / "out")
    assert result.exit_code == 2
    from sqlalchemy.engine import make_url

    name = make_url(db_url).render_as_string(hide_password=True)
    assert result.output.strip() == (f"thinning: no lots in the records yet (database {name}; pass --db to read "
                                     "another, e.g. the demo's sqlite:///thinning-demo/records.db).")
    assert len(result.output.strip().splitlines()) == 1 and not (tmp_path / "out").exists()


def _artefact_dir() -> Path:
    folder = Path(os.environ.get(ARTEFACTS_ENV) or Path(__file__).parent / "artefacts")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


@pytest.mark.chromium
def test_chromium_shows_and_prints_the_index(sqlite_filled, tmp_path, chromium_path):
    from matplotlib.image import imread

    url, batch, _ = sqlite_filled
    with rec.open_records(url) as records:
        page = write_reports(records, tmp_path / "reports", batch_dirs=[batch]).index
    shot = tmp_path / "index-first-screen.png"
    process = run_chromium(chromium_path, page, tmp_path / "profile", f"--screenshot={shot}", window=(1280, 900))
    assert process.returncode == 0, process.stderr[-2000:]
    assert [line for line in process.stderr.splitlines() if ":CONSOLE" in line or "Uncaught" in line] == []
    shutil.copyfile(shot, _artefact_dir() / "index-first-screen.png")
    pixels = imread(shot)[..., :3]
    assert pixels.shape[:2] == (900, 1280) and pixels.std() > 0.05
    # the verdict badges in their colours (the lot report's --pass/--review/--fail) on the first screen
    for rgb in ((0x1E, 0x7B, 0x34), (0xA1, 0x5C, 0x00), (0xB4, 0x23, 0x18)):
        assert np.all(np.abs(pixels * 255 - np.array(rgb)) < 6, axis=-1).sum() > 200, rgb
    dom = run_chromium(chromium_path, page, tmp_path / "profile", "--dump-dom")
    assert dom.returncode == 0 and 'id="lots"' in dom.stdout and "<script>alert" not in dom.stdout
    pdf = tmp_path / "index.pdf"
    printed = run_chromium(chromium_path, page, tmp_path / "profile", f"--print-to-pdf={pdf}",
                           "--no-pdf-header-footer")
    assert printed.returncode == 0 and pdf.read_bytes()[:5] == b"%PDF-"
    shutil.copyfile(pdf, _artefact_dir() / "index-printed.pdf")
