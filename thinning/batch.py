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

import contextlib
import csv
import datetime as _dt
import fcntl
import importlib
import io
import json
import logging
import math
import os
import secrets
import shutil
from collections import deque
from dataclasses import dataclass, field
from pathlib import Path

from .errors import ThinningError
from . import __version__, atomic
from .manifest import ManifestRow, read_manifest, row_options
from .result import Result
from .units import AnalysisOptions, BadQuantity
from .values import row_folder_name, safe_name  # noqa: F401  (safe_name: part of the batch API)

log = logging.getLogger(__name__)

DEFAULT_ANALYSER = "thinning.analysis:analyse_to"
ROW_SCHEMA = "thinning.batch-row/1"
ROW_FILE = "row.json"
#: Suffix of the temporary sibling folders a row is written through.
TEMP_SUFFIX = ".thinning-tmp"
#: How often a row is tried when its local worker process dies while analysing it.
MAX_ATTEMPTS = 2

#: results.csv: the contract's columns, in order.
RESULT_COLUMNS = (
    "row", "path", "sample", "lot", "product", "replicate", "status", "reason", "quality", "regime",
    "relaxation_time_s", "relaxation_time_ci95_low_s", "relaxation_time_ci95_high_s",
    "elastic_modulus_Pa", "shear_viscosity_Pa_s", "extensional_viscosity_max_Pa_s",
    "breakup_time_s", "filament_lifetime_s", "initial_diameter_m", "fps_hz", "pixel_size_m",
    "warnings", "sha256",
)
#: Further columns after the contract's: the findings' codes (contract version 2), then
#: bookkeeping and provenance.
EXTRA_COLUMNS = ("warning_codes", "made_on", "notes", "folder", "analysed_at", "tool_version")
TABLE_COLUMNS = RESULT_COLUMNS + EXTRA_COLUMNS
#: Numeric result columns copied straight from result.json.
_RESULT_NUMBERS = ("relaxation_time_s", "elastic_modulus_Pa", "shear_viscosity_Pa_s",
                   "extensional_viscosity_max_Pa_s", "breakup_time_s", "filament_lifetime_s",
                   "initial_diameter_m", "fps_hz", "pixel_size_m")
_NUMERIC_COLUMNS = _RESULT_NUMBERS + ("relaxation_time_ci95_low_s", "relaxation_time_ci95_high_s")


class BatchBusy(ThinningError, RuntimeError):
    """Another batch is writing into the same output folder."""


class SchedulerUnreachable(ThinningError, RuntimeError):
    """The Dask scheduler given with ``--scheduler`` cannot be reached (one sentence)."""


# --- time ----------------------------------------------------------------------------------

def utc_now() -> str:
    """The current UTC time, ISO 8601 to the second with a ``Z``."""
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


# --- one row, in a worker ------------------------------------------------------------------

@dataclass(frozen=True)
class RowTask:
    """Everything a worker needs to analyse one row (picklable, absolute paths)."""

    row: int
    source: str
    options: AnalysisOptions
    folder: str
    redo: bool = False
    analyser: str = DEFAULT_ANALYSER


@dataclass(frozen=True)
class RowOutcome:
    """What became of one row.

    ``status`` ``"ok"`` or ``"failed"``; ``reason`` one sentence when failed;
    ``result`` the :class:`~thinning.result.Result` when ok (without its neck
    series and per-frame table, which stay in the row's folder); ``skipped`` True when an
    earlier run's result was reused; ``analysed_at`` UTC ISO time of the analysis.
    """

    row: int
    status: str
    reason: str = ""
    result: Result | None = None
    analysed_at: str = ""
    skipped: bool = False
    attempts: int = 1

    @property
    def ok(self) -> bool:
        return self.status == "ok"


