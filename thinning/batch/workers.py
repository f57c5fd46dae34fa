"""Where the rows run: local worker processes, or an existing Dask cluster.

:func:`run_local` keeps a pool of spawned processes, one row each at a time;
a process that dies while analysing a row (segfault, ``os._exit``) is
replaced and the row tried once more, a second death fails the row.
:func:`run_dask` submits one task per row to a dask.distributed scheduler;
retries follow the cluster (``retries=1`` for errors; a worker death is
retried per the scheduler's ``allowed-failures``).
"""

from __future__ import annotations

import dataclasses
import logging
import os
import secrets
import shutil
from collections import deque
from pathlib import Path

from ..errors import ThinningError
from .rows import TEMP_SUFFIX, RowOutcome, run_row, write_failed_folder

log = logging.getLogger(__name__)


#: How often a row is tried when its local worker process dies while analysing it.
MAX_ATTEMPTS = 2


class SchedulerUnreachable(ThinningError, RuntimeError):
    """The Dask scheduler given with ``--scheduler`` cannot be reached (one sentence)."""


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
    return dataclasses.replace(outcome, attempts=attempts)


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
