"""Quality findings: the registry of every check the tool makes, and the findings they raise.

Every stage reports what may make a record or a number untrustworthy as a
:class:`Finding` (a registered :class:`Code`, a :class:`Severity`, one plain
sentence and the stretch of the record concerned) instead of raising.
:class:`Code` is the registry: each code carries what it means and whether it
makes the record doubtful (``"yes"``, ``"no"`` or ``"sometimes"``, when the
severity depends on how bad the problem is). The README's warnings table is
this registry (a test holds them equal); ``result.json`` carries the findings
whole (``findings``), and their sentences as ``warnings`` and, for the
doubtful ones, ``quality_reasons``.

To add a check: add a :class:`Code` member with its meaning and policy, raise
``Finding(Code.NEW, …)`` in the stage that sees the problem, and add the row
to the README's table.
"""

from __future__ import annotations

import enum
from dataclasses import dataclass


class Severity(enum.Enum):
    """How much a finding weighs on the headline number."""

    NOTE = "note"          # worth knowing, the number stands
    DOUBTFUL = "doubtful"  # the headline number cannot be trusted


class Code(str, enum.Enum):
    """The registered finding codes (stable kebab-case), with meaning and doubtful policy."""

    def __new__(cls, value, doubtful, meaning):
        member = str.__new__(cls, value)
        member._value_ = value
        member.doubtful = doubtful
        member.meaning = meaning
        return member

    FEW_FRAMES_IN_WINDOW = (
        "few-frames-in-window", "yes",
        "fewer than 10 frames inside the elasto-capillary window: frame rate too low for this λ")
    WINDOW_CUT_BY_FLOOR = (
        "window-cut-by-floor", "yes",
        "the resolution floor cuts the window so that D falls less than 3-fold inside it")
    NO_USABLE_REGIME = ("no-usable-regime", "yes", "no thinning law could be located")
    RECORD_BROKEN_OFF = (
        "record-broken-off", "yes",
        "the video broke off before its end; analysed up to its last good frame")
    FILAMENT_LOST = ("filament-lost", "yes", "the filament left the view without a visible breakup")
    THREAD_GAPS = (
        "thread-gaps", "sometimes",
        "frames without a connected thread before the final breakup; doubtful when the thread was "
        "still thicker than 2 px")
    NO_CONNECTED_THREAD = ("no-connected-thread", "yes", "no frame shows a connected thread")
    ELASTIC_NOT_SETTLED = (
        "elastic-not-settled", "yes",
        "the strain rate kept falling after the elastic window: it may be the viscous-to-elastic "
        "passage, the settled stretch lying near or below the floor")
    LATE_BREAKUP = (
        "late-breakup", "yes",
        "a \"Newtonian\" thread broke well after its law predicts: elastic stress held it in a "
        "stretch too thin to resolve")
    WINDOW_BELOW_FLOOR = (
        "window-below-floor", "yes",
        "no settled elasto-capillary stretch above the resolution floor: λ comes from one below "
        "it (widths of one to three pixels, read from the thread's integrated shadow)")
    FLOOR_ENDS_WINDOW = (
        "floor-ends-window", "no",
        "the window ends at the resolution floor (thinner frames left out)")
    FEW_FRAMES_PER_RELAXATION_TIME = (
        "few-frames-per-relaxation-time", "no", "fewer frames per λ than advisable")
    NO_ELASTIC_REGIME = ("no-elastic-regime", "no", "Newtonian thinning: no relaxation time")
    NO_BREAKUP = ("no-breakup", "no", "the filament did not break within the record")
    DEFECTIVE_PIXELS = (
        "defective-pixels", "no",
        "stuck, hot or dead sensor pixels were found and replaced by their neighbours' median")
    BREAKUP_FADED = (
        "breakup-faded", "no",
        "the thread faded below the optical resolution before it was seen to part: the breakup "
        "time is a lower bound; the lifetime is extrapolated by a fitted law or left empty")
    MODEL_FIT_DISAGREES = (
        "model-fit-disagrees", "no",
        "the whole-curve filament model does not describe the record, or its λ and the local-slope "
        "λ disagree beyond their 95 % intervals, or only one of them finds elasticity")
    OUTLIER_FRAMES = (
        "outlier-frames", "no", "frames off the thinning trend (beads, dust) left out of the fits")
    CONTAINER_FRAME_RATE = (
        "container-frame-rate", "yes",
        "no --fps: the file's rate, under 500/s and so likely a playback rate, set the clock")
    VISCOSITY_FALLBACK = (
        "viscosity-fallback", "no", "the solvent viscosity stood in for the zero-shear viscosity")
    GRAVITY_SAGGING = ("gravity-sagging", "no", "Bond number large: the neck may sag")
    TILT = ("tilt", "no", "the filament axis is tilted (diameters are taken across it)")
    AXIS_DRIFT = ("axis-drift", "no", "the filament axis moves sideways during the record")
    BEADS = ("beads", "no", "beads on the thread; the diameter is the thread's minimum between them")
    CONTRAST_LOSS = (
        "contrast-loss", "no",
        "thread narrower than about three blur widths: blurred into a low-contrast dip")
    BACKGROUND_CLIPPED = (
        "background-clipped", "sometimes",
        "part of the background is at the camera's maximum grey level, so edges may read inward; "
        "above 85 % of it the light level is unknown, edges come from the steepest light gradient "
        "and the record is doubtful")
    FILES_LEFT_OUT = (
        "files-left-out", "no",
        "the image folder holds other files (videos, text, unknown types) that were not read as frames")
    CLOCK_OVERRIDDEN = (
        "clock-overridden", "no",
        "--fps-override: --fps, not the native camera file's recording rate, set the clock")
    EXPOSURE_OPTION_UNUSED = (
        "exposure-option-unused", "no",
        "--exposure differs from the exposure in the file's header, which was used")
    FRAMES_DROPPED = (
        "frames-dropped", "no",
        "the file's time stamps show frames the camera did not save; times come from the stamps")
    COLOUR_AS_GREY = (
        "colour-as-grey", "no",
        "a colour camera's frames were read as grey (luma of interpolated colour, or the 2 × 2 "
        "mean of a raw colour-filter mosaic)")
    MOTION_BLUR = (
        "motion-blur", "no",
        "at the neck's measured speed an edge moves more than 0.3 px during one exposure")
    NO_FILAMENT_FRAMES = (
        "no-filament-frames", "no", "the first frames show no connected filament")


