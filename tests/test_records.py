"""The records database and the `records` commands, on SQLite and PostgreSQL (db_url fixture)."""

import csv
import io
import json
import os
import subprocess
import sys
import textwrap
import threading
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from sqlalchemy import create_engine, func, select, update

from services import fake_curve, fake_result, source_hash, write_batch
from thinning import records as rec
from thinning.cli_records import records as records_cli
from thinning.result import Result

# columns exactly as written in docs/contract.md ("thinning records …")
CONTRACT_EXPORT = ["product", "lot", "sample", "replicate", "status", "quality", "regime", "relaxation_time_s",
                   "relaxation_time_ci95_low_s", "relaxation_time_ci95_high_s", "shear_viscosity_Pa_s",
                   "extensional_viscosity_max_Pa_s", "breakup_time_s", "filament_lifetime_s", "sha256",
                   "analysed_at", "tool_version",
                   "warning_codes"]  # contract version 2: the findings' codes
CONTRACT_LOTS = ["product", "lot", "made_on", "n_valid", "relaxation_time_mean_s", "relaxation_time_sd_s",
                 "relaxation_time_cv", "verdict", "reasons", "chart_flags", "decision_rule"]

SPECS = """
[[product]]
name = "ink-A"
relaxation_time_s = [0.008, 0.012]
replicates = 3
max_cv = 0.10

[[product]]
name = "ink-B"
relaxation_time_s = [0.002, nan]
replicates = 2
max_cv = 0.2
"""


def lot_rows(product, lot, lams, *, made_on="2026-01-05", analysed_at="2026-02-01T10:00:00Z", tool="0.1.0",
             options=None):
    return [dict(sample=f"{lot}-s", lot=lot, product=product, replicate=str(i), made_on=made_on,
                 analysed_at=analysed_at, notes="",
                 result=fake_result(relaxation_time_s=lam, sha256=source_hash(product, lot, i), tool_version=tool,
                                    options=options))
            for i, lam in enumerate(lams, start=1)]


def run(args, db_url, **kwargs):
    result = CliRunner().invoke(records_cli, [*args, "--db", db_url], **kwargs)
    return result


def count(db_url, table, *where):
    engine = create_engine(db_url)
    try:
        with engine.connect() as conn:
            return conn.execute(select(func.count()).select_from(table).where(*where)).scalar()
    finally:
        engine.dispose()


def test_load_batch_is_idempotent_and_keeps_full_precision(db_url, tmp_path):
    lam = 0.010000000000000002  # needs all 17 digits to round-trip
    rows = lot_rows("ink-A", "L1", [lam, 0.0101, 0.0099])
    write_batch(tmp_path / "b", rows)
    with rec.open_records(db_url) as store:
        assert store.load_batch(tmp_path / "b") == {"inserted": 3, "unchanged": 0, "superseded": 0, "history": 0,
                                                   "failure": 0}
        assert store.load_batch(tmp_path / "b") == {"inserted": 0, "unchanged": 3, "superseded": 0, "history": 0,
                                                   "failure": 0}
        exported = store.export_rows()
    assert count(db_url, rec.measurements) == 3
    assert [r["relaxation_time_s"] for r in exported] == [lam, 0.0101, 0.0099]
    out = tmp_path / "export.csv"
    result = run(["export", "--out", str(out)], db_url)
    assert result.exit_code == 0, result.output
    with out.open(encoding="utf-8-sig") as handle:
        reader = csv.DictReader(handle)
        table = list(reader)
    assert reader.fieldnames == CONTRACT_EXPORT
    assert float(table[0]["relaxation_time_s"]) == lam
    assert table[0]["analysed_at"] == "2026-02-01T10:00:00Z" and table[0]["status"] == "ok"
    assert table[0]["shear_viscosity_Pa_s"] == ""


def test_store_result_copies_the_diameter_curve(db_url, tmp_path):
    write_batch(tmp_path / "b", lot_rows("ink-A", "L1", [0.01]))
    row_dir = tmp_path / "b" / "1-L1-s"
    result = json.loads((row_dir / "result.json").read_text())
    manifest_row = {"sample": "L1-s", "lot": "L1", "product": "ink-A", "replicate": "1", "path": "x.avi",
                    "status": "ok", "sha256": result["source"]["sha256"], "made_on": "2026-01-05"}
    with rec.open_records(db_url) as store:
        assert store.store_result(manifest_row, Result.from_json(result),
                                  analysed_at="2026-02-01T10:00:00Z", row_dir=row_dir) == "inserted"
        assert store.store_result(manifest_row, Result.from_json(result), analysed_at="2026-02-02T10:00:00Z",
                                  row_dir=row_dir) == "unchanged"
        detail = store.lot_detail("L1")
    (t, d), = detail.curves.values()
    t_true, d_true = fake_curve(0.01)
    np.testing.assert_array_equal(t, t_true)
    np.testing.assert_array_equal(np.isnan(d), np.isnan(d_true))
    np.testing.assert_array_equal(d[~np.isnan(d)], d_true[~np.isnan(d_true)])


