"""The simulated fibre cathode (simulators.cathode): validation against the bare Murphy–Good
equation, facts of the trade, and the model's own bookkeeping. Seeds are fixed and shown;
nothing here looks at wall time. Small ensembles (10^3) except where the defaults are the
point."""
import math
import os
import sys

import numpy as np
import pytest
import scipy.constants as C
from scipy import integrate

from sequencer import physics as P
from simulators import equations as EQ
from simulators.cathode import FITTABLE, PARAMS, Cathode, CathodeParamError, CathodeParams

sys.path.insert(0, os.path.join(os.path.dirname(os.path.dirname(os.path.abspath(__file__))), "examples"))
import plot_cathode as EX  # noqa: E402

SEED = 12


# --- single-tip mode against Murphy–Good ------------------------------------------------

def _v_quad(f):
    # v(f) = (3/2) integral of (1 - x - f/4x)^(1/2) between the turning points (the JWKB
    # exponent of the Schottky–Nordheim barrier; Forbes and Deane 2007), by quadrature
    x1, x2 = (1 - math.sqrt(1 - f)) / 2, (1 + math.sqrt(1 - f)) / 2
    val, _ = integrate.quad(lambda x: math.sqrt(max(1 - x - f / (4 * x), 0.0)), x1, x2,
                            epsabs=1e-14, epsrel=1e-13)
    return 1.5 * val


def _mg_reference(F, phi):
    # Murphy and Good, Phys. Rev. 102 (1956) 1464: J = e^3 F^2 / (8 pi h phi t^2)
    # exp(-8 pi (2 m)^(1/2) phi^(3/2) v / (3 e h F)), phi in joules here; CODATA via
    # scipy.constants; t = v - (4/3) f dv/df by a central difference of the quadrature.
    phiJ = phi * C.e
    f = C.e ** 3 / (4 * np.pi * C.epsilon_0) * F / phiJ ** 2
    v = _v_quad(f)
    h = 1e-5
    t = v - (4.0 / 3.0) * f * (_v_quad(f + h) - _v_quad(f - h)) / (2 * h)
    return (C.e ** 3 * F ** 2 / (8 * np.pi * C.h * phiJ * t ** 2)
            * math.exp(-8 * np.pi * math.sqrt(2 * C.m_e) * phiJ ** 1.5 * v / (3 * C.e * C.h * F)))


@pytest.mark.parametrize("phi", [4.0, 4.8, 5.2])
@pytest.mark.parametrize("F", [2.5e9, 4e9, 7e9])
def test_single_tip_is_bare_murphy_good(F, phi):
    # Set: single-tip mode, beta = 1000 at d = 500 um, area 1e-16 m^2; the supply voltage
    # is chosen so that F = beta V / d. Expect: exactly J_MG(F, phi) x area.
    beta, d, area = 1000.0, 500e-6, 1e-16
    cath = Cathode(CathodeParams.from_dict({"single_tip": {"beta": beta, "gap_m": d, "work_function_ev": phi,
                                                           "area_m2": area}}), np.random.default_rng(SEED))
    V = F * d / beta
    I = cath.emit(V, 0.0, 1e-5)
    # physics' constants are tabulated to 7 digits and the exponent (15..40 here)
    # magnifies the rounding of b: agree to 2e-5
    assert I == pytest.approx(_mg_reference(F, phi) * area, rel=2e-5)
    assert I == pytest.approx(P.murphy_good_j(F, phi, exact=True) * area, rel=1e-9)
    # no state, no noise: the same answer later and at another pressure
    assert cath.emit(V, 100.0, 1e-3) == I
    assert not cath.lost and cath.events == []


def test_single_tip_with_forbes_approximations_within_their_error():
    # exact: false uses Forbes 2006 v and t (errors up to 0.33 % in v, 0.39 % in t):
    # |ln J_approx - ln J_exact| <= 0.0034 v b phi^1.5 / F + 2 x 0.0039.
    F, phi = 4e9, 4.8
    cath = Cathode(CathodeParams.from_dict({"single_tip": {"exact": False, "work_function_ev": phi}}))
    V = F * 500e-6 / 1000.0
    I = cath.emit(V, 0.0, 1e-5)
    ref = _mg_reference(F, phi) * 1e-16
    bound = 0.0034 * P.B_FN * phi ** 1.5 / F + 2 * 0.0039
    assert abs(math.log(I / ref)) < bound


# --- facts of the trade (common practice, no source) -----------------------------------------