def run_row(task: RowTask) -> RowOutcome:
    """Analyse one row into its folder (or reuse an up-to-date earlier result).

    Never raises for a bad recording: the outcome is then ``failed`` and the
    folder holds only ``row.json`` with the reason.
    """
    folder = Path(task.folder)
    if not task.redo:
        earlier = _up_to_date(task)
        if earlier is not None:
            return earlier
    temp = _temp_sibling(folder, "new")
    temp.mkdir(parents=True)
    with _cleared(temp):
        try:
            result = _analyser(task.analyser)(task.source, temp, task.options).summary()
            status, reason = "ok", ""
        except ThinningError as exc:
            result, status, reason = None, "failed", str(exc)
        except Exception as exc:  # a bug must not stop the batch: the row fails, saying so
            log.exception("row %d: internal error", task.row)
            result, status = None, "failed"
            reason = f"Internal error while analysing it ({type(exc).__name__}: {exc})."
        if result is None:
            shutil.rmtree(temp)
            temp.mkdir()
        return _publish(temp, folder, task, RowOutcome(task.row, status, reason, result, utc_now()))


def _analyser(spec: str):
    module, attribute = spec.split(":")
    return getattr(importlib.import_module(module), attribute)


def _plain_options(options: AnalysisOptions) -> dict:
    return json.loads(json.dumps(options.to_dict(), allow_nan=False))


def _row_json(task: RowTask, outcome: RowOutcome) -> dict:
    result = outcome.result
    return {"schema": ROW_SCHEMA, "row": task.row, "status": outcome.status, "reason": outcome.reason,
            "source": task.source, "sha256": None if result is None else result.source.sha256,
            "options": _plain_options(task.options), "analysed_at": outcome.analysed_at,
            "tool_version": __version__ if result is None else result.tool_version}


def _write_row_json(folder: Path, task: RowTask, outcome: RowOutcome):
    text = json.dumps(_row_json(task, outcome), indent=2, allow_nan=False) + "\n"
    (folder / ROW_FILE).write_text(text, encoding="utf-8")


def _up_to_date(task: RowTask) -> RowOutcome | None:
    """The earlier outcome when the row's folder holds an ok result for the same source and options."""
    from .frames import UnusableSource, open_source

    folder = Path(task.folder)
    try:
        record = json.loads((folder / ROW_FILE).read_text(encoding="utf-8"))
        result = Result.from_json(json.loads((folder / "result.json").read_text(encoding="utf-8")))
    except (OSError, ValueError, TypeError, KeyError):
        return None
    if record.get("status") != "ok" or record.get("options") != _plain_options(task.options):
        return None
    try:
        with open_source(task.source) as recording:
            sha256 = recording.sha256
    except (UnusableSource, OSError):
        return None
    if sha256 != record.get("sha256") or sha256 != result.source.sha256:
        return None
    return RowOutcome(task.row, "ok", "", result, record.get("analysed_at", ""), skipped=True)


def _temp_sibling(folder: Path, tag: str) -> Path:
    return folder.with_name(f".{folder.name}.{tag}-{os.getpid()}-{secrets.token_hex(4)}{TEMP_SUFFIX}")


def swap_in(temp: Path, folder: Path):
    """Put the finished folder ``temp`` in place of ``folder`` by renames (same file system)."""
    old = None
    if folder.exists():
        old = _temp_sibling(folder, "old")
        os.rename(folder, old)
    os.rename(temp, folder)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def write_failed_folder(task: RowTask, reason: str) -> RowOutcome:
    """A failed row decided by the coordinator (bad cells): its folder holds only ``row.json``."""
    folder = Path(task.folder)
    temp = _temp_sibling(folder, "new")
    temp.mkdir(parents=True)
    with _cleared(temp):
        return _publish(temp, folder, task, RowOutcome(task.row, "failed", reason, None, utc_now()))


def _publish(temp: Path, folder: Path, task: RowTask, outcome: RowOutcome) -> RowOutcome:
    """Add ``row.json`` to the finished folder ``temp`` and swap it in as the row's ``folder``."""
    _write_row_json(temp, task, outcome)
    swap_in(temp, folder)
    return outcome


