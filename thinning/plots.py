"""Figures for one analysed recording (matplotlib, Agg, no pyplot state).

Every ``plot_*`` function takes the :class:`~thinning.result.Result` of a
recording, draws on the ``ax`` it is given (or on a fresh
:class:`~matplotlib.figure.Figure`) and returns it; nothing is shown. The
fitted laws are drawn over their windows from the result's typed fits
(:meth:`thinning.fits.Fit.curve`). :func:`write_figures` writes the four PNGs
(and, on request, the same figures as SVG) atomically and byte-identically for
the same input.

Colours come from the Okabe–Ito palette, which stays distinct for the common
forms of colour blindness (M. Okabe and K. Ito, "Color Universal Design (CUD):
how to make figures and presentations that are friendly to colorblind people",
2008, https://jfly.uni-koeln.de/color/); and no two kinds of mark differ by
colour alone: markers, line styles and hatching tell them apart on a grey print.
Log axes are labelled with plain numbers (200, 500, 1000; never "6×10²"; see
:class:`ReadableLogLocator`), as the house style of :mod:`thinning.display` asks.
"""

from __future__ import annotations

import contextlib
import logging
import textwrap
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib import patheffects, ticker
from matplotlib.figure import Figure

from thinning import atomic, display, laws
from .values import finite_number as _number

logger = logging.getLogger(__name__)

#: Fixed resolution of every PNG (dots per inch).
DPI = 110
#: PNG metadata that keeps the bytes identical from run to run.
PNG_METADATA = {"Software": None}
#: SVG metadata that keeps the bytes identical from run to run (no date, no library version);
#: the ids inside come from the fixed ``svg.hashsalt`` of the style.
SVG_METADATA = {"Date": None, "Creator": None}

#: The Okabe–Ito palette (Okabe & Ito 2008, see the module's docstring).
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky blue": "#56B4E9", "bluish green": "#009E73",
    "yellow": "#F0E442", "blue": "#0072B2", "vermillion": "#D55E00", "reddish purple": "#CC79A7",
}

#: Per regime kind: (shading of the stretch, colour of its fit line, hatching of the shading);
#: the shadings are Okabe–Ito colours mixed 30:70 with white, the hatching tells them apart in grey.
REGIME_COLOURS = {
    "inertio-capillary": ("#f8e2b3", OKABE_ITO["orange"], ""),
    "visco-capillary": ("#cce8f8", OKABE_ITO["blue"], "...."),
    "elasto-capillary": ("#b2e2d5", OKABE_ITO["bluish green"], "////"),
    "finite-extensibility": ("#f0d7e5", OKABE_ITO["reddish purple"], "\\\\"),
    "undetermined": ("#e4e4e4", "#555555", "xx"),
}
DATA_COLOUR = OKABE_ITO["black"]
MARK_COLOUR = OKABE_ITO["vermillion"]
MODEL_COLOUR = OKABE_ITO["blue"]
FLOOR_COLOUR = "#8a8a8a"
#: Measured points below the resolution floor (and replicates that are not valid): grey.
BELOW_COLOUR = "#9a9a9a"
#: The detected edges drawn over the frames.
EDGE_COLOUR = OKABE_ITO["orange"]

#: The look we want, independent of the user's matplotlibrc.
_STYLE = {
    "font.family": "DejaVu Sans",
    "font.size": 9.0,
    "axes.titlesize": 10.0,
    "axes.labelsize": 9.0,
    "axes.edgecolor": "#4a4a4a",
    "axes.linewidth": 0.8,
    "axes.grid": True,
    "axes.axisbelow": True,
    "grid.color": "#dddddd",
    "grid.linewidth": 0.6,
    "legend.fontsize": 8.0,
    "legend.frameon": False,
    "lines.linewidth": 1.4,
    "savefig.dpi": DPI,
    "image.interpolation": "nearest",
    "path.simplify": True,
    "svg.hashsalt": "thinning",
    "svg.fonttype": "path",
    "hatch.linewidth": 0.5,
}

FIGSIZE_IN = (7.6, 3.9)

@contextlib.contextmanager
def _style():
    with matplotlib.rc_context(_STYLE):
        yield


def _new_axes(ax):
    if ax is not None:
        return ax
    fig = Figure(figsize=FIGSIZE_IN, dpi=DPI, layout="constrained")
    return fig.add_subplot()


def _column(table, name):
    """Float array of column ``name`` (all NaN when the column is missing)."""
    if table is not None and name in getattr(table, "columns", ()):
        return np.asarray(table[name], dtype=float)
    n = 0 if table is None else len(table)
    return np.full(n, np.nan)


def _time_scale(table, result):
    """(factor, unit) so the time axis reads in s or ms."""
    times = [_column(table, "time_s")]
    times.append(np.array([_number(result.characterisation.breakup_time_s) or np.nan]))
    t = np.concatenate(times)
    t = t[np.isfinite(t)]
    span = float(np.max(np.abs(t))) if t.size else 1.0
    return (1e3, "ms") if span < 1.0 else (1.0, "s")