def test_default_fibre_emits_in_the_low_hundreds_of_volts():
    # Set: defaults (100 um fibre, 500 um gap, 10^4 emitters), seed 12, quick up-sweep.
    # Expected (common practice, no source): > 1 nA somewhere in the low hundreds of volts
    # (here: by 300 V), and nothing measurable at 100 V.
    v, i = EX.fn_sweep(seed=SEED, v_lo=100.0, v_hi=300.0, steps=9)
    print(f"seed {SEED}: " + ", ".join(f"{a:.0f} V {b:.2e} A" for a, b in zip(v, i)))
    assert i[-1] > 1e-9
    assert i[0] < 1e-15


def test_quick_sweep_fn_plot_is_straight_with_negative_slope():
    # Set: 10^3 emitters, adsorbates off, seed 12, 300..800 V. Expected (common practice,
    # no source): ln(I/V^2) against 1/V close to a straight line of negative slope.
    v, i = EX.fn_sweep(seed=SEED, emitters=1000, adsorbates=False, v_lo=300.0, v_hi=800.0, steps=21)
    x, y = 1 / v, np.log(i / v ** 2)
    slope, icpt = np.polyfit(x, y, 1)
    r2 = 1 - np.sum((y - (slope * x + icpt)) ** 2) / np.sum((y - y.mean()) ** 2)
    print(f"seed {SEED}: slope {slope:.0f} V, R^2 {r2:.5f}")
    assert slope < 0
    assert r2 > 0.995


def _slopes(v, i, split):
    x, y = 1 / v, np.log(i / v ** 2)
    lo = v < split
    return np.polyfit(x[lo], y[lo], 1)[0], np.polyfit(x[~lo], y[~lo], 1)[0]


def test_adsorbates_give_two_slopes():
    # Set: 10^3 emitters, seed 12, 250..800 V, with adsorbates (coverage 0.9, -0.7 eV) and
    # without. Expected (common practice, no source): with adsorbates the FN plot has two
    # slopes (low- and high-voltage halves differ by > 20 %); without, one (< 3 %).
    v, i_ads = EX.fn_sweep(seed=SEED, emitters=1000, adsorbates=True, v_lo=250.0, v_hi=800.0, steps=23)
    _, i_clean = EX.fn_sweep(seed=SEED, emitters=1000, adsorbates=False, v_lo=250.0, v_hi=800.0, steps=23)
    lo_a, hi_a = _slopes(v, i_ads, 450.0)
    lo_c, hi_c = _slopes(v, i_clean, 450.0)
    print(f"seed {SEED}: adsorbates {lo_a:.0f}/{hi_a:.0f}, clean {lo_c:.0f}/{hi_c:.0f}")
    assert abs(hi_a / lo_a - 1) > 0.2
    assert abs(hi_c / lo_c - 1) < 0.03
    # The low-voltage slope scales as phi^(3/2) (FN slope -s b phi^1.5 / beta_V, Forbes
    # 2013): covered emitters have phi = 4.8 - 0.9 x 0.7 = 4.17 eV.
    assert lo_a / lo_c == pytest.approx((4.17 / 4.8) ** 1.5, rel=0.03)


def test_flicker_with_bursts_at_fixed_voltage():
    # Set: 10^3 emitters, seed 12, ramp to 850 V, hold 120 s at the chamber's 1e-5 Pa.
    # Expected (common practice, no source): the current flickers, and emitters burn with
    # a short burst (a sample well above the running level) and leave a lower level.
    t, i, burns, cath, _ = EX.flicker(seed=SEED, emitters=1000, volts=850.0, duration_s=120.0)
    print(f"seed {SEED}: burns at {burns} s; events {[(round(e[0], 1), e[1]) for e in cath.events]}")
    assert burns.size >= 1
    med = np.median(i)
    for tb in burns:
        k = int(np.searchsorted(t, tb - 1e-9))
        assert i[k] > 1.5 * med
    # flicker away from the bursts: a few per cent, from the 1/f noise (noise_level 0.03)
    quiet = i[(t > 5) & (i < 1.3 * med)]
    spread = np.std(np.diff(np.log(quiet)))
    assert 0.002 < spread < 0.1


def test_up_and_down_sweeps_differ_after_a_long_dwell():
    # Set: 10^3 emitters, seed 12, up 450..850 V, 120 s at 850 V, down again.
    # Expected (common practice, no source): the way down differs from the way up (here
    # lower: the hottest emitters lost their adsorbates or burned during the dwell).
    v, up, down, cath = EX.hysteresis(seed=SEED, emitters=1000, v_lo=450.0, v_hi=850.0, steps=17, dwell_s=120.0)
    ratio = down / up
    print(f"seed {SEED}: down/up {np.round(ratio, 3)}")
    assert np.median(ratio) < 0.5
    assert np.all(np.isfinite(ratio))


# --- bookkeeping --------------------------------------------------------------------------

def _ramp(cath, v_end, t0=0.0, n=40, p=1e-5):
    t = t0
    I = 0.0
    for v in np.linspace(0.0, v_end, n):
        t += 0.1
        I = cath.emit(v, t, p)
    return t, I


