"""Emission regimes: segmented regression with the number of segments chosen by the
Bayesian information criterion.

Model with k segments and breakpoints b_1 < ... < b_(k-1) on x:

    y = c0 + c1 x + sum_j sign(d_j) [softplus(|d_j| (x - b_j)) - ln 2],   softplus(z) = ln(1 + e^z)

Far from b_j each term is a straight line (0 on one side, d_j (x - b_j) on the other), so
the model is the continuous broken line of segmented regression (V.M.R. Muggeo, Statistics
in Medicine 22 (2003) 3055) with each corner rounded over a width 1/|d_j| in x. The rounding
is not an extra parameter and it is the exact shape of the sum of two emitting populations,
ln(e^(a1 + s1 x) + e^(a2 + s2 x)), when the bend is convex (d > 0), and of a current limited
by a second process, -ln(e^-(...) + e^-(...)), when it is concave (d < 0). The breakpoint is
where the two straight lines cross: for two populations, the voltage at which they carry
equal current.

Fitting: breakpoints are first searched on a grid between data points with sharp corners
(a weighted linear least-squares problem for fixed breakpoints), then all parameters are
refined by nonlinear least squares (scipy.optimize.least_squares).

Model choice: BIC = n ln(RSS_w / n) + p ln n with p = 2k parameters (G. Schwarz, Ann. Stat.
6 (1978) 461; Gaussian errors of unknown common scale, so the weights only need to be right
relative to one another). The smallest BIC wins.

Breakpoint uncertainty: from the Jacobian of the refined fit, cov = s^2 (J^T J)^-1 with s^2
= RSS/(n - p) (the usual asymptotic least-squares covariance; W.H. Press et al., Numerical
Recipes, 3rd ed. (2007) section 15.5). Each segment must hold at least ``min_points``
points, which keeps a few noisy points from making a regime of their own. More than
MAX_POINTS points (a long continuous ramp) are first reduced to MAX_POINTS weighted means of
consecutive points.
"""
from __future__ import annotations

import itertools
import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize

MIN_POINTS = 5
MAX_GRID = 40
MAX_POINTS = 300          # above this, the regime search runs on binned means
LN2 = math.log(2.0)


@dataclass(frozen=True)
class SegmentModel:
    n_segments: int
    breakpoints: tuple          # in x, ascending
    breakpoint_se: tuple        # standard uncertainty of each breakpoint, in x
    slope_changes: tuple        # d_j, in y per unit x
    labels: np.ndarray          # segment of each input point, 0 = largest x (lowest V)
    bic: dict                   # k -> BIC of every k tried
    rss: float
    _theta: tuple = ()          # normalised parameters (internal)
    _norm: tuple = (0.0, 1.0)   # x normalisation (mean, scale)

    def predict(self, x):
        m, s = self._norm
        u = (np.asarray(x, dtype=float) - m) / s
        return _model(np.asarray(self._theta), u, self.n_segments - 1)

    def segment_slopes(self) -> list:
        """Slope of each segment's straight asymptote (in y per unit x), by label: segment
        L (L breakpoints at or above its x) has the slope changes of the m - L lowest
        breakpoints added to c1."""
        m = self.n_segments - 1
        c1 = self._theta[1] / self._norm[1]
        return [c1 + sum(self.slope_changes[:m - L]) for L in range(self.n_segments)]

    def transition_width(self, j: int) -> float:
        """Width 1/|d_j| in x over which corner j is rounded."""
        d = self.slope_changes[j]
        return math.inf if d == 0 else 1.0 / abs(d)

    def as_dict(self) -> dict:
        bv = [1.0 / b for b in self.breakpoints]
        return {"n_segments": self.n_segments, "breakpoints_x": list(self.breakpoints),
                "breakpoint_se_x": list(self.breakpoint_se),
                "breakpoints_v": bv,
                "breakpoint_se_v": [se * v * v for se, v in zip(self.breakpoint_se, bv)],
                "slope_changes": list(self.slope_changes),
                "segment_slopes": self.segment_slopes(),
                "bic": {str(k): v for k, v in self.bic.items()}, "rss": self.rss}


def _binned(x, y, w, nbins):
    """Weighted means of (x, y) over nbins groups of consecutive x (equal counts), weights
    summed: a long continuous ramp becomes a few hundred points for the regime search (the
    weighted least-squares fit of binned means, common practice, no source)."""
    o = np.argsort(x)
    xs, ys, ws = x[o], y[o], w[o]
    groups = np.array_split(np.arange(xs.size), nbins)
    W = np.array([ws[g].sum() for g in groups])
    X = np.array([(ws[g] * xs[g]).sum() for g in groups]) / W
    Y = np.array([(ws[g] * ys[g]).sum() for g in groups]) / W
    return X, Y, W


def _model(theta, u, m):
    y = theta[0] + theta[1] * u
    for j in range(m):
        d, b = theta[2 + j], theta[2 + m + j]
        y = y + np.sign(d) * (np.logaddexp(0.0, abs(d) * (u - b)) - LN2)
    return y