def _diameter_scale(d):
    d = d[np.isfinite(d) & (d > 0)]
    top = float(np.max(d)) if d.size else 1e-3
    return (1e3, "mm") if top >= 1e-2 else (1e6, "µm")


def _no_data(ax, text):
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center",
            color=FLOOR_COLOUR, fontsize=9)


def _shade_regimes(ax, result, t_factor):
    """Shade each located stretch in its own colour and hatching (legend entries by kind)."""
    seen = set()
    for regime in result.characterisation.regimes:
        kind = regime.kind
        shade, line, hatch = REGIME_COLOURS.get(kind, REGIME_COLOURS["undetermined"])
        ax.axvspan(regime.t_start_s * t_factor, regime.t_end_s * t_factor, facecolor=shade,
                   edgecolor=_mix(line, 0.45), hatch=hatch or None, alpha=0.85, lw=0,
                   label=None if kind in seen else kind, zorder=0)
        seen.add(kind)


def _mix(colour, share):
    """``colour`` mixed ``share`` : ``1 − share`` with white (a hex colour)."""
    rgb = np.array(matplotlib.colors.to_rgb(colour))
    return matplotlib.colors.to_hex(share * rgb + (1.0 - share))


def _mark_breakup(ax, result, t_factor):
    tb = _number(result.characterisation.breakup_time_s)
    if tb is not None:
        ax.axvline(tb * t_factor, color=MARK_COLOUR, ls="-.", lw=1.0, label="breakup")


class ReadableLogLocator(ticker.LogLocator):
    """Major ticks of a log axis whose labels read as plain numbers.

    Over a range holding three decades or more: the decades (0.01, 0.1, 1 …, thinned as
    :class:`~matplotlib.ticker.LogLocator` does); over a narrower one: the 1–2–5 numbers in it
    (200, 500, 1000 or 0.5, 1, 2) when there are at least three, else the 1–2–3–5 numbers
    (200, 300, 500); over a range narrower still (within a factor of about three): evenly
    spaced round numbers (110, 120, 130). Paired with
    :data:`PLAIN_NUMBERS`, a narrow range never gets labels like "6×10²".
    """

    def __init__(self):
        super().__init__(base=10.0)

    def tick_values(self, vmin, vmax):
        if vmin > vmax:
            vmin, vmax = vmax, vmin
        if not (np.isfinite(vmin) and np.isfinite(vmax) and vmin > 0):
            return super().tick_values(vmin, vmax)
        decades = np.asarray(super().tick_values(vmin, vmax))
        if np.count_nonzero((decades >= vmin) & (decades <= vmax)) >= 3:
            return decades
        low, high = int(np.floor(np.log10(vmin))), int(np.ceil(np.log10(vmax)))
        for mantissas in ((1, 2, 5), (1, 2, 3, 5)):
            steps = np.array([m * 10.0 ** k for k in range(low - 1, high + 1) for m in mantissas])
            inside = (steps >= vmin * (1 - 1e-9)) & (steps <= vmax * (1 + 1e-9))
            if np.count_nonzero(inside) >= 3:
                return steps
        linear = ticker.MaxNLocator(nbins=4, steps=[1, 2, 2.5, 5, 10]).tick_values(vmin, vmax)
        return linear[linear > 0]


def _plain_tick(x, _pos=None):
    return display.plain(x) if np.isfinite(x) and x > 0 else ""


#: Tick labels as plain numbers in the house style (:func:`thinning.display.plain`: no
#: e-notation, no "×10ⁿ").
PLAIN_NUMBERS = ticker.FuncFormatter(_plain_tick)


def readable_log_axis(axis):
    """Give a log ``axis`` (``ax.yaxis``, …) plain-number labels at :class:`ReadableLogLocator`'s
    ticks and unlabelled minor ticks; call it after ``set_yscale("log")``."""
    axis.set_major_locator(ReadableLogLocator())
    axis.set_major_formatter(PLAIN_NUMBERS)
    axis.set_minor_locator(ticker.LogLocator(base=10.0, subs=tuple(range(2, 10))))
    axis.set_minor_formatter(ticker.NullFormatter())


def fit_curves(result, *, n_points=200):
    """``{kind: (time_s, diameter_m)}``: each successful fit's law over its window.

    A fit whose law cannot be evaluated (read back from a file, or an
    inertio-capillary fit without the density) gives no curve.
    """
    curves = {}
    for name, fit in result.characterisation.fits.items():
        a, b = (_number(w) for w in fit.window_s)
        if not fit or a is None or b is None or b <= a:
            continue
        t = np.linspace(a, b, n_points)
        d = fit.curve(t)
        if np.isfinite(d).any():
            curves[fit.model if fit.model not in curves else name] = (t, d)
    return curves


