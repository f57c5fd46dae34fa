"""Figures of one recording: written, not blank, deterministic, honest about missing data."""

from __future__ import annotations

from dataclasses import replace
from types import SimpleNamespace

import matplotlib.image
import numpy as np
import pandas as pd
import pytest
from matplotlib.figure import Figure

from thinning import laws, plots
from thinning.fits import Fit
from thinning.result import Result

SIGMA = 0.05  # N/m
D0 = 5e-4  # m
FPS = 2000.0


def _table(d, t, *, extra=True):
    cols = {"frame": np.arange(t.size), "time_s": t, "diameter_m": d}
    if extra:
        with np.errstate(all="ignore"):
            rate = -2.0 * np.gradient(d, t) / d
            cols["strain_rate_1_s"] = rate
            cols["hencky_strain"] = 2.0 * np.log(D0 / d)
            cols["apparent_extensional_viscosity_Pa_s"] = SIGMA / (-np.gradient(d, t))
    return pd.DataFrame(cols)


@pytest.fixture
def elastic():
    """An elasto-capillary record from the closed-form law, with 1 % noise and breakup."""
    rng = np.random.default_rng(11)
    lam, g = 0.005, 40.0
    t = np.arange(0.0, 0.1, 1.0 / FPS)
    d = laws.elasto_capillary_diameter(t, initial_diameter=D0, elastic_modulus=g,
                                       surface_tension=SIGMA, relaxation_time=lam)
    d = d * (1.0 + 0.01 * rng.standard_normal(t.size))
    d[t > 0.08] = np.nan
    result = {
        "regime": "elasto-capillary",
        "regimes": [{"kind": "inertio-capillary", "t_start_s": 0.0, "t_end_s": 0.004},
                    {"kind": "elasto-capillary", "t_start_s": 0.005, "t_end_s": 0.06},
                    {"kind": "finite-extensibility", "t_start_s": 0.062, "t_end_s": 0.08}],
        "relaxation_time_s": lam, "relaxation_time_ci95_s": [0.0049, 0.0051],
        "fit_window_s": [0.005, 0.06], "elastic_modulus_Pa": g, "initial_diameter_m": D0,
        "free_thinning_start_s": 0.0, "breakup_time_s": 0.08025,
        "extensional_viscosity_max_Pa_s": 30.0, "extensional_viscosity_terminal_Pa_s": 25.0,
        "options": {"surface_tension_N_m": SIGMA}, "pixel_size_m": 4e-6, "fps_hz": FPS,
    }
    return _table(d, t), result


def _elastic_result(elastic, snapshots=None, **changes):
    table, fields = elastic
    return _result({**fields, **changes}, table, fits={"elasto-capillary": _ec_fit()},
                   snapshots=snapshots)


def _result(fields, table, *, fits=None, snapshots=None):
    """A :class:`Result` from result.json-style ``fields``, the per-frame ``table``, typed fits
    and the frames of the picture strip."""
    result = Result.from_json(fields, table=table)
    if fits is not None:
        result = replace(result, characterisation=replace(result.characterisation, fits=fits))
    if snapshots is not None:
        result = replace(result, neck=SimpleNamespace(snapshots=snapshots))
    return result


def _ec_fit(lam=0.005, g=40.0, window=(0.005, 0.06)):
    law = {"initial_diameter": D0, "elastic_modulus": g, "surface_tension": SIGMA,
           "relaxation_time": lam, "t0": 0.0}
    return Fit(model="elasto-capillary", values={"relaxation_time_s": lam, "elastic_modulus_Pa": g},
               window_s=window, n_points=100, success=True, law=law)


def _snapshots(rng, *, dtype=np.uint8, n=3):
    top = np.iinfo(dtype).max
    snaps = []
    for k in range(n):
        img = (0.8 * top + 0.02 * top * rng.standard_normal((90, 60))).clip(0, top).astype(dtype)
        left, right = 20.0 + k, 40.0 - k
        img[:, int(left):int(right)] = top // 10
        prof = SimpleNamespace(axial_px=np.arange(90.0), left_px=np.full(90, left),
                               right_px=np.full(90, right))
        snaps.append((10 * k, img, prof))
    return snaps


