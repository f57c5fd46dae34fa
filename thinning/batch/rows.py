"""One batch row, in a worker: analyse it into its own folder, or find it up to date.

:func:`run_row` writes the row's folder ``DIR/<row>-<name>/`` through a
temporary sibling and a rename (:func:`thinning.atomic.swap_in`), so a half-written folder
never survives; ``row.json`` in it says what became of the row (status,
reason, source sha256, options in SI, analysis time, tool version). A row
whose folder says ``ok`` for the same sha256 and options is not analysed
again unless ``redo``.
"""

from __future__ import annotations

import contextlib
import importlib
import json
import logging
import shutil
from dataclasses import dataclass
from pathlib import Path

from .. import __version__, atomic
from ..errors import ENVIRONMENT_ERRNOS, ThinningError
from ..result import Result
from ..units import AnalysisOptions
from ..values import utc_text

log = logging.getLogger(__name__)


DEFAULT_ANALYSER = "thinning.analysis:analyse_to"


ROW_SCHEMA = "thinning.batch-row/1"


ROW_FILE = "row.json"


#: Suffix of the temporary sibling folders a row is written through.
TEMP_SUFFIX = atomic.TEMP_SUFFIX


@dataclass(frozen=True)
class RowTask:
    """Everything a worker needs to analyse one row (picklable, absolute paths)."""

    row: int
    source: str
    options: AnalysisOptions
    folder: str
    redo: bool = False
    analyser: str = DEFAULT_ANALYSER
    figures: tuple = ("png",)


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
    environment: bool = False   # failed for the machine's sake (a full disk, no permission)

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
    temp = atomic.temp_sibling(folder, "new")
    try:
        temp.mkdir(parents=True)
        with _cleared(temp):
            try:
                extra = {} if tuple(task.figures) == ("png",) else {"figures": tuple(task.figures)}
                result = _analyser(task.analyser)(task.source, temp, task.options, **extra).summary()
                status, reason = "ok", ""
            except ThinningError as exc:
                result, status, reason = None, "failed", str(exc)
            except Exception as exc:  # a bug must not stop the batch: the row fails, saying so
                if isinstance(exc, OSError) and exc.errno in ENVIRONMENT_ERRNOS:
                    raise
                log.exception("row %d: internal error", task.row)
                result, status = None, "failed"
                reason = f"Internal error while analysing it ({type(exc).__name__}: {exc})."
            if result is None:
                shutil.rmtree(temp)
                temp.mkdir()
            return _publish(temp, folder, task, RowOutcome(task.row, status, reason, result, utc_text()))
    except OSError as exc:
        if exc.errno not in ENVIRONMENT_ERRNOS:
            raise
        # the machine's fault, not the recording's: one line, no traceback, and the row's folder
        # keeps whatever it held before
        log.warning("row %d: %s", task.row, exc.strerror)
        return RowOutcome(task.row, "failed",
                          f"The batch folder's disk refused the outputs ({exc.strerror}); free space "
                          "or fix the permissions and run the batch again.", None, utc_text(),
                          environment=True)


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
    record = {**_row_json(task, outcome), "outputs": outputs_digest(folder)}
    text = json.dumps(record, indent=2, allow_nan=False) + "\n"
    (folder / ROW_FILE).write_text(text, encoding="utf-8")


def outputs_digest(folder: Path) -> dict[str, str]:
    """``{file name: SHA-256 hex}`` of every file of a row folder but ``row.json``: the tamper
    evidence that ``row.json`` keeps of the analysis's outputs."""
    from ..frames import sha256_of_files

    return {path.name: sha256_of_files([path]) for path in sorted(Path(folder).iterdir())
            if path.is_file() and path.name != ROW_FILE}


def changed_outputs(folder: Path, record: dict) -> list[str]:
    """The outputs listed in a row's ``row.json`` record that are missing or no longer match their
    digest (empty for a record written before digests were kept)."""
    listed = record.get("outputs") if isinstance(record, dict) else None
    if not isinstance(listed, dict):
        return []
    now = outputs_digest(folder) if Path(folder).is_dir() else {}
    return sorted(name for name, digest in listed.items() if now.get(name) != digest)


def _up_to_date(task: RowTask) -> RowOutcome | None:
    """The earlier outcome when the row's folder holds an ok result for the same source and options."""
    from ..frames import UnusableSource, open_source

    folder = Path(task.folder)
    try:
        record = json.loads((folder / ROW_FILE).read_text(encoding="utf-8"))
        result = Result.from_json(json.loads((folder / "result.json").read_text(encoding="utf-8")))
    except (OSError, ValueError, TypeError, KeyError, AttributeError):
        return None
    if not isinstance(record, dict) or record.get("status") != "ok" \
            or record.get("options") != _plain_options(task.options):
        return None
    other_formats = [fmt for fmt in task.figures if fmt != "png"]
    if other_formats:   # figures asked for that the earlier run may not have written
        from ..plots import FIGURE_NAMES

        if any(not (folder / f"{name}.{fmt}").is_file() for fmt in other_formats for name in FIGURE_NAMES):
            return None
    changed = changed_outputs(folder, record)
    if changed:
        log.warning("row %d: %s changed since its analysis; analysing it again", task.row,
                    ", ".join(changed))
        return None
    try:
        with open_source(task.source) as recording:
            sha256 = recording.sha256
    except (UnusableSource, OSError):
        return None
    if sha256 != record.get("sha256") or sha256 != result.source.sha256:
        return None
    return RowOutcome(task.row, "ok", "", result, record.get("analysed_at", ""), skipped=True)


def write_failed_folder(task: RowTask, reason: str) -> RowOutcome:
    """A failed row decided by the coordinator (bad cells): its folder holds only ``row.json``."""
    folder = Path(task.folder)
    temp = atomic.temp_sibling(folder, "new")
    temp.mkdir(parents=True)
    with _cleared(temp):
        return _publish(temp, folder, task, RowOutcome(task.row, "failed", reason, None, utc_text()))


def _publish(temp: Path, folder: Path, task: RowTask, outcome: RowOutcome) -> RowOutcome:
    """Add ``row.json`` to the finished folder ``temp`` and swap it in as the row's ``folder``."""
    _write_row_json(temp, task, outcome)
    atomic.swap_in(temp, folder)
    return outcome


@contextlib.contextmanager
def _cleared(temp: Path):
    """Whatever happens inside, ``temp`` does not outlive the block (it is gone once swapped in)."""
    try:
        yield
    finally:
        if temp.exists():
            shutil.rmtree(temp, ignore_errors=True)
