"""Small helpers shared by the writers and readers of results: plain JSON values, numbers read
back, file names, UTC time stamps, spreadsheet-safe CSV text."""

from __future__ import annotations

import hashlib
import math
import re
from collections.abc import Mapping
from datetime import datetime, timezone
from pathlib import PurePath

import numpy as np

#: The one form of every time stamp the tool writes: ISO 8601, UTC, to the second.
UTC_FORMAT = "%Y-%m-%dT%H:%M:%SZ"


def utc_text(moment: datetime | None = None) -> str:
    """``moment`` (default: now) as ISO 8601 UTC text to the second, e.g. ``2026-12-02T16:39:29Z``;
    a moment without a time zone is taken as UTC."""
    moment = datetime.now(timezone.utc) if moment is None else moment
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=timezone.utc)
    return moment.astimezone(timezone.utc).strftime(UTC_FORMAT)


def json_plain(value):
    """Plain Python for JSON: mappings and sequences copied, numpy scalars and arrays unwrapped,
    NaN and infinities as None, paths as text."""
    if isinstance(value, Mapping):
        return {str(k): json_plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [json_plain(v) for v in value]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, PurePath):
        return str(value)
    return value


def finite_number(value) -> float | None:
    """``value`` as a finite float; None for missing, empty, non-numeric, boolean or NaN/inf."""
    if value is None or isinstance(value, bool) or value == "":
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


#: Longest safe name (characters): file systems allow 255 bytes a name, and the batch stages a
#: row folder under a longer hidden name beside it.
MAX_NAME_CHARS = 80


def safe_name(text: str) -> str:
    """``text`` with every character outside ASCII letters, digits, ``.``, ``_``, ``-`` → ``_``.

    The contract's rule for batch row folders and lot report file names; a name longer than
    :data:`MAX_NAME_CHARS` keeps its first 71 characters and gets ``-`` and 8 hex digits of the
    SHA-256 of the whole text, so long names stay distinct.
    """
    name = re.sub(r"[^A-Za-z0-9._-]", "_", text)
    if len(name) > MAX_NAME_CHARS:
        digest = hashlib.sha256(text.encode("utf-8", "surrogatepass")).hexdigest()[:8]
        name = f"{name[:MAX_NAME_CHARS - 9]}-{digest}"
    return name


def row_folder_name(row: int, name: str, width: int) -> str:
    """``<row>-<name>``: row zero-padded to ``width`` digits, name made safe."""
    return f"{row:0{width}d}-{safe_name(name)}"


#: The first characters that make a spreadsheet read a cell as a formula (OWASP, "CSV Injection").
FORMULA_LEADS = ("=", "+", "-", "@", "\t", "\r")


def spreadsheet_safe(text: str) -> str:
    """A CSV cell that a spreadsheet shows as text: a cell that is not a number and starts like
    a formula gets a leading apostrophe (OWASP's advice against CSV injection); numbers, such as
    ``-0.5``, and other text are unchanged. :func:`from_spreadsheet_safe` undoes it."""
    if text.startswith(FORMULA_LEADS):
        try:
            float(text)
        except ValueError:
            return "'" + text
    return text


def from_spreadsheet_safe(text: str) -> str:
    """The cell as written before :func:`spreadsheet_safe`."""
    if text.startswith("'") and text[1:].startswith(FORMULA_LEADS) and spreadsheet_safe(text[1:]) == text:
        return text[1:]
    return text
