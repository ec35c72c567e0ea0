"""Equations of the simulated carbon-nanotube fibre cathode, as pure numpy functions.

SI units inside (metres, volts, amperes, kelvin, pascals, watts); work functions, decay
widths and activation energies in electronvolts, as the trade writes them. The emission
equations themselves (Murphy–Good J, v(f), t(f), decay width, thermal–field factor,
Child–Langmuir) live in ``sequencer.physics``; this module holds what the cathode model adds
on top: geometry and enhancement, screening, heating, failure, adsorbates, space charge,
gas kinetics and noise. Every function names its source; "from memory" marks a formula or
value quoted from memory rather than read off the paper while writing it.
"""
from __future__ import annotations

import numpy as np

from sequencer.physics import K_B_EV, K_CL

# --- constants (CODATA 2018, the values scipy.constants carries; tests compare) ---------
K_B = 1.380649e-23            # Boltzmann constant, J/K
E_CHARGE = 1.602176634e-19    # elementary charge, C
M_E = 9.1093837015e-31        # electron mass, kg
EPS0 = 8.8541878128e-12       # vacuum permittivity, F/m
SIGMA_SB = 5.670374419e-8     # Stefan–Boltzmann constant, W m^-2 K^-4
AMU = 1.66053906660e-27       # atomic mass constant, kg

# Molar masses of residual-gas species, g/mol (IUPAC standard atomic weights, from memory).
MOLAR_MASS_G = {
    "H2": 2.016, "He": 4.003, "CH4": 16.043, "H2O": 18.015, "N2": 28.014, "CO": 28.010,
    "O2": 31.998, "Ar": 39.948, "CO2": 44.009,
}
# Species that oxidise carbon at elevated temperature (common practice, no source).
OXIDISING = ("H2O", "O2", "CO2")


# --- field enhancement ---------------------------------------------------------------------

def hyperboloid_apex_field_per_volt(r_apex, gap):
    """Apex field per volt (1/m) of a hyperboloid-of-revolution cathode with apex radius
    ``r_apex`` whose apex sits at ``gap`` from a flat anode, from the exact solution in
    prolate spheroidal coordinates (C.F. Eyring, S.S. Mackeown and R.A. Millikan, Phys.
    Rev. 31 (1928) 900; from memory). The cathode is the surface eta = eta0 with
    eta0^2 = d/(d + r) and focal distance a = d/eta0; the anode is eta = 0:
        F_apex / V = 1 / (a (1 - eta0^2) artanh(eta0)).
    For r << d this tends to the familiar 2 / (r ln(4 d / r))."""
    r = np.asarray(r_apex, dtype=float)
    d = np.asarray(gap, dtype=float)
    eta0 = np.sqrt(d / (d + r))
    a = d / eta0
    return 1.0 / (a * (1.0 - eta0 * eta0) * np.arctanh(eta0))


def hyperboloid_surface_field_ratio(setback, r_apex, gap):
    """Surface field at an axial distance ``setback`` behind the apex, relative to the apex
    field, on the same hyperboloid (Eyring, Mackeown and Millikan 1928, from memory). With
    xi = (d + s)/d the prolate coordinate of the surface point,
        F(s) / F_apex = ((1 - eta0^2) / (xi^2 - eta0^2))^(1/2).
    Used for the fibre: an emitter on the end or the side at setback s sees the fibre-level
    field F_apex(V) times this ratio (the fibre is approximated by the hyperboloid whose apex
    radius is the fibre radius; the real cylinder's side field falls faster far from the end)."""
    s = np.asarray(setback, dtype=float)
    d = float(gap)
    eta0sq = d / (d + float(r_apex))
    xi = (d + s) / d
    return np.sqrt((1.0 - eta0sq) / (xi * xi - eta0sq))


