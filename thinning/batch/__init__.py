"""Many recordings from a manifest, on local worker processes or a Dask cluster; resumable.

:func:`run_batch` is the whole ``thinning batch`` job. Each manifest row is
analysed by :func:`run_row` in a worker (a local process, or a Dask worker
that sees the same output folder), which writes the row's folder
``DIR/<row>-<name>/`` through a temporary sibling and a rename, so a
half-written folder never survives. The coordinating process collects each
:class:`RowOutcome` as it arrives, rewrites ``DIR/results.csv`` atomically
(so an interrupted batch keeps what finished), and hands the outcome to the
caller (progress, records database). ``DIR/results.parquet`` (when pyarrow
is installed) is written when the batch completes.

Resume: each row folder holds ``row.json`` (status, source sha256, options
in SI); a row whose folder says ``ok`` for the same sha256 and options is
not analysed again unless ``redo``. Failed rows are always tried again.

A local worker process that dies while analysing a row (segfault,
``os._exit``) is replaced and the row tried once more; a second death fails
the row. On Dask, retries follow the cluster (``retries=1`` for errors; a
worker death is retried per the scheduler's ``allowed-failures``).
"""

from __future__ import annotations

import fcntl
import logging
import os
import shutil
from dataclasses import dataclass, field
from pathlib import Path

from ..atomic import require_fitting_name
from ..errors import ThinningError
from ..units import AnalysisOptions, BadQuantity
from ..values import row_folder_name, safe_name
from .manifest import read_manifest, row_options
from .rows import DEFAULT_ANALYSER, TEMP_SUFFIX, RowOutcome, RowTask, run_row, write_failed_folder
from .table import (RESULT_COLUMNS, TABLE_COLUMNS, FinishedRow, read_batch, results_frame, table_row,
                    earlier_rows, write_results_csv, write_results_parquet, _parquet_available)
from .workers import SchedulerUnreachable, run_dask, run_local

log = logging.getLogger(__name__)

__all__ = ["run_batch", "BatchReport", "BatchBusy", "SchedulerUnreachable", "RowTask", "RowOutcome",
           "run_row", "read_batch", "FinishedRow", "RESULT_COLUMNS", "TABLE_COLUMNS", "TEMP_SUFFIX",
           "row_folder_name", "safe_name"]


class BatchBusy(ThinningError, RuntimeError):
    """Another batch is writing into the same output folder."""


@dataclass
class BatchReport:
    """What a batch did: the results table and counts."""

    table: object
    n_rows: int
    n_ok: int
    n_failed: int
    n_skipped: int
    results_csv: Path
    outcomes: dict = field(default_factory=dict)


def _lock(out: Path):
    handle = open(out / ".thinning-batch.lock", "w")
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        handle.close()
        raise BatchBusy(f"Another batch is writing into {out}; wait for it or choose another --out.") from None
    return handle


def _clean_leftovers(out: Path):
    """Remove temporary row folders an interrupted earlier run left behind."""
    for entry in out.iterdir():
        if entry.name.startswith(".") and entry.name.endswith(TEMP_SUFFIX) and entry.is_dir():
            log.info("removing leftover %s", entry.name)
            shutil.rmtree(entry, ignore_errors=True)


