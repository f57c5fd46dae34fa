"""The Dask path: a real scheduler and worker as separate processes on 127.0.0.1.

Setup that works on this kind of machine: bind 127.0.0.1, port 0,
dashboards on 127.0.0.1:0, ``--scheduler-file`` for the address.
"""

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from test_batch import (DEFAULTS, FAKE, SYNTHETIC_DEFAULTS, read_table, write_stack,
                        write_synthetic_set)
from thinning.batch import SchedulerUnreachable, run_batch

pytestmark = [pytest.mark.dask, pytest.mark.slow]

#: Columns that may differ between two runs of the same batch.
TIMESTAMPS = ("analysed_at",)


def _dask_command():
    found = Path(sys.executable).with_name("dask")
    return [str(found)] if found.exists() else [shutil.which("dask") or "dask"]


def _stop(proc):
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    """Address of a fresh scheduler with two single-threaded worker processes.

    The workers can import this test folder's modules (the fake analyser of test_batch).
    """
    pytest.importorskip("distributed")
    from distributed import Client

    work = tmp_path_factory.mktemp("dask")
    scheduler_file = work / "scheduler.json"
    logs = [open(work / "scheduler.log", "wb"), open(work / "worker.log", "wb")]
    scheduler = subprocess.Popen(
        _dask_command() + ["scheduler", "--host", "127.0.0.1", "--port", "0",
                           "--dashboard-address", "127.0.0.1:0", "--scheduler-file", str(scheduler_file)],
        cwd=work, stdout=logs[0], stderr=subprocess.STDOUT, start_new_session=True)
    processes = [scheduler]
    try:
        deadline = time.monotonic() + 60
        while not scheduler_file.exists() or not scheduler_file.read_text().strip():
            if time.monotonic() > deadline or scheduler.poll() is not None:
                pytest.fail(f"the Dask scheduler did not start: {(work / 'scheduler.log').read_text()[-500:]}")
            time.sleep(0.1)
        time.sleep(0.2)
        address = json.loads(scheduler_file.read_text())["address"]
        assert address.startswith("tcp://127.0.0.1:")
        worker = subprocess.Popen(
            _dask_command() + ["worker", address, "--host", "127.0.0.1", "--nworkers", "2",
                               "--nthreads", "1", "--dashboard-address", "127.0.0.1:0",
                               "--local-directory", str(work / "space")],
            cwd=work, stdout=logs[1], stderr=subprocess.STDOUT, start_new_session=True,
            env={**os.environ, "PYTHONPATH": os.pathsep.join(
                [str(Path(__file__).parent), os.environ.get("PYTHONPATH", "")]).rstrip(os.pathsep)})
        processes.append(worker)
        with Client(address, timeout="30s") as client:
            client.wait_for_workers(2, timeout=60)
        yield address
    finally:
        for proc in reversed(processes):
            _stop(proc)
        for handle in logs:
            handle.close()


def _comparable(table):
    return [{k: v for k, v in row.items() if k not in TIMESTAMPS} for row in table]


def test_dask_gives_the_same_table_as_local_processes(tmp_path, cluster):
    manifest = write_synthetic_set(tmp_path / "data")
    local = run_batch(manifest, tmp_path / "local", defaults=SYNTHETIC_DEFAULTS, workers=2)
    remote = run_batch(manifest, tmp_path / "remote", defaults=SYNTHETIC_DEFAULTS, scheduler=cluster)
    assert (remote.n_ok, remote.n_failed) == (local.n_ok, local.n_failed) == (3, 3)
    _, local_rows = read_table(tmp_path / "local" / "results.csv")
    columns, remote_rows = read_table(tmp_path / "remote" / "results.csv")
    assert "analysed_at" in columns and all(r["analysed_at"] for r in remote_rows)
    assert _comparable(remote_rows) == _comparable(local_rows)
    for row in local_rows:
        if row["status"] == "ok":
            a = json.loads((tmp_path / "local" / row["folder"] / "result.json").read_text())
            b = json.loads((tmp_path / "remote" / row["folder"] / "result.json").read_text())
            assert a == b
    # a rerun on the cluster finds every finished row up to date
    again = run_batch(manifest, tmp_path / "remote", defaults=SYNTHETIC_DEFAULTS, scheduler=cluster)
    assert again.n_skipped == 3


def test_a_row_that_kills_its_dask_worker_fails_and_the_batch_goes_on(tmp_path, cluster):
    import numpy as np

    rng = np.random.default_rng(21)
    for name in ("a", "crash-always", "b"):
        write_stack(tmp_path / f"{name}.tif", rng)
    manifest = tmp_path / "m.csv"
    manifest.write_text("path,fps\na.tif,1kHz\ncrash-always.tif,1kHz\nb.tif,1kHz\n")
    report = run_batch(manifest, tmp_path / "out", defaults=DEFAULTS, scheduler=cluster, analyser=FAKE)
    _, table = read_table(tmp_path / "out" / "results.csv")
    assert [r["status"] for r in table] == ["ok", "failed", "ok"]
    assert "KilledWorker" in table[1]["reason"]
    assert sorted(os.listdir(tmp_path / "out" / table[1]["folder"])) == ["row.json"]
    assert report.n_failed == 1


def test_unreachable_scheduler_is_one_sentence(tmp_path):
    pytest.importorskip("distributed")
    import socket

    with socket.socket() as sock:      # a port nobody listens on
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    manifest = tmp_path / "m.csv"
    manifest.write_text("path\na.tif\n")
    with pytest.raises(SchedulerUnreachable, match=f"127.0.0.1:{port}"):
        run_batch(manifest, tmp_path / "out", defaults=SYNTHETIC_DEFAULTS,
                  scheduler=f"tcp://127.0.0.1:{port}", connect_timeout_s=2)
