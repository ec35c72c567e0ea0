"""Lab notebook: the ``condition`` step's logic (sequencer.conditioning), alone and driven by
the watchdog's verdicts. Currents are hand-made; noise seeded (seed shown).

Set for every test unless it says otherwise: start 1000 V, steps of 100 V to 1500 V,
stable_fraction 0.05 over stable_time 30 s, back-off 50 V, 2 retries, 1 s samples.
"""
import math

import numpy as np
import pytest

from sequencer import conditioning as cond
from sequencer.limits import Limits
from sequencer.sample import CONTINUE, FLAG_OVERFLOW, Action, Sample, Verdict
from sequencer.watchdog import Watchdog

PARAMS = dict(v_target=1500.0, i_target=None, v_step=100.0, v_start=1000.0,
              stable_fraction=0.05, stable_time=30.0, backoff_v=50.0, retries=2,
              timeout_s=10_000.0, rate=10.0)


def smp(k, v, i, **kw):
    return Sample(seq=k, t=float(k), utc=1.8e9 + k, setpoint_v=v, voltage_v=v,
                  gap_voltage_v=v, current_a=i, pressure_pa=1e-5, t_v=float(k),
                  t_i=float(k), t_p=float(k), step_kind="condition", **kw)


def drive(state, current, n, verdict=lambda k, s: CONTINUE):
    """The engine's part, reduced: the setpoint arrives at the asked level at once."""
    levels = []
    for k in range(n):
        s = smp(k, state.level, current(k, state.level))
        _, state = cond.condition_step(state, s, verdict(k, s))
        levels.append(state.level)
        if state.finished:
            break
    return levels, state


def test_advances_only_after_stable_time_then_done_at_target():
    # seed 7: 1 % noise, well inside 5 %: each level is left once 30 s of it are stable
    rng = np.random.default_rng(7)
    levels, st = drive(cond.start(PARAMS), lambda k, v: 1e-6 * (1 + 0.01 * rng.standard_normal()), 1000)
    assert st.status == cond.DONE and st.level == 1500.0 and st.advances == 5
    changes = [k for k in range(1, len(levels)) if levels[k] != levels[k - 1]]
    # the first level starts at t = 0 and is full after 30 s; every later one needs its own
    # 30 s, counted from the first sample at the new level
    assert changes[0] == 30 and all(b - a >= 31 for a, b in zip(changes, changes[1:]))


def test_stability_edges():
    # alternating +/- a: the spread (population std/mean) is exactly a
    alt = lambda a: (lambda k, v: 1e-6 * (1 + a * (-1) ** k))
    _, st = drive(cond.start(PARAMS), alt(0.049), 2000)
    assert st.status == cond.DONE
    levels, st = drive(cond.start(dict(PARAMS, timeout_s=500.0)), alt(0.051), 2000)
    assert st.status == cond.TIMEOUT and set(levels) == {1000.0} and st.advances == 0


def test_back_off_on_bursts_and_the_retry_budget():
    # the watchdog says BACK_OFF at t = 10, 20, 40: two retries are spent (1000 -> 950 -> 900)
    # and the third back-off exhausts the step.
    bo = Verdict(Action.BACK_OFF, rule="bursts")
    verdict = lambda k, s: bo if k in (10, 20, 40) else CONTINUE
    levels, st = drive(cond.start(PARAMS), lambda k, v: 1e-6 * (1 + 0.2 * (-1) ** k), 100, verdict)
    assert levels[10] == 950.0 and levels[20] == 900.0
    assert st.status == cond.EXHAUSTED and st.backoffs == 2 and len(levels) == 41


def test_hold_never_advances():
    hold = Verdict(Action.HOLD, rule="new_maximum")
    levels, st = drive(cond.start(dict(PARAMS, timeout_s=200.0)), lambda k, v: 1e-6, 300,
                       lambda k, s: hold)
    assert set(levels) == {1000.0} and st.status == cond.TIMEOUT


