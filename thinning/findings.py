"""Structured quality findings: what may make a record or a number untrustworthy.

Every stage reports problems as :class:`Finding` values instead of raising;
:mod:`thinning.analysis` renders them as the sentences of ``result.json``
``warnings``, and those with ``severity=Severity.DOUBTFUL`` also make the
record ``doubtful`` and fill ``quality_reasons``.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass


class Severity(enum.Enum):
    """How much a finding weighs on the headline number."""

    NOTE = "note"          # worth knowing, the number stands
    DOUBTFUL = "doubtful"  # the headline number cannot be trusted


@dataclass(frozen=True)
class Finding:
    """One quality finding.

    ``code`` is a stable kebab-case identifier (documented in the README),
    ``message`` one plain sentence, ``t_range_s`` the stretch of the record
    concerned on the recording's clock (or None).
    """

    code: str
    severity: Severity
    message: str
    t_range_s: tuple[float, float] | None = None

    @property
    def doubtful(self) -> bool:
        return self.severity is Severity.DOUBTFUL


def warning_sentences(findings) -> list[str]:
    """The ``warnings`` list of ``result.json``: every message, in order, without repeats."""
    return list(dict.fromkeys(f.message for f in findings))


def quality_of(findings) -> tuple[str, list[str]]:
    """``("good" | "doubtful", quality_reasons)`` from a list of findings."""
    reasons = list(dict.fromkeys(f.message for f in findings if f.doubtful))
    return ("doubtful" if reasons else "good"), reasons
