"""Locating the thinning regimes in a minimum-diameter series D(t).

Everything here works on plain arrays (time in s on the recording's clock,
diameter in m, NaN where no thread was measured) and never touches files.

The criteria (docs/physics.md §3.5, §4, §5.1):

1. Only frames after the start of free thinning, with a finite diameter above
   the resolution floor (default 3 pixels) and not flagged as outliers, are
   used. An outlier is a frame whose ln D departs from the running median of
   its 9 neighbours by more than 5 noise standard deviations (σ_D/D; beads,
   dust, mis-measured frames), tested twice so a bead does not drag its
   neighbours out.
2. A local Hencky strain rate ε̇(t) = −2 d ln D/dt comes from sliding weighted
   least-squares lines through ln D (weights (D/σ_D)², σ_D the diameter noise,
   constant in pixels), each window spanning about 0.2 in ln D (at least 3
   frames), widened up to 8-fold where the slope would be less precise than
   2.5 %. The local relaxation time is λ(t) = 2/(3 ε̇) (Anna & McKinley 2001).
3. Elasto-capillary: the stretch covering the largest fall of ln D in which the
   local λ stays within ±5 % of one value (±10 % at most where the local
   estimates are noisy: 5 % plus 2 standard errors), with at least 6 frames and
   D falling by at least a factor 2. It must then pass a straightness test: a
   quadratic in t through ln D over the stretch may change λ from one end to
   the other by no more than 25 % (with 2 standard errors from the scatter),
   which no power law over a factor-2 fall can pass. Finally each end is cut
   back while its first or last fifth (in ln D) has a slope that differs from
   the rest by more than 2.5 standard errors, cutting the end where ln D bends
   more (at most half the fall at each end).
   When nothing is found the search is repeated once with twice the noise
   (noise correlated from frame to frame looks smaller than it is); when the
   scatter about the stretch's line exceeds the noise (reduced χ² > 1.5) the
   noise is widened to match and the search repeated.
4. Finite extensibility: after the elasto-capillary stretch, the frames where
   the strain rate rises clearly above 2/(3λ) (local λ below the stretch's by
   more than 5 % plus 2 standard errors), from the first to the last such
   frame: ln D bends down. A linear stretch after an elasto-capillary one is
   never called visco-capillary (docs/physics.md §3.4).
5. Before an elasto-capillary stretch, or when there is none, a stretch is
   visco-capillary when D follows a power law of (t_c − t) with exponent
   1 ± 0.2, inertio-capillary with exponent 2/3 ± 0.1. The local exponent
   comes without knowing t_c from the inverse strain rate, which for
   D ∝ (t_c − t)^n is a line in t of slope −1/(2n) (docs/physics.md §3.5); such a
   stretch needs at least 6 frames and a 1.5-fold fall of D.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, replace

import numpy as np

from .kinematics import LocalSlopes, local_exponents, local_log_slopes, weighted_line
from .series import DiameterSeries, prepare_series

logger = logging.getLogger(__name__)

INERTIO_CAPILLARY = "inertio-capillary"
VISCO_CAPILLARY = "visco-capillary"
ELASTO_CAPILLARY = "elasto-capillary"
FINITE_EXTENSIBILITY = "finite-extensibility"
KINDS = (INERTIO_CAPILLARY, VISCO_CAPILLARY, ELASTO_CAPILLARY, FINITE_EXTENSIBILITY)

#: Local exponent of D ∝ (t_c − t)^n for each power-law regime, and the accepted half-width.
POWER_LAW_EXPONENTS = {VISCO_CAPILLARY: (1.0, 0.2), INERTIO_CAPILLARY: (2.0 / 3.0, 0.1)}


@dataclass(frozen=True)
class Regime:
    """One located stretch of the record (times on the recording's clock, s).

    ``n_frames`` counts the usable frames inside; ``value`` is the stretch's
    characteristic number: the local relaxation time (s) for elasto-capillary,
    the power-law exponent for the others; ``cut_by_floor`` says whether the
    stretch ends because the diameter reached the resolution floor.
    """

    kind: str
    t_start_s: float
    t_end_s: float
    n_frames: int
    diameter_start_m: float
    diameter_end_m: float
    value: float
    cut_by_floor: bool = False

    def to_dict(self) -> dict:
        """The ``result.json`` form ``{"kind", "t_start_s", "t_end_s"}``."""
        return {"kind": self.kind, "t_start_s": float(self.t_start_s), "t_end_s": float(self.t_end_s)}

    @classmethod
    def from_dict(cls, data: dict) -> "Regime":
        """A stretch read back from its ``result.json`` form (frames and diameters unknown: 0, NaN)."""
        nan = float("nan")
        return cls(kind=str(data["kind"]), t_start_s=float(data["t_start_s"]),
                   t_end_s=float(data["t_end_s"]), n_frames=0, diameter_start_m=nan,
                   diameter_end_m=nan, value=nan)






# --- preparing a series ----------------------------------------------------------------









# --- local fits ------------------------------------------------------------------------









# --- elasto-capillary run --------------------------------------------------------------

def _close_gaps(mask, max_gap):
    """Fill runs of at most ``max_gap`` False values that have True on both sides."""
    m = mask.copy()
    idx = np.flatnonzero(~m)
    if idx.size == 0:
        return m
    starts = idx[np.r_[True, np.diff(idx) > 1]]
    ends = idx[np.r_[np.diff(idx) > 1, True]]
    for s, e in zip(starts, ends):
        if e - s + 1 <= max_gap and s > 0 and e < m.size - 1:
            m[s:e + 1] = True
    return m


def _runs(mask):
    """(start, end) inclusive of every run of True."""
    if not mask.any():
        return []
    idx = np.flatnonzero(mask)
    brk = np.flatnonzero(np.diff(idx) > 1)
    starts = np.r_[idx[0], idx[brk + 1]]
    ends = np.r_[idx[brk], idx[-1]]
    return list(zip(starts.tolist(), ends.tolist()))




def find_elastocapillary_run(series: DiameterSeries, slopes: LocalSlopes, *, tolerance=0.05,
                             z=2.0, min_points=6, min_decrease=2.0, max_gap=2, max_drift=0.25):
    """Positions (start, end) in ``series`` of the elasto-capillary run, or None.

    See the module docstring (criterion 3). The run is grown around a
    reference λ taken from a grid, then the reference is refined to the
    weighted fit over the run until it settles.
    """
    lam = slopes.relaxation_time_s
    rel_se = np.abs(slopes.slope_se_1_s / slopes.slope_1_s)
    ok = np.isfinite(lam) & np.isfinite(rel_se)
    if ok.sum() < min_points:
        return None
    log_d = np.log(series.diameter_m)
    allowance = tolerance + z * np.where(ok, rel_se, np.inf)
    allowance = np.minimum(allowance, 2.0 * tolerance)  # noise never makes a power law look constant

    def best_run(ref):
        consistent = ok & (np.abs(lam / ref - 1.0) <= allowance)
        consistent = _close_gaps(consistent, max_gap)
        best = None
        for s, e in _runs(consistent):
            if e - s + 1 < min_points:
                continue
            span = log_d[s] - log_d[e]
            if span < np.log(min_decrease):
                continue
            if best is None or span > best[2]:
                best = (s, e, span)
        return best

    lo, hi = np.nanpercentile(lam[ok], [1, 99])
    if not (hi > 0 and lo > 0):
        return None
    grid = np.exp(np.arange(np.log(lo), np.log(hi) + tolerance, tolerance / 2.0))
    candidates = [r for r in (best_run(ref) for ref in grid) if r is not None]
    if not candidates:
        return None
    s, e, _ = max(candidates, key=lambda r: (r[2], r[1] - r[0]))
    for _ in range(6):
        x = series.time_s[s:e + 1]
        w = (series.diameter_m[s:e + 1] / series.noise_m) ** 2
        slope, _, _ = weighted_line(x - x[0], log_d[s:e + 1], w)
        if slope >= 0:
            return None
        ref = -1.0 / (3.0 * slope)
        run = best_run(ref)
        if run is None:
            break
        # keep the run that overlaps the previous one
        if run[1] < s or run[0] > e:
            break
        if (run[0], run[1]) == (s, e):
            break
        s, e = run[0], run[1]
    run = _trim_to_constant_rate(series, s, e, max_drift=max_drift, min_points=min_points,
                                 min_decrease=min_decrease)
    if run is None:
        return None
    return _trim_curved_edges(series, *run, min_points=min_points, min_decrease=min_decrease)


def _trim_curved_edges(series, s, e, *, min_points, min_decrease, z=2.5, edge_fraction=0.2,
                       step_fraction=0.05, max_trim_fraction=0.5):
    """Drop the ends of [s, e] whose slope differs significantly from the rest of the run.

    The first (last) ``edge_fraction`` of the run's fall in ln D is fitted
    apart from the rest; while either end's slope differs from the rest by
    more than ``z`` combined standard errors, ``step_fraction`` of the fall is
    cut from the end where ln D bends more (a weighted cubic in t), up to
    ``max_trim_fraction`` of the fall at each end. Where the local λ drifts
    (finite extensibility pulls it down ever faster at the thin end, the
    solvent's share lifts it at the thick end and fades) this keeps the
    flatter part. On precise data this removes the
    bend into and out of the elasto-capillary stretch that a ±5 % band lets in.
    """
    log_d = np.log(series.diameter_m)
    key = -np.minimum.accumulate(log_d)
    t = series.time_s
    w = (series.diameter_m / series.noise_m) ** 2
    span0 = key[e] - key[s]
    budget = key[s] + max_trim_fraction * span0, key[e] - max_trim_fraction * span0

    def slope(a, b):
        sl, _, cov = weighted_line(t[a:b + 1] - t[a], log_d[a:b + 1], w[a:b + 1])
        return sl, np.sqrt(cov[1, 1])

    def long_enough(a, b):
        return b - a + 1 >= min_points and log_d[a] - log_d[b] >= np.log(min_decrease)

    def edge_test(a, b, head):
        """(z-score of the edge against the rest, trimmed run) for one end."""
        span = key[b] - key[a]
        if head:
            cut = int(np.searchsorted(key, key[a] + edge_fraction * span, side="right")) - 1
            (a1, b1), (a2, b2) = (a, cut), (cut + 1, b)
            nxt = int(np.searchsorted(key, key[a] + step_fraction * span0, side="right"))
            new = (max(nxt, a + 1), b)
            allowed = key[new[0]] <= budget[0]
        else:
            cut = int(np.searchsorted(key, key[b] - edge_fraction * span, side="left"))
            (a1, b1), (a2, b2) = (cut, b), (a, cut - 1)
            nxt = int(np.searchsorted(key, key[b] - step_fraction * span0, side="left")) - 1
            new = (a, min(nxt, b - 1))
            allowed = key[new[1]] >= budget[1]
        if b1 - a1 < 2 or b2 - a2 < 2 or not allowed or not long_enough(*new):
            return False, None
        (s1, e1), (s2, e2) = slope(a1, b1), slope(a2, b2)
        return abs(s1 - s2) > z * np.hypot(e1, e2), new

    def head_bends_more(a, b):
        """Whether the slope of ln D changes faster at the start than at the end (cubic fit)."""
        u = t[a:b + 1] - 0.5 * (t[a] + t[b])
        u = u / max(np.abs(u).max(), np.finfo(float).tiny)
        c = np.polynomial.polynomial.polyfit(u, log_d[a:b + 1], 3, w=np.sqrt(w[a:b + 1]))
        # d(slope)/du = 2 c2 + 6 c3 u at u = −1 (start) and u = +1 (end)
        return abs(2 * c[2] - 6 * c[3]) >= abs(2 * c[2] + 6 * c[3])

    while True:
        # while either end differs significantly from the rest, trim the end where ln D
        # bends more (where the local λ changes fastest), which keeps the flatter part
        head, tail = edge_test(s, e, True), edge_test(s, e, False)
        if not (head[0] or tail[0]):
            break
        if head[1] is None and tail[1] is None:
            break
        if head[1] is None or tail[1] is None:
            pick = head if tail[1] is None else tail
        else:
            pick = head if (e - s + 1 >= 8 and head_bends_more(s, e)) else tail
        s, e = pick[1]
    return s, e


def relaxation_time_drift(time_s, diameter_m, *, noise_m):
    """Relative change of the local λ across a stretch, and its standard error.

    From a weighted quadratic fit of ln D in t: δ = (λ_end − λ_start)/λ_mid, 0
    for an exponential; about −0.5 or more for any power law over a factor-2
    fall of D. The standard error comes from the scatter about the quadratic.
    """
    t = np.asarray(time_s, dtype=float)
    d = np.asarray(diameter_m, dtype=float)
    x = (t - t.mean()) / max(np.ptp(t), np.finfo(float).tiny)
    w = (d / noise_m) ** 2
    a = np.vstack([np.ones_like(x), x, x * x]).T
    aw = a * w[:, None]
    cov = np.linalg.inv(a.T @ aw)
    coef = cov @ (aw.T @ np.log(d))
    if d.size > 4:
        # errors from the scatter about the quadratic, whatever the noise estimate said
        chi2 = float(np.sum(w * (np.log(d) - a @ coef) ** 2) / (d.size - 3))
        cov = cov * chi2
    b, c = coef[1], coef[2]
    x0, x1 = x[0], x[-1]
    s0, s1, sm = b + 2 * c * x0, b + 2 * c * x1, b + c * (x0 + x1)
    # λ ∝ −1/s: δ = (1/s1 − 1/s0)·sm = sm (s0 − s1)/(s0 s1)
    delta = sm * (s0 - s1) / (s0 * s1)
    # gradient of δ with respect to (b, c), numerically
    eps_b, eps_c = 1e-6 * max(abs(b), 1e-12), 1e-6 * max(abs(c), abs(b), 1e-12)

    def dlt(bb, cc):
        q0, q1, qm = bb + 2 * cc * x0, bb + 2 * cc * x1, bb + cc * (x0 + x1)
        return qm * (q0 - q1) / (q0 * q1)

    g = np.array([0.0, (dlt(b + eps_b, c) - dlt(b - eps_b, c)) / (2 * eps_b),
                  (dlt(b, c + eps_c) - dlt(b, c - eps_c)) / (2 * eps_c)])
    se = float(np.sqrt(max(g @ cov @ g, 0.0)))
    return float(delta), se


def _trim_to_constant_rate(series, s, e, *, max_drift, min_points, min_decrease):
    """Shrink [s, e] until ln D is shown to be straight: |δ| + 2 SE(δ) ≤ ``max_drift``.

    Trims the late (noisier) end first, then the early one, in steps of a
    tenth of the run's fall in ln D. None when no sub-run passes.
    """
    log_d = np.log(series.diameter_m)
    key = -np.minimum.accumulate(log_d)  # increasing, for searchsorted

    def passes(a, b):
        if b - a + 1 < min_points or log_d[a] - log_d[b] < np.log(min_decrease):
            return False
        delta, se = relaxation_time_drift(series.time_s[a:b + 1], series.diameter_m[a:b + 1],
                                          noise_m=series.noise_m)
        return abs(delta) + 2.0 * se <= max_drift

    if passes(s, e):
        return s, e
    step = (key[e] - key[s]) / 10.0
    for total in range(1, 10):
        for k_start in range(0, total + 1):
            k_end = total - k_start
            a = int(np.searchsorted(key, key[s] + k_start * step))
            b = int(np.searchsorted(key, key[e] - k_end * step, side="right")) - 1
            a, b = max(a, s), min(b, e)
            if passes(a, b):
                return a, b
    return None


# --- power-law stretches ---------------------------------------------------------------





def _power_law_stretches(series, slopes, s, e, *, min_points, min_decrease, max_gap):
    """Power-law regimes inside positions [s, e], by their local exponent."""
    expo, expo_se = local_exponents(series.time_s, slopes)
    expo, expo_se = expo[s:e + 1], expo_se[s:e + 1]
    log_d = np.log(series.diameter_m[s:e + 1])
    out = []
    taken = np.zeros(expo.size, dtype=bool)
    for kind, (n0, half) in sorted(POWER_LAW_EXPONENTS.items(), key=lambda kv: kv[1][1]):
        allow = np.minimum(half + 2.0 * np.nan_to_num(expo_se, nan=np.inf), 1.5 * half)
        mask = np.isfinite(expo) & (np.abs(expo - n0) <= allow) & ~taken
        mask = _close_gaps(mask, max_gap)
        for a, b in _runs(mask):
            if b - a + 1 < min_points or log_d[a] - log_d[b] < np.log(min_decrease):
                continue
            taken[a:b + 1] = True
            out.append((kind, s + a, s + b, float(np.nanmedian(expo[a:b + 1]))))
    return out


# --- the regimes of a record -----------------------------------------------------------

@dataclass(frozen=True)
class RegimeAnalysis:
    """Everything :func:`locate_regimes` found, for the fits and the findings."""

    series: DiameterSeries
    slopes: LocalSlopes
    regimes: list
    elastic_run: tuple | None
    #: the local relaxation time rose clearly after the elastic run (strain rate still falling):
    #: the run may be the viscous-to-elastic transition, the settled stretch lying later
    elastic_unsettled: bool = False


def _make_regime(kind, series, s, e, value):
    # ended by the floor: no more than a few usable frames after it, then only thinner ones
    slack = max(3, (e - s + 1) // 10)
    floor_cut = bool(e >= series.n - 1 - slack and series.below_floor_index.size
                     and series.below_floor_index.max() > series.index[e])
    return Regime(kind=kind, t_start_s=float(series.time_s[s]), t_end_s=float(series.time_s[e]),
                  n_frames=int(e - s + 1), diameter_start_m=float(series.diameter_m[s]),
                  diameter_end_m=float(series.diameter_m[e]), value=float(value),
                  cut_by_floor=floor_cut)


def _reduced_chi2_log_line(series, s, e):
    """Reduced χ² of the weighted line through ln D over positions [s, e]."""
    x = series.time_s[s:e + 1] - series.time_s[s]
    y = np.log(series.diameter_m[s:e + 1])
    w = (series.diameter_m[s:e + 1] / series.noise_m) ** 2
    slope, icpt, _ = weighted_line(x, y, w)
    return float(np.sum(w * (y - icpt - slope * x) ** 2) / max(e - s - 1, 1))


def _merge_neighbours(regimes, series, *, max_gap):
    """Join consecutive power-law stretches of one kind separated by at most ``max_gap`` frames."""
    out = []
    for r in regimes:
        if out and out[-1].kind == r.kind and r.kind in POWER_LAW_EXPONENTS:
            prev = out[-1]
            a = int(np.searchsorted(series.time_s, prev.t_end_s))
            b = int(np.searchsorted(series.time_s, r.t_start_s))
            if b - a - 1 <= max_gap:
                n = prev.n_frames + r.n_frames
                value = (prev.value * prev.n_frames + r.value * r.n_frames) / n
                out[-1] = Regime(r.kind, prev.t_start_s, r.t_end_s, b - a + prev.n_frames + r.n_frames - 1,
                                 prev.diameter_start_m, r.diameter_end_m, value, r.cut_by_floor)
                continue
        out.append(r)
    return out


#: Multiples of the estimated diameter noise tried when locating the elastic run.
NOISE_RETRY_FACTORS = (2.0, 3.0)


def _log_fall(series, s, e) -> float:
    """Fall of ln D between frames ``s`` and ``e`` of a prepared series."""
    return float(np.log(series.diameter_m[s] / series.diameter_m[e]))


def analyse_regimes(time_s, diameter_m, *, resolution_floor_m, diameter_noise_m=None,
                    t_start_s=None, tolerance=0.05, min_points=6,
                    min_decrease=2.0) -> RegimeAnalysis:
    """:func:`locate_regimes` with its working: prepared series, local slopes, run positions."""
    series = prepare_series(time_s, diameter_m, resolution_floor_m=resolution_floor_m,
                            diameter_noise_m=diameter_noise_m, t_start_s=t_start_s)
    if series.n < min_points:
        empty = LocalSlopes(*(np.empty(0),) * 3, np.empty(0, int), np.empty(0, int))
        return RegimeAnalysis(series, empty, [], None)
    found = []

    def locate(noise_m):
        sr = replace(series, noise_m=noise_m)
        sl = local_log_slopes(sr.time_s, sr.diameter_m, noise_m=noise_m, target_rel_se=tolerance / 2.0)
        return sr, sl, find_elastocapillary_run(sr, sl, tolerance=tolerance, min_points=min_points,
                                                min_decrease=min_decrease)

    series, slopes, run = locate(series.noise_m)
    # noise correlated from frame to frame looks smaller than it is to the estimator, which
    # can hide the elastic run or break it into pieces: try with two and three times the noise
    # and keep whichever run covers the largest fall of ln D (the drift test and the cap on the
    # allowance do not depend on the noise, so a power law still never passes as constant)
    for factor in NOISE_RETRY_FACTORS:
        retry = locate(factor * series.noise_m)
        if retry[2] is not None and (run is None or _log_fall(retry[0], *retry[2])
                                     > _log_fall(series, *run)):
            series, slopes, run = retry
    if run is not None:
        # scatter about the elastic line larger than the noise says (correlated noise, an
        # underestimated σ_D): widen the noise to match and locate again
        chi2 = _reduced_chi2_log_line(series, *run)
        if chi2 > 1.5:
            widened = locate(series.noise_m * float(np.sqrt(chi2)))
            if widened[2] is not None and _log_fall(widened[0], *widened[2]) >= 0.8 * _log_fall(series, *run):
                series, slopes, run = widened
    gap = 2
    unsettled = False
    if run is not None:
        s, e = run
        x = series.time_s[s:e + 1]
        w = (series.diameter_m[s:e + 1] / series.noise_m) ** 2
        slope, _, _ = weighted_line(x - x[0], np.log(series.diameter_m[s:e + 1]), w)
        lam_ec = -1.0 / (3.0 * slope)
        found.append(_make_regime(ELASTO_CAPILLARY, series, s, e, lam_ec))
        # after: finite extensibility from where the strain rate first rises clearly above
        # 2/(3λ) to the last such frame (a gradual bend between the two stays unlabelled)
        if e + 1 < series.n:
            lam = slopes.relaxation_time_s[e + 1:]
            rel_se = np.abs(slopes.slope_se_1_s / slopes.slope_1_s)[e + 1:]
            faster = np.isfinite(lam) & (lam < lam_ec * (1.0 - tolerance - 2.0 * rel_se))
            # after a settled elastic stretch the strain rate never falls again (finite
            # extensibility only raises it); a sustained fall means the run was a transition
            slower = np.isfinite(lam) & (lam > lam_ec * (1.0 + 2.0 * tolerance + 2.0 * rel_se))
            unsettled = any(b - a + 1 >= min_points for a, b in _runs(_close_gaps(slower, gap)))
            runs = [r for r in _runs(_close_gaps(faster, gap)) if r[1] - r[0] + 1 >= min_points]
            if runs:
                a, b = runs[0][0] + e + 1, runs[-1][1] + e + 1
                if np.mean(faster[a - e - 1:b - e]) >= 0.5:
                    # the terminal linear slope, D ≈ (σ/η_E,∞)(t_b − t), is fitted later
                    found.append(_make_regime(FINITE_EXTENSIBILITY, series, a, b,
                                              float(np.nanmedian(lam[a - e - 1:b - e]))))
        pre_end = s - 1
    else:
        pre_end = series.n - 1
    # power-law stretches before the elastic one (or everywhere when there is none)
    if pre_end + 1 >= min_points:
        for kind, a, b, n in _power_law_stretches(series, slopes, 0, pre_end,
                                                  min_points=min_points,
                                                  min_decrease=min(min_decrease, 1.5),
                                                  max_gap=gap):
            found.append(_make_regime(kind, series, a, b, n))
    found = _merge_neighbours(sorted(found, key=lambda r: r.t_start_s), series, max_gap=3 * gap)
    logger.debug("regimes: %s", found)
    return RegimeAnalysis(series, slopes, found, run, unsettled)


def locate_regimes(time_s, diameter_m, *, resolution_floor_m, diameter_noise_m=None,
                   t_start_s=None, tolerance=0.05, min_points=6,
                   min_decrease=2.0) -> list[Regime]:
    """The thinning regimes of a minimum-diameter series, in time order.

    ``time_s`` (s) and ``diameter_m`` (m, NaN where no thread) are the
    recording's series; frames before ``t_start_s`` (free-thinning start) and
    below ``resolution_floor_m`` are ignored. ``diameter_noise_m`` is the
    noise standard deviation of D (estimated from the data when None).
    Criteria: see the module docstring. An empty list means no regime could
    be located.
    """
    return analyse_regimes(time_s, diameter_m, resolution_floor_m=resolution_floor_m,
                           diameter_noise_m=diameter_noise_m, t_start_s=t_start_s,
                           tolerance=tolerance, min_points=min_points,
                           min_decrease=min_decrease).regimes