def _sharp_rss(u, y, sw, bps):
    cols = [np.ones_like(u), u] + [np.maximum(u - b, 0.0) for b in bps]
    A = np.column_stack(cols) * sw[:, None]
    coef, *_ = np.linalg.lstsq(A, y * sw, rcond=None)
    r = y * sw - A @ coef
    return float(r @ r), coef


def _counts_ok(us, bps, min_points):
    edges = [-np.inf] + sorted(bps) + [np.inf]
    return all(np.count_nonzero((us > lo) & (us <= hi)) >= min_points
               for lo, hi in zip(edges[:-1], edges[1:]))


def _refine(u, y, sw, bps, coef):
    """Smooth-corner refinement from a sharp-corner start; returns (rss, theta, cov)."""
    m = len(bps)
    theta0 = np.concatenate([coef[:2], coef[2:], np.asarray(bps, dtype=float)])
    # sharp corners are the |d| -> infinity limit; the start keeps the sharp fit's slopes

    def res(th):
        return (y - _model(th, u, m)) * sw
    try:
        r = optimize.least_squares(res, theta0, method="trf", x_scale="jac", max_nfev=400)
    except ValueError:
        return None
    th = r.x
    rss = float(r.fun @ r.fun)
    n, p = u.size, th.size
    try:
        cov = np.linalg.pinv(r.jac.T @ r.jac) * rss / max(n - p, 1)
    except np.linalg.LinAlgError:
        cov = np.full((p, p), np.nan)
    return rss, th, cov


def find_segments(x, y, w=None, max_segments: int = 3, min_points: int = MIN_POINTS) -> SegmentModel:
    """Choose 1..max_segments segments for the points (x, y) with weights w (module
    docstring). Labels number segments from the largest x (the lowest voltage)."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    w = np.ones_like(x) if w is None else np.asarray(w, dtype=float)
    if x.size < 3:
        raise ValueError(f"segmented regression needs at least 3 points, got {x.size}")
    x_all = x
    if x.size > MAX_POINTS:
        x, y, w = _binned(x, y, w, MAX_POINTS)
    n = x.size
    mx, sx = float(np.mean(x)), float(np.std(x)) or 1.0
    u = (x - mx) / sx
    sw = np.sqrt(w / np.mean(w))
    uu = np.unique(u)
    cands = (uu[:-1] + uu[1:]) / 2.0
    below = np.searchsorted(np.sort(u), cands)          # points at or below each candidate
    cands = cands[(below >= min_points) & (n - below >= min_points)]

    fits = {}
    rss1, coef1 = _sharp_rss(u, y, sw, [])
    fits[1] = (rss1, np.asarray(coef1), np.zeros((2, 2)))
    if max_segments >= 2 and cands.size:
        grid = cands if cands.size <= 4 * MAX_GRID else cands[np.linspace(0, cands.size - 1, 4 * MAX_GRID).astype(int)]
        b = min(grid, key=lambda c: _sharp_rss(u, y, sw, [c])[0])
        _, coef = _sharp_rss(u, y, sw, [b])
        got = _refine(u, y, sw, [b], coef)
        if got and _counts_ok(u, [got[1][3]], min_points):
            fits[2] = got
    if max_segments >= 3 and cands.size >= 2:
        grid = cands if cands.size <= MAX_GRID else cands[np.linspace(0, cands.size - 1, MAX_GRID).astype(int)]
        pairs = [p for p in itertools.combinations(grid, 2) if _counts_ok(u, list(p), min_points)]
        if pairs:
            p = min(pairs, key=lambda q: _sharp_rss(u, y, sw, list(q))[0])
            _, coef = _sharp_rss(u, y, sw, list(p))
            got = _refine(u, y, sw, list(p), coef)
            if got:
                th = got[1]
                if th[4] < th[3]:            # keep breakpoints ordered
                    got = None
                elif not _counts_ok(u, [th[3], th[4]], min_points):
                    got = None
            if got:
                fits[3] = got

    bic = {k: n * math.log(max(v[0], 1e-300) / n) + 2 * k * math.log(n) for k, v in fits.items()}
    k = min(bic, key=bic.get)
    rss, th, cov = fits[k]
    m = k - 1
    if k == 1:
        th = np.asarray(coef1, dtype=float)
    bps_u = [float(th[2 + m + j]) for j in range(m)]
    bps = tuple(mx + sx * b for b in bps_u)
    se = tuple(float(sx * math.sqrt(max(cov[2 + m + j, 2 + m + j], 0.0))) for j in range(m))
    dch = tuple(float(th[2 + j]) / sx for j in range(m))
    labels = (np.asarray(bps)[None, :] >= x_all[:, None]).sum(axis=1).astype(int) if bps else \
        np.zeros(x_all.size, dtype=int)
    return SegmentModel(k, bps, se, dch, labels, bic, float(rss), tuple(map(float, th)), (mx, sx))
