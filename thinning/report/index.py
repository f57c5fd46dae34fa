"""The index of lots: every lot's report and an ``index.html`` that lists and links them.

:func:`write_reports` writes, into one folder, the report of every lot in the
records (:mod:`thinning.report.lot`) and ``index.html``: a table of the lots
(product, lot, made on, verdict, valid replicates, link to the lot report) and,
per lot, its recordings (replicate, λ, quality, validity, link to the
recording's own ``report.html``).

The records do not keep where a recording's batch folder is, so recording
reports are found in the batch folders the caller names (``batch_dirs``): a
recording is linked to the ``report.html`` of the row of the first of those
folders whose results table holds it (same product, lot, sample, replicate and
source sha256). Others are listed without a link.

Links are relative: a lot report's is its file name in the folder (the lot id
under the batch folders' character rule, so no lot id can point outside the
folder); a recording report's is the path from the folder to the row folder.
Everything that comes from users is HTML-escaped by the template (jinja2
autoescape), as in the lot report.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import quote

import jinja2

from .. import __version__, atomic, display
from ..values import from_spreadsheet_safe, safe_name, utc_text
from .lot import MISSING, TEMPLATE_DIR, VERDICT_LINES, display_units, lot_report_html, report_filename

INDEX_FILENAME = "index.html"

#: A recording's report in its batch row folder (``thinning batch`` / ``analyse``).
RECORDING_REPORT = "report.html"


@dataclass(frozen=True)
class WrittenReports:
    """What :func:`write_reports` wrote: the index, every lot report, and how many of the
    recordings the index links to their reports (of how many it lists)."""

    index: Path
    lot_reports: tuple[Path, ...]
    recordings_linked: int
    recordings: int


def lot_report_names(summaries) -> dict[tuple[str, str], str]:
    """File names of the lot reports, by (product, lot): ``<LOT>.html`` (:func:`report_filename`),
    except where that name would be shared (two products with one lot id, lot ids that the
    character rule or letter case makes alike, a lot named ``index``): those lots get
    ``<PRODUCT>_<LOT>.html``, and ``-2``, ``-3`` … if even that is taken."""
    plain = [report_filename(s.lot) for s in summaries]
    folded = [name.casefold() for name in plain]   # alike on a file system that ignores case
    taken = {INDEX_FILENAME}
    names = {}
    for summary, name, key in zip(summaries, plain, folded):
        if folded.count(key) > 1 or key in taken:
            name = f"{safe_name(f'{summary.product}_{summary.lot}')}.html"
        stem, number = name[:-len(".html")], 2
        while name.casefold() in taken:
            name, number = f"{stem}-{number}.html", number + 1
        taken.add(name.casefold())
        names[(summary.product, summary.lot)] = name
    return names


def _cell(row, key) -> str:
    value = row.get(key)
    return "" if value is None else from_spreadsheet_safe(str(value).strip())


def recording_reports(batch_dirs) -> dict[tuple, Path]:
    """``report.html`` of each finished row of the batch folders, by (product, lot, sample,
    replicate, sha256); the first folder given wins. A folder without ``results.csv`` raises
    :class:`~thinning.batch.table.UnusableBatchFolder`."""
    from ..batch.table import UnusableBatchFolder
    from ..values import row_folder_name

    found: dict[tuple, Path] = {}
    for batch_dir in batch_dirs:
        batch_dir = Path(batch_dir)
        table = batch_dir / "results.csv"
        try:
            with table.open(newline="", encoding="utf-8-sig") as handle:
                rows = list(csv.DictReader(handle))
        except (OSError, UnicodeDecodeError, csv.Error):
            raise UnusableBatchFolder(f"{batch_dir} has no readable results.csv; give the folder of a "
                                      "finished batch.") from None
        numbers = [_cell(r, "row") for r in rows]
        width = len(str(max((int(n) for n in numbers if n.isdigit()), default=1)))
        for row, number in zip(rows, numbers):
            if not number.isdigit() or (_cell(row, "status") or "ok") != "ok":
                continue
            sample = _cell(row, "sample") or Path(_cell(row, "path")).stem
            # the folder as the batch names it (only ever one safe name inside the batch folder)
            folder = batch_dir / row_folder_name(int(number), sample, width)
            if not folder.is_dir():
                matches = sorted(batch_dir.glob(f"{int(number):0{width}d}-*"))
                folder = matches[0] if len(matches) == 1 else folder
            page = folder / RECORDING_REPORT
            key = (_cell(row, "product"), _cell(row, "lot"), sample, _cell(row, "replicate"),
                   _cell(row, "sha256"))
            if key not in found and page.is_file():
                found[key] = page
    return found


def _href(target: Path, start: Path) -> str | None:
    """``target`` relative to the folder ``start``, as a URL path (None on another drive)."""
    try:
        relative = os.path.relpath(Path(target).resolve(), Path(start).resolve())
    except ValueError:
        return None
    return "/".join(quote(part) for part in Path(relative).parts)


def _recordings(detail, pages: dict[tuple, Path], out_dir: Path) -> list[dict]:
    from ..records import replicate_label

    summary, verdict = detail.summary, detail.summary.verdict
    unit = display_units(detail)["relaxation_time_s"]   # as the lot's own report shows λ
    rows = []
    for m, is_valid, why in zip(detail.measurements, verdict.valid, verdict.invalid_reasons):
        page = pages.get((summary.product, summary.lot, m["sample"], m["replicate"], m["sha256"]))
        lam, _ = display.estimate(m["relaxation_time_s"],
                                  (m["relaxation_time_ci95_low_s"], m["relaxation_time_ci95_high_s"]), unit)
        rows.append({"label": replicate_label(m), "lam": lam,
                     "quality": m["quality"] or MISSING, "is_valid": is_valid,
                     "valid": "yes" if is_valid else f"no: {why}",
                     "source_path": m["source_path"] or MISSING,
                     "href": None if page is None else _href(page, out_dir)})
    for f in detail.failures:
        rows.append({"label": replicate_label(f), "lam": MISSING, "quality": "failed", "is_valid": False,
                     "valid": "no", "source_path": f["source_path"] or MISSING, "href": None})
    return rows


def index_html(lots: list[dict], *, database: str | None = None, batch_dirs=(),
               generated_at: str | None = None) -> str:
    """The index page for ``lots`` (as :func:`write_reports` builds them), as HTML text."""
    environment = jinja2.Environment(loader=jinja2.FileSystemLoader(TEMPLATE_DIR), autoescape=True,
                                     undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    counts = {v: sum(lot["verdict"] == v for lot in lots) for v in VERDICT_LINES}
    recordings = [r for lot in lots for r in lot["recordings"]]
    return environment.get_template("index.html").render(
        lots=lots, counts=counts, n_recordings=len(recordings),
        n_linked=sum(r["href"] is not None for r in recordings),
        batch_dirs=[str(b) for b in batch_dirs], database=database, verdict_lines=VERDICT_LINES,
        version=__version__, generated_at=display.timestamp(generated_at or utc_text()))


def write_reports(records, out_dir: str | Path, *, product: str | None = None, batch_dirs=(),
                  database: str | None = None, generated_at: str | None = None) -> WrittenReports:
    """Write the report of every lot (of ``product``) and ``out_dir/index.html``.

    ``batch_dirs``: batch folders in which to look for the recordings' reports; ``database``:
    how to name the records on the page (a URL without its password), if at all. Each file is
    written atomically; the index last, so it never links a report not yet written.
    """
    pages = recording_reports(batch_dirs)   # an unusable batch folder is refused before anything is written
    summaries = records.lots(product=product)
    names = lot_report_names(summaries)
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    stamp = generated_at or utc_text()
    lots, written = [], []
    for summary in summaries:
        detail = records.lot_detail(summary.lot, product=summary.product)
        name = names[(summary.product, summary.lot)]
        path = out / name
        atomic.write_text(path, lot_report_html(detail, generated_at=stamp))
        written.append(path)
        verdict = detail.summary.verdict
        lots.append({
            "product": summary.product, "lot": summary.lot, "made_on": summary.made_on or MISSING,
            "verdict": verdict.verdict, "reasons": verdict.shown_reasons, "n_valid": verdict.n_valid,
            "n_replicates": verdict.n_replicates,
            "required": detail.spec.replicates if detail.spec is not None else None,
            "lam_mean": display.quantity(summary.relaxation_time.mean, display_units(detail)["relaxation_time_s"]),
            "chart_flags": summary.chart_flags,
            "href": quote(name), "file": name, "recordings": _recordings(detail, pages, out)})
    index = out / INDEX_FILENAME
    atomic.write_text(index, index_html(lots, database=database, batch_dirs=batch_dirs, generated_at=stamp))
    recordings = [r for lot in lots for r in lot["recordings"]]
    return WrittenReports(index=index, lot_reports=tuple(written),
                          recordings_linked=sum(r["href"] is not None for r in recordings),
                          recordings=len(recordings))
