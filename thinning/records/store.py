"""Storing and reading the records: one transaction a row, retried on locks and lost races."""

from __future__ import annotations

import difflib
import hashlib
import json
import logging
import math
import os
import random
import time
from dataclasses import dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Callable, Iterable, Mapping, TypeVar

import numpy as np
from sqlalchemy import Table, create_engine, event, func, select, text, update
from sqlalchemy.engine import Connection, Engine, make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, IntegrityError, OperationalError

from .. import qc
from ..errors import ThinningError
from ..result import Result
from .schema import (SCHEMA_VERSION, baseline_exclusions, curves, failures, lots, measurements, metadata,
                     products, samples, schema_version, verdict_changes, NUMBER_KEYS)
from ..values import finite_number as _number
from ..values import json_plain, utc_text
from ..batch.table import read_batch, read_curve, recorded_outputs

logger = logging.getLogger(__name__)


#: environment variable naming the default records database URL
ENV_DB = "THINNING_DB"

#: columns of ``thinning records export`` (contract), in order
EXPORT_COLUMNS = (
    "product", "lot", "sample", "replicate", "status", "quality", "regime", "relaxation_time_s",
    "relaxation_time_ci95_low_s", "relaxation_time_ci95_high_s", "shear_viscosity_Pa_s",
    "extensional_viscosity_max_Pa_s", "breakup_time_s", "filament_lifetime_s", "sha256",
    "analysed_at", "tool_version", "warning_codes",
)

#: columns of ``thinning records lots`` (contract), in order
LOT_COLUMNS = (
    "product", "lot", "made_on", "n_valid", "relaxation_time_mean_s", "relaxation_time_sd_s",
    "relaxation_time_cv", "verdict", "reasons", "chart_flags", "decision_rule",
)



class RecordsError(ThinningError, ValueError):
    """A problem the user can fix (bad URL, unknown lot, unusable batch folder); one sentence."""


class LotNotFound(RecordsError):
    """No lot of that id (and product) in the records."""


class AmbiguousLot(RecordsError):
    """Two or more products share the lot id and no product was named."""


class _LostRace(Exception):
    """Another writer changed the row we were about to supersede; retry the transaction."""


def default_db_path() -> Path:
    """The default SQLite file: ``records.db`` in the user's data folder (platformdirs)."""
    import platformdirs

    return Path(platformdirs.user_data_dir("thinning")) / "records.db"


def default_db_url() -> str:
    """``$THINNING_DB`` if set, else ``sqlite:///`` + :func:`default_db_path`."""
    return os.environ.get(ENV_DB) or f"sqlite:///{default_db_path()}"


def normalise_timestamp(value: str) -> str:
    """An ISO 8601 time → the tool's one UTC form (:func:`thinning.values.utc_text`; a time without
    a zone is taken as UTC)."""
    try:
        moment = datetime.fromisoformat(str(value).strip().replace("Z", "+00:00"))
    except ValueError:
        raise RecordsError(f"{value!r} is not an ISO 8601 time such as 2026-03-01T12:00:00+00:00.") from None
    return utc_text(moment)


def _made_on(value) -> str | None:
    text_value = _text(value)
    if not text_value:
        return None
    try:
        return date.fromisoformat(text_value).isoformat()
    except ValueError:
        raise RecordsError(f"made_on {text_value!r} is not an ISO date such as 2026-03-01.") from None


def _text(value) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return str(value).strip()





def _json(value) -> str:
    """Canonical JSON (sorted keys, no NaN): the same text for an in-memory result and its file."""
    return json.dumps(json_plain(value), sort_keys=True, allow_nan=False, separators=(",", ":"))


def result_fingerprint(result: Mapping) -> str:
    """sha256 of the result without its timestamps: equal fingerprints mean an identical result."""
    kept = {k: v for k, v in result.items() if not k.endswith("_at") and k not in ("elapsed_s",)}
    return hashlib.sha256(_json(kept).encode()).hexdigest()




@dataclass(frozen=True)
class LotDetail:
    """Everything the lot report and ``records show`` need about one lot."""

    summary: qc.LotSummary
    spec: qc.Spec | None
    measurements: list[dict]
    failures: list[dict]
    curves: dict[int, tuple[np.ndarray, np.ndarray]]
    chart: list[tuple[qc.LotSummary, qc.ChartPoint]]
    history: list[dict] = field(default_factory=list)
    #: re-evaluations that changed the lot's verdict (oldest first): old/new verdict and rule,
    #: cause, changed_at
    verdict_changes: list[dict] = field(default_factory=list)
    #: the product's lots excluded from control-chart baselines now (``lot, reason,
    #: excluded_by, excluded_at``), oldest first
    exclusions: list[dict] = field(default_factory=list)
    #: every exclusion of this lot, withdrawn ones too (with ``withdrawn_at``, ``withdrawn_by``,
    #: ``withdrawn_reason``), oldest first
    exclusion_history: list[dict] = field(default_factory=list)


