"""Batch manifests: one CSV row per recording, with its sample identity and options.

Columns (contract, ``docs/contract.md`` › ``thinning batch``): ``path`` (required;
relative to the manifest's folder), ``sample``, ``lot``, ``product``,
``replicate``, ``made_on``, ``notes``, and every ``analyse`` option with
underscores (``fps``, ``pixel_size``, …, ``geometry``, ``roi``). A cell takes
units exactly as on the command line; an empty cell falls back to the option
given to ``thinning batch``, then to the option's default.

A manifest that cannot be read, has no ``path`` column or has an unknown
column is unusable (:class:`UnusableManifest`). A row whose cells are bad, or
whose recording lacks a required value, is a *failed row*: it is reported
per row, never for the whole manifest.

Data rows are numbered from 1 in file order, header not counted; lines with
no cell at all are skipped and not counted.
"""

from __future__ import annotations

import csv
import difflib
import io
import logging
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path

from ..errors import ThinningError
from ..units import (OPTION_FIELDS, AnalysisOptions, BadQuantity, check_required, options_from_text,
                     shown_text)

log = logging.getLogger(__name__)

#: Identity and bookkeeping columns, in the order results.csv carries them.
IDENTITY_COLUMNS = ("sample", "lot", "product", "replicate", "made_on", "notes")
#: Analysis option columns (named like the ``analyse`` options, with underscores).
OPTION_COLUMNS = tuple(OPTION_FIELDS)
#: Every column a manifest may have.
MANIFEST_COLUMNS = ("path",) + IDENTITY_COLUMNS + OPTION_COLUMNS


class UnusableManifest(ThinningError, ValueError):
    """The manifest as a whole cannot be used (message: one sentence for the user)."""


@dataclass(frozen=True)
class ManifestRow:
    """One data row of a manifest.

    ``row``: 1-based data-row number; ``path``: the cell as given; ``source``:
    the recording's location (relative paths resolved against the manifest's
    folder); ``identity``: the identity columns (empty string where absent);
    ``cells``: the option cells as text (empty string where absent);
    ``problem``: one sentence when the row's shape itself is wrong, else None.
    """

    row: int
    path: str
    source: Path
    identity: dict = field(default_factory=dict)
    cells: dict = field(default_factory=dict)
    problem: str | None = None

    @property
    def name(self) -> str:
        """The row's display name: its sample, else the recording's file stem."""
        sample = self.identity.get("sample", "").strip()
        if sample:
            return sample
        return Path(self.path.rstrip("/\\")).stem if self.path.strip() else "row"


def read_manifest(path) -> list[ManifestRow]:
    """Read a manifest CSV into :class:`ManifestRow` values, in file order.

    Raises :class:`UnusableManifest` when the file cannot be read or decoded,
    has no header or no ``path`` column, repeats a column or has a column this
    tool does not know.
    """
    path = Path(path)
    try:
        # the csv module reads the file itself (newline=""), so a quoted line break or a U+2028
        # inside a cell stays in its cell
        with open(path, encoding="utf-8-sig", newline="") as handle:
            text = handle.read()
    except FileNotFoundError:
        raise UnusableManifest(f"{path}: no such manifest file.") from None
    except IsADirectoryError:
        raise UnusableManifest(f"{path}: is a folder, not a manifest CSV file.") from None
    except UnicodeDecodeError:
        raise UnusableManifest(f"{path}: not a text CSV file (it is not UTF-8).") from None
    except OSError as exc:
        raise UnusableManifest(f"{path}: the manifest cannot be read ({exc.strerror}).") from None
    first_line = text.lstrip("\r\n").split("\n", 1)[0]
    delimiter = ";" if ";" in first_line and "," not in first_line else ","
    try:
        records = [r for r in csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
                   if any(cell.strip() for cell in r)]
    except csv.Error as exc:
        raise UnusableManifest(f"{path}: not a readable CSV file ({exc}).") from None
    if not records:
        raise UnusableManifest(f"{path}: the manifest is empty; it needs a header with a 'path' column.")
    header = [cell.strip().lower() for cell in records[0]]
    _check_header(path, header, [cell.strip() for cell in records[0]])
    base = path.parent
    rows = []
    seen: dict[tuple, int] = {}
    for number, cells in enumerate(records[1:], start=1):
        problem = None
        if len(cells) > len(header):
            extra = [c for c in cells[len(header):] if c.strip()]
            if extra:
                problem = (f"the row has {len(cells)} cells but the header names only "
                           f"{len(header)} columns.")
        values = dict(zip(header, (c.strip() for c in cells)))
        given = values.get("path", "")
        if problem is None and not given:
            problem = "the path cell is empty."
        made_on = values.get("made_on", "")
        if problem is None and made_on:
            try:
                date.fromisoformat(made_on)
            except ValueError:
                problem = f"made_on '{shown_text(made_on)}' is not an ISO date such as 2026-03-01."
        key = (values.get("product", ""), values.get("lot", ""),
               values.get("sample", "") or Path(given.rstrip("/\\")).stem, values.get("replicate", ""))
        if problem is None and given and (key[0] or key[1]) and key in seen:
            problem = (f"the same product, lot, sample and replicate as row {seen[key]}; give each "
                       "recording its own sample or replicate.")
        seen.setdefault(key, number)   # (rows of no lot and no product are no lot's replicates)
        source = Path(given) if Path(given).is_absolute() else base / given
        rows.append(ManifestRow(
            row=number, path=given, source=source,
            identity={name: values.get(name, "") for name in IDENTITY_COLUMNS},
            cells={name: values.get(name, "") for name in OPTION_COLUMNS},
            problem=problem))
    if not rows:
        raise UnusableManifest(f"{path}: the manifest lists no recordings, only its header; add one "
                               "row per recording.")
    return rows


