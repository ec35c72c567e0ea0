"""Figures of merit, hysteresis, dwell stability and threshold against gap.

Sources beside each check.
"""
import numpy as np
import pytest
import scipy.constants as C
from scipy.optimize import brentq

from sequencer.analysis import hysteresis, merit, run, stability
from test_analysis_support import mg_current, sweep_points, write_run_folder

PHI, GAP, D = 4.50, 500e-6, 50e-6


def test_child_langmuir_against_scipy_constants():
    # J = (4 eps0 / 9) sqrt(2 e / m_e) V^(3/2) / d^2 (Child 1911, Langmuir 1913), CODATA
    # constants through scipy.constants; 1.2 kV over 500 um.
    V = np.linspace(300, 1200, 10)
    I = 1e-9 * np.exp(V / 100)
    m = merit.figures_of_merit(V, I, gap=GAP, diameter=D)
    j_cl = 4 * C.epsilon_0 / 9 * np.sqrt(2 * C.e / C.m_e) * 1200.0 ** 1.5 / GAP ** 2
    assert m["child_langmuir_j_a_per_m2"] == pytest.approx(j_cl, rel=1e-5)
    assert m["j_over_child_langmuir"] == pytest.approx(I.max() / (np.pi * D ** 2 / 4) / j_cl, rel=1e-5)


def test_turn_on_and_threshold_fields_at_the_conventional_densities():
    # 10 uA/cm^2 = 0.1 A/m^2 and 10 mA/cm^2 = 100 A/m^2 on the fibre's cross-section (pi D^2/4),
    # compared with root-finding on the reference law; fine voltage steps, so linear
    # interpolation in ln J is good to 0.5 %.
    V = np.arange(500.0, 1400.0, 5.0)
    I = mg_current(V, 2000, 1e-13, GAP, PHI)
    m = merit.figures_of_merit(V, I, gap=GAP, diameter=D, v_ref=1000.0)
    ax = np.pi * D ** 2 / 4
    for key, j in (("turn_on", 0.1), ("threshold", 100.0)):
        v_true = brentq(lambda v: np.log(mg_current(v, 2000, 1e-13, GAP, PHI) / ax / j), 400, 1500)
        assert m[f"{key}_v"] == pytest.approx(v_true, rel=0.005)
        assert m[f"{key}_field_v_per_m"] == pytest.approx(v_true / GAP, rel=0.005)
    assert m["i_at_v_ref_a"] == pytest.approx(mg_current(1000.0, 2000, 1e-13, GAP, PHI), rel=0.01)


def test_hysteresis_sign_and_size():
    # Down branch needs 10 V more for the same current (a worse emitter on the way down):
    # dV = +10 V; the up branch carries more current, so the FN-coordinate area is positive.
    V = np.linspace(600, 1200, 25)
    I = mg_current(V, 2000, 1e-13, GAP, PHI)
    h = hysteresis.hysteresis(V, I, V + 10.0, I, PHI)
    assert h["dv_v"] == pytest.approx(10.0, rel=0.02)
    assert h["fn_area"] > 0
    h2 = hysteresis.hysteresis(V + 10.0, I, V, I, PHI)
    assert h2["dv_v"] == pytest.approx(-10.0, rel=0.02)
    assert h2["fn_area"] < 0


def test_allan_deviation_of_white_noise_falls_as_one_over_root_tau():
    # White fractional noise of std sigma: ADEV(tau) = sigma / sqrt(tau / tau0)
    # (W.J. Riley, NIST SP 1065 (2008), section 5.2 / table of noise types). Seed 51.
    rng = np.random.default_rng(51)
    sigma = 0.01
    t = np.arange(4096) * 0.5
    I = 1e-6 * (1 + sigma * rng.standard_normal(t.size))
    s = stability.dwell_stability(t, I)
    taus, adev = np.array(s["allan_tau_s"]), np.array(s["allan_deviation"])
    for tau, a in zip(taus[:6], adev[:6]):
        assert a == pytest.approx(sigma / np.sqrt(tau / 0.5), rel=0.15)
    assert s["relative_fluctuation"] == pytest.approx(sigma, rel=0.05)
    assert s["bursts"] == 0


def test_drift_and_bursts_are_found():
    # 1 uA with a drift of -5 % per hour over 20 min, 0.2 % noise, and three bursts of +30 %
    # lasting 2 readings each (seed 52).
    rng = np.random.default_rng(52)
    t = np.arange(0, 1200, 1.0)
    I = 1e-6 * (1 - 0.05 * t / 3600) * (1 + 0.002 * rng.standard_normal(t.size))
    for k in (200, 600, 1000):
        I[k:k + 2] *= 1.3
    s = stability.dwell_stability(t, I)
    assert s["drift_per_h"] == pytest.approx(-0.05, abs=0.01)
    assert s["bursts"] == 3
    assert s["largest_burst_relative"] == pytest.approx(0.3, abs=0.05)


def test_threshold_voltage_against_gap(tmp_path):
    # Three runs of KL-F12 at gaps 300, 500, 700 um with a gap-independent beta = 2000:
    # F = beta V / d, so the threshold voltage is V_th = (F_th / beta) d, a line through the
    # origin with slope the macroscopic threshold field (found here by root-finding).
    ax = np.pi * D ** 2 / 4
    results = []
    for gap_um in (300, 500, 700):
        g = gap_um * 1e-6
        law = (lambda gg: (lambda V: mg_current(V, 2000, 1e-13, gg, PHI)))(g)
        f = write_run_folder(str(tmp_path), f"2026120{gap_um // 100}T100000Z-kl-f12-gap-{gap_um:06d}", law,
                             sweep_points(0.3 * gap_um * 4, 0.3 * gap_um * 9.5, 0.3 * gap_um * 0.05, down=False),
                             seed=60 + gap_um // 100, gap=f"{gap_um} um", samples_per_point=1, floor_sigma=0.0,
                             zero_samples=0)
        results.append(run.analyze(f, run.Options(phi=PHI), figures=False))
    v_true = brentq(lambda v: np.log(mg_current(v, 2000, 1e-13, 500e-6, PHI) / ax / 100.0), 300, 3000)
    mg = run.multigap_summary(results)
    assert mg["field_v_per_m"] == pytest.approx(v_true / 500e-6, rel=0.02)
    assert abs(mg["offset_v"]) < 0.02 * v_true
    # the third run's history lists all three (same sample, same runs/ directory)
    assert [h["run"] for h in results[-1]["history"]] == sorted(h["run"] for h in results[-1]["history"])
    assert len(results[-1]["history"]) == 3