def post_enhancement(height, radius):
    """Apex field enhancement factor of a hemisphere-on-post emitter standing on a flat
    conductor in a uniform field, the fit of R.G. Forbes, C.J. Edgcombe and U. Valdrè,
    Ultramicroscopy 95 (2003) 57 to the numerical results of C.J. Edgcombe and U. Valdrè,
    J. Microsc. 203 (2001) 188 (from memory):
        gamma ~= 1.2 (h/r + 2.15)^0.90,   fitted for 30 <= h/r <= 2000 (within a few %).
    ``height`` h is the total height, ``radius`` r the post and cap radius."""
    ratio = np.asarray(height, dtype=float) / np.asarray(radius, dtype=float)
    return 1.2 * np.power(ratio + 2.15, 0.90)


def screening_factor(spacing, height, c=2.3172):
    """Reduction of an emitter's enhancement by its neighbours, beta/beta_isolated =
    1 - exp(-c s/h) with c = 2.3172 (fit by S.H. Jo, Y. Tu, Z.P. Huang, D.L. Carnahan, D.Z.
    Wang and Z.F. Ren, Appl. Phys. Lett. 82 (2003) 3520, to the simulations of J.-M. Bonard,
    N. Weiss, H. Kind, T. Stöckli, L. Forró, K. Kern and A. Châtelain, Adv. Mater. 13 (2001)
    184; from memory). s is the distance to the neighbours, h the emitter height; screening
    is negligible beyond s ~ 2h, in line with Bonard's reported optimum spacing."""
    s = np.asarray(spacing, dtype=float)
    h = np.asarray(height, dtype=float)
    return -np.expm1(-c * s / h)


def nearest_neighbour_spacing(u, density):
    """Nearest-neighbour distance of a 2-D Poisson point pattern of areal ``density``
    (1/m^2) by inverse transform of a uniform deviate u in (0, 1]: P(s > x) =
    exp(-pi n x^2) (P. Hertz 1909; S. Chandrasekhar, Rev. Mod. Phys. 15 (1943) 1, from
    memory); mean 1/(2 n^(1/2))."""
    u = np.asarray(u, dtype=float)
    return np.sqrt(-np.log(u) / (np.pi * np.asarray(density, dtype=float)))


# --- space charge ------------------------------------------------------------------------

def planar_gap_length(E_surface, J, V):
    """Exact 1-D (planar) Poisson result for electrons leaving a cathode at rest with surface
    field ``E_surface`` (V/m) and current density ``J`` (A/m^2): the distance over which
    the potential rises by ``V``. Integrating Poisson's equation once gives
        E(x)^2 = E_s^2 + kappa phi(x)^(1/2),   kappa = 4 J (m_e / 2e)^(1/2) / eps0,
    and once more, with s = (1 + kappa V^(1/2) / E_s^2)^(1/2),
        L = (4 V / (3 E_s)) (s + 2) / (s + 1)^2
    (the planar analysis of Y.Y. Lau, Y. Liu and R.K. Parker, Phys. Plasmas 1 (1994) 2082,
    and R.G. Forbes, J. Appl. Phys. 104 (2008) 084303; written here in a form without
    cancellation). L -> V/E_s without space charge; E_s -> 0 gives Child–Langmuir."""
    Es = np.asarray(E_surface, dtype=float)
    kappa = 4.0 * np.asarray(J, dtype=float) * np.sqrt(M_E / (2.0 * E_CHARGE)) / EPS0
    s = np.sqrt(1.0 + kappa * np.sqrt(V) / (Es * Es))
    return (4.0 * V / (3.0 * Es)) * (s + 2.0) / np.square(s + 1.0)


def space_charge_ratio(J, E_laplace, length):
    """Emitted J over the planar Child–Langmuir J of a local diode of length ``length`` at
    voltage E_laplace * length (Child 1911; Langmuir 1913): the strength of space charge.
    Below about 1e-5 the surface field is reduced by less than 1e-5 (from the expansion of
    ``planar_gap_length``: E_s/E_L ~= 1 - (16/27) ratio)."""
    Vloc = np.asarray(E_laplace, dtype=float) * length
    return np.asarray(J, dtype=float) * np.square(length) / (K_CL * np.power(Vloc, 1.5))