def test_the_batch_store_and_a_later_load_of_its_folder_agree(db_url, tmp_path):
    # the batch stores its in-memory result (tuples, numpy numbers, NaN where the file has null);
    # loading the finished folder afterwards must find the identical result
    rows = lot_rows("ink-A", "L1", [0.0103])
    write_batch(tmp_path / "b", rows)
    in_memory = dict(rows[0]["result"])
    in_memory.update(relaxation_time_s=np.float64(0.0103), shear_viscosity_Pa_s=float("nan"),
                     fit_window_s=(0.001, 0.02), fit_window_frames=np.int64(380))
    manifest_row = {k: rows[0][k] for k in ("sample", "lot", "product", "replicate", "made_on")}
    with rec.open_records(db_url) as store:
        assert store.store_result({**manifest_row, "status": "ok", "sha256": in_memory["source"]["sha256"]},
                                  Result.from_json(in_memory), analysed_at="2026-02-01T10:00:00Z",
                                  row_dir=tmp_path / "b" / "1-L1-s") == "inserted"
        assert store.load_batch(tmp_path / "b")["unchanged"] == 1
        (row,) = store.export_rows()
    assert row["shear_viscosity_Pa_s"] is None and type(row["relaxation_time_s"]) is float


def test_a_changed_result_supersedes_and_keeps_history(db_url, tmp_path):
    write_batch(tmp_path / "old", lot_rows("ink-A", "L1", [0.010, 0.010, 0.010], tool="0.1.0",
                                           options={"surface_tension_N_m": 0.05}))
    write_batch(tmp_path / "new", lot_rows("ink-A", "L1", [0.011, 0.010, 0.010], tool="0.2.0",
                                           analysed_at="2026-03-01T09:00:00Z", options={"surface_tension_N_m": 0.06}))
    with rec.open_records(db_url) as store:
        store.load_batch(tmp_path / "old")
        assert store.load_batch(tmp_path / "new")["superseded"] == 3
        assert store.load_batch(tmp_path / "new")["unchanged"] == 3
        exported = store.export_rows()
        detail = store.lot_detail("L1")
    assert len(exported) == 3 and {r["tool_version"] for r in exported} == {"0.2.0"}
    assert exported[0]["relaxation_time_s"] == 0.011
    assert count(db_url, rec.measurements) == 6
    assert len(detail.history) == 3
    old = detail.history[0]
    assert old["tool_version"] == "0.1.0" and json.loads(old["options"])["surface_tension_N_m"] == 0.05
    assert old["superseded_at"] and old["superseded_by"] is not None and old["analysed_at"].startswith("2026-02-01")
    # the verdict only sees the current measurements
    assert detail.summary.verdict.stats["relaxation_time_s"].mean == pytest.approx((0.011 + 0.020) / 3)
    result = run(["show", "L1", "--history"], db_url)
    assert result.exit_code == 0 and "superseded" in result.output and "0.1.0" in result.output


def test_the_latest_analysis_stays_current_whatever_the_loading_order(db_url, tmp_path):
    write_batch(tmp_path / "old", lot_rows("ink-A", "L1", [0.010, 0.010], tool="0.1.0"))
    write_batch(tmp_path / "new", lot_rows("ink-A", "L1", [0.011, 0.011], tool="0.2.0",
                                           analysed_at="2026-03-01T09:00:00Z"))
    with rec.open_records(db_url) as store:
        store.load_batch(tmp_path / "new")
        assert store.load_batch(tmp_path / "old")["history"] == 2
        assert store.load_batch(tmp_path / "old")["unchanged"] == 2
        assert [r["tool_version"] for r in store.export_rows()] == ["0.2.0", "0.2.0"]
        assert len(store.lot_detail("L1").history) == 2
    assert count(db_url, rec.measurements) == 4


def test_failed_rows_are_no_measurements_but_make_the_lot_review(db_url, tmp_path):
    rows = lot_rows("ink-A", "L1", [0.010, 0.010, 0.010])
    rows.append(dict(sample="L1-s", lot="L1", product="ink-A", replicate="4", status="failed",
                     reason="no frame rate anywhere", sha256="ab" * 32, analysed_at="2026-02-01T10:00:00Z"))
    write_batch(tmp_path / "b", rows)
    with rec.open_records(db_url) as store:
        store.load_specs(_specs(tmp_path))
        assert store.load_batch(tmp_path / "b")["failure"] == 1
        (lot,) = store.lots()
        assert len(store.export_rows()) == 3
        assert lot.verdict.verdict == "review" and lot.verdict.n_valid == 3 and lot.verdict.n_replicates == 4
        assert lot.verdict.reasons == ("replicate L1-s #4 is not valid: failed (no frame rate anywhere)",)
        # the same row analysed successfully later: the failure no longer counts
        fixed = fake_result(relaxation_time_s=0.0101, sha256="ab" * 32)
        store.store_result({"sample": "L1-s", "lot": "L1", "product": "ink-A", "replicate": "4", "status": "ok"},
                           Result.from_json(fixed), analysed_at="2026-02-02T10:00:00Z")
        (lot,) = store.lots()
    assert lot.verdict.verdict == "pass" and lot.verdict.n_valid == 4
    assert count(db_url, rec.failures) == 1  # kept, no longer counted


def _specs(tmp_path):
    path = tmp_path / "specs.toml"
    path.write_text(SPECS)
    return path


