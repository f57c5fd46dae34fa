"""``thinning records …`` and ``thinning report``: the per-lot records from the command line.

Thin: parse, call :mod:`thinning.records` / :mod:`thinning.report.lot`, print.
Heavy modules are imported inside the commands so that ``thinning --help``
stays fast. Errors the user can fix exit 2 with one sentence.
"""

from __future__ import annotations

import csv
import math
import os
import re
import sys

import click
from platformdirs import user_data_dir

from . import atomic, display
from .cli import FriendlyCommand, FriendlyError, FriendlyGroup
from .values import spreadsheet_safe

ENV_DB = "THINNING_DB"  # same name as thinning.records.ENV_DB


def _hide_password(url: str) -> str:
    return re.sub(r"://([^:/@]+):[^@]*@", r"://\1:***@", url)


def _db_help() -> str:
    fallback = f"sqlite:///{os.path.join(user_data_dir('thinning'), 'records.db')}"
    now = os.environ.get(ENV_DB)
    shown = f" (set now: {_hide_password(now)})" if now else ""
    return ("Records database, any SQLAlchemy URL: sqlite:///file.db or "
            "postgresql+psycopg://user:pw@host:port/db. Default: the environment variable "
            f"{ENV_DB}{shown}, else {fallback}.")


class _DbOption(click.Option):
    """--db, whose help shows the default database as it is when --help runs."""

    def get_help_record(self, ctx):
        self.help = _db_help()
        return super().get_help_record(ctx)


def db_option(func):
    return click.option("--db", "db_url", cls=_DbOption, metavar="URL", default=None)(func)


def product_option(func):
    return click.option("--product", default=None, metavar="NAME",
                        help="Product name; required where two products share the lot id.")(func)


def csv_option(func):
    return click.option("--csv", "as_csv", is_flag=True, help="Write CSV to standard output.")(func)


def _shown_url(url: str) -> str:
    """A database URL without its password."""
    try:
        from sqlalchemy.engine import make_url

        return make_url(url).render_as_string(hide_password=True)
    except Exception:  # not a URL SQLAlchemy reads: shown as given
        return url


def _open(db_url):
    from .records import open_records

    return open_records(db_url)