def test_collapse_is_never_chased():
    col = Verdict(Action.RAMP_DOWN, rule="collapse")
    levels, st = drive(cond.start(PARAMS), lambda k, v: 1e-6 if k < 50 else 1e-12, 200,
                       lambda k, s: col if k == 50 else CONTINUE)
    assert st.status == cond.COLLAPSED and levels[-1] == levels[49]
    v, st2 = cond.condition_step(st, smp(60, st.level, 1e-12))
    assert v == st.level and st2 is st


def test_current_target_and_ceiling():
    # i_target 3 uA, no v_target, ceiling 1400 V: the current is 1 uA per 100 V above 900 V
    p = dict(PARAMS, v_target=None, i_target=3e-6)
    _, st = drive(cond.start(p, v_ceiling=2000.0), lambda k, v: 1e-6 * (v - 900.0) / 100.0, 1000)
    assert st.status == cond.DONE and st.level == 1200.0
    p = dict(PARAMS, v_target=None, i_target=30e-6)
    _, st = drive(cond.start(p, v_ceiling=1400.0), lambda k, v: 1e-6 * (v - 900.0) / 100.0, 1000)
    assert st.status == cond.CEILING and st.level == 1400.0
    with pytest.raises(ValueError):
        cond.start(dict(PARAMS, v_target=None, i_target=None))


def test_samples_before_arrival_do_not_count():
    # the setpoint lags: it reaches the asked 1100 V only 20 s after the advance
    st = cond.start(PARAMS)
    for k in range(31):
        _, st = cond.condition_step(st, smp(k, 1000.0, 1e-6))
    assert st.level == 1100.0
    for k in range(31, 50):            # still ramping: setpoint below the level (to 1095 V)
        _, st = cond.condition_step(st, smp(k, 1000.0 + 5 * (k - 30), 1e-6))
    assert st.window == () and st.level == 1100.0


def test_watchdog_bursts_drive_the_back_off():
    # The real watchdog on a dwell at each level: arcs (ammeter overflows) at t = 5, 10, 15
    # make the bursts rule back off on the third (3 in 60 s), and conditioning lowers the
    # level by backoff_v on that very sample.
    wd = Watchdog(Limits.defaults())
    st = cond.start(PARAMS)
    for k in range(20):
        arc = k in (5, 10, 15)
        s = smp(k, st.level, math.nan if arc else 1e-6, flags=(FLAG_OVERFLOW,) if arc else ())
        v = wd.judge(s)
        _, st = cond.condition_step(st, s, v)
        if k == 15:
            assert v.action is Action.BACK_OFF and v.rule == "bursts"
            assert st.level == 950.0 and st.retries_left == 1
    assert st.level == 950.0 and st.advances == 0


from hypothesis import given, settings, strategies as hst

_any = hst.one_of(hst.floats(allow_nan=True, allow_infinity=True),
                  hst.floats(min_value=0.0, max_value=3000.0))


@settings(max_examples=200, deadline=None)
@given(hst.lists(hst.tuples(_any, _any, hst.sampled_from([None, "hold", "collapse", "back_off"])),
                 max_size=60))
def test_whatever_it_is_fed_the_level_stays_below_the_target(stream):
    # Any readings and verdicts: condition_step never raises, the level never exceeds
    # v_target (1500 V) or goes below 0 V, and it never rises after a collapse.
    st = cond.start(PARAMS)
    collapsed = False
    verdicts = {None: CONTINUE, "hold": Verdict(Action.HOLD, rule="step_up"),
                "collapse": Verdict(Action.RAMP_DOWN, rule="collapse"),
                "back_off": Verdict(Action.BACK_OFF, rule="bursts")}
    for k, (sp, i, what) in enumerate(stream):
        before = st.level
        lvl, st = cond.condition_step(st, smp(k * 10, sp, i), verdicts[what])
        assert 0.0 <= lvl <= 1500.0 and lvl == st.level
        collapsed = collapsed or what == "collapse"
        if collapsed:
            assert lvl <= before