def test_same_seed_same_run_other_seed_other_run():
    # Every random choice is drawn from the generator handed in (seed 12 twice, then 13).
    def run(seed):
        c = Cathode(CathodeParams.from_dict({"emitters": 1000}), np.random.default_rng(seed))
        t = 0.0
        out = []
        for k in range(300):
            t += 0.1
            out.append(c.emit(min(20.0 * k, 800.0), t, 1e-5))
        return np.array(out), [(e[0], e[1]) for e in c.events]
    a, ea = run(SEED)
    b, eb = run(SEED)
    c, _ = run(SEED + 1)
    assert np.array_equal(a, b) and ea == eb
    assert not np.array_equal(a, c)


def test_gap_voltage_is_self_consistent():
    # V_gap = V - I R_series: with a 100 MOhm ballast the drop is large, and the solved
    # gap voltage plus I x (ballast + fibre + contact) gives back the supply voltage.
    cfg = {"emitters": 1000, "series_resistance_ohm": 1e8, "noise_level": 0.0, "burst_rate_hz": 0.0}
    cath = Cathode(CathodeParams.from_dict(cfg), np.random.default_rng(SEED))
    t, I = _ramp(cath, 900.0)
    R = 1e8 + 50.0 + 200.0
    assert I * R > 10.0                      # a real drop
    assert cath.gap_voltage + I * R == pytest.approx(900.0, rel=1e-5)


def test_skipped_emitters_carry_less_than_a_millionth():
    # The active set leaves out emitters below 1e-6 of the total: summing Murphy–Good over
    # every emitter (with their present work functions, at the solved gap voltage, cold)
    # adds less than 1e-5 of the current.
    cath = Cathode(CathodeParams.from_dict({"emitters": 1000, "noise_level": 0.0, "burst_rate_hz": 0.0}),
                   np.random.default_rng(SEED))
    _ramp(cath, 600.0)
    vg = cath.gap_voltage
    phi = cath.params.work_function_ev + cath.params.adsorbate_shift_ev * cath.theta
    each = cath.area * P.murphy_good_j(cath.beta * vg, phi)
    skipped = np.ones(each.size, dtype=bool)
    skipped[cath._active] = False
    assert cath.active_count < 1000 // 5
    assert each[skipped].sum() < 1e-5 * each.sum()


def test_ion_hits_grow_with_pressure():
    # Back-bombardment events come at a rate proportional to pressure x current: seed 12,
    # 10^3 emitters, 60 s at 800 V at 1e-6 and at 1e-4 Pa.
    counts = []
    for p in (1e-6, 1e-4):
        c = Cathode(CathodeParams.from_dict({"emitters": 1000}), np.random.default_rng(SEED))
        t, _ = _ramp(c, 800.0, p=p)
        for _ in range(600):
            t += 0.1
            c.emit(800.0, t, p)
        counts.append(sum(1 for e in c.events if e[1] == "ion-hit"))
    print(f"seed {SEED}: ion hits {counts}")
    assert counts[1] > 5 * max(counts[0], 1)


def test_contact_melts_after_seconds_and_the_fibre_is_lost():
    # Set: a poor contact, 100 kOhm with a heat loss of only 1e-8 W/K and a 20 s time
    # constant, so ~10 uA heats it by I^2 R / G ~ 1000 K at equilibrium. Expected: the
    # contact warms gradually (first order, C dT/dt = I^2 R - G (T - T_room)), passes its
    # 456 K melting point seconds after the current starts, the fibre is lost and emits
    # nothing from then on.
    cfg = {"emitters": 1000, "contact_resistance_ohm": 1e5, "contact_conductance_w_k": 1e-8,
           "contact_time_constant_s": 20.0}
    cath = Cathode(CathodeParams.from_dict(cfg), np.random.default_rng(SEED))
    t, _ = _ramp(cath, 850.0, n=5)
    t_on = t
    temps = []
    while not cath.lost and t < t_on + 120:
        t += 0.1
        cath.emit(850.0, t, 1e-5)
        temps.append(cath.contact_temperature)
    lost = [e for e in cath.events if e[1] == "fibre-lost"]
    print(f"seed {SEED}: lost at {lost[0][0] - t_on if lost else None} s after the ramp")
    assert cath.lost and len(lost) == 1
    assert lost[0][2]["contact_temperature_k"] > 456.0
    assert lost[0][0] - t_on > 1.0
    assert np.all(np.diff(temps) > 0)
    assert cath.emit(1000.0, t + 1, 1e-5) == 0.0


