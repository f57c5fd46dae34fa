"""Test services as a pytest plugin: a throwaway PostgreSQL cluster, headless Chromium, fake batches.

Fixtures
--------
``db_url``
    parametrised over ``sqlite`` (a file in ``tmp_path``) and ``postgresql``
    (a fresh database per test on a session-wide throwaway cluster started
    with the Debian ``initdb``/``pg_ctl`` in a temporary folder, listening on
    127.0.0.1 at a free port, fsync off). ``THINNING_TEST_POSTGRES_URL`` (a
    SQLAlchemy URL of a role allowed to create databases) uses an existing
    server instead.
``postgres_server``
    the admin URL of that server.
``chromium_path``
    the headless Chromium executable.

A missing service skips the tests that need it, or fails them when
``THINNING_REQUIRE_SERVICES=1`` (CI). Helpers :func:`write_batch`,
:func:`fake_result` and :func:`run_chromium` build test inputs.
"""

from __future__ import annotations

import csv
import glob
import hashlib
import json
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import uuid
from pathlib import Path

import numpy as np
import pytest

REQUIRE_ENV = "THINNING_REQUIRE_SERVICES"
POSTGRES_ENV = "THINNING_TEST_POSTGRES_URL"

CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-quic",
                  "--disable-dev-shm-usage", "--hide-scrollbars")


def unavailable(message: str):
    """Skip, or fail when the environment requires every service."""
    if os.environ.get(REQUIRE_ENV) == "1":
        pytest.fail(f"{message} ({REQUIRE_ENV}=1)", pytrace=False)
    pytest.skip(message)


# ---------------------------------------------------------------------------------------------- PostgreSQL
def _postgres_bindir() -> Path | None:
    found = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"), key=lambda p: int(p.split("/")[4]))
    if found:
        return Path(found[-1]).parent
    initdb = shutil.which("initdb")
    return Path(initdb).parent if initdb else None


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


