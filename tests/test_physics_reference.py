"""Field-emission constants and barrier functions against outside references.

Sources are named beside each check.
"""
import numpy as np
import pytest
import scipy.constants as C
from scipy import integrate

from sequencer import physics as P


def test_first_fn_constant_from_codata():
    # a = e^3/(8 pi h), in A eV V^-2: CODATA via scipy.constants; tabulated value
    # 1.541434e-6 (Forbes and Deane, Proc. R. Soc. A 463 (2007) 2907, table 1).
    a = C.e ** 3 / (8 * np.pi * C.h) / C.e
    assert P.A_FN == pytest.approx(a, rel=1e-6)


def test_second_fn_constant_from_codata_is_per_metre():
    # b = (4/3)(2 m_e)^(1/2)/(e hbar) in eV^-3/2 V m^-1 (6.830890 per nm, Forbes and
    # Deane 2007, table 1); CODATA via scipy.constants.
    b = 4.0 / 3.0 * np.sqrt(2 * C.m_e) / (C.e * C.hbar) * C.e ** 1.5
    assert P.B_FN == pytest.approx(b, rel=1e-6)
    assert P.B_FN / 1e9 == pytest.approx(6.830890, rel=1e-6)


def test_schottky_constant_from_codata():
    # c_S^2 = e^3/(4 pi eps0) in eV^2 V^-1 m (1.439964 eV^2 V^-1 nm, Forbes 2006).
    cs2 = C.e ** 3 / (4 * np.pi * C.epsilon_0) / C.e ** 2
    assert P.CS2 == pytest.approx(cs2, rel=1e-6)


def test_child_langmuir_constant_from_codata():
    # (4 eps0/9) sqrt(2e/m_e) ~ 2.33e-6 A V^-3/2 (Child 1911, Langmuir 1913).
    k = 4 * C.epsilon_0 / 9 * np.sqrt(2 * C.e / C.m_e)
    assert P.K_CL == pytest.approx(k, rel=1e-5)
    assert P.child_langmuir_j(100.0, 1e-3) == pytest.approx(k * 100 ** 1.5 / 1e-6, rel=1e-5)


def _v_quadrature(f):
    # v(f) = (3/2) * integral of sqrt(1 - x - f/(4x)) between the barrier's classical
    # turning points: the JWKB exponent of the Schottky–Nordheim barrier in scaled
    # coordinates (Forbes and Deane 2007, section 2).
    x1 = (1 - np.sqrt(1 - f)) / 2
    x2 = (1 + np.sqrt(1 - f)) / 2
    val, _ = integrate.quad(lambda x: np.sqrt(max(1 - x - f / (4 * x), 0.0)), x1, x2,
                            epsabs=1e-13, epsrel=1e-12)
    return 1.5 * val


@pytest.mark.parametrize("f", [0.01, 0.1, 0.3, 0.48, 0.7, 0.95])
def test_elliptic_v_matches_quadrature(f):
    assert P.v_exact(f) == pytest.approx(_v_quadrature(f), rel=1e-9)


@pytest.mark.parametrize("f", [0.05, 0.3, 0.6, 0.9])
def test_elliptic_t_matches_definition(f):
    # t = v - (4/3) f dv/df (Forbes and Deane 2007), derivative by central difference
    # of the quadrature.
    h = 1e-5
    dv = (_v_quadrature(f + h) - _v_quadrature(f - h)) / (2 * h)
    assert P.t_exact(f) == pytest.approx(_v_quadrature(f) - 4.0 / 3.0 * f * dv, rel=1e-7)


def test_forbes_approximation_error_maxima():
    # Forbes 2006 (APL 89, 113122) reports max |error| about 0.33 % for v near f = 0.3
    # and about 0.39 % for t near f = 0.48. Measured here on a fine grid.
    f = np.linspace(1e-4, 0.99, 200001)
    ev = np.abs(P.v_approx(f) / P.v_exact(f) - 1)
    et = np.abs(P.t_approx(f) / P.t_exact(f) - 1)
    iv, it = np.argmax(ev), np.argmax(et)
    assert ev[iv] == pytest.approx(0.00332, abs=0.00003)
    assert f[iv] == pytest.approx(0.30, abs=0.02)
    assert et[it] == pytest.approx(0.00386, abs=0.00003)
    assert f[it] == pytest.approx(0.48, abs=0.02)


def test_barrier_end_points():
    # v(0) = 1, v(1) = 0, t(1) = pi / (2 sqrt 2) (Forbes and Deane 2007).
    assert P.v_exact(0.0) == pytest.approx(1.0)
    assert P.v_exact(1.0) == pytest.approx(0.0, abs=1e-12)
    assert P.t_exact(1.0) == pytest.approx(np.pi / (2 * np.sqrt(2)), rel=1e-12)
