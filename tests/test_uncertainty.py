"""The uncertainty budget's terms (thinning.uncertainty) against closed forms.

Coverage of the whole interval on recordings from both renderers is measured by
``scripts/accuracy_probe.py`` (README "Accuracy"); here each term is checked on its own.
"""

import math

import numpy as np
import pytest

from thinning import uncertainty as u
from thinning.fits import Fit


def test_terms_add_in_quadrature_and_the_bootstrap_keeps_its_asymmetry():
    # GUM (JCGM 100:2008) §5.1: independent terms add in quadrature
    b = u.combine(10.0, (9.0, 10.5), {"a": 0.03, "b": 0.04})
    rest = 0.05 * 10.0
    assert b.interval == pytest.approx((10.0 - math.hypot(1.0, rest), 10.0 + math.hypot(0.5, rest)))
    assert b.terms["scatter_and_window"] == pytest.approx(0.075)
    assert b.relative_half_width == pytest.approx(math.sqrt(0.075 ** 2 + 0.05 ** 2))
    assert u.combine(10.0, (math.nan, 11.0), {"a": 0.1}).terms == {}


def _exponential(lam=5e-3, d1=30.0, d2=3.0, n=300):
    t = np.linspace(0.0, 3 * lam * math.log(d1 / d2), n)
    return t, d1 * np.exp(-t / (3 * lam))


def test_bias_term_follows_the_closed_form_of_a_two_point_slope():
    # with only the two end points: a constant offset B moves the slope of ln D by
    # ln((D1+B)/(D2+B))/ln(D1/D2) − 1, a change of B across the window (+B/2 at D1, −B/2 at D2)
    # by ln((D1+B/2)/(D2−B/2))/ln(D1/D2) − 1; the two add in quadrature
    t = np.array([0.0, 1.0])
    d = np.array([30.0, 3.0])
    got = u._bias_term(t, d, np.ones(2), 0.15, log=True)
    offset = math.log(30.15 / 3.15) / math.log(10.0) - 1.0
    ramp = math.log(30.075 / 2.925) / math.log(10.0) - 1.0
    assert got == pytest.approx(math.hypot(offset, ramp), rel=1e-9)
    # a linear law's slope: an offset moves nothing, the change across moves it by B/(D1 − D2)
    assert u._bias_term(t, d, np.ones(2), 0.15, log=False) == pytest.approx(0.15 / 27.0, rel=1e-9)


def test_bias_term_grows_as_the_window_reaches_thinner_threads():
    t, d = _exponential(d2=10.0)
    wide = u._bias_term(t, d, np.ones_like(d), 0.15, log=True)
    t, d = _exponential(d2=3.0)
    thin = u._bias_term(t, d, np.ones_like(d), 0.15, log=True)
    assert 0 < wide < thin
    assert u._bias_term(t, d, np.ones_like(d), 0.0, log=True) == 0.0


def test_drift_is_half_the_range_of_the_local_slope():
    # ln D = −a x + b x² over [0, X]: the slope runs from −a to −a + 2bX, half its range over
    # the mean slope −a + bX is bX/(a − bX)
    x = np.linspace(0.0, 1.0, 400)
    a, b = 2.0, 0.1
    y = -a * x + b * x * x
    rng = np.random.default_rng(0)
    noisy = y + rng.normal(0.0, 1e-4, x.size)
    w = np.full(x.size, 1e8)
    assert u._drift_of_slope(x, noisy, w) == pytest.approx(b / (a - b), rel=0.02)
    # an exact exponential drifts by no more than its noise
    assert u._drift_of_slope(x, -a * x + rng.normal(0.0, 1e-4, x.size), w) == 0.0


def test_relaxation_time_budget_names_its_terms_and_widens_the_bootstrap():
    t, d = _exponential()
    px = 5e-6
    fit = Fit(model="elasto-capillary", values={"relaxation_time_s": 5e-3},
              ci95={"relaxation_time_s": (4.99e-3, 5.01e-3)}, window_s=(t[0], t[-1]), success=True)
    b = u.relaxation_time_budget(t, d * px, fit, noise_m=0.1 * px, floor_m=3 * px, pixel_size_m=px)
    assert set(b.terms) == {"scatter_and_window", "diameter_bias", "local_drift",
                            "unchecked_model_departure"}       # no whole-curve fit to check it
    assert b.terms["unchecked_model_departure"] == u.ELASTIC_TOLERANCE
    assert b.interval[0] < 4.99e-3 and b.interval[1] > 5.01e-3
    assert b.terms["local_drift"] == 0.0


def test_reference_width_uncertainty():
    assert u.reference_width_uncertainty(150.0) == pytest.approx(2 * u.EDGE_BIAS_PX / 150.0)
    assert u.reference_width_uncertainty(None) == 0.0