def model_curve(result, *, n_points=300):
    """``(time_s, diameter_m)`` of the whole-curve filament model from its start to the last
    frame above the resolution floor, or None (no fit, or one read back from a file)."""
    c = result.characterisation
    fit = c.model_fit
    t0 = _number(fit.t_start_s) if fit else None
    t = _column(result.table, "time_s")
    d = _column(result.table, "diameter_m")
    floor = _number(c.resolution_floor_m) or 0.0
    above = np.isfinite(t) & np.isfinite(d) & (d > floor)
    if t0 is None or not above.any():
        return None
    t_end = float(t[above].max())
    if t_end <= t0:
        return None
    ft = np.linspace(t0, t_end, n_points)
    fd = fit.curve(ft)
    return (ft, fd) if np.isfinite(fd).any() else None


#: Legend labels of the three kinds of measured point on the diameter plot.
IN_WINDOW_LABEL = "measured, in the fit window"
OUTSIDE_WINDOW_LABEL = "measured, outside the fit window"
BELOW_FLOOR_LABEL = "measured, below the {floor}"


def plot_diameter(result, *, ax=None):
    """Minimum neck diameter against time on a log axis.

    Measured points in the headline fit's window are filled, those outside it
    open, and those below the resolution floor (else one pixel, drawn as a
    dotted line) grey triangles. Each located regime is shaded in its own
    colour and hatching, the fits drawn over their windows
    (:func:`fit_curves`), the whole-curve model dashed (:func:`model_curve`),
    breakup marked by a dash-dotted line, and λ with its 95 % interval written
    on the plot (:func:`relaxation_time_text`). Returns the Axes.
    """
    with _style():
        ax = _new_axes(ax)
        c = result.characterisation
        table = result.table
        t_factor, t_unit = _time_scale(table, result)
        t = _column(table, "time_s")
        d = _column(table, "diameter_m")
        curves = fit_curves(result)
        d_factor, d_unit = _diameter_scale(d)
        _shade_regimes(ax, result, t_factor)
        ok = np.isfinite(t) & np.isfinite(d) & (d > 0)
        floor = _number(c.resolution_floor_m)
        floor_label = "resolution floor"
        if floor is None:
            floor, floor_label = _number(result.calibration.pixel_size_m), "one pixel"
        below = ok & (d < floor) if floor is not None else np.zeros_like(ok)
        window = [_number(w) for w in (c.fit_window_s or ())]
        if len(window) == 2 and None not in window:
            inside = ok & ~below & (t >= min(window)) & (t <= max(window))
        else:
            inside = np.zeros_like(ok)
        outside = ok & ~below & ~inside
        kinds = (
            (inside, dict(marker="o", ms=2.8, mfc=DATA_COLOUR, mec=DATA_COLOUR, mew=0.0),
             IN_WINDOW_LABEL),
            (outside, dict(marker="o", ms=3.0, mfc="white", mec=DATA_COLOUR, mew=0.6),
             OUTSIDE_WINDOW_LABEL if inside.any() or window else "measured"),
            (below, dict(marker="v", ms=3.0, mfc=BELOW_COLOUR, mec="none", mew=0.0),
             BELOW_FLOOR_LABEL.format(floor=floor_label)),
        )
        for mask, marks, label in kinds:
            if mask.any():
                ax.plot(t[mask] * t_factor, d[mask] * d_factor, ls="none", alpha=0.9, label=label,
                        zorder=3, **marks)
        if not ok.any():
            _no_data(ax, "no filament measured")
        for kind, (ft, fd) in curves.items():
            ft, fd = np.asarray(ft, dtype=float), np.asarray(fd, dtype=float)
            good = np.isfinite(ft) & np.isfinite(fd) & (fd > 0)
            if good.any():
                colour = REGIME_COLOURS.get(kind, REGIME_COLOURS["undetermined"])[1]
                ax.plot(ft[good] * t_factor, fd[good] * d_factor, "-", color=colour, lw=1.8,
                        label=f"{kind} fit", zorder=4)
        model = model_curve(result)
        if model is not None:
            ft, fd = model
            good = np.isfinite(fd) & (fd > 0)
            ax.plot(ft[good] * t_factor, fd[good] * d_factor, "--", color=MODEL_COLOUR, lw=1.3,
                    label="whole-curve filament model", zorder=5)
        if floor is not None and (ok.any() or curves):
            ax.axhline(floor * d_factor, color=FLOOR_COLOUR, ls=":", lw=1.1, label=floor_label)
        _mark_breakup(ax, result, t_factor)
        ax.set_yscale("log")
        readable_log_axis(ax.yaxis)
        if not ok.any():
            ax.set_ylim(1e-1, 1e4)
        text = relaxation_time_text(result)
        if text is not None:
            ax.text(0.98, 0.97, text, transform=ax.transAxes, ha="right", va="top", fontsize=8.5,
                    gid="relaxation-time", zorder=6,
                    bbox=dict(boxstyle="round,pad=0.3", facecolor="white", edgecolor="#bbbbbb",
                              alpha=0.9))
        ax.set_xlabel(f"time t ({t_unit})")
        ax.set_ylabel(f"minimum neck diameter D ({d_unit})")
        ax.set_title("Neck diameter")
        _legend(ax)
    return ax


