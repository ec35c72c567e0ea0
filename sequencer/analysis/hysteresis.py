"""Hysteresis between the up and down branches of a sweep.

Two numbers, both of either sign (common practice, no source):

- voltage shift at a reference current: dV = V_down(I_ref) - V_up(I_ref), each branch
  interpolated linearly in ln I. Positive: the way down needs more voltage for the same
  current (the emitter got worse during the sweep, e.g. adsorbate removal or damage);
  negative: it needs less (conditioning, heating). I_ref defaults to the geometric mean of
  the current range both branches share.
- area between the branches in FN coordinates: integral over the shared 1/V range of
  [y_up(x) - y_down(x)] dx with y = ln(I/V^2), x = 1/V (trapezoidal rule on 200 points).
  Positive when the up branch carries more current.
"""
from __future__ import annotations

import math
from typing import Optional

import numpy as np

from . import forms


def _monotone(x, y):
    o = np.argsort(x)
    return x[o], y[o]


def hysteresis(V_up, I_up, V_down, I_down, phi: float, i_ref: Optional[float] = None) -> Optional[dict]:
    """The two numbers of the module docstring, or None when the branches do not overlap."""
    V_up, I_up = np.asarray(V_up, float), np.asarray(I_up, float)
    V_down, I_down = np.asarray(V_down, float), np.asarray(I_down, float)
    if V_up.size < 2 or V_down.size < 2:
        return None
    lo = max(I_up.min(), I_down.min())
    hi = min(I_up.max(), I_down.max())
    out = {"i_ref_a": None, "dv_v": None, "fn_area": None, "fn_x_range": None}
    if hi > lo > 0:
        iref = math.sqrt(lo * hi) if i_ref is None else float(i_ref)
        if lo <= iref <= hi:
            lu, vu = _monotone(np.log(I_up), V_up)
            ld, vd = _monotone(np.log(I_down), V_down)
            out["i_ref_a"] = iref
            out["dv_v"] = float(np.interp(math.log(iref), ld, vd) - np.interp(math.log(iref), lu, vu))
    xu, yu = forms.transform(V_up, I_up, "FN", phi)
    xd, yd = forms.transform(V_down, I_down, "FN", phi)
    a, b = max(xu.min(), xd.min()), min(xu.max(), xd.max())
    if b > a:
        g = np.linspace(a, b, 200)
        xu, yu = _monotone(xu, yu)
        xd, yd = _monotone(xd, yd)
        diff = np.interp(g, xu, yu) - np.interp(g, xd, yd)
        out["fn_area"] = float(np.trapezoid(diff, g))
        out["fn_x_range"] = [float(a), float(b)]
    if out["dv_v"] is None and out["fn_area"] is None:
        return None
    return out