def test_lots_csv_has_the_contract_columns_and_verdicts(db_url, tmp_path):
    rows = (lot_rows("ink-A", "A1", [0.010, 0.0102, 0.0098], made_on="2026-01-02")
            + lot_rows("ink-A", "A2", [0.013, 0.0135, 0.0128], made_on="2026-01-01")
            + lot_rows("ink-B", "B1", [0.005], made_on="2026-01-03"))
    write_batch(tmp_path / "b", rows)
    assert run(["load-specs", str(_specs(tmp_path))], db_url).exit_code == 0
    loaded = run(["load", str(tmp_path / "b")], db_url)
    assert loaded.exit_code == 0 and "7 new" in loaded.output
    result = run(["lots", "--csv"], db_url)
    assert result.exit_code == 0, result.output
    reader = csv.DictReader(io.StringIO(result.output))
    table = list(reader)
    assert reader.fieldnames == CONTRACT_LOTS
    assert [(r["product"], r["lot"]) for r in table] == [("ink-A", "A2"), ("ink-A", "A1"), ("ink-B", "B1")]
    by_lot = {r["lot"]: r for r in table}
    assert by_lot["A1"]["verdict"] == "pass" and by_lot["A1"]["reasons"] == ""
    assert float(by_lot["A1"]["relaxation_time_mean_s"]) == pytest.approx(0.010)
    assert by_lot["A2"]["verdict"] == "fail" and "above the maximum" in by_lot["A2"]["reasons"]
    assert by_lot["B1"]["verdict"] == "review" and by_lot["B1"]["reasons"] == (
        "lot mean relaxation time 0.005 s lies inside the limits, but a single valid replicate gives no "
        "95 % interval to judge it by; 1 valid replicate of 2 required")
    assert {r["decision_rule"] for r in table} == {"guard-band"}
    assert by_lot["B1"]["relaxation_time_sd_s"] == "" and by_lot["B1"]["n_valid"] == "1"
    only_b = run(["lots", "--csv", "--product", "ink-B"], db_url)
    assert len(only_b.output.strip().splitlines()) == 2
    human = run(["lots"], db_url)
    assert human.exit_code == 0 and "A2" in human.output and "fail" in human.output


def test_chart_flags_follow_production_order(db_url, tmp_path):
    # six steady lots made in January, then a lot far above them: stored in scrambled order
    lams = [0.0100, 0.0102, 0.0099, 0.0101, 0.0100, 0.0098, 0.0118]
    rows = []
    for i in (6, 2, 0, 5, 1, 4, 3):
        rows += lot_rows("ink-A", f"L{i}", [lams[i]] * 3, made_on=f"2026-01-{i + 10:02d}")
    write_batch(tmp_path / "b", rows)
    with rec.open_records(db_url) as store:
        store.load_batch(tmp_path / "b")
        summaries = store.lots()
    assert [s.lot for s in summaries] == [f"L{i}" for i in range(7)]
    assert all(s.chart_flags == () for s in summaries[:6])
    assert "beyond-3-sigma" in summaries[6].chart_flags
    assert summaries[6].chart.n_baseline == 6
    assert summaries[6].chart.centre == pytest.approx(np.mean(lams[:6]))


def test_shared_lot_ids_need_a_product_and_unknown_lots_are_reported(db_url, tmp_path):
    write_batch(tmp_path / "b", lot_rows("ink-A", "X1", [0.01]) + lot_rows("ink-B", "X1", [0.005]))
    assert run(["load", str(tmp_path / "b")], db_url).exit_code == 0
    ambiguous = run(["show", "X1"], db_url)
    assert ambiguous.exit_code == 2
    assert ambiguous.output.strip() == ("thinning: lot 'X1' exists for products 'ink-A', 'ink-B': "
                                        "name one with --product.")
    shown = run(["show", "X1", "--product", "ink-B"], db_url)
    assert shown.exit_code == 0 and "ink-B" in shown.output and "review" in shown.output
    unknown = run(["show", "nope"], db_url)
    assert unknown.exit_code == 2 and unknown.output.strip() == "thinning: no lot 'nope' in the records."
    cased = run(["show", "x1", "--product", "ink-A"], db_url)
    assert cased.exit_code == 2 and "case-sensitive: did you mean 'X1'?" in cased.output
    product = run(["lots", "--product", "INK-A"], db_url)
    assert product.exit_code == 2 and "did you mean 'ink-A'?" in product.output
    csv_out = run(["show", "X1", "--product", "ink-A", "--csv"], db_url)
    assert csv_out.output.splitlines()[0] == ",".join(CONTRACT_EXPORT)


def test_results_csv_alone_is_enough(db_url, tmp_path):
    write_batch(tmp_path / "b", lot_rows("ink-A", "L1", [0.0105]))
    (tmp_path / "b" / "1-L1-s" / "result.json").unlink()
    with rec.open_records(db_url) as store:
        store.load_batch(tmp_path / "b")
        (row,) = store.export_rows()
    assert row["relaxation_time_s"] == 0.0105 and row["relaxation_time_ci95_low_s"] == 0.0105 * 0.97