def _labels(ax):
    return [h.get_label() for h in ax.get_legend_handles_labels()[0]]


def test_figures_are_written_and_not_blank(tmp_path, elastic):
    rng = np.random.default_rng(1)
    paths = plots.write_figures(tmp_path, _elastic_result(elastic, _snapshots(rng)))
    assert set(paths) == {"diameter", "extensional_viscosity", "strain_rate", "frames"}
    for name, path in paths.items():
        assert path == tmp_path / f"{name}.png"
        assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        pixels = matplotlib.image.imread(path)[..., :3]
        assert pixels.std() > 0.05, name  # a blank page has zero spread
    # nothing but the four PNGs: the temporary files of the atomic writes are gone
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(f"{n}.png" for n in paths)


def test_same_input_gives_byte_identical_pngs(tmp_path, elastic):
    first = plots.write_figures(tmp_path / "a",
                                _elastic_result(elastic, _snapshots(np.random.default_rng(2))))
    second = plots.write_figures(tmp_path / "b",
                                 _elastic_result(elastic, _snapshots(np.random.default_rng(2))))
    for name in first:
        assert first[name].read_bytes() == second[name].read_bytes(), name


def test_png_carries_no_software_or_date_text(tmp_path, elastic):
    data = plots.write_figures(tmp_path, _elastic_result(elastic, []))["diameter"].read_bytes()
    assert b"Software" not in data and b"matplotlib" not in data.lower()


@pytest.mark.parametrize("keep_first", [True, False])
def test_all_nan_table_still_gives_figures(tmp_path, keep_first):
    """No filament after frame 0 (or at all), no regime, no numbers."""
    t = np.arange(50) / FPS
    d = np.full(t.size, np.nan)
    if keep_first:
        d[0] = D0
    table = _table(d, t)
    result = {"regime": "undetermined", "regimes": [], "relaxation_time_s": None,
              "fit_window_s": None, "breakup_time_s": 0.00025, "options": {}, "pixel_size_m": None,
              "extensional_viscosity_max_Pa_s": None, "fps_hz": FPS}
    rng = np.random.default_rng(3)
    snaps = _snapshots(rng, n=1)
    snaps.append((1, snaps[0][1], None))  # a frame where no edge was found
    paths = plots.write_figures(tmp_path, _result(result, table, snapshots=snaps))
    for path in paths.values():
        assert matplotlib.image.imread(path)[..., :3].std() > 0.01


def test_missing_columns_are_tolerated(elastic):
    table, fields = elastic
    bare = _result(fields, table[["frame", "time_s", "diameter_m"]])
    ax = plots.plot_strain_rate(bare)
    assert not any(line.get_label() == "measured" for line in ax.lines)
    ax = plots.plot_extensional_viscosity(bare)
    assert ax.get_yscale() == "log"


def test_newtonian_result_draws_the_visco_capillary_fit_and_no_plateau():
    t = np.arange(0.0, 0.02, 1.0 / FPS)
    eta, t_b = 0.5, 0.0199
    d = laws.visco_capillary_diameter(t, t_b=t_b, surface_tension=SIGMA, viscosity=eta)
    d[d <= 0] = np.nan
    result = {"regime": "visco-capillary", "relaxation_time_s": None,
              "relaxation_time_ci95_s": None, "elastic_modulus_Pa": None,
              "regimes": [{"kind": "visco-capillary", "t_start_s": 0.002, "t_end_s": 0.018}],
              "fit_window_s": [0.002, 0.018], "breakup_time_s": t_b, "shear_viscosity_Pa_s": eta,
              "options": {"surface_tension_N_m": SIGMA}, "pixel_size_m": 4e-6}
    fit = Fit(model="visco-capillary", values={"shear_viscosity_Pa_s": eta, "breakup_time_s": t_b},
              window_s=(0.002, 0.018), n_points=40, success=True,
              law={"t_b": t_b, "surface_tension": SIGMA, "viscosity": eta})
    result = _result(result, _table(d, t), fits={"visco-capillary": fit})
    ax = plots.plot_diameter(result)
    fit = [line for line in ax.lines if line.get_label() == "visco-capillary fit"]
    assert len(fit) == 1
    ft_ms, fd_um = fit[0].get_data()
    # the drawn curve is the law itself, in ms and µm
    expected = laws.visco_capillary_diameter(np.asarray(ft_ms) / 1e3, t_b=t_b, surface_tension=SIGMA,
                                             viscosity=eta)
    np.testing.assert_allclose(np.asarray(fd_um) / 1e6, expected, rtol=1e-12)
    assert ax.get_xlabel() == "time t (ms)"
    assert ax.get_ylabel() == "minimum neck diameter D (µm)"
    rate_ax = plots.plot_strain_rate(result)
    assert r"$2/(3\lambda)$" not in _labels(rate_ax)