def relaxation_time_text(result):
    """``λ = 5.2 ms (95 % interval 4.2–6.2 ms)`` in the house style (:mod:`thinning.display`:
    the interval's precision, the unit of the recording's times), or None without a λ."""
    c = result.characterisation
    if _number(c.relaxation_time_s) is None:
        return None
    unit = display.time_unit(c.relaxation_time_s, *(c.relaxation_time_ci95_s or ()),
                             c.breakup_time_s, c.filament_lifetime_s, c.free_thinning_start_s,
                             *(c.fit_window_s or ()))
    return "λ = " + display.with_interval(c.relaxation_time_s, c.relaxation_time_ci95_s, unit)


def plot_extensional_viscosity(result, *, ax=None):
    """Apparent extensional viscosity against Hencky strain (log y), with η_E max (the largest
    plotted value) and its 95 % interval marked."""
    with _style():
        ax = _new_axes(ax)
        table = result.table
        eps = _column(table, "hencky_strain")
        eta = _column(table, "apparent_extensional_viscosity_Pa_s")
        ok = np.isfinite(eps) & np.isfinite(eta) & (eta > 0)
        if ok.any():
            ax.plot(eps[ok], eta[ok], "o", ms=2.6, mfc=REGIME_COLOURS["finite-extensibility"][1],
                    mec="none", alpha=0.85, label="apparent η_E", zorder=3)
        else:
            _no_data(ax, "no apparent extensional viscosity")
            ax.set_ylim(1e-3, 1e1)
        eta_max = _number(result.characterisation.extensional_viscosity_max_Pa_s)
        if eta_max is not None:
            ax.axhline(eta_max, color=MARK_COLOUR, ls="--", lw=1.0, label="η_E max")
            interval = result.characterisation.interval("extensional_viscosity_max_Pa_s")
            if interval is not None:
                ax.axhspan(*interval, color=MARK_COLOUR, alpha=0.12, lw=0, label="η_E max 95 % interval")
        eta_inf = _number(result.characterisation.extensional_viscosity_terminal_Pa_s)
        if eta_inf is not None:
            ax.axhline(eta_inf, color=REGIME_COLOURS["finite-extensibility"][1], ls="-.", lw=1.0,
                       label="terminal plateau")
        ax.set_yscale("log")
        readable_log_axis(ax.yaxis)
        ax.set_xlabel(r"Hencky strain $\varepsilon$")
        ax.set_ylabel(r"apparent extensional viscosity $\eta_E$ (Pa·s)")
        ax.set_title("Apparent extensional viscosity")
        _legend(ax)
    return ax


def plot_strain_rate(result, *, ax=None):
    """Strain rate against time (log y), with the elasto-capillary plateau 2/(3λ) marked."""
    with _style():
        ax = _new_axes(ax)
        table = result.table
        t_factor, t_unit = _time_scale(table, result)
        t = _column(table, "time_s")
        rate = _column(table, "strain_rate_1_s")
        _shade_regimes(ax, result, t_factor)
        ok = np.isfinite(t) & np.isfinite(rate) & (rate > 0)
        if ok.any():
            ax.plot(t[ok] * t_factor, rate[ok], "o", ms=2.6, mfc=DATA_COLOUR, mec="none", alpha=0.85,
                    label="measured", zorder=3)
        else:
            _no_data(ax, "no strain rate measured")
            ax.set_ylim(1e0, 1e4)
        lam = _number(result.characterisation.relaxation_time_s)
        if lam is not None and lam > 0:
            plateau = laws.elasto_capillary_strain_rate(lam)
            window = [_number(w) for w in (result.characterisation.fit_window_s or [])]
            colour = REGIME_COLOURS["elasto-capillary"][1]
            label = r"$2/(3\lambda)$"
            if len(window) == 2 and None not in window:
                ax.hlines(plateau, window[0] * t_factor, window[1] * t_factor, colors=colour,
                          lw=2.0, label=label, zorder=4)
                ax.axhline(plateau, color=colour, ls=":", lw=0.8)
            else:
                ax.axhline(plateau, color=colour, lw=1.4, label=label)
        _mark_breakup(ax, result, t_factor)
        ax.set_yscale("log")
        readable_log_axis(ax.yaxis)
        ax.set_xlabel(f"time t ({t_unit})")
        ax.set_ylabel(r"strain rate $\dot\varepsilon$ (1/s)")
        ax.set_title("Strain rate")
        _legend(ax)
    return ax


def _legend(ax):
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)