def _store_many(url, worker, n, barrier=None):
    with rec.open_records(url) as store:
        if barrier is not None:
            barrier.wait()
        for i in range(n):
            sha = source_hash("race", worker, i)
            store.store_result({"sample": f"w{worker}-{i}", "lot": "RACE", "product": "ink-A", "replicate": "1",
                                "status": "ok", "made_on": "2026-01-01"},
                               Result.from_json(fake_result(relaxation_time_s=0.01, sha256=sha)),
                               analysed_at=f"2026-02-01T10:00:{i:02d}Z")
            # every worker also rewrites one shared identity with its own result
            store.store_result({"sample": "shared", "lot": "RACE", "product": "ink-A", "replicate": "1",
                                "status": "ok"},
                               Result.from_json(fake_result(relaxation_time_s=0.01 + 1e-5 * (worker * n + i),
                                                            sha256="cd" * 32)),
                               analysed_at="2026-02-01T11:00:00Z")


def _check_race(url, n_workers, n):
    with rec.open_records(url) as store:
        rows = store.export_rows()
    assert len(rows) == n_workers * n + 1
    assert count(url, rec.measurements, rec.measurements.c.is_current.is_(True)) == n_workers * n + 1
    # the shared identity: one current, every other write kept as history
    assert count(url, rec.measurements, rec.measurements.c.sha256 == "cd" * 32) == n_workers * n
    assert count(url, rec.lots) == 1


def test_two_threads_storing_at_once_lose_nothing(db_url):
    barrier = threading.Barrier(3)
    errors = []

    def work(worker):
        try:
            _store_many(db_url, worker, 12, barrier)
        except Exception as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(w,)) for w in range(3)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == []
    _check_race(db_url, 3, 12)


@pytest.mark.slow
def test_two_processes_storing_at_once_lose_nothing(db_url, tmp_path):
    with rec.open_records(db_url):
        pass  # schema in place; the processes race on rows, not on tables
    # each process announces it is ready, then both start storing when both are (a file barrier)
    script = textwrap.dedent(f"""
        import sys, time
        from pathlib import Path
        sys.path.insert(0, {str(Path(__file__).parent)!r})
        from test_records import _store_many
        gate = Path({str(tmp_path)!r})
        (gate / f"ready-{{sys.argv[1]}}").touch()
        deadline = time.time() + 60
        while len(list(gate.glob("ready-*"))) < 2 and time.time() < deadline:
            time.sleep(0.005)
        _store_many({db_url!r}, int(sys.argv[1]), 15)
    """)
    env = {**os.environ,
           "PYTHONPATH": os.pathsep.join([str(Path(__file__).parents[1]), os.environ.get("PYTHONPATH", "")])}
    procs = [subprocess.Popen([sys.executable, "-c", script, str(w)], env=env, stderr=subprocess.PIPE,
                              text=True) for w in range(2)]
    outcomes = [(p.wait(timeout=120), p.stderr.read()) for p in procs]
    for p in procs:
        p.stderr.close()
    assert [code for code, _ in outcomes] == [0, 0], outcomes
    _check_race(db_url, 2, 15)


def test_the_default_database_comes_from_the_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("THINNING_DB", f"sqlite:///{tmp_path / 'env.db'}")
    write_batch(tmp_path / "b", lot_rows("ink-A", "L1", [0.01]))
    result = CliRunner().invoke(records_cli, ["load", str(tmp_path / "b")])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "env.db").is_file()
    help_text = CliRunner().invoke(records_cli, ["lots", "--help"]).output
    assert "THINNING_DB" in help_text and "env.db" in help_text and "records.db" in help_text
    monkeypatch.delenv("THINNING_DB")
    assert rec.default_db_url() == f"sqlite:///{rec.default_db_path()}"
    assert rec.default_db_path().name == "records.db"


def test_user_errors_are_one_sentence(tmp_path):
    url = f"sqlite:///{tmp_path / 'r.db'}"
    cases = [
        ["load", str(tmp_path / "missing")],
        ["load-specs", str(tmp_path / "missing.toml")],
        ["lots", "--product", "nothing"],
    ]
    bad_specs = tmp_path / "bad.toml"
    bad_specs.write_text('[[product]]\nname = "a"\nrelaxation_time_s = [2.0, 1.0]\n')
    cases.append(["load-specs", str(bad_specs)])
    for args in cases:
        result = run(args, url)
        assert result.exit_code == 2, (args, result.output)
        assert len(result.output.strip().splitlines()) == 1 and "Traceback" not in result.output
    bad_url = CliRunner().invoke(records_cli, ["lots", "--db", "nonsense://"])
    assert bad_url.exit_code == 2 and len(bad_url.output.strip().splitlines()) == 1


def test_a_newer_schema_is_refused(tmp_path):
    url = f"sqlite:///{tmp_path / 'r.db'}"
    rec.open_records(url).close()
    engine = create_engine(url)
    with engine.begin() as conn:
        conn.execute(update(rec.schema_version).values(version=rec.SCHEMA_VERSION + 1))
    engine.dispose()
    with pytest.raises(rec.RecordsError, match="newer"):
        rec.open_records(url)


