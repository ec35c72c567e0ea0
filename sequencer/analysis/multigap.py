"""Threshold voltage against gap for several runs of one sample.

For a cathode whose enhancement does not depend on the gap, V_th = F_th d + V_0 is a
straight line; its slope is the macroscopic threshold field and a clear curvature says the
anode distance changes the field at the emitter (common practice, no source). Fitted by
ordinary least squares (numpy.polyfit with covariance when there are more than three runs).
"""
from __future__ import annotations

import math
from typing import List, Optional

import numpy as np


def threshold_vs_gap(gaps_m: List[float], v_th: List[Optional[float]], labels: List[str]) -> dict:
    pts = [(g, v, l) for g, v, l in zip(gaps_m, v_th, labels) if g and v is not None]
    out = {"points": [{"gap_m": g, "threshold_v": v, "run": l} for g, v, l in pts]}
    if len({g for g, _, _ in pts}) < 2:
        out["note"] = "needs runs at two or more gaps"
        return out
    d = np.array([p[0] for p in pts])
    v = np.array([p[1] for p in pts])
    if d.size > 3:
        coef, cov = np.polyfit(d, v, 1, cov=True)
        out["field_se_v_per_m"] = float(math.sqrt(cov[0, 0]))
    else:
        coef = np.polyfit(d, v, 1)
    out["field_v_per_m"] = float(coef[0])
    out["offset_v"] = float(coef[1])
    return out
