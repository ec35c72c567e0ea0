"""Forbes's field-emission orthodoxy test (R.G. Forbes, Proc. R. Soc. A 469 (2013) 20130271).

Published extraction: f_extr = -s_t eta(phi) / (S_fit X) with s_t = 0.95 and
eta(phi) = b c_S^2 / phi^(1/2); here b and c_S^2 are recomputed from CODATA through
scipy.constants. Range limits for phi = 4.50 eV, from memory: apparently reasonable
0.15 <= f <= 0.45, clearly unreasonable below 0.10 or above 0.75.
"""
import numpy as np
import pytest

from sequencer.analysis import extract, orthodoxy
from test_analysis_support import B_REF, CS2_REF, mg_current

PHI = 4.50


def eta_ref(phi):
    return B_REF * CS2_REF / np.sqrt(phi)


@pytest.mark.parametrize("slope,X", [(-2.0e4, 1e-3), (-5.5e4, 7.1e-4), (-1.2e5, 2.5e-3)])
def test_extracted_scaled_field_follows_the_published_formula(slope, X):
    assert orthodoxy.extracted_scaled_field(slope, X, PHI, "FN") == pytest.approx(
        -0.95 * eta_ref(PHI) / (slope * X), rel=1e-6)
    # eta(4.50 eV) = 4.637 (Forbes 2013 lists eta(phi) for phi = 4.50 eV as about 4.64; from memory)
    assert eta_ref(PHI) == pytest.approx(4.637, abs=0.002)


def test_extracted_field_matches_the_true_scaled_field_of_mg_data():
    # MG data for zeta = 250 nm, 600-1300 V; true f = c_S^2 V / (phi^2 zeta). The FN test uses
    # s_t = 0.95 while the true s = 1 - f/6 is 0.95-0.97 here: agreement to 2 %.
    V = np.linspace(600, 1300, 30)
    I = mg_current(V, 2000, 1e-13, 500e-6, PHI)
    e = extract.extract(V, I, np.ones_like(V), "FN", PHI, gap=500e-6)
    o = orthodoxy.check_segment(e.fit.slope, e.fit.x_min, e.fit.x_max, PHI, "FN")
    zeta = 500e-6 / 2000
    assert o.f_low == pytest.approx(CS2_REF * 600 / (PHI ** 2 * zeta), rel=0.02)
    assert o.f_high == pytest.approx(CS2_REF * 1300 / (PHI ** 2 * zeta), rel=0.02)
    assert o.verdict == orthodoxy.VERDICT_OK
    # the MG form uses s = 1 (Forbes 2019) and agrees with the truth more closely still
    om = orthodoxy.check_segment(*_mg_fit(V, I), PHI, "MG")
    assert om.f_high == pytest.approx(CS2_REF * 1300 / (PHI ** 2 * zeta), rel=0.01)


def _mg_fit(V, I):
    e = extract.extract(V, I, np.ones_like(V), "MG", PHI)
    return e.fit.slope, e.fit.x_min, e.fit.x_max


@pytest.mark.parametrize("f_low,f_high,verdict", [
    (0.15, 0.45, "apparently reasonable"),
    (0.20, 0.30, "apparently reasonable"),
    (0.09, 0.30, "clearly unreasonable"),
    (0.20, 0.80, "clearly unreasonable"),
    (0.12, 0.30, "in between"),
    (0.30, 0.60, "in between"),
])
def test_verdict_limits_for_phi_4_5(f_low, f_high, verdict):
    assert orthodoxy.judge(f_low, f_high) == verdict


def test_limits_are_quoted_with_their_work_function():
    assert orthodoxy.PHI_OF_LIMITS == 4.50
    assert "4.50 eV" in orthodoxy.LIMITS_SOURCE and "from memory" in orthodoxy.LIMITS_SOURCE
    o = orthodoxy.check_segment(-3e4, 7e-4, 1.5e-3, 4.8, "FN")
    assert "our assumption" in o.note and "4.50 eV" in o.note


def test_positive_slope_is_clearly_unreasonable():
    assert orthodoxy.check_segment(1.0, 1e-3, 2e-3, PHI).verdict == "clearly unreasonable"


def test_trust_paragraph_names_a_failing_condition_climb_as_a_changing_emitter():
    # Two up branches: "up 1" (a ramp) passes the orthodoxy test, "up 2" (a condition
    # step's climb) fails with f 1.00-1.42 (above 0.75: clearly unreasonable, Forbes 2013,
    # Proc. R. Soc. A 469, 20130271). Expected: "do not trust" naming up 2, and the sentence
    # that a condition climb changes the emitter; a failing ramp branch gets no such sentence.
    from sequencer.analysis import run

    def branch(kind, verdict, lo, hi):
        return {"step_kind": kind, "segments": [{"index": 1, "forms": {"FN": {"orthodoxy": {
            "verdict": verdict, "f_low": lo, "f_high": hi}}}}]}
    res = {"settings": {"phi_ev": 4.5, "phi_source": "option", "gap_m": 5e-4},
           "branches": {"up 1": branch("ramp", orthodoxy.VERDICT_OK, 0.2, 0.3),
                        "up 2": branch("condition", orthodoxy.VERDICT_BAD, 1.0, 1.42)}}
    t = run.trust_paragraph(res)
    assert t["verdict"] == "do not trust"
    assert "up 2 regime 1 (f 1.00-1.42)" in t["text"]
    assert "The up 2 branch is the climb of a condition step" in t["text"]
    res["branches"]["up 2"]["step_kind"] = "ramp"
    assert "condition step" not in run.trust_paragraph(res)["text"]


def test_trust_paragraph_also_names_the_in_between_regimes_when_one_fails():
    # "up 2" fails (f 1.00-1.42, clearly unreasonable) and "down" lies in between
    # (f 0.24-0.48: above 0.45, below 0.75; Forbes 2013, Proc. R. Soc. A 469, 20130271).
    # Expected: "do not trust" for up 2, and down named "with caution" rather than left out.
    from sequencer.analysis import run
    from sequencer.report.content import branch_name

    def branch(kind, verdict, lo, hi, step):
        return {"step_kind": kind, "step": step, "segments": [{"index": 1, "forms": {"FN": {
            "orthodoxy": {"verdict": verdict, "f_low": lo, "f_high": hi}}}}]}
    res = {"settings": {"phi_ev": 4.5, "phi_source": "option", "gap_m": 5e-4},
           "branches": {"up 2": branch("condition", orthodoxy.VERDICT_BAD, 1.0, 1.42, 2),
                        "down": branch("sweep", orthodoxy.VERDICT_MID, 0.24, 0.48, 4)}}
    t = run.trust_paragraph(res)
    assert t["verdict"] == "do not trust"
    assert "Treat those of down regime 1 (f 0.24-0.48) with caution" in t["text"]
    # the report names a branch with its step, counted from 1 as on the console
    assert branch_name(res, "up 2") == "up 2 (step 3, condition)"
    assert run._utc_text(0.0) == "1970-01-01T00:00:00Z"       # the Unix epoch (POSIX)