def test_specs_update_in_place(db_url, tmp_path):
    with rec.open_records(db_url) as store:
        store.load_specs(_specs(tmp_path))
        (tmp_path / "v2.toml").write_text('[[product]]\nname = "ink-A"\nrelaxation_time_s = [0.009, 0.011]\n'
                                          'filament_lifetime_s = [nan, 0.3]\nreplicates = 2\nmax_cv = 0.05\n')
        store.load_specs(tmp_path / "v2.toml")
        specs = store.specs()
    assert specs["ink-A"].relaxation_time_s == (0.009, 0.011) and specs["ink-A"].replicates == 2
    assert np.isnan(specs["ink-A"].filament_lifetime_s[0]) and specs["ink-A"].filament_lifetime_s[1] == 0.3
    assert np.isnan(specs["ink-B"].relaxation_time_s[1]) and specs["ink-B"].extensional_viscosity_max_Pa_s is None


def test_show_says_why_a_replicate_is_not_valid_with_the_codes(db_url, tmp_path):
    rows = lot_rows("ink-A", "L1", [0.010, 0.011])
    rows[1]["result"] = fake_result(relaxation_time_s=0.011, sha256=source_hash("ink-A", "L1", 2),
                                    quality="doubtful", warnings=["Only 6 frames lie in the window."])
    write_batch(tmp_path / "b", rows)
    assert run(["load", str(tmp_path / "b")], db_url).exit_code == 0
    shown = run(["show", "L1"], db_url)
    assert shown.exit_code == 0, shown.output
    assert "- replicate L1-s #2 is not valid: quality doubtful (few-frames-in-window)" in shown.output
    with rec.open_records(db_url) as store:
        (lot,) = store.lots()
    assert "replicate L1-s #2 is not valid: quality doubtful (few-frames-in-window)" in lot.verdict.reasons
    exported = run(["export", "--out", str(tmp_path / "all.csv")], db_url)
    assert exported.exit_code == 0
    with open(tmp_path / "all.csv", newline="", encoding="utf-8-sig") as handle:
        codes = [r["warning_codes"] for r in csv.DictReader(handle)]
    assert codes == ["", "few-frames-in-window"]


def test_a_database_of_schema_version_1_keeps_its_verdicts_until_the_specifications_are_reloaded(tmp_path):
    # a lot whose mean (11.73 ms) lies inside [8, 12] ms but whose t-interval reaches 12.25 ms:
    # `pass` under the simple rule that judged it before decision rules existed, `review` under
    # the guard-band rule a reloaded specification brings
    db_url = f"sqlite:///{tmp_path / 'old.db'}"
    write_batch(tmp_path / "b", lot_rows("ink-A", "A1", [0.0115, 0.0118, 0.0119]))
    with rec.open_records(db_url) as store:
        store.load_specs(_specs(tmp_path))
        store.load_batch(tmp_path / "b")
    engine = create_engine(db_url)
    with engine.begin() as conn:  # back to version 1: no decision_rule column, no version 2, 3 or 4
        conn.exec_driver_sql("ALTER TABLE products DROP COLUMN decision_rule")
        conn.exec_driver_sql("ALTER TABLE products DROP COLUMN baseline_json")
        conn.exec_driver_sql("ALTER TABLE measurements DROP COLUMN outputs_json")
        conn.exec_driver_sql("UPDATE schema_version SET version = 1")
        conn.exec_driver_sql("DROP TABLE verdict_changes")
        conn.exec_driver_sql("DROP TABLE baseline_exclusions")
    engine.dispose()
    with rec.open_records(db_url) as store:
        (lot,) = store.lots()
        assert lot.verdict.verdict == "pass" and lot.verdict.decision_rule == "simple"
    result = run(["load-specs", str(_specs(tmp_path))], db_url)
    assert result.exit_code == 0, result.output
    assert "re-evaluated: ink-A lot A1: pass → review (decision rule simple → guard-band)" in result.output
    with rec.open_records(db_url) as store:
        (lot,) = store.lots()
        assert lot.verdict.verdict == "review" and lot.verdict.decision_rule == "guard-band"
        (change,) = store.lot_detail("A1").verdict_changes
        assert (change["old_verdict"], change["new_verdict"], change["cause"]) == (
            "pass", "review", "specification loaded")
    assert count(db_url, rec.schema_version) == 4   # versions 1 to 4
    shown = run(["show", "A1"], db_url)
    assert "re-evaluated" in shown.output and "pass → review" in shown.output
    from thinning.report.lot import write_lot_report
    with rec.open_records(db_url) as store:
        html = write_lot_report(store, "A1", out_dir=tmp_path / "out").read_text(encoding="utf-8")
    assert "Decision rule: guard-band" in html
    assert "specification loaded): pass → review, decision rule simple → guard-band" in html
    # loading the same specifications again changes nothing and records nothing
    again = run(["load-specs", str(_specs(tmp_path))], db_url)
    assert "re-evaluated" not in again.output
    with rec.open_records(db_url) as store:
        assert len(store.lot_detail("A1").verdict_changes) == 1


BASELINE_SPECS = SPECS.replace('max_cv = 0.10\n', 'max_cv = 0.10\n\n[product.baseline]\nname = "phase I"\n'
                               'lots = ["P0", "P1", "P2", "P3", "P4"]\n', 1)