@contextlib.contextmanager
def _cleared(temp: Path):
    """Whatever happens inside, ``temp`` does not outlive the block (it is gone once swapped in)."""
    try:
        yield
    finally:
        if temp.exists():
            shutil.rmtree(temp, ignore_errors=True)


# --- local worker processes ----------------------------------------------------------------

def _die_with_parent():
    """Linux: have the kernel kill this worker when the coordinating process dies."""
    try:
        import ctypes
        import signal

        libc = ctypes.CDLL(None, use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def _worker_main(conn, log_level, parent_pid, single_thread):
    import signal

    _die_with_parent()
    if os.getppid() != parent_pid:   # the coordinator died before the line above took effect
        return
    signal.signal(signal.SIGINT, signal.SIG_IGN)   # Ctrl-C is the coordinator's to handle
    if single_thread:  # one worker process per core: keep numeric libraries to one thread each
        for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
            os.environ.setdefault(name, "1")
        import cv2

        cv2.setNumThreads(1)
    logging.basicConfig(level=log_level, format="%(levelname)s %(name)s: %(message)s")
    while True:
        try:
            task = conn.recv()
        except (EOFError, OSError):
            return
        if task is None:
            return
        conn.send(run_row(task))


class _Worker:
    def __init__(self, ctx, log_level, single_thread):
        self.conn, child = ctx.Pipe()
        self.process = ctx.Process(target=_worker_main, args=(child, log_level, os.getpid(), single_thread),
                                   daemon=True, name="thinning-batch-worker")
        self.process.start()
        child.close()
        self.task = None

    def give(self, task):
        self.task = task
        self.conn.send(task)

    def stop(self, *, timeout=5.0):
        """Ask the process to finish (``timeout=0``: kill it now)."""
        if self.conn.closed:
            return
        if timeout > 0:
            try:
                self.conn.send(None)
            except (OSError, ValueError):
                pass
            self.process.join(timeout)
        if self.process.is_alive():
            self.process.kill()
            self.process.join()
        self.conn.close()


def run_local(tasks, on_outcome, *, workers: int):
    """Run ``tasks`` on ``workers`` spawned local processes; ``on_outcome(outcome)`` as each finishes.

    A process that dies mid-row is replaced; the row is tried :data:`MAX_ATTEMPTS` times in all.
    """
    import multiprocessing as mp
    from multiprocessing.connection import wait

    ctx = mp.get_context("spawn")
    level = logging.getLogger().getEffectiveLevel()
    queue = deque(tasks)
    attempts = {task.row: 0 for task in tasks}
    n_workers = max(1, min(workers, len(queue)))
    single_thread = workers > 1

    def start():
        return _Worker(ctx, level, single_thread)

    pool = [start() for _ in range(n_workers)]

    def feed(worker):
        if queue:
            task = queue.popleft()
            attempts[task.row] += 1
            worker.give(task)

    try:
        for worker in pool:
            feed(worker)
        while any(w.task is not None for w in pool):
            busy = [w for w in pool if w.task is not None]
            wait([w.conn for w in busy] + [w.process.sentinel for w in busy])
            for i, worker in enumerate(pool):
                if worker.task is None:
                    continue
                try:
                    outcome = worker.conn.recv() if worker.conn.poll() else None
                except (EOFError, OSError):
                    outcome = None
                if outcome is not None:
                    worker.task = None
                    on_outcome(_with_attempts(outcome, attempts[outcome.row]))
                    feed(worker)
                elif not worker.process.is_alive():
                    task, code = worker.task, worker.process.exitcode
                    worker.task = None
                    worker.stop()
                    _remove_temp_folders(Path(task.folder), worker.process.pid)
                    log.warning("row %d: worker process died (exit code %s)", task.row, code)
                    if attempts[task.row] < MAX_ATTEMPTS:
                        queue.appendleft(task)
                    else:
                        reason = (f"The worker process analysing it died {attempts[task.row]} times "
                                  f"(last exit code {code}).")
                        on_outcome(_with_attempts(write_failed_folder(task, reason), attempts[task.row]))
                    if queue:
                        pool[i] = start()
                        feed(pool[i])
    except BaseException:  # Ctrl-C or a failing callback: stop at once, leave no half-written folder
        for worker in pool:
            worker.stop(timeout=0)
            if worker.task is not None:
                _remove_temp_folders(Path(worker.task.folder), worker.process.pid)
        raise
    finally:
        for worker in pool:
            worker.stop()


def _remove_temp_folders(folder: Path, pid: int):
    """Remove what a dead worker process ``pid`` left half-written beside ``folder``."""
    for entry in folder.parent.glob(f".{folder.name}.*-{pid}-*{TEMP_SUFFIX}"):
        shutil.rmtree(entry, ignore_errors=True)


def _with_attempts(outcome: RowOutcome, attempts: int) -> RowOutcome:
    if outcome.attempts == attempts:
        return outcome
    return RowOutcome(outcome.row, outcome.status, outcome.reason, outcome.result,
                      outcome.analysed_at, outcome.skipped, attempts)


# --- Dask ----------------------------------------------------------------------------------

def run_dask(tasks, on_outcome, *, scheduler: str, connect_timeout_s: float = 20.0):
    """Run ``tasks`` on an existing dask.distributed cluster at ``scheduler`` (``tcp://host:port``).

    One ``client.submit(run_row, task, pure=False, retries=1)`` per row; the
    workers must import ``thinning`` and see the output folder at the same path.
    """
    from distributed import Client, as_completed

    try:
        client = Client(scheduler, timeout=f"{connect_timeout_s}s")
    except (OSError, TimeoutError, ValueError) as exc:
        raise SchedulerUnreachable(f"No Dask scheduler answered at {scheduler} ({type(exc).__name__}); "
                                   "start one or check the address.") from None
    token = secrets.token_hex(4)
    try:
        futures = {client.submit(run_row, task, pure=False, retries=1,
                                 key=f"thinning-row-{task.row}-{token}"): task for task in tasks}
        for future in as_completed(futures):
            task = futures.pop(future)
            try:
                outcome = future.result()
            except Exception as exc:  # KilledWorker and friends: the row fails, the batch goes on
                outcome = write_failed_folder(
                    task, f"The Dask worker analysing it failed ({type(exc).__name__}: {exc}).")
            on_outcome(outcome)
    finally:
        client.close()


# --- the results table ---------------------------------------------------------------------

def table_row(row: ManifestRow, outcome: RowOutcome, folder_name: str) -> dict:
    """One results.csv row (:data:`TABLE_COLUMNS`; None where empty)."""
    values = {"row": row.row, "path": row.path, **{k: row.identity.get(k, "") for k in
                                                    ("sample", "lot", "product", "replicate")},
              "status": outcome.status, "reason": outcome.reason}
    values.update(made_on=row.identity.get("made_on", ""), notes=row.identity.get("notes", ""),
                  folder=folder_name, analysed_at=outcome.analysed_at, tool_version=__version__)
    result = outcome.result
    if result is not None:
        fields = result.to_json()
        ci = fields["relaxation_time_ci95_s"] or [None, None]
        values.update({name: fields[name] for name in _RESULT_NUMBERS})
        values.update(quality=result.quality, regime=fields["regime"],
                      relaxation_time_ci95_low_s=ci[0], relaxation_time_ci95_high_s=ci[1],
                      warnings="; ".join(result.warnings),
                      warning_codes="; ".join(result.warning_codes),
                      sha256=result.source.sha256, tool_version=result.tool_version)
    return {column: values.get(column) for column in TABLE_COLUMNS}


def _cell(value) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        return repr(value) if math.isfinite(value) else ""
    return str(value)


def results_csv_text(rows: list[dict]) -> str:
    """The results.csv text: header, then rows; numbers at full precision (``repr``)."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(TABLE_COLUMNS)
    for values in rows:
        writer.writerow([_cell(values[c]) for c in TABLE_COLUMNS])
    return buffer.getvalue()


def results_frame(rows: list[dict]):
    """The results table as a pandas DataFrame (numbers as float, NaN where empty)."""
    import pandas as pd

    frame = pd.DataFrame(rows, columns=list(TABLE_COLUMNS))
    for column in _NUMERIC_COLUMNS:
        frame[column] = pd.to_numeric(frame[column], errors="coerce").astype(float)
    frame["row"] = frame["row"].astype(int)
    return frame


def write_results_csv(out: Path, rows: list[dict]):
    """Atomically (re)write ``out/results.csv`` from table rows."""
    atomic.write_bytes(out / "results.csv", results_csv_text(rows).encode("utf-8"))


def write_results_parquet(out: Path, frame):
    """Atomically write ``out/results.parquet`` from the results DataFrame (needs pyarrow)."""
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    atomic.write_bytes(out / "results.parquet", buffer.getvalue())


def _parquet_available() -> bool:
    try:
        import pyarrow  # noqa: F401
    except ImportError:
        return False
    return True


# --- the whole batch ------------------------------------------------------------------------

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
              scheduler: str | None = None, redo: bool = False, on_row=None,
              analyser: str = DEFAULT_ANALYSER, connect_timeout_s: float = 20.0) -> BatchReport:
    """Analyse every row of ``manifest`` into ``out_dir``; write ``results.csv`` as rows finish.

    ``defaults``: option texts from the command line (``{"fps": "10kHz", …}``)
    for empty cells. ``workers``: local processes (default ``os.cpu_count()``);
    ``scheduler``: a Dask scheduler address instead. ``on_row(manifest_row,
    outcome, folder)`` is called in this process as each row finishes, in finishing
    order. ``analyser``: ``"module:function"`` with the signature of
    :func:`thinning.analysis.analyse` (the default), imported in the workers.
    ``connect_timeout_s``: how long to wait for the Dask scheduler.
    Raises :class:`~thinning.manifest.UnusableManifest`, :class:`BatchBusy`,
    :class:`SchedulerUnreachable`.
    """
    rows = read_manifest(manifest)
    out = Path(out_dir).resolve()
    out.mkdir(parents=True, exist_ok=True)
    lock = _lock(out)
    try:
        _clean_leftovers(out)
        return _run(rows, out, defaults=defaults or {}, workers=workers or os.cpu_count() or 1,
                    scheduler=scheduler, redo=redo, on_row=on_row, analyser=analyser,
                    connect_timeout_s=connect_timeout_s)
    finally:
        lock.close()


def _run(rows, out, *, defaults, workers, scheduler, redo, on_row, analyser, connect_timeout_s):
    width = len(str(max((r.row for r in rows), default=1)))
    by_row = {r.row: r for r in rows}
    folders = {r.row: row_folder_name(r.row, r.name, width) for r in rows}
    finished: dict[int, dict] = {}
    outcomes: dict[int, RowOutcome] = {}
    (out / "results.parquet").unlink(missing_ok=True)  # written again when the batch completes

    def record(outcome: RowOutcome):
        row = by_row[outcome.row]
        outcomes[outcome.row] = outcome
        finished[outcome.row] = table_row(row, outcome, folders[outcome.row])
        write_results_csv(out, [finished[k] for k in sorted(finished)])
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
        tasks.append(RowTask(row.row, str(row.source.resolve()), options, folder, redo, analyser))
    if tasks:
        if scheduler:
            run_dask(tasks, record, scheduler=scheduler, connect_timeout_s=connect_timeout_s)
        else:
            run_local(tasks, record, workers=workers)
    rows_done = [finished[k] for k in sorted(finished)]
    write_results_csv(out, rows_done)
    table = results_frame(rows_done)
    if _parquet_available():
        write_results_parquet(out, table)
    n_ok = sum(o.ok for o in outcomes.values())
    return BatchReport(table=table, n_rows=len(rows), n_ok=n_ok, n_failed=len(outcomes) - n_ok,
                       n_skipped=sum(o.skipped for o in outcomes.values()),
                       results_csv=out / "results.csv", outcomes=outcomes)