T = TypeVar("T")


def _retryable(exc: Exception) -> bool:
    if isinstance(exc, (IntegrityError, _LostRace)):
        return True
    if isinstance(exc, OperationalError):
        message = str(exc.orig).lower() if exc.orig is not None else str(exc).lower()
        sqlstate = getattr(exc.orig, "sqlstate", None)
        return "locked" in message or "busy" in message or sqlstate in ("40001", "40P01")
    return False


class Records:
    """A records database. Open with :func:`open_records`; close with :meth:`close` (or ``with``)."""

    def __init__(self, engine: Engine, *, retries: int = 12):
        self.engine = engine
        self._retries = retries

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self) -> None:
        self.engine.dispose()

    # ------------------------------------------------------------------ transactions
    def _transaction(self, work: Callable[[Connection], T]) -> T:
        """Run ``work(conn)`` in one transaction, retrying lock waits and lost races."""
        for attempt in range(self._retries):
            try:
                with self.engine.begin() as conn:
                    if conn.dialect.name == "postgresql":
                        conn.execute(text("SET LOCAL lock_timeout = '60s'"))
                    return work(conn)
            except (DBAPIError, _LostRace) as exc:
                if isinstance(exc, OperationalError) and not _retryable(exc):
                    # the machine's refusal (full disk, I/O error, read-only file), not a race:
                    # the transaction was rolled back whole
                    reason = str(exc.orig).strip().splitlines()[0] if exc.orig is not None else type(exc).__name__
                    raise RecordsError(
                        f"the records database {self.engine.url.render_as_string(hide_password=True)} "
                        f"refused the change ({reason}); nothing of it was stored: free space or check "
                        "the database, and run again.") from None
                if attempt == self._retries - 1 or not _retryable(exc):
                    raise
                delay = min(1.0, 0.02 * 2 ** attempt) * (0.5 + random.random())
                logger.debug("retrying a records transaction after %s (%.2f s)", type(exc).__name__, delay)
                time.sleep(delay)
        raise AssertionError("unreachable")

    def _ensure_schema(self) -> None:
        def work(conn: Connection) -> None:
            if conn.dialect.name == "postgresql":  # serialise concurrent first opens
                conn.execute(text("SELECT pg_advisory_xact_lock(7163512)"))
            metadata.create_all(conn)  # (new tables of a newer version too)
            found = conn.execute(select(func.max(schema_version.c.version))).scalar()
            if found is None:
                conn.execute(schema_version.insert().values(version=SCHEMA_VERSION, applied_at=utc_text()))
            elif found > SCHEMA_VERSION:
                raise RecordsError(f"the records database has schema version {found}, newer than this "
                                   f"thinning understands ({SCHEMA_VERSION}); upgrade thinning.")
            else:
                if found < 2:
                    # version 1 → 2: specifications stored so far keep the simple rule (NULL)
                    # that judged the verdicts already shown
                    conn.execute(text("ALTER TABLE products ADD COLUMN decision_rule VARCHAR(20)"))
                    conn.execute(schema_version.insert().values(version=2, applied_at=utc_text()))
                if found < 3:
                    # version 2 → 3: measurements stored so far have no output digests (NULL)
                    conn.execute(text("ALTER TABLE measurements ADD COLUMN outputs_json TEXT"))
                    conn.execute(schema_version.insert().values(version=3, applied_at=utc_text()))
                if found < 4:
                    # version 3 → 4: specifications stored so far name no phase-I baseline (NULL:
                    # the default baseline); baseline_exclusions was created above, empty
                    conn.execute(text("ALTER TABLE products ADD COLUMN baseline_json TEXT"))
                    conn.execute(schema_version.insert().values(version=4, applied_at=utc_text()))
        self._transaction(work)

    # ------------------------------------------------------------------ specifications
    def load_specs(self, path: str | Path, *, changes: list | None = None) -> list[qc.Spec]:
        """Load or update the product specifications of a TOML file; returns them.

        ``changes``, when given, receives the verdict changes the new
        specifications make (see :meth:`store_specs`)."""
        try:
            content = Path(path).read_text(encoding="utf-8")
        except OSError as exc:
            raise RecordsError(f"cannot read the specifications file {path} ({exc.strerror}).") from None
        except UnicodeDecodeError:
            raise RecordsError(f"the specifications file {path} is not UTF-8 text (is it a TOML "
                               "file?).") from None
        specs = qc.parse_specs(content)
        made = self.store_specs(specs)
        if changes is not None:
            changes.extend(made)
        return specs

    def store_specs(self, specs: Iterable[qc.Spec]) -> list[dict]:
        """Store (insert or replace) specifications in one transaction.

        Returns the lots whose verdict the new specifications change (each also
        kept in ``verdict_changes``, so that no verdict already shown changes
        silently): product, lot, old and new verdict and decision rule.
        """
        specs = list(specs)

        def work(conn: Connection) -> list[dict]:
            now = utc_text()
            before = {(s.product, s.lot): s.verdict.verdict for s in self._summaries(conn)[0]}
            old_rules = {name: spec.decision_rule for name, spec in self._specs(conn).items()}
            product_ids = {}
            for spec in specs:
                values = {"has_spec": True, "replicates": spec.replicates, "max_cv": spec.max_cv,
                          "decision_rule": spec.decision_rule, "spec_loaded_at": now,
                          "baseline_json": None if spec.baseline is None else _json(spec.baseline.as_mapping())}
                for key in qc.LIMITED_QUANTITIES:
                    limits = getattr(spec, key)
                    values[f"{key}_limited"] = limits is not None
                    low, high = limits if limits is not None else (math.nan, math.nan)
                    values[f"{key}_min"] = _number(low)
                    values[f"{key}_max"] = _number(high)
                product_ids[spec.name] = self._get_or_create(conn, products, {"name": spec.name})
                conn.execute(update(products).where(products.c.id == product_ids[spec.name])
                             .values(**values))
            changes = []
            names = {spec.name: spec for spec in specs}
            for summary in self._summaries(conn)[0]:
                old = before.get((summary.product, summary.lot))
                if summary.product not in names or old is None or old == summary.verdict.verdict:
                    continue
                change = {"product": summary.product, "lot": summary.lot, "old_verdict": old,
                          "new_verdict": summary.verdict.verdict,
                          "old_decision_rule": old_rules.get(summary.product),
                          "new_decision_rule": names[summary.product].decision_rule}
                conn.execute(verdict_changes.insert().values(
                    product_id=product_ids[summary.product], lot=summary.lot, old_verdict=old,
                    new_verdict=change["new_verdict"], old_decision_rule=change["old_decision_rule"],
                    new_decision_rule=change["new_decision_rule"],
                    cause="specification loaded", changed_at=now))
                changes.append(change)
            return changes
        return self._transaction(work)

    def specs(self) -> dict[str, qc.Spec]:
        """Every stored specification by product name."""
        with self.engine.connect() as conn:
            return self._specs(conn)

    @staticmethod
    def _specs(conn: Connection) -> dict[str, qc.Spec]:
        found = {}
        for row in conn.execute(select(products).where(products.c.has_spec.is_(True))).mappings():
            limits = {}
            for key in qc.LIMITED_QUANTITIES:
                if row[f"{key}_limited"]:
                    low, high = row[f"{key}_min"], row[f"{key}_max"]
                    limits[key] = (math.nan if low is None else low, math.nan if high is None else high)
            baseline = (qc.baseline_from_mapping(row["name"], json.loads(row["baseline_json"]))
                        if row["baseline_json"] else None)
            found[row["name"]] = qc.Spec(name=row["name"], replicates=row["replicates"],
                                         max_cv=row["max_cv"], baseline=baseline,
                                         decision_rule=row["decision_rule"] or "simple", **limits)
        return found

    # ------------------------------------------------------------------ storing
    @staticmethod
    def _get_or_create(conn: Connection, table: Table, key: Mapping, extra: Mapping | None = None) -> int:
        """The id of the row of ``table`` matching ``key``, inserting it if missing (race-safe)."""
        where = [table.c[name] == value for name, value in key.items()]
        found = conn.execute(select(table.c.id).where(*where)).scalar()
        if found is not None:
            return found
        try:
            with conn.begin_nested():
                return conn.execute(table.insert().values(**key, **(extra or {}))).inserted_primary_key[0]
        except IntegrityError:  # another writer inserted it first; theirs is committed by now
            found = conn.execute(select(table.c.id).where(*where)).scalar()
            if found is None:
                raise
            return found

    def _sample_id(self, conn: Connection, meta: Mapping, analysed_at: str) -> int:
        product_id = self._get_or_create(conn, products, {"name": meta["product"]})
        lot_id = self._get_or_create(conn, lots, {"product_id": product_id, "lot": meta["lot"]},
                                     {"made_on": meta["made_on"], "first_analysed_at": analysed_at})
        lot_row = conn.execute(select(lots.c.made_on, lots.c.first_analysed_at)
                               .where(lots.c.id == lot_id)).one()
        changes = {}
        if meta["made_on"] and lot_row.made_on != meta["made_on"]:
            changes["made_on"] = meta["made_on"]
        if analysed_at < lot_row.first_analysed_at:
            changes["first_analysed_at"] = analysed_at
        if changes:
            conn.execute(update(lots).where(lots.c.id == lot_id).values(**changes))
        sample_id = self._get_or_create(
            conn, samples, {"lot_id": lot_id, "sample": meta["sample"], "replicate": meta["replicate"]},
            {"notes": meta["notes"] or None})
        if meta["notes"]:
            conn.execute(update(samples).where(samples.c.id == sample_id, samples.c.notes.is_distinct_from(
                meta["notes"])).values(notes=meta["notes"]))
        return sample_id

    @staticmethod
    def _meta(manifest_row: Mapping, outputs: Mapping | None = None) -> dict:
        sample = _text(manifest_row.get("sample")) or Path(_text(manifest_row.get("path"))).stem
        return {"product": _text(manifest_row.get("product")), "lot": _text(manifest_row.get("lot")),
                "sample": sample, "replicate": _text(manifest_row.get("replicate")),
                "made_on": _made_on(manifest_row.get("made_on")), "notes": _text(manifest_row.get("notes")),
                "path": _text(manifest_row.get("path")), "status": _text(manifest_row.get("status")) or "ok",
                "reason": _text(manifest_row.get("reason")), "sha256": _text(manifest_row.get("sha256")),
                "tool_version": _text(manifest_row.get("tool_version")),
                "outputs": _json(dict(outputs)) if outputs else None}

    def _store(self, conn: Connection, meta: Mapping, result: Mapping | None, analysed_at: str,
               curve: tuple[np.ndarray, np.ndarray] | None) -> str:
        """Store one row inside ``conn``'s transaction; returns what happened."""
        sample_id = self._sample_id(conn, meta, analysed_at)
        now = utc_text()
        if meta["status"] != "ok":
            sha = meta["sha256"] or _text(((result or {}).get("source") or {}).get("sha256"))
            values = {"reason": meta["reason"] or "failed without a reason", "analysed_at": analysed_at,
                      "stored_at": now, "source_path": meta["path"],
                      "tool_version": meta["tool_version"] or None}
            existing = conn.execute(select(failures.c.id).where(failures.c.sample_id == sample_id,
                                                                failures.c.sha256 == sha)).scalar()
            if existing is None:
                self._get_or_create(conn, failures, {"sample_id": sample_id, "sha256": sha}, values)
            else:
                conn.execute(update(failures).where(failures.c.id == existing).values(**values))
            return "failure"
        if result is None:
            raise RecordsError(f"sample {meta['sample']!r} of lot {meta['lot']!r} has status ok but no result.")
        sha = meta["sha256"] or _text((result.get("source") or {}).get("sha256"))
        if not sha:
            raise RecordsError(f"sample {meta['sample']!r} of lot {meta['lot']!r} has no source sha256.")
        fingerprint = result_fingerprint(result)
        current = conn.execute(
            select(measurements.c.id, measurements.c.result_fingerprint, measurements.c.analysed_at,
                   measurements.c.outputs_json).where(
                measurements.c.sample_id == sample_id, measurements.c.sha256 == sha,
                measurements.c.is_current.is_(True))).first()
        if current is not None and current.result_fingerprint == fingerprint:
            if curve is not None and conn.execute(select(curves.c.measurement_id).where(
                    curves.c.measurement_id == current.id)).first() is None:
                self._insert_curve(conn, current.id, curve)
            if meta["outputs"] is not None and current.outputs_json is None:
                # stored before digests were kept (or from a folder without them): add them
                conn.execute(update(measurements).where(measurements.c.id == current.id).values(
                    outputs_json=meta["outputs"]))
            return "unchanged"
        if current is not None and analysed_at < current.analysed_at:
            # an older analysis (e.g. an earlier batch folder loaded late): history, not current
            known = conn.execute(select(measurements.c.id).where(
                measurements.c.sample_id == sample_id, measurements.c.sha256 == sha,
                measurements.c.result_fingerprint == fingerprint)).first()
            if known is not None:
                return "unchanged"
            old_id = conn.execute(measurements.insert().values(
                sample_id=sample_id, sha256=sha, stored_at=now, analysed_at=analysed_at, is_current=False,
                superseded_at=now, superseded_by=current.id, result_fingerprint=fingerprint,
                **self._measurement_values(meta, result))).inserted_primary_key[0]
            if curve is not None:
                self._insert_curve(conn, old_id, curve)
            return "history"
        if current is not None:
            retired = conn.execute(update(measurements).where(
                measurements.c.id == current.id, measurements.c.is_current.is_(True)).values(
                is_current=False, superseded_at=now))
            if retired.rowcount != 1:
                raise _LostRace()
        new_id = conn.execute(measurements.insert().values(
            sample_id=sample_id, sha256=sha, stored_at=now, analysed_at=analysed_at, is_current=True,
            result_fingerprint=fingerprint, **self._measurement_values(meta, result))).inserted_primary_key[0]
        if current is not None:
            conn.execute(update(measurements).where(measurements.c.id == current.id).values(superseded_by=new_id))
        if curve is not None:
            self._insert_curve(conn, new_id, curve)
        return "superseded" if current is not None else "inserted"

    @staticmethod
    def _measurement_values(meta: Mapping, result: Mapping) -> dict:
        ci = result.get("relaxation_time_ci95_s") or (None, None)
        window = result.get("fit_window_s") or (None, None)
        values = {key: _number(result.get(key)) for key in NUMBER_KEYS}
        values.update(
            source_path=meta["path"] or _text((result.get("source") or {}).get("path")),
            status="ok", quality=result.get("quality"), regime=result.get("regime"),
            quality_reasons=_json(list(result.get("quality_reasons") or [])),
            regimes=_json(list(result.get("regimes") or [])),
            relaxation_time_ci95_low_s=_number(ci[0]), relaxation_time_ci95_high_s=_number(ci[1]),
            fit_window_start_s=_number(window[0]), fit_window_end_s=_number(window[1]),
            warnings=_json(list(result.get("warnings") or [])), options=_json(result.get("options") or {}),
            result_json=_json(dict(result)), outputs_json=meta["outputs"],
            tool_version=_text(result.get("tool_version")) or meta["tool_version"] or None)
        return values

    @staticmethod
    def _insert_curve(conn: Connection, measurement_id: int, curve) -> None:
        time_s, diameter_m = (np.asarray(a, dtype="<f8") for a in curve)
        conn.execute(curves.insert().values(measurement_id=measurement_id, n_points=int(time_s.size),
                                            time_s=time_s.tobytes(), diameter_m=diameter_m.tobytes()))

    def store_result(self, manifest_row: Mapping, result: Result | None, *, analysed_at: str,
                     row_dir: str | Path | None = None) -> str:
        """Store one finished batch row in its own transaction.

        ``manifest_row`` carries ``product, lot, sample, replicate, made_on,
        notes, path, status, reason, sha256`` (missing keys are empty);
        ``result`` is the row's :class:`~thinning.result.Result` (None for a failed row);
        ``row_dir`` the row's folder, whose ``diameter.csv`` is copied.
        Returns ``"inserted"``, ``"unchanged"``, ``"superseded"`` (a changed
        result replaced the current one), ``"history"`` (a changed result
        analysed before the current one: kept as superseded history, so the
        latest analysis stays current whatever the loading order) or
        ``"failure"`` (a failed row noted).
        """
        outputs = recorded_outputs(Path(row_dir)) if row_dir is not None else None
        meta = self._meta(manifest_row, outputs)
        curve = read_curve(Path(row_dir)) if row_dir is not None and meta["status"] == "ok" else None
        stamp = normalise_timestamp(analysed_at)
        data = None if result is None else result.to_json()
        return self._transaction(lambda conn: self._store(conn, meta, data, stamp, curve))

    def load_batch(self, batch_dir: str | Path) -> dict[str, int]:
        """Store a finished batch folder (``results.csv`` + row folders) in one transaction.

        Idempotent: loading the same folder again changes nothing. Returns
        counts by outcome (see :meth:`store_result`).
        """
        rows = [(self._meta(row.identity, row.outputs), None if row.result is None else row.result.to_json(),
                 normalise_timestamp(row.analysed_at), row.curve) for row in read_batch(batch_dir)]

        def work(conn: Connection) -> dict[str, int]:
            counts = {"inserted": 0, "unchanged": 0, "superseded": 0, "history": 0, "failure": 0}
            for meta, result, stamp, curve in rows:
                counts[self._store(conn, meta, result, stamp, curve)] += 1
            return counts
        return self._transaction(work)

    # ------------------------------------------------------------------ reading
    @staticmethod
    def _joined(current: bool = True):
        columns = [products.c.name.label("product"), lots.c.lot, lots.c.made_on, lots.c.first_analysed_at,
                   samples.c.sample, samples.c.replicate, samples.c.notes, *measurements.c]
        query = (select(*columns).select_from(measurements.join(samples).join(lots).join(products))
                 .where(measurements.c.is_current.is_(current)))
        return query

    def _summaries(self, conn: Connection) -> tuple[list[qc.LotSummary], dict, dict]:
        """Every lot's summary (verdict + chart point), its current measurements and open failures."""
        specs = self._specs(conn)
        lot_rows = conn.execute(select(lots.c.id, products.c.name.label("product"), lots.c.lot, lots.c.made_on,
                                       lots.c.first_analysed_at).select_from(lots.join(products))).mappings().all()
        by_lot: dict[tuple, list[dict]] = {(r["product"], r["lot"]): [] for r in lot_rows}
        for row in conn.execute(self._joined()).mappings():
            by_lot[(row["product"], row["lot"])].append(_measurement_row(row))
        has_current = select(measurements.c.id).where(measurements.c.sample_id == samples.c.id,
                                                      measurements.c.is_current.is_(True)).exists()
        open_failures: dict[tuple, dict[int, dict]] = {key: {} for key in by_lot}
        failure_rows = conn.execute(
            select(products.c.name.label("product"), lots.c.lot, samples.c.sample, samples.c.replicate,
                   samples.c.notes, *failures.c).select_from(failures.join(samples).join(lots).join(products))
            .where(~has_current).order_by(failures.c.analysed_at)).mappings()
        for row in failure_rows:  # the latest failure of each sample counts
            open_failures[(row["product"], row["lot"])][row["sample_id"]] = dict(row)
        failures_by_lot = {key: sorted(v.values(), key=qc.row_order) for key, v in open_failures.items()}
        for rows in by_lot.values():
            rows.sort(key=qc.row_order)
        excluded = {(r["product"], r["lot"]): r["reason"] for r in self._exclusions(conn)}
        summaries = qc.lot_summaries(lot_rows, by_lot, failures_by_lot, specs, excluded)
        return summaries, by_lot, failures_by_lot

    @staticmethod
    def _exclusions(conn: Connection, *, product: str | None = None, lot: str | None = None,
                    withdrawn: bool = False) -> list[dict]:
        """The exclusions from control-chart baselines (in force only, unless ``withdrawn``),
        oldest first, with the product's name."""
        query = (select(products.c.name.label("product"), *baseline_exclusions.c)
                 .select_from(baseline_exclusions.join(products)).order_by(baseline_exclusions.c.id))
        if not withdrawn:
            query = query.where(baseline_exclusions.c.withdrawn_at.is_(None))
        if product is not None:
            query = query.where(products.c.name == product)
        if lot is not None:
            query = query.where(baseline_exclusions.c.lot == lot)
        return [dict(r) for r in conn.execute(query).mappings()]

    def exclude(self, lot: str, *, reason: str, by: str, product: str | None = None,
                withdraw: bool = False) -> dict:
        """Exclude a lot from its product's control-chart baselines (or, with ``withdraw``, end
        its exclusion), keeping who, when and why; one transaction.

        Verdicts do not change (chart flags never feed them); the chart flags of later lots may.
        Returns ``{"product", "lot", "flag_changes": [{"lot", "old", "new"}, …]}``, the lots whose
        chart flags the change moves. Raises :class:`RecordsError` for an empty reason, a lot
        already excluded (or, withdrawing, not excluded)."""
        reason, by = " ".join(str(reason or "").split()), " ".join(str(by or "").split())
        if not reason:
            raise RecordsError("give the reason with --reason: it is kept with the exclusion.")
        if not by:
            raise RecordsError("say who decides with --by NAME: it is kept with the exclusion.")
        product, lot = self.resolve_lot(lot, product=product)

        def work(conn: Connection) -> dict:
            before = {s.lot: s.chart_flags for s in self._summaries(conn)[0] if s.product == product}
            open_ = self._exclusions(conn, product=product, lot=lot)
            now = utc_text()
            if withdraw:
                if not open_:
                    raise RecordsError(f"lot {lot!r} of product {product!r} is not excluded from the "
                                       "control-chart baseline.")
                conn.execute(update(baseline_exclusions).where(
                    baseline_exclusions.c.id.in_([e["id"] for e in open_])).values(
                    withdrawn_at=now, withdrawn_by=by, withdrawn_reason=reason))
            else:
                if open_:
                    raise RecordsError(f"lot {lot!r} of product {product!r} is already excluded from the "
                                       f"control-chart baseline ({open_[0]['reason']}); withdraw that "
                                       "first with --withdraw.")
                product_id = conn.execute(select(products.c.id).where(products.c.name == product)).scalar()
                conn.execute(baseline_exclusions.insert().values(
                    product_id=product_id, lot=lot, reason=reason, excluded_by=by, excluded_at=now))
            after = {s.lot: s.chart_flags for s in self._summaries(conn)[0] if s.product == product}
            moved = [{"lot": name, "old": before.get(name, ()), "new": flags}
                     for name, flags in after.items() if before.get(name, ()) != flags]
            return {"product": product, "lot": lot, "flag_changes": moved}
        return self._transaction(work)

    def lots(self, *, product: str | None = None) -> list[qc.LotSummary]:
        """Every lot (of ``product``), by product then production order, with verdicts."""
        with self.engine.connect() as conn:
            summaries, _, _ = self._summaries(conn)
        if product is not None and not any(s.product == product for s in summaries):
            near = [s.product for s in summaries if s.product.casefold() == product.casefold()]
            hint = f" (product names are case-sensitive: did you mean {near[0]!r}?)" if near else ""
            raise RecordsError(f"no lot of product {product!r} in the records{hint}.")
        return [s for s in summaries if product is None or s.product == product]

    def resolve_lot(self, lot: str, *, product: str | None = None) -> tuple[str, str]:
        """(product, lot) for a lot id; raises :class:`LotNotFound` or :class:`AmbiguousLot`."""
        with self.engine.connect() as conn:
            query = select(products.c.name).select_from(lots.join(products)).where(lots.c.lot == lot)
            if product is not None:
                query = query.where(products.c.name == product)
            names = sorted(conn.execute(query).scalars())
            # lot ids are case-sensitive (as labs write them): for a refusal, a near one to name
            known = [] if names else sorted(set(conn.execute(select(lots.c.lot)).scalars()))
        if not names:
            where = f" of product {product!r}" if product is not None else ""
            near = [k for k in known if k.casefold() == str(lot).casefold()] or \
                difflib.get_close_matches(str(lot), known, n=1, cutoff=0.8)
            hint = f" (lot ids are case-sensitive: did you mean {near[0]!r}?)" if near else ""
            raise LotNotFound(f"no lot {lot!r}{where} in the records{hint}.")
        if len(names) > 1:
            raise AmbiguousLot(f"lot {lot!r} exists for products {', '.join(map(repr, names))}: "
                               "name one with --product.")
        return names[0], lot

    def lot_detail(self, lot: str, *, product: str | None = None) -> LotDetail:
        """Measurements, failures, curves, verdict, chart and history of one lot."""
        product, lot = self.resolve_lot(lot, product=product)
        with self.engine.connect() as conn:
            summaries, by_lot, failures_by_lot = self._summaries(conn)
            rows = by_lot[(product, lot)]
            ids = [row["id"] for row in rows]
            found = conn.execute(select(curves).where(curves.c.measurement_id.in_(ids))).mappings() if ids else []
            curve_map = {row["measurement_id"]: (np.frombuffer(row["time_s"], dtype="<f8"),
                                                 np.frombuffer(row["diameter_m"], dtype="<f8"))
                         for row in found}
            history = [dict(r) for r in conn.execute(
                self._joined(current=False).where(products.c.name == product, lots.c.lot == lot)
                .order_by(measurements.c.superseded_at)).mappings()]
            spec = self._specs(conn).get(product)
            changed = [dict(r) for r in conn.execute(
                select(verdict_changes).select_from(verdict_changes.join(products))
                .where(products.c.name == product, verdict_changes.c.lot == lot)
                .order_by(verdict_changes.c.id)).mappings()]
            exclusions = self._exclusions(conn, product=product)
            exclusion_history = self._exclusions(conn, product=product, lot=lot, withdrawn=True)
        summary = next(s for s in summaries if (s.product, s.lot) == (product, lot))
        chart = [(s, s.chart) for s in summaries if s.product == product and s.chart is not None]
        return LotDetail(summary=summary, spec=spec, measurements=rows, failures=failures_by_lot[(product, lot)],
                         curves=curve_map, chart=chart, history=history, verdict_changes=changed,
                         exclusions=exclusions, exclusion_history=exclusion_history)

    def export_rows(self, *, product: str | None = None) -> list[dict]:
        """Every current measurement as a dict of :data:`EXPORT_COLUMNS`."""
        with self.engine.connect() as conn:
            query = self._joined()
            if product is not None:
                query = query.where(products.c.name == product)
            rows = [_measurement_row(r) for r in conn.execute(query).mappings()]
        rows.sort(key=lambda r: (r["product"], r["lot"], *qc.row_order(r)))
        return [{col: row[col] for col in EXPORT_COLUMNS} for row in rows]

    def verify(self, batch_dir: str | Path | None = None) -> dict[str, int]:
        """Check the stored measurements, and optionally a batch folder against them.

        Every measurement (current and superseded) must still match its
        ``result_fingerprint``. With ``batch_dir``, every finished row of that
        folder must be untouched since its analysis (``row.json``'s digests)
        and be stored with the same result and the same output digests.
        Raises :class:`RecordsError` naming the first mismatch; returns the
        counts ``{"measurements": …, "rows": …}`` checked."""
        with self.engine.connect() as conn:
            stored = conn.execute(self._joined(True).union_all(self._joined(False))).mappings().all()
        for row in sorted(stored, key=lambda r: r["id"]):
            try:
                intact = result_fingerprint(json.loads(row["result_json"])) == row["result_fingerprint"]
            except (ValueError, TypeError):
                intact = False
            if not intact:
                raise RecordsError(f"measurement {row['id']} ({_named(row)}) no longer matches its "
                                   "fingerprint: the database was changed outside thinning.")
        checked = 0
        if batch_dir is not None:
            by_identity: dict[tuple, list] = {}
            for row in stored:
                key = (row["product"], row["lot"], row["sample"], row["replicate"], row["sha256"])
                by_identity.setdefault(key, []).append(row)
            for finished in read_batch(batch_dir):
                if finished.result is None:
                    continue
                meta = self._meta(finished.identity, finished.outputs)
                data = finished.result.to_json()
                sha = meta["sha256"] or _text((data.get("source") or {}).get("sha256"))
                fingerprint = result_fingerprint(data)
                matches = [r for r in by_identity.get((meta["product"], meta["lot"], meta["sample"],
                                                       meta["replicate"], sha), [])
                           if r["result_fingerprint"] == fingerprint]
                if not matches:
                    raise RecordsError(f"the row of {meta['path'] or meta['sample']} in {batch_dir} is "
                                       f"not stored with this result ({_named(meta)}); load the folder "
                                       "with records load.")
                kept = [json.loads(r["outputs_json"]) for r in matches if r["outputs_json"]]
                if finished.outputs and kept and all(k != finished.outputs for k in kept):
                    name = sorted(n for n in set(kept[0]) | set(finished.outputs)
                                  if kept[0].get(n) != finished.outputs.get(n))[0]
                    raise RecordsError(f"the outputs of the row of {meta['path'] or meta['sample']} in "
                                       f"{batch_dir} differ from the digests stored with its measurement "
                                       f"(first {name}).")
                checked += 1
        return {"measurements": len(stored), "rows": checked}