#: Most frames in the strip (the candidates kept while measuring are more:
#: :data:`thinning.measure.record.SNAPSHOT_CANDIDATES`).
STRIP_FRAMES = 6


def strip_snapshots(result, *, n=STRIP_FRAMES):
    """The frames of a recording's picture strip: ``[(snapshot, caption)]`` in time order.

    From the frames kept while measuring (``result.neck.snapshots``, frames with a thread spread
    over its life and the last one with a thread) the ones nearest the start of free thinning,
    the start, middle and end of the fit window and the approach to breakup, and the last frame
    with a thread; then, up to ``n``, the ones that fill the largest gaps between them. Never a
    frame from the breakup on, nor one before free thinning when there is one after it.
    ``caption`` says where the frame lies ("free thinning", "fit window", …).
    """
    neck = result.neck
    snaps = list(getattr(neck, "snapshots", None) or [])
    if not snaps:
        return []
    c = result.characterisation
    index = np.array([float(s[0]) for s in snaps])
    t = _frame_times(result, index)
    keep = np.isfinite(t)
    breakup_frame = _number(getattr(neck, "breakup_frame", None))
    if breakup_frame is not None:
        keep &= index < breakup_frame
    tb = _number(c.breakup_time_s)
    if tb is not None:
        keep &= t < tb
    start = _number(c.free_thinning_start_s)
    if start is not None and (keep & (t >= start)).any():
        keep &= t >= start
    order = [k for k in np.argsort(t, kind="stable") if keep[k]]
    if not order:
        return []
    last = order[-1]
    window = [_number(w) for w in (c.fit_window_s or ())]
    window = sorted(window) if len(window) == 2 and None not in window else None
    targets = [t[last]]
    if start is not None:
        targets.append(start)
    if window is not None:
        a, b = window
        targets += [0.5 * (a + b), a, b, 0.5 * (b + t[last])]
    chosen = []
    for target in targets:
        free = [k for k in order if k not in chosen]
        if free and len(chosen) < n:
            chosen.append(min(free, key=lambda k: (abs(t[k] - target), t[k])))
    while len(chosen) < min(n, len(order)):  # fill the largest gaps
        times = np.array(sorted(t[k] for k in chosen))
        free = [k for k in order if k not in chosen]
        chosen.append(max(free, key=lambda k: (float(np.min(np.abs(times - t[k]))), -t[k])))
    chosen.sort(key=lambda k: t[k])

    def caption(k):
        if k == last and tb is not None:
            return "last with a thread"
        if k == chosen[0] and start is not None:
            return "free thinning"
        if window is not None and window[0] <= t[k] <= window[1]:
            return "fit window"
        if window is not None and t[k] > window[1]:
            return "towards breakup"
        return ""
    return [(snaps[k], caption(k)) for k in chosen]


def _frame_times(result, index):
    """Times (s) of frame indices on the recording's clock (NaN where the clock is unknown)."""
    try:
        return np.asarray(result.calibration.time_s(index), dtype=float)
    except (TypeError, ValueError, ZeroDivisionError):
        return np.full(np.shape(index), np.nan)


def plot_frame_strip(snapshots, *, orientation="vertical", fps_hz=None, frame_time_s=None,
                     pixel_size_m=None, captions=None, max_frames=STRIP_FRAMES, fig=None):
    """A row of frames with the detected edges drawn over them.

    ``snapshots`` is a list of ``(frame_index, image, profile)``; ``image`` a
    2-D array (any dtype), ``profile`` anything with ``axial_px``, ``left_px``
    and ``right_px`` arrays (or None). Edges are drawn only where they were
    measured: rows where the profile's ``valid`` is true (all rows when it has
    none), and none at all where its ``connected`` is false ("no thread").
    ``orientation`` says how the filament runs: ``"vertical"`` (axial = image
    row, edges = columns) or ``"horizontal"`` (axial = column, edges = rows).
    With ``frame_time_s`` (frame index → s, e.g.
    :meth:`thinning.units.Calibration.time_s`) or ``fps_hz`` each panel gives
    its time, all in one unit; with ``pixel_size_m`` the first panel carries a
    scale bar of a round length in µm (artist gid ``"scale-bar"``, its label
    ``"scale-bar-label"``); ``captions`` (one text per frame) are written under
    the panels. More than ``max_frames`` frames are thinned to that many,
    spread evenly (pick them with :func:`strip_snapshots` instead). Returns the Figure.
    """
    if orientation not in ("vertical", "horizontal"):
        raise ValueError(f"orientation must be 'vertical' or 'horizontal', not {orientation!r}")
    snapshots = list(snapshots)
    captions = list(captions) if captions is not None else [""] * len(snapshots)
    if max_frames and len(snapshots) > max_frames:
        pick = np.unique(np.round(np.linspace(0, len(snapshots) - 1, max_frames)).astype(int))
        snapshots, captions = [snapshots[k] for k in pick], [captions[k] for k in pick]
    times = _strip_times(snapshots, frame_time_s, fps_hz)
    unit = display.time_unit(*[x for x in times if x is not None])
    with _style():
        n = max(len(snapshots), 1)
        if fig is None:
            fig = Figure(figsize=_strip_size(snapshots), dpi=DPI, layout="constrained")
        axes = fig.subplots(1, n, squeeze=False)[0]
        if not snapshots:
            axes[0].set_axis_off()
            _no_data(axes[0], "no frames")
        for k, (ax, (index, image, profile)) in enumerate(zip(axes, snapshots)):
            img = np.asarray(image, dtype=float)
            finite = img[np.isfinite(img)]
            lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
            ax.imshow(img, cmap="gray", vmin=lo, vmax=hi if hi > lo else lo + 1.0, aspect="equal")
            if profile is not None and not getattr(profile, "connected", True):
                # no connected thread (before it formed, a gap, or after breakup): no edges
                ax.text(0.5, 0.02, "no thread", transform=ax.transAxes, ha="center", va="bottom",
                        fontsize=7, color=EDGE_COLOUR)
            elif profile is not None:
                _draw_edges(ax, profile, orientation)
            ax.set_xlim(-0.5, img.shape[1] - 0.5)
            ax.set_ylim(img.shape[0] - 0.5, -0.5)
            title = f"frame {index}"
            if times[k] is not None:
                title += f"\n{_strip_time(times[k], unit)}"
            ax.set_title(title, fontsize=8)
            if captions[k]:
                ax.set_xlabel(captions[k], fontsize=7.5)
            ax.set_xticks([])
            ax.set_yticks([])
            ax.grid(False)
            if k == 0:
                _scale_bar(ax, img.shape, pixel_size_m)
    return fig


