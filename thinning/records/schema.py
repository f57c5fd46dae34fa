"""The records database's tables (SQLAlchemy Core), at schema version :data:`SCHEMA_VERSION`.

See :mod:`thinning.records` for what each table holds.
"""

from __future__ import annotations

from sqlalchemy import (Boolean, Column, Double, ForeignKey, Index, Integer, LargeBinary, MetaData,
                        String, Table, Text, UniqueConstraint)

from .. import qc

SCHEMA_VERSION = 4
#: What each version added (:meth:`thinning.records.Records` migrates older databases in place).
SCHEMA_CHANGES = {2: "products.decision_rule; the verdict_changes table",
                  3: "measurements.outputs_json: the digests of the row folder's files",
                  4: "products.baseline_json (a phase-I control-chart baseline); the "
                     "baseline_exclusions table"}


#: headline numbers copied from result.json into columns of the same name
NUMBER_KEYS = (
    "relaxation_time_s", "elastic_modulus_Pa", "shear_viscosity_Pa_s",
    "extensional_viscosity_max_Pa_s", "extensional_viscosity_terminal_Pa_s", "breakup_time_s",
    "filament_lifetime_s", "initial_diameter_m", "free_thinning_start_s", "fps_hz", "pixel_size_m",
)

metadata = MetaData()

schema_version = Table(
    "schema_version", metadata,
    Column("version", Integer, primary_key=True, autoincrement=False),
    Column("applied_at", String(40), nullable=False),
)

_limit_columns = [col for key in qc.LIMITED_QUANTITIES
                  for col in (Column(f"{key}_min", Double), Column(f"{key}_max", Double),
                              Column(f"{key}_limited", Boolean, nullable=False, default=False))]

products = Table(
    "products", metadata,
    Column("id", Integer, primary_key=True),
    Column("name", String(200), nullable=False, unique=True),
    Column("has_spec", Boolean, nullable=False, default=False),
    *_limit_columns,
    Column("replicates", Integer),
    Column("max_cv", Double),
    #: NULL: a specification stored before decision rules existed, judged by the simple rule
    Column("decision_rule", String(20)),
    Column("spec_loaded_at", String(40)),
    #: the specification's ``[product.baseline]`` as JSON (``name`` and ``lots`` or ``from`` /
    #: ``to``); NULL: the default baseline (version 4)
    Column("baseline_json", Text),
)

lots = Table(
    "lots", metadata,
    Column("id", Integer, primary_key=True),
    Column("product_id", Integer, ForeignKey("products.id"), nullable=False),
    Column("lot", String(200), nullable=False),
    Column("made_on", String(10)),
    Column("first_analysed_at", String(40), nullable=False),
    UniqueConstraint("product_id", "lot", name="uq_lots_product_lot"),
)

samples = Table(
    "samples", metadata,
    Column("id", Integer, primary_key=True),
    Column("lot_id", Integer, ForeignKey("lots.id"), nullable=False),
    Column("sample", String(200), nullable=False),
    Column("replicate", String(50), nullable=False),
    Column("notes", Text),
    UniqueConstraint("lot_id", "sample", "replicate", name="uq_samples_lot_sample_replicate"),
)

measurements = Table(
    "measurements", metadata,
    Column("id", Integer, primary_key=True),
    Column("sample_id", Integer, ForeignKey("samples.id"), nullable=False),
    Column("sha256", String(64), nullable=False),
    Column("source_path", Text),
    Column("status", String(20), nullable=False),
    Column("quality", String(20)),
    Column("quality_reasons", Text, nullable=False),
    Column("regime", String(40)),
    Column("regimes", Text, nullable=False),
    Column("relaxation_time_s", Double),
    Column("relaxation_time_ci95_low_s", Double),
    Column("relaxation_time_ci95_high_s", Double),
    Column("elastic_modulus_Pa", Double),
    Column("shear_viscosity_Pa_s", Double),
    Column("extensional_viscosity_max_Pa_s", Double),
    Column("extensional_viscosity_terminal_Pa_s", Double),
    Column("breakup_time_s", Double),
    Column("filament_lifetime_s", Double),
    Column("initial_diameter_m", Double),
    Column("free_thinning_start_s", Double),
    Column("fit_window_start_s", Double),
    Column("fit_window_end_s", Double),
    Column("fps_hz", Double),
    Column("pixel_size_m", Double),
    Column("warnings", Text, nullable=False),
    Column("options", Text, nullable=False),
    Column("result_json", Text, nullable=False),
    Column("result_fingerprint", String(64), nullable=False),
    #: ``{file name: SHA-256 hex}`` of the row folder's outputs as row.json recorded them (NULL
    #: for a measurement stored before schema version 3 or from a folder without digests)
    Column("outputs_json", Text),
    Column("tool_version", String(60)),
    Column("analysed_at", String(40), nullable=False),
    Column("stored_at", String(40), nullable=False),
    Column("is_current", Boolean, nullable=False),
    Column("superseded_at", String(40)),
    Column("superseded_by", Integer, ForeignKey("measurements.id")),
)
Index("uq_measurements_current_identity", measurements.c.sample_id, measurements.c.sha256,
      unique=True, sqlite_where=measurements.c.is_current.is_(True),
      postgresql_where=measurements.c.is_current.is_(True))
Index("ix_measurements_sample", measurements.c.sample_id)

curves = Table(
    "curves", metadata,
    Column("measurement_id", Integer, ForeignKey("measurements.id"), primary_key=True,
           autoincrement=False),
    Column("n_points", Integer, nullable=False),
    Column("time_s", LargeBinary, nullable=False),
    Column("diameter_m", LargeBinary, nullable=False),
)

failures = Table(
    "failures", metadata,
    Column("id", Integer, primary_key=True),
    Column("sample_id", Integer, ForeignKey("samples.id"), nullable=False),
    Column("sha256", String(64), nullable=False),
    Column("source_path", Text),
    Column("reason", Text, nullable=False),
    Column("tool_version", String(60)),
    Column("analysed_at", String(40), nullable=False),
    Column("stored_at", String(40), nullable=False),
    UniqueConstraint("sample_id", "sha256", name="uq_failures_sample_sha256"),
)

verdict_changes = Table(
    "verdict_changes", metadata,
    Column("id", Integer, primary_key=True),
    Column("product_id", Integer, ForeignKey("products.id"), nullable=False),
    Column("lot", String(200), nullable=False),
    Column("old_verdict", String(10), nullable=False),
    Column("new_verdict", String(10), nullable=False),
    Column("old_decision_rule", String(20)),
    Column("new_decision_rule", String(20)),
    Column("cause", Text, nullable=False),
    Column("changed_at", String(40), nullable=False),
)
Index("ix_verdict_changes_product_lot", verdict_changes.c.product_id, verdict_changes.c.lot)

#: lots excluded from the control-chart baselines of their product, with who, when and why; an
#: exclusion is withdrawn (never deleted) with who, when and why too (version 4)
baseline_exclusions = Table(
    "baseline_exclusions", metadata,
    Column("id", Integer, primary_key=True),
    Column("product_id", Integer, ForeignKey("products.id"), nullable=False),
    Column("lot", String(200), nullable=False),
    Column("reason", Text, nullable=False),
    Column("excluded_by", String(200), nullable=False),
    Column("excluded_at", String(40), nullable=False),
    Column("withdrawn_at", String(40)),
    Column("withdrawn_by", String(200)),
    Column("withdrawn_reason", Text),
)
Index("ix_baseline_exclusions_product_lot", baseline_exclusions.c.product_id, baseline_exclusions.c.lot)