def _named(row: Mapping) -> str:
    """``product P, lot L, sample S, replicate R`` of a measurement or manifest row."""
    return ", ".join(f"{key} {row[key]!r}" for key in ("product", "lot", "sample", "replicate")
                     if row.get(key))


def _measurement_row(row: Mapping) -> dict:
    """A stored measurement as a dict, with ``warning_codes`` (its findings' codes, one per
    warning, joined by ``; ``), ``clock_source``, ``exposure_s`` and ``trigger_frame`` read from
    the stored ``result.json``."""
    out = dict(row)
    data = json.loads(row["result_json"])
    result = Result.from_json(data)
    for key in ("clock_source", "exposure_s", "trigger_frame"):   # null for results before them
        out[key] = data.get(key) if isinstance(data, dict) else None
    out["warning_codes"] = "; ".join(result.warning_codes)
    out["doubtful_codes"] = tuple(dict.fromkeys(f.code.value for f in result.findings if f.doubtful))
    return out










def _prepare_sqlite(engine: Engine) -> None:
    """One writer at a time (BEGIN IMMEDIATE), waiting on locks, WAL for concurrent readers."""

    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, _record):
        dbapi_connection.isolation_level = None  # let SQLAlchemy's 'begin' event issue BEGIN
        cursor = dbapi_connection.cursor()
        cursor.execute("PRAGMA busy_timeout = 60000")
        cursor.execute("PRAGMA foreign_keys = ON")
        cursor.execute("PRAGMA journal_mode = WAL")
        cursor.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn):
        conn.exec_driver_sql("BEGIN IMMEDIATE")


