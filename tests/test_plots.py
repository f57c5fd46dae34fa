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
