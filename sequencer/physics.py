"""Field-emission equations as pure numpy functions. SI units inside, except that work
functions and barrier heights are in electronvolts (eV), as the trade writes them.

Used by analysis and by the simulated cathode. Every function cites its source.

Conventions
-----------
F   local (barrier) field, V/m
phi work function, eV
f   scaled barrier field, dimensionless: f = c_S^2 F / phi^2  (f = 1: barrier vanishes)
J   current density, A/m^2

Constants (first and second Fowler–Nordheim constants and the Schottky constant) are the
values tabulated by R.G. Forbes and J.H.B. Deane, Proc. R. Soc. A 463 (2007) 2907, and
R.G. Forbes, Appl. Phys. Lett. 89 (2006) 113122; the tests recompute them from CODATA via
scipy.constants.
"""
from __future__ import annotations

import numpy as np
from scipy import special as _special

# First FN constant a = e^3 / (8 pi h)               [A eV V^-2]
A_FN = 1.541434e-6
# Second FN constant b = (4/3) (2 m_e)^(1/2) / (e hbar)   [eV^-3/2 V m^-1]  (6.830890 per nm)
B_FN = 6.830890e9
# Schottky constant squared c_S^2 = e^3 / (4 pi eps0)  [eV^2 V^-1 m]  (1.439964 eV^2 V^-1 nm)
CS2 = 1.439964e-9
# Planar Child–Langmuir constant (4 eps0 / 9) sqrt(2 e / m_e)   [A V^-3/2]
K_CL = 2.33395e-6
# Boltzmann constant in eV/K (CODATA 2018)
K_B_EV = 8.617333262e-5


def scaled_field(F, phi):
    """Scaled barrier field f = c_S^2 F / phi^2 (Forbes 2006, APL 89, 113122, eq. 3)."""
    F = np.asarray(F, dtype=float)
    return CS2 * F / np.square(phi)


def reference_field(phi):
    """Reference field F_R = phi^2 / c_S^2 at which the Schottky–Nordheim barrier
    vanishes (f = 1) (Forbes 2006)."""
    return np.square(phi) / CS2