def open_records(url: str | None = None) -> Records:
    """Open the records database, creating it (and an SQLite file's folder) if needed.

    Parameters
    ----------
    url : str, optional
        Any SQLAlchemy URL (``sqlite:///records.db``,
        ``postgresql+psycopg://user:pw@host:port/db``); None means
        :func:`default_db_url`.

    Returns
    -------
    Records
        Close it with ``close()`` or use it in a ``with`` block.

    Raises
    ------
    RecordsError
        For an unusable URL or database.
    """
    url = url or default_db_url()
    try:
        parsed = make_url(url)
    except ArgumentError:
        raise RecordsError(f"{url!r} is not a database URL such as sqlite:///records.db.") from None
    try:
        if parsed.get_backend_name() == "sqlite":
            if parsed.database and parsed.database != ":memory:":
                Path(parsed.database).expanduser().parent.mkdir(parents=True, exist_ok=True)
            engine = create_engine(parsed, connect_args={"timeout": 60})
            _prepare_sqlite(engine)
        else:
            engine = create_engine(parsed, pool_pre_ping=True)
    except (ArgumentError, ImportError) as exc:
        raise RecordsError(f"cannot use the database URL {parsed.render_as_string(hide_password=True)} "
                           f"({exc}).") from None
    records = Records(engine)
    try:
        records._ensure_schema()
    except DBAPIError as exc:   # cannot connect, locked, or a file that is not a database
        engine.dispose()
        reason = str(exc.orig).strip().splitlines()[0] if exc.orig is not None else str(exc)
        raise RecordsError(f"cannot open the records database "
                           f"{parsed.render_as_string(hide_password=True)} ({reason}).") from None
    except RecordsError:
        engine.dispose()
        raise
    return records