#: six steady lots, a seventh far above them (it fails [8, 12] ms and breaks the 3-sigma rule), an eighth
BASELINE_LAMS = [0.0100, 0.0102, 0.0099, 0.0101, 0.0100, 0.0098, 0.0125, 0.0101]


def _baseline_batch(tmp_path):
    rows = []
    for i, lam in enumerate(BASELINE_LAMS):
        rows += lot_rows("ink-A", f"P{i}", [lam * 0.99, lam, lam * 1.01], made_on=f"2026-01-{i + 10:02d}")
    return write_batch(tmp_path / "b", rows)


def test_a_phase_one_baseline_is_stored_with_the_specification(db_url, tmp_path):
    batch = _baseline_batch(tmp_path)
    (tmp_path / "phase-one.toml").write_text(BASELINE_SPECS)
    with rec.open_records(db_url) as store:
        store.load_specs(_specs(tmp_path))
        store.load_batch(batch)
        default = {s.lot: s for s in store.lots()}
        assert default["P6"].verdict.verdict == "fail" and "beyond-3-sigma" in default["P6"].chart_flags
        assert default["P7"].chart.baseline == ("P0", "P1", "P2", "P3", "P4", "P5")   # P6 failed and flagged
        changes = []
        store.load_specs(tmp_path / "phase-one.toml", changes=changes)
        assert changes == []   # a baseline changes no verdict
        assert store.specs()["ink-A"].baseline == rec_baseline("phase I", lots=("P0", "P1", "P2", "P3", "P4"))
        named = {s.lot: s for s in store.lots()}
    assert all(named[f"P{i}"].chart.baseline == ("P0", "P1", "P2", "P3", "P4") for i in (5, 6, 7))
    assert named["P7"].chart.baseline_name == "phase I"
    assert named["P5"].chart.centre == named["P7"].chart.centre == pytest.approx(np.mean(BASELINE_LAMS[:5]))
    assert {k: s.verdict.verdict for k, s in named.items()} == {k: s.verdict.verdict for k, s in default.items()}
    # a date range instead; loading the plain specification again returns to the default baseline
    (tmp_path / "phase-one.toml").write_text(SPECS.replace(
        'max_cv = 0.10\n', 'max_cv = 0.10\n[product.baseline]\nname = "Jan"\nfrom = 2026-01-11\n', 1))
    with rec.open_records(db_url) as store:
        store.load_specs(tmp_path / "phase-one.toml")
        assert store.lots()[-1].chart.baseline == ("P1", "P2", "P3", "P4", "P5", "P6")
        store.load_specs(_specs(tmp_path))
        assert store.specs()["ink-A"].baseline is None
        assert store.lots()[-1].chart.baseline == ("P0", "P1", "P2", "P3", "P4", "P5")


def rec_baseline(name, **kwargs):
    from thinning.qc import Baseline

    return Baseline(name=name, **kwargs)


def test_an_exclusion_with_a_reason_changes_the_limits_and_is_kept_with_who_when_why(db_url, tmp_path):
    batch = _baseline_batch(tmp_path)
    assert run(["load-specs", str(_specs(tmp_path))], db_url).exit_code == 0
    assert run(["load", str(batch)], db_url).exit_code == 0
    with rec.open_records(db_url) as store:
        before = {s.lot: s for s in store.lots()}
    done = run(["exclude", "P3", "--reason", "pump seal  replaced mid-lot", "--by", "A. Chemist"], db_url)
    assert done.exit_code == 0, done.output
    assert done.output.splitlines()[0] == "ink-A lot P3 is excluded from its control-chart baselines: pump seal " \
                                          "replaced mid-lot"
    with rec.open_records(db_url) as store:
        after = {s.lot: s for s in store.lots()}
        detail = store.lot_detail("P7")
    assert after["P7"].chart.baseline == ("P0", "P1", "P2", "P4", "P5")
    assert after["P7"].chart.centre != before["P7"].chart.centre
    assert dict(after["P7"].chart.left_out)["P3"] == "excluded: pump seal replaced mid-lot"
    assert {k: s.verdict for k, s in after.items()} == {k: s.verdict for k, s in before.items()}
    (e,) = detail.exclusions
    assert (e["lot"], e["reason"], e["excluded_by"]) == ("P3", "pump seal replaced mid-lot", "A. Chemist")
    assert e["excluded_at"] and e["withdrawn_at"] is None
    shown = run(["show", "P3"], db_url)
    assert "excluded from the control-chart baseline" in shown.output and "by A. Chemist: pump seal" in shown.output
    again = run(["exclude", "P3", "--reason", "twice"], db_url)
    assert again.exit_code == 2 and "already excluded" in again.output
    empty = run(["exclude", "P2", "--reason", "  "], db_url)
    assert empty.exit_code == 2 and "--reason" in empty.output and "Traceback" not in empty.output
    unknown = run(["exclude", "NOPE", "--reason", "x"], db_url)
    assert unknown.exit_code == 2 and "no lot 'NOPE'" in unknown.output
    back = run(["exclude", "P3", "--withdraw", "--reason", "seal was not the cause", "--by", "QA"], db_url)
    assert back.exit_code == 0, back.output
    assert "may enter its control-chart baselines again" in back.output
    with rec.open_records(db_url) as store:
        restored = {s.lot: s for s in store.lots()}
        (kept,) = store.lot_detail("P3").exclusion_history
    assert restored["P7"].chart == before["P7"].chart
    assert (kept["withdrawn_by"], kept["withdrawn_reason"]) == ("QA", "seal was not the cause")
    assert count(db_url, rec.baseline_exclusions) == 1
    not_excluded = run(["exclude", "P3", "--withdraw", "--reason", "x"], db_url)
    assert not_excluded.exit_code == 2 and "is not excluded" in not_excluded.output