def v_approx(f):
    """Forbes's 2006 approximation v(f) ~= 1 - f + (f/6) ln f for the principal
    Schottky–Nordheim barrier function (R.G. Forbes, Appl. Phys. Lett. 89 (2006) 113122,
    eq. 4; largest error about 0.33 % near f = 0.3). Defined for 0 <= f <= 1; v(0) = 1."""
    f = np.asarray(f, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        lf = np.where(f > 0, np.log(np.where(f > 0, f, 1.0)), 0.0)
    return 1.0 - f + (f / 6.0) * lf


def t_approx(f):
    """Approximation t(f) ~= 1 + f/9 - (f/18) ln f (R.G. Forbes, Appl. Phys. Lett. 89
    (2006) 113122, eq. 5; J.H.B. Deane and R.G. Forbes, J. Phys. A 41 (2008) 395301)."""
    f = np.asarray(f, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        lf = np.where(f > 0, np.log(np.where(f > 0, f, 1.0)), 0.0)
    return 1.0 + f / 9.0 - (f / 18.0) * lf


def v_exact(f):
    """Exact v(f) of the Schottky–Nordheim barrier in elliptic-integral form, written with
    the Nordheim parameter y = f^(1/2) (R.G. Forbes and J.H.B. Deane, Proc. R. Soc. A 463
    (2007) 2907; the classical form goes back to Burgess, Kroemer and Houston, Phys. Rev.
    90 (1953) 515):
        v = (1+y)^(1/2) [E(m) - y K(m)],   m = (1-y)/(1+y),
    with K, E the complete elliptic integrals of *parameter* m (scipy's convention,
    m = k^2). The tests check it against direct quadrature of the barrier integral."""
    f = np.asarray(f, dtype=float)
    y = np.sqrt(np.clip(f, 0.0, 1.0))
    m = (1.0 - y) / (1.0 + y)
    K = np.where(y > 0, _special.ellipk(np.where(y > 0, m, 0.5)), 0.0)
    return np.sqrt(1.0 + y) * (_special.ellipe(m) - y * K)


def t_exact(f):
    """Exact t(f) = v(f) - (4/3) f dv/df in elliptic-integral form (Forbes and Deane
    2007), with y = f^(1/2) and m = (1-y)/(1+y):
        t = (1+y)^(-1/2) [(1+y) E(m) - y K(m)]."""
    f = np.asarray(f, dtype=float)
    y = np.sqrt(np.clip(f, 0.0, 1.0))
    m = (1.0 - y) / (1.0 + y)
    K = np.where(y > 0, _special.ellipk(np.where(y > 0, m, 0.5)), 0.0)
    return ((1.0 + y) * _special.ellipe(m) - y * K) / np.sqrt(1.0 + y)


def murphy_good_j(F, phi, exact: bool = False):
    """Murphy–Good (zero-temperature) FN current density for a Schottky–Nordheim barrier
    (E.L. Murphy and R.H. Good, Phys. Rev. 102 (1956) 1464; in the form of Forbes and
    Deane 2007):
        J = (a / (phi t(f)^2)) F^2 exp(-v(f) b phi^(3/2) / F).
    F in V/m, phi in eV. With ``exact`` the elliptic v and t are used, otherwise Forbes's
    2006 approximations. The barrier vanishes at f >= 1, where the equation no longer
    holds: f is clipped to 1 (the current at the reference field), which keeps the
    function finite and monotonic; callers that care test ``scaled_field(F, phi) < 1``."""
    F = np.asarray(F, dtype=float)
    Fpos = np.maximum(F, 1e-30)
    f = np.clip(scaled_field(Fpos, phi), 0.0, 1.0)
    Fc = np.minimum(Fpos, reference_field(phi))
    v = v_exact(f) if exact else v_approx(f)
    t = t_exact(f) if exact else t_approx(f)
    with np.errstate(over="ignore", under="ignore"):
        J = (A_FN / (phi * t * t)) * Fc * Fc * np.exp(-v * B_FN * np.power(phi, 1.5) / Fc)
    return np.where(F > 0, J, 0.0)


def decay_width(F, phi, f=None):
    """Decay width d_F = e hbar F / (2 (2 m_e phi)^(1/2) t(f)), written as
    d_F [eV] = (2/3) F / (b phi^(1/2) t(f))   (Forbes 2008; Murphy and Good 1956),
    since b = (4/3)(2 m_e)^(1/2)/(e hbar), i.e. (2 m_e)^(1/2)/(e hbar) = 3b/4.
    Returned in eV (about 0.2 eV at 5 V/nm and 4.5 eV)."""
    F = np.asarray(F, dtype=float)
    if f is None:
        f = np.clip(scaled_field(F, phi), 0.0, 1.0)
    return (2.0 / 3.0) * F / (B_FN * np.sqrt(phi) * t_approx(f))


def thermal_field_factor(F, phi, T):
    """Murphy–Good thermal–field enhancement of the FN current,
        J(T)/J(0) = (pi k T / d_F) / sin(pi k T / d_F)
    (E.L. Murphy and R.H. Good, Phys. Rev. 102 (1956) 1464, the low-temperature
    field-emission region). Valid for p = pi k T / d_F well below 1; p is clipped at 0.8
    (beyond it the expansion fails and the regime is thermal–field/Schottky emission,
    outside this model). Returns 1 at T = 0."""
    T = np.asarray(T, dtype=float)
    p = np.pi * K_B_EV * T / np.maximum(decay_width(F, phi), 1e-30)
    p = np.clip(p, 1e-12, 0.8)
    return p / np.sin(p)


def child_langmuir_j(V, d):
    """Planar Child–Langmuir space-charge-limited current density
        J = (4 eps0 / 9) sqrt(2 e / m_e) V^(3/2) / d^2
    (C.D. Child, Phys. Rev. 32 (1911) 492; I. Langmuir, Phys. Rev. 2 (1913) 450).
    V in volts, d in metres."""
    V = np.maximum(np.asarray(V, dtype=float), 0.0)
    return K_CL * np.power(V, 1.5) / np.square(d)


def fn_slope_to_field_factor(slope, phi, s=1.0):
    """From an FN-plot slope S = d ln(I/V^2) / d(1/V) (negative) to the voltage-to-field
    conversion factor beta_V = F/V (1/m):  beta_V = -s b phi^(3/2) / S,
    with slope correction factor s (Forbes 2013, Proc. R. Soc. A 469, 20130271;
    s ~ 0.95 for typical f, iterate via s(f) = 1 - f/6 for the SN barrier)."""
    return -s * B_FN * np.power(phi, 1.5) / np.asarray(slope, dtype=float)


def slope_correction(f):
    """Slope correction factor for the FN plot of the SN barrier, s(f) = v(f) - f dv/df
    = 1 - f/6 with Forbes's approximation (Forbes 2006/2013)."""
    return 1.0 - np.asarray(f, dtype=float) / 6.0


def eta(phi):
    """The work-function-dependent exponent eta(phi) = b phi^(3/2) / F_R = b c_S^2 / phi^(1/2)
    of the Murphy–Good plot (R.G. Forbes, Appl. Phys. Lett. 114 (2019) 123101:
    ln(I/V^(2 - eta/6)) against 1/V is straight for SN-barrier MG emission).
    eta = 9.836239 (eV / phi)^(1/2)."""
    return B_FN * CS2 / np.sqrt(phi)


def form_slope_correction(f, phi, kappa):
    """Slope correction factor of a plot of ln(I/V^kappa) against 1/V for Murphy–Good
    emission through a Schottky–Nordheim barrier, at the scaled field f of the tangent
    point:  S = -s b phi^(3/2) zeta  with  s = 1 - f/6 + (2 - kappa) f / eta(phi).

    Derived from the MG equation (murphy_good_j) with Forbes's v(f) ~= 1 - f + (f/6) ln f
    (Appl. Phys. Lett. 89 (2006) 113122) and t(f) taken as constant, which gives
    ln(I/V^kappa) = const + (2 - kappa - eta/6) ln V - b phi^(3/2) zeta / V
    (R.G. Forbes, Appl. Phys. Lett. 114 (2019) 123101, where kappa = 2 - eta/6 makes the
    plot straight). Special cases: FN plot (kappa = 2): s = 1 - f/6 (Forbes 2013, Proc. R.
    Soc. A 469, 20130271); MG plot: s = 1; ML plot (kappa = 0): s = 1 - f/6 + 2f/eta."""
    f = np.asarray(f, dtype=float)
    return 1.0 - f / 6.0 + (2.0 - kappa) * f / eta(phi)


def form_log_prefactor(zeta, phi, kappa, v0):
    """Intercept per unit area, ln of it, of the tangent at V = v0 of the plot
    ln(I/V^kappa) against 1/V for MG emission from area A_f (so the plot's intercept is
    ln A_f + this):

        ln(a/phi) - 2 ln t(f0) - 2 ln zeta + eta - (eta/6) ln(c_S^2 / (phi^2 zeta))
        + p (ln v0 + 1),     p = 2 - kappa - eta/6,   f0 = c_S^2 v0 / (phi^2 zeta).

    Same derivation and sources as form_slope_correction (the ln V term is replaced by
    its tangent at v0). For the FN plot the v0-terms combine into Forbes's intercept
    correction exp(eta - (eta/6)(ln f0 + 1)) t(f0)^-2 (Forbes 2013). zeta = V/F in m,
    v0 in V."""
    zeta = np.asarray(zeta, dtype=float)
    et = eta(phi)
    f0 = np.clip(CS2 * v0 / (np.square(phi) * zeta), 1e-6, 1.0)
    p = 2.0 - kappa - et / 6.0
    return (np.log(A_FN / phi) - 2.0 * np.log(t_approx(f0)) - 2.0 * np.log(zeta) + et
            - (et / 6.0) * np.log(CS2 / (np.square(phi) * zeta)) + p * (np.log(v0) + 1.0))
