"""A resistance in series with the gap: the FN plot bends, the fit recovers R.

Set: phi = 4.50 eV, gap 500 um, beta 2000, area 1e-13 m^2, R = 10 MOhm in series; supply
voltages 560-1400 V; the gap voltage solves V_gap = V - I(V_gap) R (bisection in the
support module); the recorded gap voltage is the supply voltage (the rig does not know R).
1 % noise, seed 41.

Expected bend (first-order, derived here from the FN form of the law, no source needed
beyond the chain rule): with ln(I/V_g^2) = C + S_g / V_g, the apparent FN slope against the
supply voltage V is
    S_app = -V^2 [ k / (1 + R I k) - 2/V ],   k = d ln I / d V_g = 2/V_g - S_g / V_g^2,
so it flattens (|S_app| < |S_g|) as R I k grows at high current.
"""
import numpy as np
import pytest

from sequencer.analysis import forms, run
from test_analysis_support import mg_current, sweep_points, write_run_folder

PHI, GAP, R = 4.50, 500e-6, 10e6


def law(V):
    return mg_current(V, 2000, 1e-13, GAP, PHI)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    return write_run_folder(str(tmp_path_factory.mktemp("rs")), "rs", law, sweep_points(560, 1400, 20, down=False),
                            seed=41, floor_sigma=0.0, zero_samples=0, samples_per_point=1, series_r=R,
                            record_gap_voltage=False)


def test_series_resistance_bends_the_fn_plot_as_expected(folder):
    res = run.analyze(folder, run.Options(phi=PHI, gap=GAP), figures=False)
    from sequencer.analysis import csvin, hygiene
    pts = hygiene.prepare(csvin.read_any(folder))
    V, I = pts.V, pts.I
    x, y = forms.transform(V, I, "FN", PHI)
    top = slice(-6, None)
    s_top = np.polyfit(x[top], y[top], 1)[0]
    # expected from the formula in the module docstring, at the top group's middle
    Vm, Im = np.median(V[top]), np.exp(np.median(np.log(I[top])))
    lo = slice(0, 6)
    S_g = np.polyfit(x[lo], y[lo], 1)[0]            # low current: R I k << 1, the true slope
    Vg = Vm - Im * R
    k = 2 / Vg - S_g / Vg ** 2
    s_expected = -Vm ** 2 * (k / (1 + R * Im * k) - 2 / Vm)
    print(f"true slope {S_g:.4g}, apparent top slope {s_top:.4g}, expected {s_expected:.4g}")
    assert abs(s_top) < 0.8 * abs(S_g)
    assert s_top == pytest.approx(s_expected, rel=0.15)
    # the analysis sees the bend: a second, flatter regime that fails the orthodoxy test
    br = res["branches"]["up"]
    assert br["regimes"]["n_segments"] >= 2
    assert br["segments"][-1]["forms"]["FN"]["orthodoxy"]["verdict"] == "clearly unreasonable"
    assert res["trust"]["verdict"] == "do not trust"


def test_series_resistance_is_recovered_when_fitted(folder):
    res = run.analyze(folder, run.Options(phi=PHI, gap=GAP, fit_r=True), figures=False)
    fit = res["settings"]["series_resistance_fit"]
    lo, hi = fit["interval_ohm"]
    print(f"R fitted {fit['ohm']:.4g} ohm (68 % {lo:.4g}-{hi:.4g}), set {R:.4g}")
    assert fit["ohm"] == pytest.approx(R, rel=0.05)
    assert lo <= fit["ohm"] <= hi
    br = res["branches"]["up"]
    assert br["regimes"]["n_segments"] == 1
    assert br["segments"][0]["forms"]["FN"]["beta"] == pytest.approx(2000, rel=0.02)
    assert res["trust"]["verdict"] == "apparently reasonable"


def test_known_series_resistance_is_used(folder):
    res = run.analyze(folder, run.Options(phi=PHI, gap=GAP, series_r=R), figures=False)
    assert res["branches"]["up"]["segments"][0]["forms"]["MG"]["beta"] == pytest.approx(2000, rel=0.02)
