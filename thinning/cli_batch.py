"""``thinning batch MANIFEST --out DIR``: many recordings, locally or on a Dask cluster, resumable.

Thin: parse, call :func:`thinning.batch.run_batch`, show progress, exit.
Results are stored in a records database only when ``--db`` is given
(``--db`` means "also store"; without it nothing is written outside DIR).
"""

from __future__ import annotations

import os
import sys

import click

from .cli import OPTION_NAMES, FriendlyCommand, FriendlyError, analysis_options, parse_analysis_options


@click.command(cls=FriendlyCommand)
@click.argument("manifest", type=click.Path(dir_okay=False))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False),
              help="Output folder: one sub-folder per row, results.csv (and results.parquet).")
@click.option("--workers", type=click.IntRange(min=1), default=None,
              help=f"Local worker processes (default: the number of cores, here {os.cpu_count()}).")
@click.option("--scheduler", metavar="tcp://HOST:PORT", default=None,
              help="Run on an existing Dask distributed cluster instead of local processes; its "
                   "workers must import thinning and see MANIFEST's recordings and --out at the same paths.")
@click.option("--db", "db_url", metavar="URL", default=None,
              help="Also store each finished row in this records database (any SQLAlchemy URL: "
                   "sqlite:///records.db, postgresql+psycopg://user:pw@host:port/db). Without "
                   "--db the batch stores nothing; 'thinning records load DIR' can store it later.")
@click.option("--specs", "specs_file", type=click.Path(dir_okay=False), default=None,
              help="Product specifications (TOML) to load into the --db database before storing.")
@click.option("--check", is_flag=True,
              help="Validate the manifest and every source, report all problems by row, analyse nothing.")
@click.option("--redo", is_flag=True, help="Re-analyse every row, even those already finished.")
@click.option("--figures", "figure_formats", default="png", show_default=True, metavar="FORMATS",
              help="Formats of every row's figures, comma-separated: png, svg (the PNGs are always "
                   "written); a finished row without the SVGs asked for is analysed again.")
@analysis_options
def batch(manifest, out_dir, workers, scheduler, db_url, specs_file, check, redo, figure_formats,
          **values):
    """Analyse every recording listed in MANIFEST (CSV, one row per recording).

    Columns: path (required, relative to the manifest's folder), sample, lot,
    product, replicate, made_on, notes, and any analyse option with
    underscores (fps, pixel_size, surface_tension, ...). An empty cell falls
    back to the option given here, then to its default. Each row goes to
    OUT/<row>-<name>/; OUT/results.csv has one row per manifest row. A rerun
    skips rows whose recording and options are unchanged.

    Example:

    \b
      thinning batch lots.csv --out batch-out --surface-tension 62mN/m --workers 2
    """
    from .analysis import figure_formats as formats_of

    parse_analysis_options(values)  # a bad command-line option is bad usage (exit 2)
    try:
        formats = formats_of(figure_formats)
    except ValueError as exc:
        raise FriendlyError(f"--figures: {exc}.") from None
    defaults = {name: values.get(name) for name in OPTION_NAMES if values.get(name)}
    if check:
        _check(manifest, defaults)
        return
    if specs_file and not db_url:
        raise FriendlyError("--specs loads product specifications into a records database; "
                            "give --db URL too.")
    from .batch import run_batch
    from .batch.manifest import read_manifest

    n_rows = len(read_manifest(manifest))
    records = _open_records(db_url, specs_file) if db_url else None
    try:
        with Progress(n_rows) as progress:
            report = run_batch(manifest, out_dir, defaults=defaults, workers=workers,
                               scheduler=scheduler, redo=redo, records=records, figures=formats,
                               on_row=lambda row, outcome, folder: progress.advance(row, outcome))
    finally:
        if records is not None:
            records.close()
    skipped = f" ({report.n_skipped} already up to date)" if report.n_skipped else ""
    click.echo(f"{report.n_rows} rows: {report.n_ok} ok{skipped}, {report.n_failed} failed; "
               f"table in {report.results_csv}")
    refused = [o for o in report.outcomes.values() if o.environment]
    if refused:
        raise FriendlyError(f"{len(refused)} row(s) could not be written: {refused[0].reason} "
                            "Finished rows are kept and will not be analysed again.")


def _check(manifest, defaults):
    from .batch.manifest import check_manifest, read_manifest

    problems = check_manifest(manifest, defaults)
    if problems and problems[0].row == 0:
        raise FriendlyError(problems[0].message)
    n_rows = len(read_manifest(manifest))
    if not problems:
        click.echo(f"{manifest}: {n_rows} rows, no problems found.")
        return
    for problem in problems:
        click.echo(str(problem))
    rows = len({p.row for p in problems})
    click.echo(f"thinning: {len(problems)} problems in {rows} of {n_rows} rows; nothing was analysed.",
               err=True)
    sys.exit(2)


def _open_records(db_url, specs_file):
    from .records import open_records

    records = open_records(db_url)
    if specs_file:
        records.load_specs(specs_file)
    return records


class Progress:
    """A rich progress bar (rate, time left) on a terminal; plain lines otherwise."""

    def __init__(self, n_rows):
        self.n_rows = n_rows
        self.width = len(str(max(n_rows, 1)))
        self.done = 0
        self.bar = None

    def __enter__(self):
        if sys.stderr.isatty():
            from rich.progress import (BarColumn, MofNCompleteColumn, Progress, ProgressColumn,
                                       TextColumn, TimeRemainingColumn)
            from rich.text import Text

            class Rate(ProgressColumn):
                def render(self, task):
                    speed = task.finished_speed or task.speed
                    return Text("—" if not speed else f"{speed:.2f} recordings/s")

            self.bar = Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                Rate(), TimeRemainingColumn(), transient=False)
            self.bar.start()
            self.task = self.bar.add_task("batch", total=self.n_rows)
        return self

    def advance(self, row, outcome):
        self.done += 1
        state = outcome.status + (" (up to date)" if outcome.skipped else "")
        line = f"[{self.done:>{self.width}}/{self.n_rows}] row {row.row} {row.name}: {state}"
        if not outcome.ok:
            line += f": {outcome.reason}"
        if self.bar is not None:
            self.bar.console.print(line, highlight=False, markup=False)
            self.bar.advance(self.task)
        else:
            click.echo(line)

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.stop()
