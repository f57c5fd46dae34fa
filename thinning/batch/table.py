"""The results table of a batch folder: its writer, and the reader of a finished folder.

``DIR/results.csv`` holds one row per manifest row (the contract's columns,
then the findings' codes, bookkeeping and provenance), numbers at full
precision; ``DIR/results.parquet`` the same table when pyarrow is installed.
:func:`read_batch` reads a finished batch folder back (the table and each
row's folder), for the records.
"""

from __future__ import annotations

import csv
import io
import json
import math
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from .. import __version__, atomic
from ..errors import ThinningError
from ..result import Result
from ..values import finite_number, from_spreadsheet_safe, row_folder_name, spreadsheet_safe, utc_text
from .manifest import ManifestRow
from .rows import RowOutcome


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
    return spreadsheet_safe(str(value))


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


def earlier_rows(out: Path) -> dict[int, dict]:
    """The rows of ``out/results.csv`` as written by an earlier run (cells as text, by row
    number); empty when there is none, or it is not this version's table."""
    path = Path(out) / "results.csv"
    try:
        with path.open(newline="", encoding="utf-8-sig") as handle:
            reader = csv.DictReader(handle)
            if tuple(reader.fieldnames or ()) != TABLE_COLUMNS:
                return {}
            return {int(r["row"]): {c: r[c] for c in TABLE_COLUMNS} for r in reader}
    except (OSError, UnicodeDecodeError, csv.Error, ValueError, TypeError):
        return {}


def write_results_csv(out: Path, rows: list[dict]):
    """Atomically (re)write ``out/results.csv`` from table rows."""
    # with a byte-order mark, so that spreadsheets read µ and other non-ASCII text right
    atomic.write_bytes(out / "results.csv", results_csv_text(rows).encode("utf-8-sig"))


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


class UnusableBatchFolder(ThinningError, ValueError):
    """A folder that is not a finished batch of this tool (one sentence)."""


@dataclass(frozen=True)
class FinishedRow:
    """One row of a finished batch folder: the ``results.csv`` cells (``identity``: path,
    sample, lot, product, replicate, made_on, notes, status, reason, sha256, tool_version, as
    text), the row's :class:`~thinning.result.Result` (None for a failed row), when it was
    analysed (UTC ISO time), its diameter curve ``(time_s, diameter_m)`` or None, and the
    digests of its folder's files that ``row.json`` keeps (None where it keeps none)."""

    identity: dict
    result: Result | None
    analysed_at: str
    curve: tuple | None
    outputs: dict | None = None


def read_curve(row_dir: Path) -> tuple[np.ndarray, np.ndarray] | None:
    """(time_s, diameter_m) from ``row_dir/diameter.csv`` (NaN where empty), or None if absent."""
    path = Path(row_dir) / "diameter.csv"
    if not path.is_file():
        return None
    time_s, diameter_m = [], []
    with path.open(newline="") as handle:
        reader = csv.DictReader(handle)
        if not reader.fieldnames or not {"time_s", "diameter_m"} <= set(reader.fieldnames):
            raise UnusableBatchFolder(f"{path} has no time_s and diameter_m columns.")
        for row in reader:
            time_s.append(finite_number(row["time_s"]))
            diameter_m.append(finite_number(row["diameter_m"]))
    to_array = lambda xs: np.array([np.nan if x is None else x for x in xs], dtype="<f8")  # noqa: E731
    return to_array(time_s), to_array(diameter_m)


def result_from_results_row(row) -> Result:
    """A result rebuilt from one ``results.csv`` row (when the row's ``result.json`` is missing)."""
    low = finite_number(row.get("relaxation_time_ci95_low_s"))
    high = finite_number(row.get("relaxation_time_ci95_high_s"))
    data = {key: finite_number(row.get(key)) for key in _RESULT_NUMBERS}
    data.update(
        tool_version=_text(row.get("tool_version")) or None,
        source={"path": _text(row.get("path")), "sha256": _text(row.get("sha256"))},
        regime=_text(row.get("regime")) or None,
        relaxation_time_ci95_s=[low, high] if low is not None and high is not None else None,
        warnings=[w for w in _text(row.get("warnings")).split("; ") if w],
        finding_codes=[c for c in _text(row.get("warning_codes")).split("; ") if c],
        quality_reasons=[])
    return Result.from_json(data)