def test_headline_curve_comes_from_the_elasto_capillary_law(elastic):
    result = _elastic_result(elastic)
    t, d = plots.fit_curves(result)["elasto-capillary"]
    assert t[0] == 0.005 and t[-1] == 0.06
    expected = laws.elasto_capillary_diameter(t, initial_diameter=D0, elastic_modulus=40.0,
                                              surface_tension=SIGMA, relaxation_time=0.005)
    np.testing.assert_allclose(d, expected, rtol=1e-12)
    # the slope of ln D is −1/(3λ) (Anna & McKinley 2001, via docs/physics.md)
    slope = np.polyfit(t, np.log(d), 1)[0]
    assert slope == pytest.approx(-1.0 / (3.0 * 0.005), rel=1e-9)


def test_a_fit_read_back_from_a_file_is_not_drawn(elastic):
    # result.json keeps a fit's values, not its law's arguments: nothing is guessed
    table, fields = elastic
    fields = dict(fields, fits={"elasto-capillary": _ec_fit().to_dict()})
    assert plots.fit_curves(_result(fields, table)) == {}


def test_diameter_plot_shades_regimes_marks_breakup_and_floor(elastic):
    fields = elastic[1]
    result = _elastic_result(elastic)
    fig = Figure()
    ax = fig.add_subplot()
    assert plots.plot_diameter(result, ax=ax) is ax
    assert ax.get_yscale() == "log"
    labels = _labels(ax)
    for kind in ("inertio-capillary", "elasto-capillary", "finite-extensibility"):
        assert kind in labels
    spans = [p for p in ax.patches]
    assert len({tuple(p.get_facecolor()) for p in spans}) == 3  # each regime its own colour
    breakup = next(li for li in ax.lines if li.get_label() == "breakup")
    assert breakup.get_xdata()[0] == pytest.approx(fields["breakup_time_s"] * 1e3)
    floor = next(li for li in ax.lines if li.get_label() == "one pixel")
    assert floor.get_ydata()[0] == pytest.approx(4.0)  # 4 µm pixel
    ax = plots.plot_diameter(_elastic_result(elastic, resolution_floor_m=1e-5))
    floor = next(li for li in ax.lines if li.get_label() == "resolution floor")
    assert floor.get_ydata()[0] == pytest.approx(10.0)


def test_strain_rate_plateau_is_two_thirds_over_lambda(elastic):
    ax = plots.plot_strain_rate(_elastic_result(elastic))
    plateau = next(c for c in ax.collections if c.get_label() == r"$2/(3\lambda)$")
    segment = plateau.get_segments()[0]
    # ε̇ = 2/(3λ) in the elasto-capillary regime (Anna & McKinley 2001, via docs/physics.md)
    assert segment[0][1] == pytest.approx(2.0 / (3.0 * 0.005))
    assert segment[0][0] == pytest.approx(5.0) and segment[1][0] == pytest.approx(60.0)  # ms
    assert ax.get_ylabel() == r"strain rate $\dot\varepsilon$ (1/s)"


def test_extensional_viscosity_axes(elastic):
    ax = plots.plot_extensional_viscosity(_elastic_result(elastic))
    assert ax.get_yscale() == "log"
    assert ax.get_xlabel() == r"Hencky strain $\varepsilon$"
    eta_max = next(li for li in ax.lines if li.get_label() == "η_E max")
    assert eta_max.get_ydata()[0] == 30.0


