"""Figures for one analysed recording (matplotlib, Agg, no pyplot state).

Every ``plot_*`` function takes the :class:`~thinning.result.Result` of a
recording, draws on the ``ax`` it is given (or on a fresh
:class:`~matplotlib.figure.Figure`) and returns it; nothing is shown. The
fitted laws are drawn over their windows from the result's typed fits
(:meth:`thinning.fits.Fit.curve`). :func:`write_figures` writes the four PNGs
atomically and byte-identically for the same input.
"""

from __future__ import annotations

import contextlib
import logging
from pathlib import Path

import matplotlib
import numpy as np
from matplotlib.figure import Figure

from thinning import atomic, laws
from .values import finite_number as _number

logger = logging.getLogger(__name__)

#: Fixed resolution of every PNG (dots per inch).
DPI = 110
#: PNG metadata that keeps the bytes identical from run to run.
PNG_METADATA = {"Software": None}

#: Our palette: (shading of the stretch, colour of its fit line) per regime kind.
REGIME_COLOURS = {
    "inertio-capillary": ("#f6d8a8", "#b4690e"),
    "visco-capillary": ("#c9e3f2", "#1f6f9c"),
    "elasto-capillary": ("#d3ecc1", "#3d7a1c"),
    "finite-extensibility": ("#f1cfd6", "#a23b54"),
    "undetermined": ("#e4e4e4", "#555555"),
}
DATA_COLOUR = "#22303c"
MARK_COLOUR = "#7a2e8e"
MODEL_COLOUR = "#c2571a"
FLOOR_COLOUR = "#8a8a8a"

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
    """Shade each located stretch in its own colour; return legend handles."""
    seen = set()
    for regime in result.characterisation.regimes:
        kind = regime.kind
        shade, _ = REGIME_COLOURS.get(kind, REGIME_COLOURS["undetermined"])
        ax.axvspan(regime.t_start_s * t_factor, regime.t_end_s * t_factor, color=shade, alpha=0.85,
                   lw=0, label=None if kind in seen else kind, zorder=0)
        seen.add(kind)


def _mark_breakup(ax, result, t_factor):
    tb = _number(result.characterisation.breakup_time_s)
    if tb is not None:
        ax.axvline(tb * t_factor, color=MARK_COLOUR, ls="--", lw=1.0, label="breakup")


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


def plot_diameter(result, *, ax=None):
    """Minimum neck diameter against time on a log axis.

    Each located regime is shaded in its own colour, the fits drawn over
    their windows (:func:`fit_curves`), the whole-curve model dashed
    (:func:`model_curve`), breakup marked by a dashed line, and
    the resolution floor (else one pixel) drawn as a dotted line. Returns the
    Axes.
    """
    with _style():
        ax = _new_axes(ax)
        table = result.table
        t_factor, t_unit = _time_scale(table, result)
        t = _column(table, "time_s")
        d = _column(table, "diameter_m")
        curves = fit_curves(result)
        d_factor, d_unit = _diameter_scale(d)
        _shade_regimes(ax, result, t_factor)
        ok = np.isfinite(t) & np.isfinite(d) & (d > 0)
        if ok.any():
            ax.plot(t[ok] * t_factor, d[ok] * d_factor, "o", ms=2.6, mfc=DATA_COLOUR, mec="none",
                    alpha=0.85, label="measured", zorder=3)
        else:
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
        floor = _number(result.characterisation.resolution_floor_m)
        floor_label = "resolution floor"
        if floor is None:
            floor, floor_label = _number(result.calibration.pixel_size_m), "one pixel"
        if floor is not None and (ok.any() or curves):
            ax.axhline(floor * d_factor, color=FLOOR_COLOUR, ls=":", lw=1.1, label=floor_label)
        _mark_breakup(ax, result, t_factor)
        ax.set_yscale("log")
        if not ok.any():
            ax.set_ylim(1e-1, 1e4)
        ax.set_xlabel(f"time t ({t_unit})")
        ax.set_ylabel(f"minimum neck diameter D ({d_unit})")
        ax.set_title("Neck diameter")
        _legend(ax)
    return ax


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
        ax.set_xlabel(f"time t ({t_unit})")
        ax.set_ylabel(r"strain rate $\dot\varepsilon$ (1/s)")
        ax.set_title("Strain rate")
        _legend(ax)
    return ax


def _legend(ax):
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)