def _draw_edges(ax, profile, orientation):
    """The profile's edges over the rows it measured (none elsewhere, no line across a gap)."""
    axial = np.asarray(profile.axial_px, dtype=float)
    keep = np.asarray(getattr(profile, "valid", np.ones(axial.shape, bool)), dtype=bool)
    for edge in (profile.left_px, profile.right_px):
        edge = np.asarray(edge, dtype=float)
        edge = np.where(keep & np.isfinite(edge), edge, np.nan)
        if not np.isfinite(edge).any():
            continue
        x, y = (edge, axial) if orientation == "vertical" else (axial, edge)
        ax.plot(x, y, "-", color=EDGE_COLOUR, lw=0.9)


def _strip_times(snapshots, frame_time_s, fps_hz):
    times = []
    for index, _, _ in snapshots:
        value = None
        if frame_time_s is not None:
            value = _number(float(np.asarray(frame_time_s(index))))
        elif _number(fps_hz):
            value = index / float(fps_hz)
        times.append(value)
    return times


def _strip_time(t_s, unit):
    """A frame's time in the strip's unit: four significant figures, no trailing zeros."""
    x = unit.of(t_s)
    return f"{display.plain(float(display.significant(x, 4))) if x != 0 else '0'} {unit.label}"


def scale_bar_length_um(field_um, *, share=0.3):
    """A round length (1, 2 or 5 × 10ⁿ µm) of at most ``share`` of a field ``field_um`` wide."""
    target = share * field_um
    if not target > 0:
        return None
    exponent = int(np.floor(np.log10(target)))
    for m in (5, 2, 1):
        length = m * 10.0 ** exponent
        if length <= target * (1 + 1e-9):
            return length
    return 10.0 ** exponent


def _scale_bar(ax, shape, pixel_size_m):
    """A white bar (dark outline) of a round length in µm in the lower left of the panel."""
    px = _number(pixel_size_m)
    if px is None or px <= 0:
        return
    um_per_px = px * 1e6
    height, width = shape[:2]
    length_um = scale_bar_length_um(width * um_per_px)
    if length_um is None:
        return
    length_px = length_um / um_per_px
    x0, y = 0.08 * width, 0.94 * height - 0.5
    outline = [patheffects.Stroke(linewidth=3.6, foreground="black"), patheffects.Normal()]
    ax.plot([x0, x0 + length_px], [y, y], "-", color="white", lw=2.2, solid_capstyle="butt",
            gid="scale-bar", label="scale bar", path_effects=outline, zorder=5)
    ax.text(x0, y - 0.035 * height, display.given(length_um * 1e-6, display.UM),
            ha="left", va="bottom", fontsize=7, color="white", gid="scale-bar-label", zorder=5,
            path_effects=[patheffects.Stroke(linewidth=2.2, foreground="black"), patheffects.Normal()])