@pytest.mark.parametrize("orientation", ["vertical", "horizontal"])
def test_frame_strip_draws_edges_in_the_right_orientation(orientation):
    rng = np.random.default_rng(5)
    snaps = _snapshots(rng, dtype=np.uint16, n=2)
    fig = plots.plot_frame_strip(snaps, orientation=orientation, fps_hz=FPS)
    axes = fig.get_axes()
    assert len(axes) == 2
    assert axes[1].get_title() == "frame 10\n5 ms"
    left = axes[0].lines[0]
    axial, edge = np.arange(90.0), np.full(90, 20.0)
    x, y = (edge, axial) if orientation == "vertical" else (axial, edge)
    np.testing.assert_array_equal(left.get_xdata(), x)
    np.testing.assert_array_equal(left.get_ydata(), y)


def test_frame_strip_draws_no_edges_without_a_connected_thread():
    # a frame after breakup (or before the bridge formed) has no thread to outline
    rng = np.random.default_rng(6)
    snaps = _snapshots(rng, n=2)
    index, image, profile = snaps[1]
    snaps[1] = (index, image, SimpleNamespace(**vars(profile), connected=False))
    fig = plots.plot_frame_strip(snaps, fps_hz=FPS)
    first, second = fig.get_axes()
    assert len(first.lines) == 2
    assert not second.lines
    assert [t.get_text() for t in second.texts] == ["no thread"]


def test_frame_strip_rejects_an_unknown_orientation():
    with pytest.raises(ValueError, match="orientation"):
        plots.plot_frame_strip([], orientation="diagonal")


def test_empty_frame_strip_says_so():
    fig = plots.plot_frame_strip([])
    texts = [t.get_text() for ax in fig.get_axes() for t in ax.texts]
    assert texts == ["no frames"]


def test_every_successful_fit_with_a_law_is_drawn_and_failures_skipped(elastic):
    table, fields = elastic
    rho, x_ic, t_c = 1000.0, 0.7, 0.09
    law = {"t_c": t_c, "surface_tension": SIGMA, "density": rho, "prefactor": x_ic}
    ic = Fit(model="inertio-capillary", values={"prefactor_X_IC": x_ic, "singular_time_s": t_c},
             window_s=(0.0, 0.004), n_points=9, success=True, law=law)
    failed = Fit(model="visco-capillary", window_s=(0.0, 0.004), success=False,
                 message="too few frames")
    no_density = Fit(model="inertio-capillary", values={"singular_time_s": t_c},
                     window_s=(0.0, 0.004), n_points=9, success=True)
    result = _result(fields, table, fits={"inertio-capillary": ic, "visco-capillary": failed})
    curves = plots.fit_curves(result)
    assert set(curves) == {"inertio-capillary"}
    t, d = curves["inertio-capillary"]
    np.testing.assert_allclose(d, laws.inertio_capillary_diameter(
        t, t_c=t_c, surface_tension=SIGMA, density=rho, prefactor=x_ic), rtol=1e-12)
    assert plots.fit_curves(_result(fields, table, fits={"inertio-capillary": no_density})) == {}


# --- the frame strip: which frames, a scale bar ----------------------------------------------------

def _candidates(n=20, step=10):
    """Frames 0, 10, … 190 as kept while measuring (each with a thread and its edges)."""
    rng = np.random.default_rng(8)
    return [(step * k, image, profile) for k, (_, image, profile) in
            enumerate(_snapshots(rng, n=1) * n)]


def _strip_result(elastic, snapshots, *, breakup_frame=160.5, **changes):
    fields = {"free_thinning_start_s": 0.004,
              "breakup_time_s": None if breakup_frame is None else breakup_frame / FPS, **changes}
    result = _elastic_result(elastic, **fields)
    return replace(result, neck=SimpleNamespace(snapshots=snapshots, breakup_frame=breakup_frame))