@pytest.fixture(scope="session")
def postgres_server():
    """Admin SQLAlchemy URL of a PostgreSQL server for the tests (started here unless given)."""
    pytest.importorskip("sqlalchemy")
    try:
        import psycopg  # noqa: F401
    except ImportError:
        unavailable("psycopg is not installed (pip install 'psycopg[binary]')")
    if os.environ.get(POSTGRES_ENV):
        yield os.environ[POSTGRES_ENV]
        return
    bindir = _postgres_bindir()
    if bindir is None:
        unavailable("PostgreSQL server binaries not found (apt-get install -y postgresql)")
    base = Path(tempfile.mkdtemp(prefix="thinning-pg-"))
    prefix: list[str] = []
    if os.geteuid() == 0:  # initdb and pg_ctl refuse to run as root
        try:
            account = pwd.getpwnam("postgres")
        except KeyError:
            unavailable("running as root but there is no 'postgres' account to run PostgreSQL")
        os.chown(base, account.pw_uid, account.pw_gid)
        prefix = ["runuser", "-u", "postgres", "--"]
    data, log, port = base / "data", base / "server.log", _free_port()
    settings = (f"-c listen_addresses=127.0.0.1 -c port={port} -c unix_socket_directories={base} "
                "-c fsync=off -c synchronous_commit=off -c full_page_writes=off -c max_connections=60")
    try:
        subprocess.run(prefix + [str(bindir / "initdb"), "-D", str(data), "-U", "postgres", "-A", "trust",
                                 "-E", "UTF8", "--no-sync"], check=True, capture_output=True, timeout=120)
        subprocess.run(prefix + [str(bindir / "pg_ctl"), "-D", str(data), "-l", str(log), "-w", "-t", "60",
                                 "-o", settings, "start"], check=True, capture_output=True, timeout=90)
    except (subprocess.CalledProcessError, subprocess.TimeoutExpired, OSError) as exc:
        detail = getattr(exc, "stderr", b"") or b""
        shutil.rmtree(base, ignore_errors=True)
        unavailable(f"could not start a PostgreSQL cluster: {exc} {detail.decode(errors='replace')[-300:]}")
    try:
        yield f"postgresql+psycopg://postgres@127.0.0.1:{port}/postgres"
    finally:
        subprocess.run(prefix + [str(bindir / "pg_ctl"), "-D", str(data), "-m", "immediate", "-w", "stop"],
                       capture_output=True, timeout=60)
        shutil.rmtree(base, ignore_errors=True)


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgres)])
def db_url(request, tmp_path):
    """A fresh, empty records database URL: an SQLite file, or a new PostgreSQL database."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'records.db'}"
        return
    from sqlalchemy import create_engine, text
    from sqlalchemy.engine import make_url

    admin_url = request.getfixturevalue("postgres_server")
    name = f"thinning_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(admin_url, isolation_level="AUTOCOMMIT")
    try:
        with admin.connect() as conn:
            conn.execute(text(f'CREATE DATABASE "{name}"'))
        yield make_url(admin_url).set(database=name).render_as_string(hide_password=False)
        with admin.connect() as conn:
            conn.execute(text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
    finally:
        admin.dispose()


# ---------------------------------------------------------------------------------------------- Chromium
@pytest.fixture(scope="session")
def chromium_path() -> str:
    """The headless Chromium executable (Debian package ``chromium``)."""
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    unavailable("Chromium not found (apt-get install -y chromium)")


def run_chromium(chromium: str, page: Path, profile_dir: Path, *extra: str, window=(1024, 768),
                 timeout_s: float = 90) -> subprocess.CompletedProcess:
    """Run headless Chromium on a local page with the closed-network flags; returns the process."""
    args = [chromium, *CHROMIUM_FLAGS, f"--user-data-dir={profile_dir}",
            f"--window-size={window[0]},{window[1]}", "--enable-logging=stderr", "--v=0", *extra,
            Path(page).resolve().as_uri()]
    return subprocess.run(args, capture_output=True, text=True, timeout=timeout_s)


# ---------------------------------------------------------------------------------------------- fake batches
RESULTS_COLUMNS = (
    "row", "path", "sample", "lot", "product", "replicate", "status", "reason", "quality", "regime",
    "relaxation_time_s", "relaxation_time_ci95_low_s", "relaxation_time_ci95_high_s", "elastic_modulus_Pa",
    "shear_viscosity_Pa_s", "extensional_viscosity_max_Pa_s", "breakup_time_s", "filament_lifetime_s",
    "initial_diameter_m", "fps_hz", "pixel_size_m", "warnings", "sha256", "made_on", "notes",
    "analysed_at", "tool_version",
)


def fake_curve(relaxation_time_s: float, *, fps_hz=20000.0, initial_diameter_m=1e-3, elastic_modulus_Pa=5.0,
               surface_tension_N_m=0.05):
    """(time_s, diameter_m) of an elasto-capillary thinning record, empty after the thread is lost."""
    from thinning.laws import elasto_capillary_diameter

    t = np.arange(int(12 * relaxation_time_s * fps_hz)) / fps_hz
    d = elasto_capillary_diameter(t, initial_diameter=initial_diameter_m, elastic_modulus=elastic_modulus_Pa,
                                  surface_tension=surface_tension_N_m, relaxation_time=relaxation_time_s)
    d[d < 5e-6] = np.nan
    return t, d


def fake_result(*, relaxation_time_s, sha256, quality="good", warnings=(), options=None,
                tool_version="0.1.0", filament_lifetime_s=None, extensional_viscosity_max_Pa_s=None) -> dict:
    """A result.json dict with every contract key (values plausible, not from an analysis)."""
    lam = relaxation_time_s
    return {
        "schema": "thinning.result/1", "tool_version": tool_version,
        "source": {"path": f"{sha256[:8]}.avi", "sha256": sha256, "n_frames": 400, "width_px": 256,
                   "height_px": 512, "bit_depth": 8},
        "fps_hz": 20000.0, "pixel_size_m": 4e-6,
        "options": options if options is not None else {"surface_tension_N_m": 0.05, "geometry": "plates"},
        "regime": "elasto-capillary" if lam is not None else "undetermined",
        "regimes": [{"kind": "elasto-capillary", "t_start_s": 0.001, "t_end_s": 0.02}] if lam else [],
        "relaxation_time_s": lam,
        "relaxation_time_ci95_s": [lam * 0.97, lam * 1.03] if lam is not None else None,
        "fit_window_s": [0.001, 0.02], "fit_window_frames": 380, "free_thinning_start_s": 0.0,
        "initial_diameter_m": 1e-3, "elastic_modulus_Pa": 5.0, "shear_viscosity_Pa_s": None,
        "extensional_viscosity_max_Pa_s": extensional_viscosity_max_Pa_s,
        "extensional_viscosity_terminal_Pa_s": None, "breakup_time_s": filament_lifetime_s,
        "filament_lifetime_s": filament_lifetime_s, "warnings": list(warnings), "quality": quality,
        "quality_reasons": list(warnings) if quality == "doubtful" else [],
        # the findings behind the sentences: doubtful ones as a short window, notes as beads
        "findings": [{"code": "few-frames-in-window" if quality == "doubtful" else "beads",
                      "severity": "doubtful" if quality == "doubtful" else "note",
                      "message": w, "t_range_s": None} for w in warnings],
    }


def source_hash(*parts) -> str:
    """A stand-in source sha256 made from any parts."""
    return hashlib.sha256("|".join(map(str, parts)).encode()).hexdigest()


def _safe(name: str) -> str:
    return "".join(c if (c.isascii() and (c.isalnum() or c in "._-")) else "_" for c in name)


def _cell(value) -> str:
    return "" if value is None else (repr(value) if isinstance(value, float) else str(value))


def write_batch(batch_dir: Path, rows: list[dict], *, with_curves: bool = True) -> Path:
    """Write a finished batch folder as ``thinning batch`` does: results.csv and row folders.

    Each row has manifest fields (``sample, lot, product, replicate, made_on,
    notes, analysed_at``) and either ``result`` (a result dict) or
    ``status="failed"`` with ``reason``.
    """
    batch_dir = Path(batch_dir)
    batch_dir.mkdir(parents=True, exist_ok=True)
    width = len(str(len(rows)))
    table = []
    for number, row in enumerate(rows, start=1):
        result = row.get("result")
        status = row.get("status", "ok" if result is not None else "failed")
        sha = result["source"]["sha256"] if result else row.get("sha256", "")
        path = row.get("path", f"videos/{row['sample']}-{row.get('replicate', '')}.avi")
        folder = batch_dir / f"{number:0{width}d}-{_safe(row.get('sample') or Path(path).stem)}"
        folder.mkdir(exist_ok=True)
        record = {col: "" for col in RESULTS_COLUMNS}
        record.update(row=number, path=path, status=status, sha256=sha,
                      **{k: row.get(k, "") for k in ("sample", "lot", "product", "replicate", "made_on", "notes",
                                                     "analysed_at", "reason")})
        if result is not None:
            ci = result["relaxation_time_ci95_s"] or (None, None)
            record.update({k: result[k] for k in ("quality", "regime", "relaxation_time_s", "elastic_modulus_Pa",
                                                  "shear_viscosity_Pa_s", "extensional_viscosity_max_Pa_s",
                                                  "breakup_time_s", "filament_lifetime_s", "initial_diameter_m",
                                                  "fps_hz", "pixel_size_m", "tool_version")})
            record.update(relaxation_time_ci95_low_s=ci[0], relaxation_time_ci95_high_s=ci[1],
                          warnings="; ".join(result["warnings"]))
            (folder / "result.json").write_text(json.dumps(result, allow_nan=False, indent=2))
            if with_curves and result["relaxation_time_s"]:
                t, d = fake_curve(result["relaxation_time_s"])
                with (folder / "diameter.csv").open("w", newline="") as handle:
                    writer = csv.writer(handle, lineterminator="\n")
                    writer.writerow(["frame", "time_s", "diameter_m"])
                    for i, (ti, di) in enumerate(zip(t, d)):
                        writer.writerow([i, repr(float(ti)), "" if np.isnan(di) else repr(float(di))])
        else:
            (folder / "error.txt").write_text(row.get("reason", "failed") + "\n")
        table.append(record)
    with (batch_dir / "results.csv").open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=RESULTS_COLUMNS, lineterminator="\n")
        writer.writeheader()
        for record in table:
            writer.writerow({k: _cell(v) for k, v in record.items()})
    return batch_dir


def small_files(limit):
    """A write-failing shim for a child process: writes past ``limit`` bytes fail (EFBIG), as on
    a full disk (ENOSPC)."""
    def apply():
        import resource
        import signal

        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))
    return apply
