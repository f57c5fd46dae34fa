"""The per-lot records database (SQLAlchemy 2 Core; SQLite file by default, PostgreSQL by URL).

Modules: :mod:`~thinning.records.schema` (the tables), :mod:`~thinning.records.store`
(:class:`Records`: storing, lot summaries, exports; verdicts and control charts are the pure
functions of :mod:`thinning.qc`).

Tables (schema version :data:`SCHEMA_VERSION`, kept in ``schema_version``):

``products``
    one row per product name; its specification (``<quantity>_min`` /
    ``_max`` in SI, NULL for an open end, ``<quantity>_limited``,
    ``replicates``, ``max_cv``, ``decision_rule``: NULL for one stored before
    schema version 2, judged by the simple rule) once a specifications file
    was loaded.
``lots``
    (product, lot id) with ``made_on`` (ISO date) and ``first_analysed_at``.
``samples``
    (lot, sample, replicate) with the manifest's ``notes``.
``measurements``
    one analysed recording: every headline number, the 95 % interval of λ,
    regime, quality, warnings, the options and the whole ``result.json`` as
    JSON, the source sha256, tool version, ``analysed_at`` and
    ``is_current``. A measurement is identified by (product, lot, sample,
    replicate, source sha256); a partial unique index keeps one current row
    per identity. ``outputs_json`` keeps the digests of the row folder's
    files (``row.json``'s ``outputs``, version 3), so that an archived
    folder can be checked against its measurement later (``records verify``). Superseded rows keep ``superseded_at`` and
    ``superseded_by`` and are never deleted.
``curves``
    a copy of each measurement's diameter curve (``time_s``,
    ``diameter_m`` as little-endian float64 bytes, NaN where no filament).
``verdict_changes``
    each lot whose verdict a reloaded specification changed: old and new
    verdict and decision rule, cause, ``changed_at`` (version 2).
``baseline_exclusions``
    lots excluded from their product's control-chart baselines
    (``records exclude``): ``reason``, ``excluded_by``, ``excluded_at``; a
    withdrawn exclusion keeps its row with ``withdrawn_at``, ``withdrawn_by``
    and ``withdrawn_reason`` (version 4). ``products.baseline_json`` keeps a
    specification's phase-I baseline (version 4).
``failures``
    rows of a batch that failed (not measurements): the reason, so that the
    verdict can count the replicate as invalid. A failure counts only while
    its sample has no current measurement.

Every store runs in one transaction and is retried on a lock, a
serialization failure or a lost insert race, so concurrent batches lose
nothing. On SQLite each transaction starts with ``BEGIN IMMEDIATE`` (one
writer at a time, waiting up to a minute) in WAL mode.
"""

from ..qc import LotSummary, replicate_label
from .schema import (SCHEMA_VERSION, baseline_exclusions, curves, failures, lots, measurements, products, samples,
                     schema_version)
from .store import (ENV_DB, EXPORT_COLUMNS, LOT_COLUMNS, AmbiguousLot, LotDetail, LotNotFound, Records,
                    RecordsError, default_db_path, default_db_url, normalise_timestamp, open_records,
                    result_fingerprint)

__all__ = ["open_records", "Records", "RecordsError", "LotNotFound", "AmbiguousLot", "LotDetail",
           "LotSummary", "replicate_label", "EXPORT_COLUMNS", "LOT_COLUMNS", "ENV_DB", "default_db_path",
           "default_db_url", "normalise_timestamp", "result_fingerprint", "SCHEMA_VERSION", "products",
           "lots", "samples", "measurements", "curves", "failures", "schema_version", "baseline_exclusions"]