def test_the_strip_shows_free_thinning_the_fit_window_and_the_last_frame_with_a_thread(elastic):
    chosen = plots.strip_snapshots(_strip_result(elastic, _candidates()))
    frames = [snap[0] for snap, _ in chosen]
    captions = dict((snap[0], caption) for snap, caption in chosen)
    assert len(frames) == plots.STRIP_FRAMES and frames == sorted(frames)
    # never a frame from the breakup (frame 160.5) on, nor one before free thinning (frame 8)
    assert all(8 <= f < 160.5 for f in frames)
    assert frames[0] == 10 and captions[10] == "free thinning"
    assert frames[-1] == 160 and captions[160] == "last with a thread"
    # the fit window (frames 10–120) shows its middle and its end
    assert {60, 120} <= set(frames)
    assert sum(caption == "fit window" for caption in captions.values()) >= 2


def test_the_strip_of_a_record_that_did_not_break_ends_with_its_last_frame(elastic):
    result = _strip_result(elastic, _candidates(), breakup_frame=None, breakup_time_s=None)
    frames = [snap[0] for snap, _ in plots.strip_snapshots(result)]
    assert frames[-1] == 190 and len(frames) == plots.STRIP_FRAMES


def _capture_strip(monkeypatch):
    """Record what each frame strip drawn by write_figures holds (before it is cleared)."""
    seen = []
    draw = plots.plot_frame_strip

    def spy(*args, **kwargs):
        fig = draw(*args, **kwargs)
        seen.append([{"title": ax.get_title(), "caption": ax.get_xlabel(),
                      "gids": [a.get_gid() for a in ax.lines + ax.texts if a.get_gid()],
                      "texts": {t.get_gid(): t.get_text() for t in ax.texts}}
                     for ax in fig.get_axes()])
        return fig
    monkeypatch.setattr(plots, "plot_frame_strip", spy)
    return seen


def test_written_strip_has_no_frame_after_breakup_and_a_scale_bar(tmp_path, elastic, monkeypatch):
    seen = _capture_strip(monkeypatch)
    plots.write_figures(tmp_path, _strip_result(elastic, _candidates()))
    (panels,) = seen
    frames = [int(p["title"].split("\n")[0].removeprefix("frame ")) for p in panels]
    assert frames and max(frames) < 160.5
    assert [p["title"].split("\n")[1] for p in panels][:2] == ["5 ms", "10 ms"]  # one time unit
    first = panels[0]
    assert "scale-bar" in first["gids"] and "scale-bar-label" in first["gids"]
    # 60 px of 4 µm: a 240 µm field; the bar is the round length within 30 % of it
    assert first["texts"]["scale-bar-label"] == "50 µm"
    assert all("scale-bar" not in p["gids"] for p in panels[1:])


def test_scale_bar_is_a_round_length_that_fits_the_frame():
    fig = plots.plot_frame_strip(_snapshots(np.random.default_rng(9), n=2), fps_hz=FPS,
                                 pixel_size_m=25e-6)
    ax = fig.get_axes()[0]
    bar = next(line for line in ax.lines if line.get_gid() == "scale-bar")
    label = next(t for t in ax.texts if t.get_gid() == "scale-bar-label")
    x = bar.get_xdata()
    # 60 px of 25 µm = 1500 µm wide: a 200 µm bar (within 30 %), 8 px long
    assert label.get_text() == "200 µm" and x[1] - x[0] == pytest.approx(8.0)
    assert [plots.scale_bar_length_um(w) for w in (100.0, 1000.0, 3000.0, 12.0)] == [20.0, 200.0, 500.0, 2.0]
    assert not any(line.get_gid() == "scale-bar" for line in
                   plots.plot_frame_strip(_snapshots(np.random.default_rng(9), n=1)).get_axes()[0].lines)


def test_edges_are_drawn_only_on_the_rows_that_were_measured():
    rng = np.random.default_rng(10)
    index, image, profile = _snapshots(rng, n=1)[0]
    valid = np.zeros(90, bool)
    valid[20:70] = True
    left = profile.left_px.copy()
    left[30] = np.nan
    snap = (index, image, SimpleNamespace(axial_px=profile.axial_px, left_px=left,
                                          right_px=profile.right_px, valid=valid, connected=True))
    lines = [line for line in plots.plot_frame_strip([snap]).get_axes()[0].lines]
    assert len(lines) == 2
    for line in lines:
        x = np.asarray(line.get_xdata(), dtype=float)
        assert np.isnan(x[:20]).all() and np.isnan(x[70:]).all()
    assert np.isnan(np.asarray(lines[0].get_xdata(), dtype=float)[30])


