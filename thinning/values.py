"""Small helpers for values read back from results (JSON, CSV cells, the database)."""

from __future__ import annotations

import math


def finite_number(value) -> float | None:
    """``value`` as a finite float; None for missing, empty, non-numeric, boolean or NaN/inf."""
    if value is None or isinstance(value, bool) or value == "":
        return None
    try:
        x = float(value)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None
