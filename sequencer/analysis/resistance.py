"""Series resistance from the I–V data itself.

A resistance R in series with the gap (ballast resistor, contact, the fibre's own
resistance) lowers the gap voltage to V - I R, which bends the FN plot down at high
current (the apparent slope flattens at small 1/V). For one emitting population the right R
is the one that makes the Murphy–Good plot of (V - I R, I) straight (R.G. Forbes, Appl. Phys.
Lett. 114 (2019) 123101: MG emission plots straight in these coordinates). R is found by
minimising the weighted residual sum of squares of a straight line on that plot (after the
exact-MG bend of forms.mg_bend is taken out), over 0 <= R < 0.9 min(V/I); its uncertainty
is the profile-likelihood interval n ln(RSS(R)/RSS_min) <= 1 (Wilks's theorem, 68 %).

This assumes one population over the fitted points: with two, a resistance and a second
regime can mimic each other, and the report says so.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import optimize

from .. import physics
from . import forms


def _rss(R, Vs, I, w, phi):
    V = Vs - I * R
    if np.any(V <= 0):
        return math.inf
    x, y = forms.transform(V, I, "MG", phi)
    f0 = forms.wls_line(x, y, w)
    zeta = -f0.slope / (physics.B_FN * phi ** 1.5) if f0.slope < 0 else None
    if zeta:
        y = y - forms.mg_bend(V, phi, zeta)
    return forms.wls_line(x, y, w).chi2


def fit_series_resistance(V_supply, I, w, phi: float):
    """(R, (lo, hi)) in ohm for the points (supply voltage V, current I, weights w on ln I)."""
    Vs = np.asarray(V_supply, dtype=float)
    I = np.asarray(I, dtype=float)
    w = np.ones_like(Vs) if w is None else np.asarray(w, dtype=float)
    if Vs.size < 5:
        raise ValueError("fitting a series resistance needs at least 5 points")
    rmax = 0.9 * float(np.min(Vs / I))
    grid = np.concatenate([[0.0], np.geomspace(rmax * 1e-5, rmax, 120)])
    vals = np.array([_rss(R, Vs, I, w, phi) for R in grid])
    i = int(np.argmin(vals))
    lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
    R = float(grid[i])
    best = vals[i]
    if hi > lo:
        r = optimize.minimize_scalar(lambda q: _rss(q, Vs, I, w, phi), bounds=(lo, hi), method="bounded",
                                     options={"xatol": 1e-6 * max(hi, 1.0)})
        if r.fun < best:
            R, best = float(r.x), float(r.fun)
    n = Vs.size

    def g(q):
        return n * math.log(max(_rss(q, Vs, I, w, phi), 1e-300) / max(best, 1e-300)) - 1.0
    ends = []
    for sign in (-1.0, 1.0):
        step = max(R, rmax * 1e-4) * 1e-3
        end = R
        while True:
            q = R + sign * step
            if q <= 0.0 and sign < 0:
                end = 0.0 if g(0.0) <= 0 else optimize.brentq(g, 0.0, R) if R > 0 else 0.0
                break
            if q >= rmax:
                end = rmax
                break
            if g(q) > 0:
                end = optimize.brentq(g, min(R, q), max(R, q))
                break
            step *= 2.0
        ends.append(float(end))
    return R, (min(ends[0], R), max(ends[1], R))