# --- the diameter plot: kinds of point, λ written on it ---------------------------------------------

def test_diameter_plot_tells_the_fit_window_outside_and_below_the_floor_apart(elastic):
    ax = plots.plot_diameter(_elastic_result(elastic, resolution_floor_m=1e-5))
    labels = _labels(ax)
    kinds = {label: next(li for li in ax.lines if li.get_label() == label) for label in
             ("measured, in the fit window", "measured, outside the fit window",
              "measured, below the resolution floor")}
    assert set(kinds) <= set(labels)
    inside, outside, below = kinds.values()
    t_in = np.asarray(inside.get_xdata())
    assert t_in.min() >= 5.0 and t_in.max() <= 60.0  # ms: the window
    assert np.all(np.asarray(below.get_ydata()) < 10.0)  # µm: below the 10 µm floor
    # filled, open and grey triangles: told apart by shape and fill, not by colour alone
    assert inside.get_markerfacecolor() != outside.get_markerfacecolor()
    assert below.get_marker() != inside.get_marker()
    text = next(t for t in ax.texts if t.get_gid() == "relaxation-time")
    assert text.get_text() == "λ = 5.00 ms (95 % interval 4.90–5.10 ms)"


def test_no_relaxation_time_writes_no_lambda(elastic):
    ax = plots.plot_diameter(_elastic_result(elastic, relaxation_time_s=None,
                                             relaxation_time_ci95_s=None))
    assert not [t for t in ax.texts if t.get_gid() == "relaxation-time"]


# --- log ticks -----------------------------------------------------------------------------------

def _tick_labels(ax):
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    FigureCanvasAgg(ax.figure).draw()
    axis = ax.yaxis
    return [t.get_text() for t in axis.get_ticklabels(minor=False) + axis.get_ticklabels(minor=True)]


def _assert_plain(labels):
    for text in labels:
        assert "×" not in text and "times" not in text and "^" not in text and "e" not in text, text
        if text:
            float(text)


def test_narrow_log_ranges_are_labelled_with_plain_numbers(elastic):
    table, fields = elastic
    t = table["time_s"].to_numpy()
    table = table.assign(strain_rate_1_s=np.linspace(150.0, 800.0, t.size),
                         apparent_extensional_viscosity_Pa_s=np.linspace(0.6, 2.5, t.size))
    result = _result({**fields, "extensional_viscosity_max_Pa_s": None,
                      "extensional_viscosity_terminal_Pa_s": None, "relaxation_time_s": None}, table)
    rate = _tick_labels(plots.plot_strain_rate(result))
    _assert_plain(rate)
    assert {"200", "300", "500"} <= set(rate)
    eta = _tick_labels(plots.plot_extensional_viscosity(result))
    _assert_plain(eta)
    assert {"1", "2"} <= set(eta)


@pytest.mark.parametrize("low, high, expected", [
    (0.4, 3.0, [0.5, 1, 2]),
    (150.0, 1100.0, [200, 500, 1000]),
    (110.0, 130.0, [110, 115, 120, 125, 130]),
    (1e-3, 1e3, [0.001, 0.01, 0.1, 1, 10, 100, 1000]),
])
def test_readable_log_ticks(low, high, expected):
    ticks = plots.ReadableLogLocator().tick_values(low, high)
    inside = [float(v) for v in ticks if low * (1 - 1e-9) <= v <= high * (1 + 1e-9)]
    assert inside == pytest.approx(expected)
    assert [plots.PLAIN_NUMBERS(v) for v in inside] == [plots.display.plain(v) for v in expected]


# --- a lot ---------------------------------------------------------------------------------------

