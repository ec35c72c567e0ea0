"""The three plot forms of field-emission I–V data and the weighted straight-line fit.

Every form plots y = ln(I / V^kappa) against x = 1/V:

======  =====================  ==========================================================
form    kappa                  source
======  =====================  ==========================================================
FN      2                      Fowler–Nordheim plot (R.H. Fowler and L. Nordheim, Proc. R.
                               Soc. A 119 (1928) 173; as used by R.G. Forbes, Proc. R. Soc.
                               A 469 (2013) 20130271)
MG      2 - eta(phi)/6         Murphy–Good plot (R.G. Forbes, Appl. Phys. Lett. 114 (2019)
                               123101): straight for Murphy–Good emission through a
                               Schottky–Nordheim barrier, so it needs no slope correction
ML      0                      Millikan–Lauritsen plot (R.A. Millikan and C.C. Lauritsen,
                               Proc. Natl. Acad. Sci. 14 (1928) 45)
======  =====================  ==========================================================

Uncertainties: a current I with standard uncertainty u_I gives u_y = u_I / I (first-order
propagation through the logarithm). The fit is weighted least squares with weights 1/u_y^2;
the covariance is scaled by the reduced chi-square (the usual choice when the absolute
scale of the uncertainties is not trusted; common practice, no source).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import physics

FORMS = ("FN", "MG", "ML")
FORM_TITLES = {
    "FN": "Fowler–Nordheim  ln(I/V²) vs 1/V",
    "MG": "Murphy–Good  ln(I/V^(2−η/6)) vs 1/V",
    "ML": "Millikan–Lauritsen  ln(I) vs 1/V",
}
# Smallest relative current uncertainty used for weights: keeps one very quiet point from
# taking all the weight (common practice, no source).
MIN_REL_UNCERTAINTY = 0.002


def kappa(form: str, phi: float) -> float:
    """Voltage exponent kappa of the plot form (table in the module docstring)."""
    if form == "FN":
        return 2.0
    if form == "MG":
        return 2.0 - float(physics.eta(phi)) / 6.0
    if form == "ML":
        return 0.0
    raise ValueError(f"unknown plot form {form!r}; use one of {', '.join(FORMS)}")


def transform(V, I, form: str, phi: float):
    """(x, y) = (1/V, ln(I / V^kappa)) for positive V and I (others give NaN)."""
    V = np.asarray(V, dtype=float)
    I = np.asarray(I, dtype=float)
    ok = (V > 0) & (I > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.where(ok, 1.0 / np.where(ok, V, 1.0), np.nan)
        y = np.where(ok, np.log(np.where(ok, I, 1.0)) - kappa(form, phi) * np.log(np.where(ok, V, 1.0)), np.nan)
    return x, y


def weights_from(I, u_I):
    """Weights 1/u_y^2 with u_y = max(u_I/I, MIN_REL_UNCERTAINTY); a point without a
    measured spread (NaN) gets the median weight of the others (or 1 when none has one)."""
    I = np.asarray(I, dtype=float)
    u = np.asarray(u_I, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = np.abs(u / I)
    rel = np.where(np.isfinite(rel), np.maximum(rel, MIN_REL_UNCERTAINTY), np.nan)
    w = 1.0 / rel ** 2
    if np.all(~np.isfinite(w)):
        return np.ones_like(I)
    return np.where(np.isfinite(w), w, np.nanmedian(w))


@dataclass(frozen=True)
class LineFit:
    """y = intercept + slope * x by weighted least squares, with scaled covariance."""

    slope: float
    intercept: float
    slope_se: float
    intercept_se: float
    cov_si: float          # covariance of (slope, intercept)
    r2: float              # weighted coefficient of determination
    n: int
    x_min: float
    x_max: float
    x_mean: float          # weighted mean of x (the point the extraction refers to)
    chi2: float            # weighted residual sum of squares

    @property
    def cov(self) -> np.ndarray:
        """2x2 covariance matrix of (intercept, slope)."""
        return np.array([[self.intercept_se ** 2, self.cov_si], [self.cov_si, self.slope_se ** 2]])

    def as_dict(self) -> dict:
        return {k: float(getattr(self, k)) if k != "n" else int(self.n) for k in self.__dataclass_fields__}


def wls_line(x, y, w=None) -> LineFit:
    """Weighted least-squares straight line (standard normal equations; covariance scaled
    by chi2/(n-2), see the module docstring). Needs at least three points."""
    x = np.asarray(x, dtype=float)
    y = np.asarray(y, dtype=float)
    w = np.ones_like(x) if w is None else np.asarray(w, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(w) & (w > 0)
    x, y, w = x[ok], y[ok], w[ok]
    n = x.size
    if n < 3:
        raise ValueError(f"a straight-line fit needs at least 3 points, got {n}")
    W = w.sum()
    xm = (w * x).sum() / W
    ym = (w * y).sum() / W
    sxx = (w * (x - xm) ** 2).sum()
    if sxx <= 0:
        raise ValueError("all points have the same x; no slope can be fitted")
    slope = (w * (x - xm) * (y - ym)).sum() / sxx
    intercept = ym - slope * xm
    res = y - intercept - slope * x
    chi2 = float((w * res ** 2).sum())
    syy = float((w * (y - ym) ** 2).sum())
    scale = chi2 / (n - 2)
    var_s = scale / sxx
    var_i = scale * (1.0 / W + xm ** 2 / sxx)
    cov = -xm * var_s
    r2 = 1.0 - chi2 / syy if syy > 0 else 1.0
    return LineFit(float(slope), float(intercept), float(np.sqrt(var_s)), float(np.sqrt(var_i)),
                   float(cov), float(r2), int(n), float(x.min()), float(x.max()), float(xm), chi2)


def mg_bend(V, phi: float, zeta: float):
    """How far exact Murphy–Good emission (elliptic v and t, physics.murphy_good_j with
    exact=True) departs from a straight line on the MG plot, in y units, up to a straight
    line: ln(J(V/zeta) / V^(2 - eta/6)) + b phi^(3/2) zeta / V.

    Forbes's MG plot (Appl. Phys. Lett. 114 (2019) 123101) is straight only to the accuracy
    of the approximations v ~= 1 - f + (f/6) ln f and t ~= const; over a sweep the rest
    amounts to a few per cent in I, which is enough for a model-selection criterion to see
    a spurious regime in data with 1 % noise. Subtracting this bend (for the zeta of a first
    one-line fit) before the segmented regression removes it."""
    V = np.asarray(V, dtype=float)
    j = physics.murphy_good_j(V / zeta, phi, exact=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        return (np.log(j) - kappa("MG", phi) * np.log(V)
                + physics.B_FN * phi ** 1.5 * zeta / V)