def space_charge_surface_field(E_laplace, length, j_and_slope, theta0=None, tol=1e-6, max_iter=80):
    """Self-consistent surface field of an emitter with space charge, applied locally: the
    apex is treated as a planar diode of ``length`` (about one apex radius) at voltage
    V = E_laplace * length, and the exact planar relation ``planar_gap_length`` is solved
    for E_s with J = J(E_s) the field-emission law. This is the smooth transition from
    emission-limited (E_s -> E_laplace) to space-charge-limited current (J -> Child–Langmuir)
    of Lau, Liu and Parker 1994 and Forbes 2008, used per emitter.

    ``j_and_slope(E)`` returns (J, n) with n = d ln J / d ln E. The residual
    g(x) = ln L(E_s = e^x E_L) - ln(length) falls monotonically with x = ln(E_s/E_L) in
    (-inf, 0]; it is solved by Newton's method on x with the analytic derivative
        d ln L / d ln E_s = -1 + (s/(s+2) - 2 s/(s+1)) (s^2 - 1)/(2 s^2) (n - 2),
    kept inside a shrinking bracket (bisection when a step leaves it), warm-started from
    ``theta0``. Returns (E_s, J, theta)."""
    EL = np.asarray(E_laplace, dtype=float)
    Vloc = EL * length
    lnL = np.log(length)
    c4V = 4.0 * Vloc / 3.0
    kfac = 4.0 * np.sqrt(M_E / (2.0 * E_CHARGE)) / EPS0 * np.sqrt(Vloc)
    x = np.zeros_like(EL) if theta0 is None else np.log(np.minimum(np.maximum(theta0, 1e-9), 1.0))
    lo = hi = None
    for it in range(max_iter):
        Es = EL * np.exp(x)
        J, n = j_and_slope(Es)
        s2 = 1.0 + kfac * J / (Es * Es)
        sr = np.sqrt(s2)
        g = np.log(c4V / Es * (sr + 2.0) / np.square(sr + 1.0)) - lnL
        dg = -1.0 + (sr / (sr + 2.0) - 2.0 * sr / (sr + 1.0)) * (s2 - 1.0) / (2.0 * s2) * (n - 2.0)
        step = g / dg
        if np.abs(step).max() < tol:       # converged: J at x is within n * tol of the root
            return Es, J, np.exp(x)
        if lo is None:
            lo = np.full_like(EL, np.log(1e-9))     # g(lo) > 0: almost no field, almost no current
            hi = np.zeros_like(EL)                  # g(0) <= 0: space charge only lowers the field
        lo = np.where(g > 0, x, lo)
        hi = np.where(g > 0, hi, x)
        nxt = x - step
        x = np.where((nxt >= lo) & (nxt <= hi), nxt, 0.5 * (lo + hi))
    Es = EL * np.exp(x)
    return Es, j_and_slope(Es)[0], np.exp(x)


# --- heating -----------------------------------------------------------------------------

def nottingham_energy_ev(T, decay_width_ev):
    """Mean energy (eV) deposited in the emitter per emitted electron by the Nottingham
    effect, eps = pi k T cot(pi k T / d_F), tending to d_F at T = 0 (heating) and changing
    sign at the inversion temperature (W.B. Nottingham, Phys. Rev. 59 (1941) 907; in the
    low-temperature form of L.W. Swanson, L.C. Crouser and F.M. Charbonnier, Phys. Rev. 151
    (1966) 327; from memory). p = pi k T / d_F is clipped at 2 (well past inversion, where
    this expansion fails; the emitter is then cooled, as observed)."""
    T = np.asarray(T, dtype=float)
    d = np.asarray(decay_width_ev, dtype=float)
    p = np.minimum(np.maximum(np.pi * K_B_EV * T / d, 1e-9), 2.0)
    return d * p / np.tan(p)


def nottingham_inversion_temperature(decay_width_ev):
    """Temperature at which Nottingham heating turns into cooling, T* = d_F / (2 k)
    (from p = pi/2 in ``nottingham_energy_ev``); numerically T* ~= 5.67e-5 F/phi^(1/2) K with
    F in V/cm (F.M. Charbonnier, R.W. Strayer, L.W. Swanson and E.E. Martin, Phys. Rev.
    Lett. 13 (1964) 397; from memory)."""
    return np.asarray(decay_width_ev, dtype=float) / (2.0 * K_B_EV)