def test_an_invalid_replicate_is_drawn_grey_dashed_and_says_why():
    t = np.arange(0.0, 0.05, 1e-4)
    measurements = [{"id": k, "sample": "S", "replicate": k} for k in (1, 2, 3)]
    curves = {k: (t, 1e-3 * np.exp(-t / (0.015 + 0.001 * k))) for k in (1, 2, 3)}
    verdict = SimpleNamespace(valid=(True, False, True),
                              invalid_reasons=(None, "its quality is doubtful", None))
    detail = SimpleNamespace(measurements=measurements, curves=curves,
                             summary=SimpleNamespace(verdict=verdict))
    ax = plots.plot_lot_curves(detail)
    lines = {line.get_label(): line for line in ax.lines}
    assert set(lines) == {"S #1", "S #2 (not valid: its quality is doubtful)", "S #3"}
    bad = lines["S #2 (not valid: its quality is doubtful)"]
    good = [lines["S #1"], lines["S #3"]]
    assert bad.get_linestyle() == "--" and bad.get_gid() == "not-valid"
    assert bad.get_color() == plots.BELOW_COLOUR and bad.get_marker() in ("None", None, "")
    assert all(g.get_linestyle() == "-" and g.get_marker() not in ("None", None, "") for g in good)
    assert good[0].get_color() != good[1].get_color() and good[0].get_marker() != good[1].get_marker()
    _assert_plain(_tick_labels(ax))


# --- SVG ------------------------------------------------------------------------------------------

def test_svg_on_request_is_byte_identical_for_the_same_input(tmp_path, elastic):
    written = {}
    for name in ("a", "b"):
        plots.write_figures(tmp_path / name, _strip_result(elastic, _candidates()),
                            formats=("png", "svg"))
        written[name] = {p.name: p.read_bytes() for p in (tmp_path / name).iterdir()}
    assert sorted(written["a"]) == sorted(f"{n}.{ext}" for n in plots.FIGURE_NAMES for ext in ("png", "svg"))
    assert written["a"] == written["b"]
    svg = written["a"]["diameter.svg"].decode()
    assert svg.lstrip().startswith("<?xml") and "<dc:date>" not in svg and "Matplotlib v" not in svg


def test_an_unknown_figure_format_is_refused():
    from thinning.analysis import figure_formats

    assert figure_formats("svg") == ("png", "svg") and figure_formats(" PNG ,svg") == ("png", "svg")
    with pytest.raises(ValueError, match="jpg"):
        figure_formats("png,jpg")


# --- the command line and the recording's page -------------------------------------------------------

@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    """A small rendered recording analysed twice with --figures png,svg, once with the default;
    the frame strips drawn on the way."""
    from click.testing import CliRunner

    from thinning import synth
    from thinning.cli import cli

    folder = tmp_path_factory.mktemp("figures")
    source = folder / "bridge.avi"
    synth.write_recording(synth.dilute_polymer_plates(frame_size_px=(160, 144), pixel_size_m=25e-6,
                                                      fps_hz=2500.0, initial_diameter_m=0.9e-3),
                          synth.Optics(), source, fmt="avi-raw", seed=7)
    runs = {}
    with pytest.MonkeyPatch.context() as patch:
        seen = _capture_strip(patch)
        for name, figures in (("a", ["--figures", "png,svg"]), ("b", ["--figures", "png,svg"]),
                              ("default", [])):
            out = folder / name
            result = CliRunner().invoke(cli, ["analyse", str(source), "--out", str(out), "--fps", "2.5kHz",
                                              "--pixel-size", "25um", "--surface-tension", "62mN/m",
                                              *figures], catch_exceptions=False)
            assert result.exit_code == 0, result.output
            runs[name] = out
    return source, runs, seen


def test_figures_png_svg_writes_both_and_the_svgs_repeat_byte_for_byte(analysed):
    _, runs, _ = analysed
    for name in plots.FIGURE_NAMES:
        for ext in ("png", "svg"):
            assert (runs["a"] / f"{name}.{ext}").read_bytes() == (runs["b"] / f"{name}.{ext}").read_bytes()
        assert (runs["default"] / f"{name}.png").is_file()
        assert not (runs["default"] / f"{name}.svg").exists()
    assert (runs["a"] / "frames.svg").read_bytes().count(b"<image") >= 4