def csv_cell(value) -> str:
    """CSV text: full-precision numbers (shortest round trip), empty for None/NaN."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return ""
    if isinstance(value, bool):
        return str(value).lower()
    if isinstance(value, float):
        return repr(value)
    return spreadsheet_safe(str(value))


def _write_csv(handle, columns, rows) -> None:
    writer = csv.writer(handle, lineterminator="\n")
    writer.writerow(columns)
    for row in rows:
        writer.writerow([csv_cell(row[col]) for col in columns])


def _console():
    from rich.console import Console

    return Console(file=sys.stdout, width=max(150, Console().width), highlight=False)


_VERDICT_STYLE = {"pass": "bold green", "review": "bold yellow", "fail": "bold red"}


@click.group(cls=FriendlyGroup)
def records():
    """Per-lot records: lots with verdicts, measurements, export, specifications.

    Every command takes --db URL; each command's --help prints the default database.

    Examples:

    \b
      thinning records load-specs specs.toml
      thinning records load results/2026-10
      thinning records lots --product harbour-cyan
      thinning records show HC-0107
      thinning records export --out all.csv
      thinning records exclude HC-0107 --reason "pump seal replaced mid-lot"
    """


@records.command("lots")
@db_option
@click.option("--product", default=None, metavar="NAME", help="Only the lots of this product.")
@csv_option
def lots_command(db_url, product, as_csv):
    """One line per lot: mean relaxation time, verdict, reasons and control-chart flags.

    Example:

    \b
      thinning records lots --product harbour-cyan --csv > lots.csv
    """
    from .records import LOT_COLUMNS

    with _open(db_url) as store:
        summaries = store.lots(product=product)
    rows = [s.as_row() for s in summaries]
    if as_csv:
        _write_csv(sys.stdout, LOT_COLUMNS, rows)
        return
    if not rows:
        from .records import default_db_url

        url = db_url or default_db_url()
        click.echo(f"No lots in the records yet (database {_shown_url(url)}; pass --db to read "
                   "another, e.g. the demo's sqlite:///thinning-demo/records.db).")
        return
    from rich.table import Table

    time = display.time_unit(*(s.relaxation_time.mean for s in summaries))
    table = Table(show_lines=False)
    for header in ("product", "lot", "made on", "valid", f"λ mean ({time.label})", f"λ sd ({time.label})",
                   "CV", "verdict", "rule", "reasons", "chart flags"):
        table.add_column(header, overflow="fold")
    for summary, row in zip(summaries, rows):
        lam = summary.relaxation_time
        table.add_row(row["product"], row["lot"], row["made_on"] or "—", str(row["n_valid"]),
                      display.estimate(lam.mean, lam.ci95, time.bare)[0], display.spread(lam.sd, time.bare),
                      display.percent(lam.cv),
                      f"[{_VERDICT_STYLE[row['verdict']]}]{row['verdict']}[/]",
                      row["decision_rule"] or "—", "\n".join(summary.verdict.shown_reasons) or "—",
                      row["chart_flags"].replace("; ", "\n") or "—")
    _console().print(table)


@records.command("show")
@click.argument("lot")
@db_option
@product_option
@csv_option
@click.option("--history", is_flag=True, help="Also list superseded measurements (kept as history).")
def show_command(lot, db_url, product, as_csv, history):
    """One lot's measurements, verdict and reasons.

    Example:

    \b
      thinning records show HC-0107 --product harbour-cyan --history
    """
    from rich.markup import escape
    from rich.table import Table

    from .records import EXPORT_COLUMNS, replicate_label

    with _open(db_url) as store:
        detail = store.lot_detail(lot, product=product)
    if as_csv:
        _write_csv(sys.stdout, EXPORT_COLUMNS, detail.measurements)
        return
    summary = detail.summary
    verdict = summary.verdict
    lam = summary.relaxation_time
    console = _console()
    console.print(f"[bold]{escape(summary.product)}[/] lot [bold]{escape(summary.lot)}[/]  made on "
                  f"{summary.made_on or '—'}  first analysed {display.timestamp(summary.first_analysed_at)}")
    rule = f", decision rule {verdict.decision_rule}" if verdict.decision_rule else ""
    console.print(f"verdict: [{_VERDICT_STYLE[verdict.verdict]}]{verdict.verdict}[/]  "
                  f"({verdict.n_valid} valid of {verdict.n_replicates} replicates{rule})")
    for reason in verdict.shown_reasons:
        console.print(f"  - {escape(reason)}")
    for c in detail.verdict_changes:
        console.print(f"  re-evaluated {display.timestamp(c['changed_at'])} ({escape(c['cause'])}): "
                      f"{c['old_verdict']} → "
                      f"{c['new_verdict']}, decision rule {c['old_decision_rule'] or 'simple'} → "
                      f"{c['new_decision_rule'] or 'simple'}")
    if summary.chart_flags:
        console.print("chart flags: " + ", ".join(summary.chart_flags))
    for e in detail.exclusion_history:
        console.print(f"excluded from the control-chart baseline {display.timestamp(e['excluded_at'])} by "
                      f"{escape(e['excluded_by'])}: {escape(e['reason'])}"
                      + (f"; withdrawn {display.timestamp(e['withdrawn_at'])} by {escape(e['withdrawn_by'])}: "
                         f"{escape(e['withdrawn_reason'] or '')}" if e["withdrawn_at"] else ""))
    time = dict(verdict.units).get("relaxation_time_s") or display.time_unit(
        lam.mean, *(m["relaxation_time_s"] for m in detail.measurements))
    if lam.mean is not None:
        extra = (f", sd {display.spread(lam.sd, time)}, CV {display.percent(lam.cv)}"
                 if lam.sd is not None and lam.cv is not None else "")
        console.print(f"relaxation time: mean {display.with_interval(lam.mean, lam.ci95, time)}{extra}")
    table = Table(title="measurements")
    for header in ("sample", "rep.", f"λ ({time.label})", f"95 % CI ({time.label})", "quality", "regime",
                   "valid", "warnings", "analysed at", "tool", "sha256"):
        table.add_column(header, overflow="fold", no_wrap=header in ("regime", "analysed at", "sha256"))
    valid = dict(zip((m["id"] for m in detail.measurements), verdict.valid))
    why = dict(zip((m["id"] for m in detail.measurements), verdict.invalid_reasons))
    for m in detail.measurements:
        shown, interval = display.estimate(
            m["relaxation_time_s"], (m["relaxation_time_ci95_low_s"], m["relaxation_time_ci95_high_s"]),
            time.bare)
        table.add_row(escape(m["sample"]), escape(m["replicate"]), shown, interval or "—",
                      m["quality"] or "—", m["regime"] or "—",
                      "yes" if valid[m["id"]] else f"no: {escape(why[m['id']] or '')}",
                      escape(m["warning_codes"]) or "—", display.timestamp(m["analysed_at"]),
                      m["tool_version"] or "—", m["sha256"][:12])
    for f in detail.failures:
        table.add_row(escape(f["sample"]), escape(f["replicate"]), "—", "—", "failed", "—", "no", "—",
                      display.timestamp(f["analysed_at"]), f["tool_version"] or "—",
                      (f["sha256"] or "—")[:12])
    console.print(table)
    for f in detail.failures:
        console.print(f"failed: {escape(replicate_label(f))}: {escape(f['reason'])}")
    if history:
        if not detail.history:
            console.print("no superseded measurements.")
        for h in detail.history:
            console.print(f"superseded {display.timestamp(h['superseded_at'])}: {escape(replicate_label(h))} "
                          f"λ {display.quantity(h['relaxation_time_s'], time)}, tool {h['tool_version'] or '—'}, "
                          f"analysed {display.timestamp(h['analysed_at'])}, options {escape(h['options'])}")


@records.command("export")
@db_option
@click.option("--out", "out_path", required=True, type=click.Path(dir_okay=False),
              help="CSV file to write: one row per current measurement.")
@click.option("--product", default=None, metavar="NAME", help="Only this product's measurements.")
def export_command(db_url, out_path, product):
    """Every current measurement to a CSV file (superseded ones are left out).

    Example:

    \b
      thinning records export --out all.csv --product harbour-cyan
    """
    from .records import EXPORT_COLUMNS

    with _open(db_url) as store:
        rows = store.export_rows(product=product)
    try:
        # a byte-order mark, so that spreadsheets read µ and other non-ASCII text right
        with atomic.replacing(out_path, "w", newline="", encoding="utf-8-sig") as handle:
            _write_csv(handle, EXPORT_COLUMNS, rows)
    except OSError as exc:
        raise FriendlyError(f"cannot write {out_path} ({exc.strerror}).") from None
    click.echo(f"wrote {len(rows)} measurements to {out_path}")


@records.command("load-specs")
@click.argument("specs_file", type=click.Path())
@db_option
def load_specs_command(specs_file, db_url):
    """Load or update product specifications from a TOML file.

    Example:

    \b
      thinning records load-specs specs.toml --db sqlite:///records.db
    """
    changes: list[dict] = []
    with _open(db_url) as store:
        specs = store.load_specs(specs_file, changes=changes)
    click.echo(f"loaded the specifications of {len(specs)} product{'s' if len(specs) != 1 else ''}: "
               + ", ".join(s.name for s in specs))
    for c in changes:  # recorded in the database too: no verdict already shown changes silently
        rule = ("" if c["old_decision_rule"] == c["new_decision_rule"] else
                f" (decision rule {c['old_decision_rule'] or 'simple'} → {c['new_decision_rule']})")
        click.echo(f"re-evaluated: {c['product']} lot {c['lot']}: {c['old_verdict']} → "
                   f"{c['new_verdict']}{rule}")


def _who() -> str:
    import getpass

    try:
        return getpass.getuser()
    except Exception:  # no login name (some containers): --by is then needed
        return ""


@records.command("exclude")
@click.argument("lot")
@click.option("--reason", required=True, help="Why (kept with the exclusion, shown in lot reports).")
@click.option("--by", "by", default=None, metavar="NAME",
              help="Who decides (kept with the exclusion). Default: your login name.")
@click.option("--withdraw", is_flag=True, help="End the lot's exclusion instead (kept as history).")
@db_option
@product_option
def exclude_command(lot, reason, by, withdraw, db_url, product):
    """Exclude a lot from its product's control-chart baselines, with the reason (or, with
    --withdraw, let it back in). Verdicts do not change; the chart flags of later lots may, and
    are printed.

    Example:

    \b
      thinning records exclude HC-0107 --reason "pump seal replaced mid-lot"
      thinning records exclude HC-0107 --withdraw --reason "seal was not the cause (CAPA 12)"
    """
    with _open(db_url) as store:
        done = store.exclude(lot, reason=reason, by=by if by is not None else _who(), product=product,
                             withdraw=withdraw)
    what = "may enter its control-chart baselines again" if withdraw else \
        "is excluded from its control-chart baselines"
    click.echo(f"{done['product']} lot {done['lot']} {what}: {' '.join(reason.split())}")
    for c in done["flag_changes"]:
        click.echo(f"chart flags of lot {c['lot']}: {', '.join(c['old']) or 'none'} → "
                   f"{', '.join(c['new']) or 'none'}")


@records.command("load")
@click.argument("batch_dir", type=click.Path())
@db_option
def load_command(batch_dir, db_url):
    """Store a finished batch folder (its results.csv and row folders) in one transaction.

    Example:

    \b
      thinning records load results/2026-10 --db sqlite:///records.db
    """
    with _open(db_url) as store:
        counts = store.load_batch(batch_dir)
    click.echo(f"{batch_dir}: {counts['inserted']} new, {counts['superseded']} replaced (earlier kept as "
               f"history), {counts['history']} older than the stored ones (kept as history), "
               f"{counts['unchanged']} unchanged, {counts['failure']} failed rows noted")


@records.command("verify")
@db_option
@click.option("--folder", "batch_dir", type=click.Path(), default=None,
              help="Also check this batch folder against the stored measurements.")
def verify_command(db_url, batch_dir):
    """Check that every stored measurement is intact, and optionally that a batch folder's files are
    the ones its measurements were stored from (exit 2 naming the first mismatch).

    Example:

    \b
      thinning records verify --db sqlite:///records.db --folder results/2026-10
    """
    with _open(db_url) as store:
        counts = store.verify(batch_dir)
    folder = f"; {counts['rows']} rows of {batch_dir} match them" if batch_dir is not None else ""
    click.echo(f"{counts['measurements']} stored measurements intact{folder}")


@click.command("report", cls=FriendlyCommand)
@click.argument("lot", required=False)
@db_option
@product_option
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Folder for LOT.html, or with --all every lot's report and index.html (created if needed).")
@click.option("--all", "all_lots", is_flag=True,
              help="Every lot (of --product, if given): each lot's report and index.html listing and linking "
                   "them and their recordings' reports.")
@click.option("--batch", "batch_dirs", multiple=True, type=click.Path(file_okay=False, exists=True),
              help="With --all: a batch folder whose recording reports the index links (the records do not "
                   "keep where they are); repeat for several.")
def report(lot, db_url, product, out_dir, all_lots, batch_dirs):
    """Write the self-contained HTML report of one lot: verdict, curves, numbers, control chart;
    or, with --all, every lot's report and an index of them.

    Examples:

    \b
      thinning report HC-0107 --product harbour-cyan --out reports
      thinning report --all --out reports --batch results/2026-10
    """
    if all_lots and lot is not None:
        raise FriendlyError("give either a lot id or --all, not both.")
    if not all_lots and lot is None:
        raise FriendlyError("name the lot to report, or give --all for every lot and an index of them.")
    if batch_dirs and not all_lots:
        raise FriendlyError("--batch tells the index where the recording reports are: give it with --all.")
    if all_lots:
        _report_all(db_url, product, out_dir, batch_dirs)
        return
    from .report.lot import write_lot_report

    with _open(db_url) as store:
        try:
            path = write_lot_report(store, lot, product=product, out_dir=out_dir)
        except OSError as exc:
            raise FriendlyError(f"cannot write the report into {out_dir} ({exc.strerror}).") from None
    click.echo(f"wrote {path}")


def _report_all(db_url, product, out_dir, batch_dirs):
    from .records import default_db_url
    from .report.index import write_reports

    url = _shown_url(db_url or default_db_url())
    with _open(db_url) as store:
        if not store.lots(product=product):
            raise FriendlyError(f"no lots in the records yet (database {url}; pass --db to read another, "
                                "e.g. the demo's sqlite:///thinning-demo/records.db).")
        try:
            written = write_reports(store, out_dir, product=product, batch_dirs=batch_dirs, database=url)
        except OSError as exc:
            raise FriendlyError(f"cannot write the reports into {out_dir} ({exc.strerror}).") from None
    click.echo(f"wrote {len(written.lot_reports)} lot report{'s' if len(written.lot_reports) != 1 else ''} "
               f"into {out_dir}")
    if not batch_dirs:
        click.echo("recordings not linked to their reports: the records do not keep their batch folders; "
                   "give them with --batch DIR")
    elif written.recordings_linked < written.recordings:
        click.echo(f"linked {written.recordings_linked} of {written.recordings} recordings to their reports "
                   "(the others are not in the batch folders given, or failed)")
    click.echo(f"wrote {written.index}")