def resistivity(rho0, tcr, T, T0=295.0):
    """Linear temperature dependence of resistivity rho = rho0 (1 + alpha (T - T0))
    (common practice, no source); floored at 1 % of rho0 for negative alpha."""
    return rho0 * np.maximum(1.0 + tcr * (np.asarray(T, dtype=float) - T0), 0.01)


def radiation_linearised(T_ref, T_env, emissivity, perimeter):
    """Grey-body radiation per unit length eps sigma P (T^4 - T_env^4) (Stefan–Boltzmann law)
    linearised about T_ref as g (T - T_lin): g = 4 eps sigma P T_ref^3,
    T_lin = T_ref - (T_ref^4 - T_env^4) / (4 T_ref^3). Returns (g, T_lin)."""
    T_ref = np.asarray(T_ref, dtype=float)
    g = 4.0 * emissivity * SIGMA_SB * perimeter * T_ref ** 3
    T_lin = T_ref - (T_ref ** 4 - T_env ** 4) / (4.0 * T_ref ** 3)
    return g, T_lin


def fin_tip_temperature(T_base, q_gen, p_tip, length, kA, g_loss, T_lin):
    """Tip temperature of a 1-D fin (an emitter on its fibre) in steady state:
        kA T'' = -q_gen + g (T - T_lin),  T(0) = T_base,  kA T'(L) = p_tip,
    with uniform heat generation q_gen (W/m, Joule), heat p_tip (W) delivered at the tip
    (Nottingham) and a linear loss g (T - T_lin) (linearised radiation). Closed form with
    m = (g/kA)^(1/2) (textbook fin analysis, e.g. F.P. Incropera and D.P. DeWitt,
    Fundamentals of Heat and Mass Transfer, ch. 3; from memory):
        T(L) = T_base + S1 (q_gen + g (T_lin - T_base)) / kA + p_tip S2 / kA,
        S1 = (1 - sech(mL)) / m^2  (-> L^2/2),  S2 = tanh(mL) / m  (-> L).
    The thermal time of a nanotube emitter is microseconds, so the steady state holds at
    every sample (quasi-static)."""
    L = np.asarray(length, dtype=float)
    m = np.maximum(np.sqrt(np.asarray(g_loss, dtype=float) / kA), 1e-4 / L)
    x = m * L
    S1 = (1.0 - 1.0 / np.cosh(np.minimum(x, 50.0))) / (m * m)
    S2 = np.tanh(x) / m
    return T_base + (S1 * (q_gen + g_loss * (T_lin - T_base)) + p_tip * S2) / kA


def failure_temperature(p_oxidising, T_sublimation, T_oxidation, p_half):
    """Temperature above which an emitter burns. In vacuum carbon is lost by sublimation;
    with an oxidising residual gas (water, oxygen) the apex is etched well below that
    (common practice, no source). Interpolated smoothly between the two:
        T_fail = T_sub - (T_sub - T_ox) x / (1 + x),   x = p_ox / p_half."""
    x = np.asarray(p_oxidising, dtype=float) / p_half
    return T_sublimation - (T_sublimation - T_oxidation) * x / (1.0 + x)


def lumped_temperature_step(T, T_ambient, power, conductance, tau, dt):
    """Exact step of a first-order thermal node C dT/dt = P - G (T - T_amb) with constant P
    over dt, C = G tau (Newton cooling; common practice, no source)."""
    T_eq = T_ambient + power / conductance
    return T_eq + (T - T_eq) * np.exp(-dt / tau)


# --- gas kinetics and adsorbates -------------------------------------------------------------

def hertz_knudsen_flux(p, mass_kg, T):
    """Molecular impingement rate per unit area, Phi = p / (2 pi m k T)^(1/2) (Hertz 1882,
    Knudsen 1909; kinetic theory: n <c> / 4)."""
    return np.asarray(p, dtype=float) / np.sqrt(2.0 * np.pi * mass_kg * K_B * T)