def _text(value) -> str:
    return "" if value is None else from_spreadsheet_safe(str(value).strip())


def _row_folder(batch_dir: Path, row, width: int) -> Path:
    number = int(_text(row.get("row")))
    name = _text(row.get("sample")) or Path(_text(row.get("path"))).stem
    folder = batch_dir / row_folder_name(number, name, width)
    if folder.is_dir():
        return folder
    matches = sorted(batch_dir.glob(f"{number:0{width}d}-*"))
    return matches[0] if len(matches) == 1 else folder


#: The results.csv cells a finished row carries to the records.
IDENTITY_CELLS = ("path", "sample", "lot", "product", "replicate", "made_on", "notes", "status",
                  "reason", "sha256", "tool_version")


def recorded_outputs(folder: Path) -> dict[str, str] | None:
    """The output digests ``{file name: SHA-256 hex}`` that the row folder's ``row.json`` keeps,
    after refusing a folder whose outputs were edited since (None: a folder of an older version,
    or made by hand, holds no digests to check against)."""
    from .rows import ROW_FILE, changed_outputs

    path = Path(folder) / ROW_FILE
    if not path.is_file():
        return None
    try:
        record = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        raise UnusableBatchFolder(f"{path} is not a row record of this tool.") from None
    changed = changed_outputs(folder, record)
    if changed:
        raise UnusableBatchFolder(
            f"{folder / changed[0]} was changed after its analysis (it no longer matches the digest "
            f"in {ROW_FILE}); restore it, or analyse the row again with batch --redo.")
    outputs = record.get("outputs") if isinstance(record, dict) else None
    return dict(outputs) if isinstance(outputs, dict) else None


def read_batch(batch_dir) -> list[FinishedRow]:
    """Read a finished batch folder (``results.csv`` and each row's folder), in table order."""
    batch_dir = Path(batch_dir)
    table = batch_dir / "results.csv"
    if not table.is_file():
        raise UnusableBatchFolder(f"{batch_dir} has no results.csv; give the folder of a finished batch.")
    with table.open(newline="", encoding="utf-8-sig") as handle:
        reader = csv.DictReader(handle)
        missing = [c for c in ("row", "path", "status", "sha256") if c not in (reader.fieldnames or [])]
        if missing:
            raise UnusableBatchFolder(f"{table} lacks the column {missing[0]!r}; is it a thinning results.csv?")
        rows = list(reader)
    try:
        width = len(str(max((int(_text(r["row"])) for r in rows), default=1)))
    except ValueError:
        raise UnusableBatchFolder(f"{table} has a row number that is not a whole number.") from None
    loaded = []
    for row in rows:
        identity = {key: _text(row.get(key)) for key in IDENTITY_CELLS}
        folder = _row_folder(batch_dir, row, width)
        result, curve = None, None
        result_path = folder / "result.json"
        outputs = recorded_outputs(folder)
        if (identity["status"] or "ok") == "ok":
            if result_path.is_file():
                try:
                    result = Result.from_json(json.loads(result_path.read_text(encoding="utf-8")))
                except (ValueError, TypeError, KeyError, AttributeError):
                    raise UnusableBatchFolder(f"{result_path} is not a result of this tool.") from None
            else:
                result = result_from_results_row(row)
            curve = read_curve(folder)
        stamp = _text(row.get("analysed_at"))
        if not stamp:
            source = result_path if result_path.is_file() else table
            stamp = utc_text(datetime.fromtimestamp(source.stat().st_mtime, timezone.utc))
        loaded.append(FinishedRow(identity, result, stamp, curve, outputs))
    return loaded
