"""Small helpers shared by the writers and readers of results: numbers read back, file names."""

from __future__ import annotations

import math
import re


def finite_number(value) -> float | None:
    """``value`` as a finite float; None for missing, empty, non-numeric, boolean or NaN/inf."""
    if value is None or isinstance(value, bool) or value == "":
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


def safe_name(text: str) -> str:
    """``text`` with every character outside ASCII letters, digits, ``.``, ``_``, ``-`` → ``_``.

    The contract's rule for batch row folders and lot report file names.
    """
    return re.sub(r"[^A-Za-z0-9._-]", "_", text)


def row_folder_name(row: int, name: str, width: int) -> str:
    """``<row>-<name>``: row zero-padded to ``width`` digits, name made safe."""
    return f"{row:0{width}d}-{safe_name(name)}"
