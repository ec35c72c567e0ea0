"""Lab notebook: the online Fowler–Nordheim fit the watchdog detrends ln I against.

Reference: the FN form I = A V^2 exp(-B/V) is the straight line ln(I/V^2) = ln A - B (1/V)
(Fowler & Nordheim, Proc. R. Soc. Lond. A 119 (1928) 173). The MAD-to-sigma factor 1.4826 is
1/Phi^-1(3/4), checked here through scipy.stats.norm (exact function). Noise is seeded.
"""
import math

import numpy as np
import pytest
from scipy.stats import norm

from sequencer.fnfit_online import (MAD_TO_SIGMA, MODEL_REL, SIGMA_FLOOR, Detrender, FNFit,
                                    Residuals)

A, B = 1e-8, 1.5e4


def fn(v, b=B):
    return A * v * v * math.exp(-b / v)


def test_exact_fn_data_gives_the_line():
    fit = FNFit()
    for k, v in enumerate(np.linspace(1000, 1600, 30)):
        fit = fit.add(float(k), float(v), fn(float(v)))
    assert fit.slope == pytest.approx(-B, rel=1e-9)
    assert fit.predict_ln_i(1700.0) == pytest.approx(math.log(fn(1700.0)), abs=1e-9)
    assert fit.dlni_dv(1500.0) == pytest.approx(2 / 1500 + B / 1500 ** 2, rel=1e-9)


def test_forgetting_follows_a_changing_cathode():
    # B changes from 1.5e4 V to 1.2e4 V at t = 100 s (the emitter conditions); sweeping on,
    # after 5 memory times (300 s) the slope is within 1 % of the new value.
    fit = FNFit(memory_s=60.0)
    for k in range(400):
        v = 1000.0 + 300.0 * (0.5 + 0.5 * math.sin(k / 5.0))
        fit = fit.add(float(k), v, fn(v, B if k < 100 else 1.2e4))
    assert fit.slope == pytest.approx(-1.2e4, rel=0.01)


def test_constant_voltage_keeps_the_last_slope_and_ignores_bad_points():
    fit = FNFit()
    for k, v in enumerate(np.linspace(1000, 1400, 20)):
        fit = fit.add(float(k), float(v), fn(float(v)))
    b = fit.slope
    for k in range(20, 200):
        fit = fit.add(float(k), 1400.0, fn(1400.0) * (1 + 0.01 * math.sin(k)))
    assert fit.slope == pytest.approx(b, rel=1e-3)   # the dwell adds no spread in 1/V
    assert fit.add(300.0, -5.0, 1e-6) is fit and fit.add(300.0, 1000.0, math.nan) is fit
    assert fit.add(math.nan, 1000.0, 1e-6) is fit


def test_robust_sigma_is_mad_times_1_4826_and_floored():
    assert MAD_TO_SIGMA == pytest.approx(1 / norm.ppf(0.75), rel=1e-4)
    rng = np.random.default_rng(5)       # seed 5
    r = Residuals()
    for x in 0.05 * rng.standard_normal(31):
        r = r.add(float(x))
    assert r.sigma == pytest.approx(0.05, rel=0.35)
    # one wild outlier barely moves it (that is why MAD, not std)
    r2 = r.add(50.0)
    assert r2.sigma == pytest.approx(r.sigma, rel=0.2)
    flat = Residuals()
    for _ in range(10):
        flat = flat.add(0.0)
    assert flat.sigma == SIGMA_FLOOR
    assert math.isnan(Residuals().sigma)


def test_detrender_scores_against_the_past():
    d = Detrender()
    for k, v in enumerate(np.linspace(1000, 1400, 40)):
        j = d.judge(float(v), fn(float(v)))
        d = d.learn(float(k), float(v), fn(float(v)), j)
    j = d.judge(1410.0, fn(1410.0) * math.exp(0.2))
    # the scale is the noise floor widened by MODEL_REL x the change the fit predicts from
    # the last learned voltage (1400 V) to this one; the fit is exact on an FN stream, so
    # that change is ln fn(1410) - ln fn(1400)
    step = math.log(fn(1410.0)) - math.log(fn(1400.0))
    assert j.residual == pytest.approx(0.2, abs=1e-6)
    assert j.z == pytest.approx(0.2 / math.hypot(SIGMA_FLOOR, MODEL_REL * step), rel=1e-6)
    # at the last learned voltage the scale is the noise alone
    j = d.judge(1400.0, fn(1400.0) * math.exp(0.2))
    assert j.z == pytest.approx(0.2 / SIGMA_FLOOR, rel=1e-6)


def test_a_voltage_step_is_not_a_spike_but_a_jump_at_constant_voltage_is():
    # Set: 60 s at 500 V, then a 10 V step whose response the fit mispredicts by 15 %
    # (a conditioning fibre's slope drifts). Expected: the step scores well under the 5
    # sigma spike threshold; the same 15 % jump with no voltage change scores above it.
    d = Detrender()
    rng = np.random.default_rng(11)      # seed 11
    for k in range(60):
        i = fn(500.0) * math.exp(0.02 * rng.standard_normal())
        d = d.learn(float(k), 500.0, i, d.judge(500.0, i))
    for k in range(60, 90):
        i = fn(510.0) * math.exp(0.02 * rng.standard_normal())
        d = d.learn(float(k), 510.0, i, d.judge(510.0, i))
    step = d.judge(520.0, fn(520.0) * math.exp(0.15))
    jump = d.judge(510.0, fn(510.0) * math.exp(0.15))
    assert step.z < 5.0 < jump.z


def test_a_stepped_climb_from_scratch_calls_no_spikes():
    # Set: a condition-like climb from 320 V in 10 V steps held 30 s each, on an FN
    # cathode with 2 % scatter (seed 13), judged from the very first reading (no slope
    # known yet). Expected: no reading scores above 5 sigma. Before the fit knew a slope
    # every step scored ~15 sigma, and since spikes were not learned it never learned one.
    d = Detrender()
    rng = np.random.default_rng(13)
    worst = 0.0
    k = 0
    for v in np.arange(320.0, 420.0, 10.0):
        for _ in range(30):
            i = fn(float(v), b=6000.0) * math.exp(0.02 * rng.standard_normal())
            j = d.judge(float(v), i)
            if math.isfinite(j.z):
                worst = max(worst, j.z)
            if not (math.isfinite(j.z) and j.z > 5.0):
                d = d.learn(float(k), float(v), i, j)
            k += 1
    assert d.fit.slope is not None
    assert worst < 5.0
