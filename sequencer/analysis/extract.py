"""From a straight line on one plot form to the emitter's characterisation parameters.

Slope S and intercept C of y = ln(I/V^kappa) against x = 1/V (see forms.py) give, for
Murphy–Good emission through a Schottky–Nordheim barrier:

- the voltage conversion length zeta = V/F = -S / (s b phi^(3/2)), where the slope
  correction factor s = s(f0) is iterated on the scaled field f0 = c_S^2 V0 / (phi^2 zeta)
  at the fit's tangent point V0 = 1 / (weighted mean of x)  (Forbes 2013, Proc. R. Soc. A
  469, 20130271; general plot form: physics.form_slope_correction). With a gap d between
  planar-like electrodes the field enhancement factor is beta = F / (V/d) = d / zeta.
- the formal emission area A_f = exp(C - physics.form_log_prefactor(zeta, phi, kappa, V0)),
  the intercept correction included.

Uncertainties (one standard uncertainty):
- fit: from the scaled covariance of (C, S), propagated through the extraction by a
  numerical Jacobian (first-order propagation, GUM, JCGM 100:2008 section 5.1);
- work function: the extraction is repeated at phi +/- u_phi on the same points (for the
  MG form the plot itself depends on phi, so the points are re-plotted); half the
  difference is the contribution; u_phi defaults to 0.2 eV (a typical spread of tabulated
  work functions of graphitic carbon, common practice, no source);
- gap: relative u_d / d enters beta in quadrature.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Optional

import numpy as np

from .. import physics
from . import forms

DEFAULT_PHI_UNCERTAINTY_EV = 0.2


@dataclass(frozen=True)
class Extraction:
    form: str
    phi: float                 # eV
    fit: forms.LineFit
    zeta: float                # voltage conversion length V/F, m
    zeta_rel_u: float          # total relative standard uncertainty of zeta
    s: float                   # slope correction factor used
    f0: float                  # scaled field at the tangent point
    f_low: float               # scaled field at the lowest voltage of the segment
    f_high: float              # scaled field at the highest voltage of the segment
    area: float                # formal emission area, m^2
    area_u_factor: float       # area is uncertain by a factor exp(u_lnA) (1 sigma)
    beta: Optional[float]      # field enhancement factor d/zeta (None without a gap)
    beta_rel_u: Optional[float]
    parts: dict = field(default_factory=dict)   # uncertainty budget (relative / ln units)
    iterations: int = 0

    def as_dict(self) -> dict:
        d = {k: getattr(self, k) for k in self.__dataclass_fields__ if k not in ("fit", "parts")}
        d["fit"] = self.fit.as_dict()
        d["parts"] = dict(self.parts)
        return d


def _core(S, C, x_mean, phi, kappa):
    """zeta, ln A, s, f0 and iterations from a slope and intercept (module docstring)."""
    bphi = physics.B_FN * phi ** 1.5
    if not (S < 0):
        raise ValueError("the plot's slope is not negative: not field emission")
    v0 = 1.0 / x_mean
    zeta = -S / bphi
    s = 1.0
    it = 0
    for it in range(1, 60):
        f0 = min(physics.CS2 * v0 / (phi * phi * zeta), 1.0)
        s = float(physics.form_slope_correction(f0, phi, kappa))
        new = -S / (s * bphi)
        done = abs(new / zeta - 1.0) < 1e-13
        zeta = new
        if done:
            break
    f0 = physics.CS2 * v0 / (phi * phi * zeta)
    lnA = C - float(physics.form_log_prefactor(zeta, phi, kappa, v0))
    return zeta, lnA, s, f0, it


def extract(V, I, w, form: str, phi: float, gap: Optional[float] = None,
            gap_u: Optional[float] = None, phi_u: float = DEFAULT_PHI_UNCERTAINTY_EV) -> Extraction:
    """Fit the points (V in volts, I in amperes, weights w on ln I) in plot form ``form``
    and extract zeta (and beta with a gap, in m), the formal area and their uncertainties."""
    V = np.asarray(V, dtype=float)
    I = np.asarray(I, dtype=float)
    kap = forms.kappa(form, phi)
    x, y = forms.transform(V, I, form, phi)
    fit = forms.wls_line(x, y, w)
    zeta, lnA, s, f0, it = _core(fit.slope, fit.intercept, fit.x_mean, phi, kap)

    # fit part: numerical Jacobian of (ln zeta, ln A) with respect to (C, S)
    hS = 1e-6 * abs(fit.slope)
    hC = 1e-6
    zS, aS = _core(fit.slope + hS, fit.intercept, fit.x_mean, phi, kap)[:2]
    zC, aC = _core(fit.slope, fit.intercept + hC, fit.x_mean, phi, kap)[:2]
    J = np.array([[(math.log(zC) - math.log(zeta)) / hC, (math.log(zS) - math.log(zeta)) / hS],
                  [(aC - lnA) / hC, (aS - lnA) / hS]])
    cov = J @ fit.cov @ J.T
    u_lnz_fit = math.sqrt(max(cov[0, 0], 0.0))
    u_lnA_fit = math.sqrt(max(cov[1, 1], 0.0))

    # work-function part: redo the whole extraction at phi +/- phi_u
    u_lnz_phi = u_lnA_phi = 0.0
    if phi_u and phi_u > 0:
        res = []
        for p in (phi - phi_u, phi + phi_u):
            xp, yp = forms.transform(V, I, form, p)
            fp = forms.wls_line(xp, yp, w)
            res.append(_core(fp.slope, fp.intercept, fp.x_mean, p, forms.kappa(form, p)))
        u_lnz_phi = abs(math.log(res[1][0]) - math.log(res[0][0])) / 2.0
        u_lnA_phi = abs(res[1][1] - res[0][1]) / 2.0

    u_gap = (gap_u / gap) if (gap and gap_u) else 0.0
    u_lnz = math.hypot(u_lnz_fit, u_lnz_phi)
    u_lnA = math.hypot(u_lnA_fit, u_lnA_phi)
    beta = beta_u = None
    if gap:
        beta = gap / zeta
        beta_u = math.sqrt(u_lnz ** 2 + u_gap ** 2)
    vmin, vmax = 1.0 / fit.x_max, 1.0 / fit.x_min
    return Extraction(
        form=form, phi=float(phi), fit=fit, zeta=float(zeta), zeta_rel_u=float(u_lnz), s=float(s),
        f0=float(f0), f_low=float(physics.CS2 * vmin / (phi * phi * zeta)),
        f_high=float(physics.CS2 * vmax / (phi * phi * zeta)), area=float(math.exp(lnA)),
        area_u_factor=float(math.exp(u_lnA)), beta=beta, beta_rel_u=beta_u,
        parts={"zeta_fit": u_lnz_fit, "zeta_phi": u_lnz_phi, "gap": u_gap,
               "lnA_fit": u_lnA_fit, "lnA_phi": u_lnA_phi, "phi_u_eV": phi_u,
               "gap_u_m": gap_u},
        iterations=it)