def _strip_size(snapshots, *, panel_width_in=1.6, max_height_in=4.5):
    """Figure size (in) for a strip of ``len(snapshots)`` panels that keeps the images' aspect."""
    n = max(len(snapshots), 1)
    shapes = [np.shape(image) for _, image, _ in snapshots if np.ndim(image) == 2]
    aspect = max((h / w for h, w in shapes if w), default=1.0)
    height = min(panel_width_in * aspect + 0.8, max_height_in)
    return (min(panel_width_in * n + 0.3, 11.0), max(height, 1.8))


def _save(fig, path, fmt):
    """Write ``fig`` to ``path`` as ``fmt`` atomically (temporary file in the same folder, then
    replace), with metadata that keeps the bytes the same from run to run."""
    path = Path(path)
    metadata = PNG_METADATA if fmt == "png" else SVG_METADATA
    with atomic.replacing(path) as fh, _style():
        fig.savefig(fh, format=fmt, dpi=DPI, metadata=metadata)
    return path


def _save_png(fig, path):
    return _save(fig, path, "png")


#: The figures of one recording, each written as ``NAME.png`` (and ``NAME.svg`` on request).
FIGURE_NAMES = ("diameter", "extensional_viscosity", "strain_rate", "frames")


def write_figures(out_dir, result, *, formats=("png",)):
    """Write ``diameter.png``, ``extensional_viscosity.png``, ``strain_rate.png`` and ``frames.png``.

    ``result`` a fresh :class:`~thinning.result.Result` (with its table and
    neck series); ``formats`` the formats to write
    (:func:`thinning.analysis.figure_formats`):
    with ``"svg"`` each figure is also written as ``NAME.svg``. Returns the
    PNGs: ``{"diameter": Path, "extensional_viscosity": Path, "strain_rate":
    Path, "frames": Path}``. The same input gives byte-identical files.
    """
    from .analysis import figure_formats

    formats = figure_formats(formats)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    strip = strip_snapshots(result)
    orientation = result.layout.orientation if result.layout is not None else "vertical"
    makers = {
        "diameter": lambda: plot_diameter(result).figure,
        "extensional_viscosity": lambda: plot_extensional_viscosity(result).figure,
        "strain_rate": lambda: plot_strain_rate(result).figure,
        "frames": lambda: plot_frame_strip([s for s, _ in strip], orientation=orientation,
                                           frame_time_s=result.calibration.time_s,
                                           pixel_size_m=result.calibration.pixel_size_m,
                                           captions=[c for _, c in strip]),
    }
    paths = {}
    for name, make in makers.items():  # one figure in memory at a time
        figure = make()
        for fmt in formats:
            written = _save(figure, out_dir / f"{name}.{fmt}", fmt)
            if fmt == "png":
                paths[name] = written
        figure.clear()
    return paths


# --- a lot ------------------------------------------------------------------------------------

#: Colours of the valid replicates of a lot (Okabe–Ito, no yellow: too pale on white), each also
#: with its own marker so the curves are told apart in grey.
REPLICATE_COLOURS = (OKABE_ITO["blue"], OKABE_ITO["vermillion"], OKABE_ITO["bluish green"],
                     OKABE_ITO["reddish purple"], OKABE_ITO["orange"], OKABE_ITO["sky blue"],
                     OKABE_ITO["black"])
REPLICATE_MARKERS = ("o", "s", "^", "D", "v", "P", "X")