def test_excluding_a_lot_prints_the_chart_flags_it_moves(db_url, tmp_path):
    # Q2 is high but early (no limits yet, so no flag): in the baseline it widens the limits and Q6
    # passes unflagged; excluded, the limits narrow (centre 10.04 ms, sigma 0.1/1.128 ms) and Q6 at
    # 10.45 ms lies beyond 3 sigma
    lams = [0.0100, 0.0101, 0.0106, 0.0100, 0.0101, 0.0100, 0.01045]
    rows = []
    for i, lam in enumerate(lams):
        rows += lot_rows("ink-A", f"Q{i}", [lam] * 3, made_on=f"2026-01-{i + 10:02d}")
    write_batch(tmp_path / "b", rows)
    with rec.open_records(db_url) as store:
        store.load_batch(tmp_path / "b")
        assert all(s.chart_flags == () for s in store.lots())
    done = run(["exclude", "Q2", "--reason", "trial lot", "--by", "me"], db_url)
    assert done.exit_code == 0, done.output
    assert done.output.splitlines()[1] == ("chart flags of lot Q6: none → beyond-3-sigma, "
                                           "moving-range-above-limit")
    with rec.open_records(db_url) as store:
        (q6,) = [s for s in store.lots() if s.lot == "Q6"]
        # the verdict stays (no specification: review), the flag is new
        assert q6.verdict.verdict == "review" and q6.chart.centre == pytest.approx(0.01004)


def test_a_version_3_database_gains_the_baseline_tables_in_place(db_url, tmp_path):
    write_batch(tmp_path / "b", lot_rows("ink-A", "V3", [0.010]))
    with rec.open_records(db_url) as store:
        store.load_batch(tmp_path / "b")
    engine = create_engine(db_url)
    with engine.begin() as conn:  # back to version 3: no baseline_json, no baseline_exclusions
        conn.exec_driver_sql("ALTER TABLE products DROP COLUMN baseline_json")
        conn.exec_driver_sql("DROP TABLE baseline_exclusions")
        conn.exec_driver_sql("UPDATE schema_version SET version = 3")
    engine.dispose()
    (tmp_path / "specs.toml").write_text(BASELINE_SPECS)
    with rec.open_records(db_url) as store:
        store.load_specs(tmp_path / "specs.toml")
        assert store.specs()["ink-A"].baseline.name == "phase I"
        store.exclude("V3", reason="migrated", by="test")
        assert store.lot_detail("V3").exclusions[0]["reason"] == "migrated"
    assert count(db_url, rec.schema_version) == 2   # versions 3 and 4
    assert rec.SCHEMA_VERSION == 4


def test_a_result_json_that_is_not_an_object_is_refused_by_name(db_url, tmp_path):
    batch = write_batch(tmp_path / "b", lot_rows("ink-A", "L1", [0.01]))
    result_json = next(batch.glob("*/result.json"))
    result_json.write_text("[1, 2, 3]\n")
    loaded = run(["load", str(batch)], db_url)
    assert loaded.exit_code == 2, loaded.output
    assert "is not a result of this tool" in loaded.output and "Traceback" not in loaded.output


def _with_row_records(batch_dir: Path) -> None:
    """Give each row folder of a written batch the row.json digests a real batch keeps."""
    from thinning.batch.rows import ROW_FILE, outputs_digest

    for folder in sorted(p for p in batch_dir.iterdir() if p.is_dir()):
        (folder / ROW_FILE).write_text(json.dumps({"status": "ok", "outputs": outputs_digest(folder)}))


def test_stored_digests_let_a_folder_and_the_database_be_checked_later(db_url, tmp_path):
    from thinning.batch.rows import ROW_FILE, outputs_digest

    batch = tmp_path / "b"
    write_batch(batch, lot_rows("ink-A", "V1", [0.010, 0.011]))
    _with_row_records(batch)
    assert run(["load", str(batch)], db_url).exit_code == 0
    engine = create_engine(db_url)
    with engine.connect() as conn:
        stored = [json.loads(v) for (v,) in conn.execute(select(rec.measurements.c.outputs_json))]
    assert sorted(stored, key=str) == sorted(
        (outputs_digest(p) for p in batch.iterdir() if p.is_dir()), key=str)
    ok = run(["verify", "--folder", str(batch)], db_url)
    assert ok.exit_code == 0, ok.output
    assert "2 stored measurements intact; 2 rows" in ok.output
    # a curve rewritten later with its row.json made to agree: the folder no longer matches the
    # digests stored with the measurement
    folder = sorted(p for p in batch.iterdir() if p.is_dir())[0]
    (folder / "diameter.csv").write_text((folder / "diameter.csv").read_text().replace("0.", "0.0", 1))
    (folder / ROW_FILE).write_text(json.dumps({"status": "ok", "outputs": outputs_digest(folder)}))
    bad = run(["verify", "--folder", str(batch)], db_url)
    assert bad.exit_code == 2 and "differ from the digests stored" in bad.output
    assert "(first diameter.csv)" in bad.output and len(bad.output.strip().splitlines()) == 1
    # a stored result edited in the database itself
    with engine.begin() as conn:
        text = conn.execute(select(rec.measurements.c.result_json)).first()[0]
        conn.execute(update(rec.measurements).values(result_json=text.replace('"quality":"good"',
                                                                               '"quality":"doubtful"')))
    engine.dispose()
    edited = run(["verify"], db_url)
    assert edited.exit_code == 2 and "no longer matches its fingerprint" in edited.output