def run_batch(manifest, out_dir, *, defaults: dict | None = None, workers: int | None = None,
              scheduler: str | None = None, redo: bool = False, on_row=None, records=None,
              analyser: str = DEFAULT_ANALYSER, connect_timeout_s: float = 20.0,
              figures=("png",)) -> BatchReport:
    """Analyse every row of a manifest into a folder; ``results.csv`` is rewritten as rows finish.

    Parameters
    ----------
    manifest : str or path
        The manifest CSV (see :mod:`thinning.batch.manifest`).
    out_dir : str or path
        The batch folder: one ``<row>-<name>/`` folder per row and ``results.csv``.
    defaults : dict, optional
        Option texts for empty cells, as on the command line (``{"fps": "10kHz", …}``).
    workers : int, optional
        Local worker processes (default: the number of cores).
    scheduler : str, optional
        A Dask scheduler address (``tcp://host:port``) to run on instead.
    redo : bool
        Analyse every row again, even those up to date.
    on_row : callable, optional
        ``on_row(manifest_row, outcome, folder)``, called in this process as each
        row finishes, in finishing order.
    records : Records, optional
        An open records database; each finished row is stored in it as it
        finishes (its own transaction, so an interrupted batch keeps what was stored).
    analyser : str
        ``"module:function"`` with the signature of :func:`thinning.analysis.analyse_to`
        (the default), imported in the workers.
    connect_timeout_s : float
        How long to wait for the Dask scheduler (s).
    figures : iterable of str or str
        The formats of every row's figures (``"png"``, ``"svg"``; PNG always), as for
        :func:`thinning.analysis.write_outputs`.

    Returns
    -------
    BatchReport
        The results table and the counts.

    Raises
    ------
    UnusableManifest, BatchBusy, SchedulerUnreachable
        One sentence each.
    """
    rows = read_manifest(manifest)
    require_fitting_name(out_dir, "batch folder", staged=False)
    out = Path(out_dir).resolve()
    out.mkdir(parents=True, exist_ok=True)
    lock = _lock(out)
    try:
        _clean_leftovers(out)
        from ..analysis import figure_formats

        return _run(rows, out, defaults=defaults or {}, workers=workers or os.cpu_count() or 1,
                    scheduler=scheduler, redo=redo, on_row=on_row, records=records, analyser=analyser,
                    connect_timeout_s=connect_timeout_s, figures=figure_formats(figures))
    finally:
        lock.close()


def _run(rows, out, *, defaults, workers, scheduler, redo, on_row, records, analyser, connect_timeout_s,
         figures):
    width = len(str(max((r.row for r in rows), default=1)))
    by_row = {r.row: r for r in rows}
    folders = {r.row: row_folder_name(r.row, r.name, width) for r in rows}
    # the rows of an earlier run stay in the table until this run finishes them again, so an
    # interrupted rerun (or --redo) never shrinks results.csv
    finished: dict[int, dict] = {number: old for number, old in earlier_rows(out).items()
                                 if number in folders and old.get("folder") == folders[number]}
    outcomes: dict[int, RowOutcome] = {}

    def record(outcome: RowOutcome):
        row = by_row[outcome.row]
        outcomes[outcome.row] = outcome
        finished[outcome.row] = table_row(row, outcome, folders[outcome.row])
        write_results_csv(out, [finished[k] for k in sorted(finished)])
        if records is not None:
            _store(records, row, outcome, out / folders[outcome.row])
        if on_row is not None:
            on_row(row, outcome, out / folders[outcome.row])

    tasks = []
    for row in rows:
        folder = str(out / folders[row.row])
        try:
            if row.problem:
                raise BadQuantity(row.problem[0].upper() + row.problem[1:])
            options = row_options(row, defaults)
        except BadQuantity as exc:
            empty = RowTask(row.row, str(row.source), AnalysisOptions(), folder, redo, analyser)
            record(write_failed_folder(empty, str(exc)))
            continue
        tasks.append(RowTask(row.row, str(row.source.resolve()), options, folder, redo, analyser,
                             figures))
    try:
        if tasks:
            if scheduler:
                run_dask(tasks, record, scheduler=scheduler, connect_timeout_s=connect_timeout_s)
            else:
                run_local(tasks, record, workers=workers)
    finally:
        # on every way out (done, Ctrl-C, an error): both tables from every finished row
        rows_done = [finished[k] for k in sorted(finished)]
        write_results_csv(out, rows_done)
        table = results_frame(rows_done)
        if _parquet_available():
            write_results_parquet(out, table)
    n_ok = sum(o.ok for o in outcomes.values())
    return BatchReport(table=table, n_rows=len(rows), n_ok=n_ok, n_failed=len(outcomes) - n_ok,
                       n_skipped=sum(o.skipped for o in outcomes.values()),
                       results_csv=out / "results.csv", outcomes=outcomes)


def _store(records, row, outcome: RowOutcome, folder: Path):
    """Store one finished row in the records (a failed row is noted as a failure)."""
    identity = {"path": row.path, **row.identity, "status": outcome.status, "reason": outcome.reason,
                "sha256": "" if outcome.result is None else outcome.result.source.sha256}
    records.store_result(identity, outcome.result, analysed_at=outcome.analysed_at,
                         row_dir=folder if outcome.ok else None)