@dataclass(frozen=True)
class Finding:
    """One quality finding.

    ``code`` a registered :class:`Code`, ``severity`` within its policy,
    ``message`` one plain sentence, ``t_range_s`` the stretch of the record
    concerned on the recording's clock (s), or None.
    """

    code: Code
    severity: Severity
    message: str
    t_range_s: tuple[float, float] | None = None

    def __post_init__(self):
        code = Code(self.code)  # raises for an unregistered code
        object.__setattr__(self, "code", code)
        allowed = {"yes": (Severity.DOUBTFUL,), "no": (Severity.NOTE,),
                   "sometimes": (Severity.NOTE, Severity.DOUBTFUL)}[code.doubtful]
        if self.severity not in allowed:
            raise ValueError(f"finding {code.value!r} cannot be {self.severity.value}")

    @property
    def doubtful(self) -> bool:
        return self.severity is Severity.DOUBTFUL

    def to_dict(self) -> dict:
        """The ``result.json`` form ``{"code", "severity", "message", "t_range_s"}``."""
        span = None if self.t_range_s is None else [float(self.t_range_s[0]), float(self.t_range_s[1])]
        return {"code": self.code.value, "severity": self.severity.value, "message": self.message,
                "t_range_s": span}


def warning_sentences(findings) -> list[str]:
    """The ``warnings`` list of ``result.json``: every message, in order, without repeats."""
    return list(dict.fromkeys(f.message for f in findings))


def quality_of(findings) -> tuple[str, list[str]]:
    """``("good" | "doubtful", quality_reasons)`` from a list of findings."""
    reasons = list(dict.fromkeys(f.message for f in findings if f.doubtful))
    return ("doubtful" if reasons else "good"), reasons