def plot_lot_curves(detail, *, ax=None):
    """The diameter curves of a lot's replicates, log D against t (one line each); returns the Axes.

    ``detail`` a :class:`thinning.records.LotDetail`. A valid replicate is a
    solid line in its own colour and marker; one that is not valid
    (``detail.summary.verdict.valid``) a grey dashed line without markers,
    labelled "not valid: <reason>" (``invalid_reasons``).
    """
    from .qc import replicate_label

    verdict = detail.summary.verdict
    valid = list(getattr(verdict, "valid", ()) or ())
    reasons = list(getattr(verdict, "invalid_reasons", ()) or ())
    with _style():
        ax = _new_axes(ax)
        drawn = 0
        for k, m in enumerate(detail.measurements):
            if m["id"] not in detail.curves:
                continue
            t, d = (np.asarray(v, dtype=float) for v in detail.curves[m["id"]])
            keep = np.isfinite(t) & np.isfinite(d) & (d > 0)
            if not keep.any():
                continue
            label = replicate_label(m)
            if k < len(valid) and not valid[k]:
                why = reasons[k] if k < len(reasons) and reasons[k] else "see the verdict"
                label = textwrap.shorten(f"{label} (not valid: {why})", width=70, placeholder=" …")
                ax.plot(t[keep] * 1e3, d[keep] * 1e6, ls="--", lw=1.3, color=BELOW_COLOUR,
                        label=label, gid="not-valid", zorder=2)
                continue
            colour = REPLICATE_COLOURS[drawn % len(REPLICATE_COLOURS)]
            marker = REPLICATE_MARKERS[drawn % len(REPLICATE_MARKERS)]
            ax.plot(t[keep] * 1e3, d[keep] * 1e6, "-", lw=1.4, color=colour, marker=marker, ms=3.5,
                    markevery=max(1, int(keep.sum()) // 8), label=label, zorder=3)
            drawn += 1
        ax.set_yscale("log")
        readable_log_axis(ax.yaxis)
        ax.set_xlabel("time on the recording's clock t (ms)")
        ax.set_ylabel("minimum neck diameter D (µm)")
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8, frameon=False)
    return ax


def plot_control_chart(detail, *, axes=None):
    """Individuals and moving-range charts of the product's lot mean λ, this lot marked.

    ``detail`` a :class:`thinning.records.LotDetail`; ``axes`` two Axes (the
    chart of lot means above, the moving ranges below), else a new figure's.
    Returns the two Axes. The X chart draws each lot's control limits (centre ±
    3σ from that lot's baseline: :func:`thinning.qc.control_chart`, after
    Montgomery, *Introduction to Statistical Quality Control*) dashed, and the
    product's specification limits of λ solid in another colour, both named in
    the legend; the lots left out of this lot's baseline are marked. Values in
    the unit of the lot's view (:mod:`thinning.display`).
    """
    from . import display

    if axes is None:
        fig = Figure(figsize=(7.0, 4.6), dpi=DPI, layout="constrained")
        axes = fig.subplots(2, 1, sharex=True, height_ratios=(3, 2))
    ax_x, ax_mr = axes
    points = [point for _, point in detail.chart]
    lots = [summary.lot for summary, _ in detail.chart]
    x = np.arange(len(points))
    nan = float("nan")
    unit = dict(detail.summary.verdict.units).get("relaxation_time_s") or \
        display.time_unit(*(p.value for p in points))

    def series(name):
        return np.array([nan if getattr(p, name) is None else unit.of(getattr(p, name)) for p in points])

    # colours from the Okabe–Ito palette (safe for the common colour-vision deficiencies; Okabe M.,
    # Ito K. (2002), Color Universal Design); the two kinds of limit differ in line style too
    # (specification solid, control dashed), so they part even in grey print
    colours = {"value": "#000000", "centre": "#999999", "control": "#D55E00", "spec": "#0072B2",
               "flag": "#CC79A7", "this": "#E69F00", "left_out": "#56B4E9"}
    value, centre, ucl, lcl = series("value"), series("centre"), series("ucl"), series("lcl")
    mr, mr_ucl = series("moving_range"), series("mr_ucl")
    flagged = np.array([bool(p.flags) for p in points], dtype=bool)
    this = np.array([lot == detail.summary.lot for lot in lots], dtype=bool)
    own = detail.summary.chart
    left_out = {key for key, _ in own.left_out} if own is not None else set()
    outside = np.array([lot in left_out for lot in lots], dtype=bool)
    ax_x.plot(x, value, "-o", color=colours["value"], ms=4, lw=1, label="lot mean λ")
    ax_x.step(x, centre, where="mid", color=colours["centre"], lw=1.2, ls=":", label="centre line")
    ax_x.step(x, ucl, where="mid", color=colours["control"], lw=1.3, ls="--", label="control limit (3σ)")
    ax_x.step(x, lcl, where="mid", color=colours["control"], lw=1.3, ls="--")
    spec = detail.spec.limits.get("relaxation_time_s") if detail.spec is not None else None
    drawn = False
    for limit in spec or ():
        if np.isfinite(limit):
            ax_x.axhline(unit.of(limit), color=colours["spec"], lw=1.8, ls="-",
                         label=None if drawn else "specification limit")
            drawn = True
    ax_x.plot(x[flagged], value[flagged], "s", color=colours["flag"], ms=7, label="chart flag")
    if outside.any():
        ax_x.plot(x[outside], value[outside], "x", color=colours["left_out"], ms=9, mew=2,
                  label="left out of this lot's baseline")
    ax_mr.plot(x[1:], mr[1:], "-o", color=colours["value"], ms=4, lw=1, label="moving range")
    ax_mr.step(x, mr_ucl, where="mid", color=colours["control"], lw=1.3, ls="--",
               label="control limit (D4 × mean MR)")
    for ax, y in ((ax_x, value), (ax_mr, mr)):
        ax.plot(x[this], y[this], "o", ms=13, mfc="none", mec=colours["this"], mew=2.2, label="this lot")
        ax.grid(True, alpha=0.3)
    ax_x.legend(fontsize=7, frameon=False, loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=4)
    ax_mr.legend(fontsize=7, frameon=False, loc="best", ncol=3)
    ax_x.set_ylabel(f"lot mean λ ({unit.label})")
    ax_mr.set_ylabel(f"moving range ({unit.label})")
    ax_mr.set_xticks(x, lots, rotation=45 if len(lots) > 6 else 0, ha="right" if len(lots) > 6 else "center",
                     fontsize=7)
    ax_mr.set_xlabel("lot, in production order")
    return ax_x, ax_mr