def test_a_version_2_database_gains_output_digests_on_the_next_load(tmp_path):
    db_url = f"sqlite:///{tmp_path / 'v2.db'}"
    batch = tmp_path / "b"
    write_batch(batch, lot_rows("ink-A", "V2", [0.010]))
    with rec.open_records(db_url) as store:
        store.load_batch(batch)
    engine = create_engine(db_url)
    with engine.begin() as conn:
        conn.exec_driver_sql("ALTER TABLE measurements DROP COLUMN outputs_json")
        conn.exec_driver_sql("ALTER TABLE products DROP COLUMN baseline_json")
        conn.exec_driver_sql("UPDATE schema_version SET version = 2")
    engine.dispose()
    _with_row_records(batch)
    with rec.open_records(db_url) as store:
        assert store.load_batch(batch)["unchanged"] == 1
    assert count(db_url, rec.schema_version) == 3   # versions 2, 3 and 4
    assert count(db_url, rec.measurements, rec.measurements.c.outputs_json.is_not(None)) == 1


@pytest.mark.slow
def test_records_load_killed_at_twenty_moments_stores_all_or_nothing(tmp_path):
    # SIGKILL at 20 moments spread over `records load` of a 150-row folder that supersedes every
    # stored measurement: after each kill the database holds the old measurements or the new
    # ones, never a mix, and a rerun stores every row exactly once
    import shutil
    import signal
    import time

    n = 150
    old_batch, new_batch = tmp_path / "old", tmp_path / "new"
    write_batch(old_batch, lot_rows("ink-K", "K1", [0.010] * n))
    write_batch(new_batch, lot_rows("ink-K", "K1", [0.012] * n, analysed_at="2026-03-01T10:00:00Z"))
    seed = tmp_path / "seed.db"
    with rec.open_records(f"sqlite:///{seed}") as store:
        store.load_batch(old_batch)

    def load(db):
        return subprocess.Popen([sys.executable, "-m", "thinning.cli", "records", "load", str(new_batch),
                                 "--db", f"sqlite:///{db}"], stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)

    def state(db):
        engine = create_engine(f"sqlite:///{db}")
        try:
            with engine.connect() as conn:
                assert conn.exec_driver_sql("PRAGMA integrity_check").scalar() == "ok"
                current = conn.execute(select(rec.measurements.c.relaxation_time_s).where(
                    rec.measurements.c.is_current.is_(True))).scalars().all()
                total = conn.execute(select(func.count()).select_from(rec.measurements)).scalar()
        finally:
            engine.dispose()
        return sorted(set(current)), len(current), total

    trial = tmp_path / "trial.db"
    shutil.copy(seed, trial)
    start = time.monotonic()
    assert load(trial).wait() == 0
    full = time.monotonic() - start
    assert state(trial) == ([0.012], n, 2 * n)
    outcomes = set()
    for k in range(20):
        db = tmp_path / f"k{k}.db"
        shutil.copy(seed, db)
        proc = load(db)
        time.sleep(full * (0.2 + 0.045 * k))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        found = state(db)
        assert found in (([0.010], n, n), ([0.012], n, 2 * n)), (k, found)
        outcomes.add(found[0][0])
        assert load(db).wait() == 0
        assert state(db) == ([0.012], n, 2 * n), k
    assert 0.010 in outcomes        # at least one kill landed before the commit


@pytest.mark.parametrize("limit", [10_000, 40_000])   # opening the database; the load's transaction
def test_a_full_disk_during_records_load_is_exit_2_and_stores_nothing(tmp_path, limit):
    import shutil

    from services import small_files

    first, second = tmp_path / "first", tmp_path / "second"
    write_batch(first, lot_rows("ink-F", "F1", [0.010]))
    write_batch(second, lot_rows("ink-F", "F2", [0.011] * 20))
    seed = tmp_path / "seed.db"
    with rec.open_records(f"sqlite:///{seed}") as store:
        store.load_batch(first)
    db = tmp_path / "r.db"
    shutil.copy(seed, db)
    proc = subprocess.run([sys.executable, "-m", "thinning.cli", "records", "load", str(second),
                           "--db", f"sqlite:///{db}"], capture_output=True, text=True,
                          preexec_fn=small_files(limit))
    assert proc.returncode == 2 and "Traceback" not in proc.stderr, proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1
    with rec.open_records(f"sqlite:///{db}") as store:
        assert [m["lot"] for m in store.export_rows()] == ["F1"]