def adsorption_rate(p_total, fractions, sticking, T_gas, site_density):
    """Rate (1/s) at which empty adsorption sites fill: sum over species of sticking
    coefficient x Hertz–Knudsen flux of its partial pressure / site density (Langmuir
    kinetics, I. Langmuir, J. Am. Chem. Soc. 40 (1918) 1361)."""
    rate = 0.0
    for name, frac in fractions.items():
        mass = MOLAR_MASS_G[name] * 1e-3 / 6.02214076e23
        rate = rate + sticking.get(name, 0.0) * hertz_knudsen_flux(frac * p_total, mass, T_gas)
    return rate / site_density


def desorption_rate(T, energy_ev, prefactor_hz):
    """First-order thermal desorption rate k = nu exp(-E_d / k T) (Polanyi–Wigner; P.A.
    Redhead, Vacuum 12 (1962) 203)."""
    return prefactor_hz * np.exp(-energy_ev / (K_B_EV * np.asarray(T, dtype=float)))


def coverage_step(theta, k_ads, k_des, dt):
    """Exact step of Langmuir kinetics d theta/dt = k_ads (1 - theta) - k_des theta over dt
    with constant rates (Langmuir 1918)."""
    k = k_ads + k_des
    theta_eq = np.where(k > 0, k_ads / np.where(k > 0, k, 1.0), theta)
    return theta_eq + (theta - theta_eq) * np.exp(-k * dt)


def effective_work_function(phi_clean, theta, shift_ev):
    """Work function with an adsorbate layer, linear in coverage, phi = phi_clean + theta *
    Delta phi: the low-coverage dipole-layer (Helmholtz) form, Delta phi = -e mu n / eps0
    (common practice, no source). Adsorbed water and similar species lower the barrier of
    nanotube emitters (negative shift)."""
    return phi_clean + np.asarray(theta, dtype=float) * shift_ev


def ion_current(I_electron, p, gap, T_gas=295.0, cross_section=1e-20):
    """Ion current produced in the gap by electron-impact ionisation of the residual gas,
    I_ion = I sigma n d with n = p / k T (common practice, no source; sigma ~ 1e-20 m^2 for
    few-hundred-eV electrons in common gases, from memory). It flows back to the cathode,
    so back-bombardment grows with pressure x current."""
    return I_electron * cross_section * (p / (K_B * T_gas)) * gap


# --- noise ---------------------------------------------------------------------------------

def ar1_coefficients(dt, taus):
    """Exact discretisation of Ornstein–Uhlenbeck processes with correlation times ``taus``
    at step dt: x <- a x + (1 - a^2)^(1/2) N(0, 1), a = exp(-dt / tau) (unit variance;
    Gillespie, Phys. Rev. E 54 (1996) 2084). A sum of such processes with correlation times
    spaced evenly in log has a 1/f spectrum between the extreme corners (common practice,
    no source)."""
    a = np.exp(-dt / np.asarray(taus, dtype=float))
    return a, np.sqrt(1.0 - a * a)


def shot_noise_sigma(current, bandwidth_hz):
    """RMS shot noise of a current, (2 e I B)^(1/2) (W. Schottky, Ann. Phys. 57 (1918) 541)."""
    return np.sqrt(2.0 * E_CHARGE * np.abs(current) * bandwidth_hz)


def measurement_noise_sigma(current, relative, floor_a):
    """RMS noise of an ammeter reading: a relative part plus a floor added in quadrature
    (common practice, no source)."""
    return np.hypot(relative * np.abs(current), floor_a)


def noisy_current(rng, current, bandwidth_hz, relative=0.0, floor_a=0.0):
    """One reading of ``current`` with shot noise over ``bandwidth_hz`` and measurement
    noise (``shot_noise_sigma``, ``measurement_noise_sigma``), drawn from ``rng``."""
    sigma = np.hypot(shot_noise_sigma(current, bandwidth_hz),
                     measurement_noise_sigma(current, relative, floor_a))
    return float(current + sigma * rng.standard_normal())