def _check_header(path, header, written):
    blank = [i + 1 for i, name in enumerate(header) if not name]
    if blank:
        raise UnusableManifest(f"{path}: header column {blank[0]} has no name; every column needs "
                               f"one of: {', '.join(MANIFEST_COLUMNS)}.")
    unknown = [i for i, name in enumerate(header) if name not in MANIFEST_COLUMNS]
    if unknown:
        name = header[unknown[0]]
        if "\t" in name or "|" in name:
            raise UnusableManifest(f"{path}: the header '{shown_text(written[unknown[0]])}' is not split into "
                                   "columns; separate the columns with commas (or semicolons).")
        close = difflib.get_close_matches(name.replace(" ", "_").replace("-", "_"),
                                          MANIFEST_COLUMNS, n=1, cutoff=0.7)
        hint = f" (did you mean '{close[0]}'?)" if close else ""
        raise UnusableManifest(f"{path}: unknown column '{shown_text(written[unknown[0]])}'{hint}; the columns a "
                               f"manifest may have are {', '.join(MANIFEST_COLUMNS)}.")
    repeated = sorted({name for name in header if header.count(name) > 1})
    if repeated:
        raise UnusableManifest(f"{path}: column '{repeated[0]}' appears more than once.")
    if "path" not in header:
        raise UnusableManifest(f"{path}: the manifest has no 'path' column naming each recording.")


def row_options(row: ManifestRow, defaults: dict | None = None) -> AnalysisOptions:
    """The row's :class:`AnalysisOptions`: its cell, else ``defaults[name]`` (text), else default.

    Raises :class:`BadQuantity` with one sentence naming the first bad cell.
    """
    problems = row_option_problems(row, defaults)
    if problems:
        raise BadQuantity(problems[0])
    return options_from_text(_merged(row, defaults))


def row_option_problems(row: ManifestRow, defaults: dict | None = None) -> list[str]:
    """Every bad option value of the row, one sentence each (empty when all parse)."""
    problems = []
    for name, text in _merged(row, defaults).items():
        if text is None or not str(text).strip():
            continue
        try:
            options_from_text({name: text})
        except BadQuantity as exc:
            where = f"column {name}" if row.cells.get(name) else f"option --{name.replace('_', '-')}"
            problems.append(f"{where}: {exc}")
    return problems


def _merged(row: ManifestRow, defaults: dict | None) -> dict:
    defaults = defaults or {}
    return {name: (row.cells.get(name) or defaults.get(name) or None) for name in OPTION_COLUMNS}


@dataclass(frozen=True)
class Problem:
    """One problem found by :func:`check_manifest` (``row`` 1-based; 0 = the manifest itself)."""

    row: int
    message: str

    def __str__(self):
        return f"row {self.row}: {self.message}" if self.row else self.message


def check_manifest(path, defaults: dict | None = None) -> list[Problem]:
    """Validate a manifest and every source without analysing anything.

    Per row: the row's shape, every option cell parses, the recording exists and
    opens, and the required values (surface tension, image scale, frame rate
    from the options or the container) are present. Returns every problem
    found, in row order; an unusable manifest gives a single row-0 problem.
    """
    from ..frames import UnusableSource, open_source

    try:
        rows = read_manifest(path)
    except UnusableManifest as exc:
        return [Problem(0, str(exc))]
    problems = []
    for row in rows:
        if row.problem:
            problems.append(Problem(row.row, row.problem[0].upper() + row.problem[1:]))
            continue
        bad = row_option_problems(row, defaults)
        problems.extend(Problem(row.row, message) for message in bad)
        options = None if bad else options_from_text(_merged(row, defaults))
        container_fps = clock_problem = None
        try:
            with open_source(row.source) as recording:
                container_fps = recording.fps
                if options is not None:
                    clock_problem = _clock_problem(options, recording)
        except UnusableSource as exc:
            problems.append(Problem(row.row, str(exc)))
            continue
        if options is None:
            continue
        if clock_problem:
            problems.append(Problem(row.row, clock_problem))
            continue
        try:
            check_required(options, container_fps=container_fps)
        except BadQuantity as exc:
            problems.append(Problem(row.row, str(exc)))
    return problems


def _clock_problem(options: AnalysisOptions, recording) -> str | None:
    """What the row's frame-rate options contradict in the recording's own clock, or None."""
    from ..clock import ClockConflict, resolve_clock

    if options.fps_hz is None and not options.fps_override:
        return None   # a missing rate is check_required's to name
    try:
        resolve_clock(options, recording)
    except ClockConflict as exc:
        return str(exc)
    return None