def test_the_recording_strip_has_a_scale_bar_and_no_frame_after_breakup(analysed):
    import json

    _, runs, seen = analysed
    data = json.loads((runs["a"] / "result.json").read_text())
    panels = seen[0]
    assert 4 <= len(panels) <= plots.STRIP_FRAMES
    assert "scale-bar" in panels[0]["gids"] and panels[0]["texts"]["scale-bar-label"].endswith(" µm")
    breakup_frame = data["breakup_time_s"] * data["fps_hz"]
    frames = [int(p["title"].split("\n")[0].removeprefix("frame ")) for p in panels]
    assert max(frames) < breakup_frame
    assert min(frames) >= data["free_thinning_start_s"] * data["fps_hz"] - 1e-9
    assert panels[-1]["caption"] == "last with a thread"


def test_a_bad_figures_option_is_exit_2_with_one_sentence(analysed, tmp_path):
    from click.testing import CliRunner

    from thinning.cli import cli

    source, _, _ = analysed
    result = CliRunner().invoke(cli, ["analyse", str(source), "--out", str(tmp_path / "o"), "--figures", "gif",
                                      "--fps", "2.5kHz", "--pixel-size", "25um", "--surface-tension", "62mN/m"])
    assert result.exit_code == 2 and "--figures" in result.output and "gif" in result.output
    assert len(result.output.strip().splitlines()) == 1 and not (tmp_path / "o").exists()


@pytest.mark.chromium
def test_chromium_shows_the_recording_report_with_its_frame_strip(analysed, tmp_path, chromium_path):
    import os
    import shutil
    from pathlib import Path

    from matplotlib.image import imread
    from services import run_chromium

    _, runs, seen = analysed
    page = runs["a"] / "report.html"
    shot = tmp_path / "recording-report.png"
    process = run_chromium(chromium_path, page, tmp_path / "profile", f"--screenshot={shot}",
                           window=(1280, 3200))
    assert process.returncode == 0, process.stderr[-2000:]
    assert [line for line in process.stderr.splitlines() if ":CONSOLE" in line or "Uncaught" in line] == []
    artefacts = Path(os.environ.get("THINNING_TEST_ARTEFACTS") or Path(__file__).parent / "artefacts")
    artefacts.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(shot, artefacts / "recording-report.png")
    pixels = imread(shot)[..., :3]
    assert pixels.shape[:2] == (3200, 1280) and pixels.std() > 0.05
    # the strip embedded in the page is the one drawn, with its scale bar
    assert "scale-bar" in seen[0][0]["gids"]
    html = page.read_text()
    assert html.count("data:image/png;base64,") == len(plots.FIGURE_NAMES)


def test_batch_figures_png_svg_writes_svgs_and_reanalyses_rows_without_them(analysed, tmp_path):
    # a finished batch row without the SVGs asked for is analysed again; with them it is kept
    import json

    from click.testing import CliRunner

    from thinning.cli import cli

    source, _, _ = analysed
    manifest = tmp_path / "m.csv"
    manifest.write_text(f"path,sample\n{source},S1\n", encoding="utf-8")
    args = ["batch", str(manifest), "--out", str(tmp_path / "b"), "--workers", "1", "--fps", "2.5kHz",
            "--pixel-size", "25um", "--surface-tension", "62mN/m"]
    assert CliRunner().invoke(cli, args).exit_code == 0
    (row,) = [p for p in (tmp_path / "b").iterdir() if p.is_dir()]
    assert not list(row.glob("*.svg"))
    run = CliRunner().invoke(cli, [*args, "--figures", "png,svg"])
    assert run.exit_code == 0, run.output
    assert "already up to date" not in run.output      # analysed again for its SVGs
    assert sorted(p.name for p in row.glob("*.svg")) == [
        "diameter.svg", "extensional_viscosity.svg", "frames.svg", "strain_rate.svg"]
    assert "diameter.svg" in json.loads((row / "row.json").read_text())["outputs"]
    again = CliRunner().invoke(cli, [*args, "--figures", "png,svg"])
    assert "already up to date" in again.output
    assert CliRunner().invoke(cli, [*args, "--figures", "tiff"]).exit_code == 2