def test_burn_events_say_what_happened():
    # kinds and details of the events the stand records
    t, i, burns, cath, _ = EX.flicker(seed=SEED, emitters=1000, volts=850.0, duration_s=30.0)
    kinds = {e[1] for e in cath.events}
    assert kinds <= {"burn", "ion-hit", "fibre-lost"}
    for t_e, kind, detail in cath.events:
        if kind == "burn":
            assert detail["temperature_k"] > detail["failure_k"]
            assert detail["outcome"] in ("shortened", "vanished")
        if kind == "ion-hit":
            assert detail["effect"] in ("sharpened", "blunted")
    assert [e[0] for e in cath.events] == sorted(e[0] for e in cath.events)


def test_zero_and_negative_voltage_emit_nothing():
    cath = Cathode(CathodeParams.from_dict({"emitters": 1000}), np.random.default_rng(SEED))
    assert cath.emit(0.0, 0.1, 1e-5) == 0.0
    assert cath.emit(-500.0, 0.2, 1e-5) == 0.0


# --- parameters -------------------------------------------------------------------------------

def test_fittable_parameters_are_named():
    assert set(FITTABLE) == {"height_median_m", "height_sigma", "radius_median_m", "radius_sigma",
                             "area_scale", "noise_level", "burst_rate_hz"}
    p = CathodeParams.from_dict({})
    assert set(p.fitted()) == set(FITTABLE)
    assert all(len(row) == 5 and row[4] for row in PARAMS)   # every key documented


@pytest.mark.parametrize("bad, words", [
    ({"emiters": 100}, "unknown key 'emiters'"),
    ({"gap_m": -1}, "gap_m: must be > 0"),
    ({"gap_m": "wide"}, "gap_m: expected a number"),
    ({"end_fraction": 2}, "between 0 and 1"),
    ({"gas": {"Xe": 1.0}}, "unknown gas 'Xe'"),
    ({"single_tip": {"beta": 1, "colour": 2}}, "unknown key 'colour'"),
])
def test_bad_parameters_give_one_clear_line(bad, words):
    with pytest.raises(CathodeParamError) as e:
        CathodeParams.from_dict(bad)
    assert words in str(e.value) and "\n" not in str(e.value)


def test_params_are_frozen():
    p = CathodeParams.from_dict({"emitters": 1000})
    with pytest.raises(Exception):
        p.values = {}
    with pytest.raises(TypeError):
        p.values["gap_m"] = 1.0
    assert p.emitters == 1000 and p.gap_m == 500e-6


def test_random_abuse_keeps_the_current_finite_and_non_negative():
    # Seeded abuse (seed 5): jumps in time from 0 to 100 s, voltages from -50 V to 10 kV,
    # pressures from 0 to 0.1 Pa. The current stays finite and >= 0, with no numpy
    # warnings, and ion storms stay bounded (at most 20 events per call).
    import warnings
    rng = np.random.default_rng(5)
    for trial in range(2):
        c = Cathode(CathodeParams.from_dict({"emitters": 1000}), np.random.default_rng(trial))
        t = 0.0
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            for k in range(100):
                t += float(rng.choice([0.0, 0.001, 0.1, 1.0, 100.0]))
                n_before = len(c.events)
                i = c.emit(float(rng.choice([0, 100, 500, 900, 1500, 3000, 10000, -50])), t,
                           float(rng.choice([1e-7, 1e-5, 1e-3, 1e-1, 0.0])))
                assert math.isfinite(i) and i >= 0.0
                hits = sum(1 for e in c.events[n_before:] if e[1] == "ion-hit")
                assert hits <= 20


def test_ensemble_current_is_the_sum_of_murphy_good_over_active_emitters():
    # The inlined emission law agrees with sequencer.physics: at the solved gap voltage,
    # sum over the active emitters of area x murphy_good_j(beta V_g, phi) x
    # thermal_field_factor(F, phi, T) gives the model's current (noise and bursts off;
    # 450 V, where space charge is weak: J/J_CL < 1e-4 for every emitter, which lowers
    # a current by less than (16/27) x 1e-4 x d lnJ/d lnF ~ 0.2 %).
    cfg = {"emitters": 1000, "noise_level": 0.0, "burst_rate_hz": 0.0}
    cath = Cathode(CathodeParams.from_dict(cfg), np.random.default_rng(SEED))
    _ramp(cath, 450.0)
    I = cath.emit(450.0, 100.0, 1e-5)
    a = cath._active
    vg = cath.gap_voltage
    phi = cath.params.work_function_ev + cath.params.adsorbate_shift_ev * cath.theta[a]
    F = cath.beta[a] * vg
    J = P.murphy_good_j(F, phi) * P.thermal_field_factor(F, phi, cath._T_used)
    assert np.max(EQ.space_charge_ratio(J, F, cath.r[a])) < 1e-4
    assert I == pytest.approx(float(np.sum(cath.area[a] * J)), rel=3e-3)