def plot_frame_strip(snapshots, *, orientation="vertical", fps_hz=None, frame_time_s=None, fig=None):
    """A row of frames with the detected edges drawn over them.

    ``snapshots`` is a list of ``(frame_index, image, profile)``; ``image`` a
    2-D array (any dtype), ``profile`` anything with ``axial_px``, ``left_px``
    and ``right_px`` arrays (or None; edges are drawn only where its
    ``connected`` is true or absent). ``orientation`` says how the filament
    runs: ``"vertical"`` (axial = image row, edges = columns) or
    ``"horizontal"`` (axial = column, edges = rows). With ``frame_time_s``
    (frame index → s, e.g. :meth:`thinning.units.Calibration.time_s`) or
    ``fps_hz`` each panel gives its time. Returns the Figure.
    """
    if orientation not in ("vertical", "horizontal"):
        raise ValueError(f"orientation must be 'vertical' or 'horizontal', not {orientation!r}")
    with _style():
        n = max(len(snapshots), 1)
        if fig is None:
            fig = Figure(figsize=_strip_size(snapshots), dpi=DPI, layout="constrained")
        axes = fig.subplots(1, n, squeeze=False)[0]
        if not snapshots:
            axes[0].set_axis_off()
            _no_data(axes[0], "no frames")
        for ax, (index, image, profile) in zip(axes, snapshots):
            img = np.asarray(image, dtype=float)
            finite = img[np.isfinite(img)]
            lo, hi = (float(finite.min()), float(finite.max())) if finite.size else (0.0, 1.0)
            ax.imshow(img, cmap="gray", vmin=lo, vmax=hi if hi > lo else lo + 1.0, aspect="equal")
            if profile is not None and not getattr(profile, "connected", True):
                # no connected thread (before it formed, a gap, or after breakup): no edges
                ax.text(0.5, 0.02, "no thread", transform=ax.transAxes, ha="center", va="bottom",
                        fontsize=7, color="#ff8c1a")
            elif profile is not None:
                axial = np.asarray(profile.axial_px, dtype=float)
                # rows the measurement trusted (where the profile says so), inside the image
                keep = np.asarray(getattr(profile, "valid", np.ones(axial.shape, bool)), dtype=bool)
                for edge in (profile.left_px, profile.right_px):
                    edge = np.where(keep, np.asarray(edge, dtype=float), np.nan)
                    x, y = (edge, axial) if orientation == "vertical" else (axial, edge)
                    ax.plot(x, y, "-", color="#ff8c1a", lw=0.9)
            ax.set_xlim(-0.5, img.shape[1] - 0.5)
            ax.set_ylim(img.shape[0] - 0.5, -0.5)
            title = f"frame {index}"
            if frame_time_s is not None:
                title += f"\n{_format_time(float(frame_time_s(index)))}"
            elif _number(fps_hz):
                title += f"\n{_format_time(index / float(fps_hz))}"
            ax.set_title(title, fontsize=8)
            ax.set_xticks([])
            ax.set_yticks([])
            ax.grid(False)
    return fig


def _strip_size(snapshots, *, panel_width_in=1.6, max_height_in=4.5):
    """Figure size (in) for a strip of ``len(snapshots)`` panels that keeps the images' aspect."""
    n = max(len(snapshots), 1)
    shapes = [np.shape(image) for _, image, _ in snapshots if np.ndim(image) == 2]
    aspect = max((h / w for h, w in shapes if w), default=1.0)
    height = min(panel_width_in * aspect + 0.6, max_height_in)
    return (min(panel_width_in * n + 0.3, 11.0), max(height, 1.8))


def _format_time(t_s):
    return f"{t_s * 1e3:.3g} ms" if abs(t_s) < 1.0 else f"{t_s:.3g} s"


def _save_png(fig, path):
    """Write ``fig`` to ``path`` atomically (temporary file in the same folder, then replace)."""
    path = Path(path)
    with atomic.replacing(path) as fh, _style():
        fig.savefig(fh, format="png", dpi=DPI, metadata=PNG_METADATA)
    return path


#: The figures of one recording, each written as ``NAME.png``.
FIGURE_NAMES = ("diameter", "extensional_viscosity", "strain_rate", "frames")


def write_figures(out_dir, result):
    """Write ``diameter.png``, ``extensional_viscosity.png``, ``strain_rate.png`` and ``frames.png``.

    ``result`` a fresh :class:`~thinning.result.Result` (with its table and
    neck series). Returns ``{"diameter": Path, "extensional_viscosity": Path,
    "strain_rate": Path, "frames": Path}``. The same input gives
    byte-identical files.
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    snapshots = result.neck.snapshots if result.neck is not None else []
    orientation = result.layout.orientation if result.layout is not None else "vertical"
    makers = {
        "diameter": lambda: plot_diameter(result).figure,
        "extensional_viscosity": lambda: plot_extensional_viscosity(result).figure,
        "strain_rate": lambda: plot_strain_rate(result).figure,
        "frames": lambda: plot_frame_strip(snapshots, orientation=orientation,
                                           frame_time_s=result.calibration.time_s),
    }
    paths = {}
    for name, make in makers.items():  # one figure in memory at a time
        figure = make()
        paths[name] = _save_png(figure, out_dir / f"{name}.png")
        figure.clear()
    return paths


# --- a lot ------------------------------------------------------------------------------------

def plot_lot_curves(detail, *, ax=None):
    """The diameter curves of a lot's replicates, log D against t (one line each); returns the Axes.

    ``detail`` a :class:`thinning.records.LotDetail`.
    """
    from .qc import replicate_label

    ax = _new_axes(ax)
    for m in detail.measurements:
        if m["id"] not in detail.curves:
            continue
        t, d = detail.curves[m["id"]]
        keep = np.isfinite(t) & np.isfinite(d) & (d > 0)
        if keep.any():
            ax.semilogy(t[keep] * 1e3, d[keep] * 1e6, lw=1.4, label=replicate_label(m))
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
