"""Lab notebook: the watchdog as a whole — which verdict wins, latching, events only on
change, determinism, tightening, the hold timeout, the console's state, and that no stream of
Samples makes it raise (Hypothesis). Streams are hand-made; noise is seeded, seed shown."""
import json
import math

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sequencer.errors import RefusedError
from sequencer.limits import PARAMS, Limits
from sequencer.rules import RULE_NAMES, Context
from sequencer.sample import (FLAG_CC, FLAG_GAUGE_UNKNOWN, FLAG_INVALID, FLAG_OVERFLOW,
                              FLAG_STALE, FLAG_SUPPLY_TRIP, Action, Sample)
from sequencer.watchdog import Watchdog, judge_stream

LIM = Limits.defaults()
C, H, B, R, T = Action.CONTINUE, Action.HOLD, Action.BACK_OFF, Action.RAMP_DOWN, Action.TRIP


def smp(k, i, v=1000.0, **kw):
    t = kw.pop("t", float(k))
    base = dict(seq=k, t=t, utc=1.8e9 + t, setpoint_v=v, voltage_v=v, gap_voltage_v=v,
                current_a=i, pressure_pa=1e-5, t_v=t, t_i=t, t_p=t, step_kind="hold")
    base.update(kw)
    return Sample(**base)


def noisy_dwell(seed, n=300, i0=1e-6, rel=0.005):
    """A dwell at 1000 V, 1 uA with 0.5 % gaussian noise (seed given)."""
    rng = np.random.default_rng(seed)
    return [smp(k, i0 * (1 + rel * rng.standard_normal())) for k in range(n)]


def test_a_quiet_dwell_gives_continue_and_no_events():
    # seed 1: 300 s of 0.5 % noise is far inside every default limit
    verdicts, events, wd = judge_stream(noisy_dwell(1), LIM)
    assert {v.action for v in verdicts} == {C} and events == []
    assert wd.state.holds == () and not wd.state.latched


def test_most_severe_wins_and_ties_go_to_the_first_rule():
    # 200 uA at 5000 V: current ceiling (100 uA) and power ceiling (0.5 W: 1 W seen) both trip;
    # current_ceiling is listed first in rules.RULES, so it is named.
    assert RULE_NAMES.index("current_ceiling") < RULE_NAMES.index("power_ceiling")
    wd = Watchdog(LIM.replace(voltage_max=6000.0))
    v = wd.judge(smp(0, 200e-6, v=5000.0))
    assert v.action is T and v.rule == "current_ceiling"
    # a hold (monitor disagreement) and a trip (gauge unknown) on one sample: the trip wins
    wd = Watchdog(LIM)
    v = wd.judge(smp(0, 10e-6, supply_current_a=30e-6, pressure_pa=math.nan,
                     flags=(FLAG_GAUGE_UNKNOWN,)))
    assert v.action is T and v.rule == "gauge_unknown"
    assert {h.rule for h in wd.state.holds} == {"monitor_disagree"}


def test_trip_acts_on_the_crossing_sample_and_latches():
    # seed 2 dwell, then sample 50 at 150 uA; afterwards the current is back at 1 uA.
    s = noisy_dwell(2, 100)
    s[50] = smp(50, 150e-6)
    verdicts, events, _ = judge_stream(s, LIM)
    assert all(v.action is C for v in verdicts[:50])
    assert all(v.action is T and v.rule == "current_ceiling" for v in verdicts[50:])
    assert [(e["seq"], e["kind"], e["action"], e["rule"]) for e in events] == [
        (50, "trip", "trip", "current_ceiling")]
    ev = events[0]
    assert ev["value"] == pytest.approx(150e-6) and ev["threshold"] == 100e-6
    assert ev["unit"] == "A" and ev["t"] == 50.0 and ev["message"]
    json.dumps(ev, allow_nan=False)        # a valid events.jsonl line


def test_ramp_down_latches_and_can_still_escalate_to_trip():
    s = [smp(k, 1e-6) for k in range(10)] + [smp(10, 0.1e-6)] + \
        [smp(k, 1e-6) for k in range(11, 15)] + [smp(15, 500e-6)]
    verdicts, events, wd = judge_stream(s, LIM)
    assert [v.action for v in verdicts[10:15]] == [R] * 5 and verdicts[10].rule == "collapse"
    assert verdicts[15].action is T
    assert [(e["seq"], e["action"]) for e in events] == [(10, "ramp_down"), (15, "trip")]
    assert wd.collapsed


def test_events_only_on_verdict_changes_with_release():
    # monitor disagreement for samples 20..29 only: one hold event, one release event
    s = [smp(k, 10e-6, supply_current_a=30e-6 if 20 <= k < 30 else 10e-6) for k in range(60)]
    verdicts, events, _ = judge_stream(s, LIM)
    assert [(e["seq"], e["action"], e["rule"]) for e in events] == [
        (20, "hold", "monitor_disagree"), (30, "continue", "monitor_disagree")]
    assert events[1]["message"].startswith("released: ammeter and supply current monitor agree")
    got = []
    wd = Watchdog(LIM, on_event=got.append)
    for x in s:
        wd.judge(x)
    assert got == events


def test_same_stream_same_verdicts():
    # seed 3: a noisy dwell with arcs (overflows) and a pressure burst, judged twice
    s = noisy_dwell(3, 400)
    for k in (100, 120, 130, 300):
        s[k] = smp(k, math.nan, flags=(FLAG_OVERFLOW,))
    s[200] = smp(200, 1e-6, pressure_pa=5e-5)
    a = judge_stream(s, LIM)
    b = judge_stream(s, LIM)
    assert a[0] == b[0] and a[1] == b[1]
    assert [e["action"] for e in a[1]][:2] == ["back_off", "hold"]   # the arcs were seen


def test_tighten_refuses_loosening_and_tightening_acts_on_the_next_sample():
    wd = Watchdog(LIM)
    with pytest.raises(RefusedError, match="loosen"):
        wd.tighten("current_max", 200e-6)
    with pytest.raises(RefusedError, match="loosen"):
        wd.tighten("burst_trip_window", 60.0)          # "higher" is stricter for windows
    with pytest.raises(RefusedError):
        wd.tighten("no_such_param", 1.0)
    with pytest.raises(RefusedError):
        wd.tighten("current_max", math.nan)
    with pytest.raises(RefusedError, match="does not read"):
        wd.tighten("current_max", 50e-6, rule="bursts")
    assert wd.judge(smp(0, 60e-6)).action is C
    new = wd.tighten("current_max", 50e-6, rule="current_ceiling")
    assert new.current_max == 50e-6 and wd.limits.current_max == 50e-6
    v = wd.judge(smp(1, 60e-6))
    assert v.action is T and v.threshold == 50e-6
    wd.tighten("burst_trip_window", 1200.0)
    assert wd.limits.burst_trip_window == 1200.0


def test_a_hold_lasting_hold_max_time_ramps_down():
    # monitor disagreement from t = 0 that never clears; hold_max_time cut to 20 s
    lim = LIM.replace(hold_max_time=20.0)
    s = [smp(k, 10e-6, supply_current_a=30e-6) for k in range(30)]
    verdicts, events, _ = judge_stream(s, lim)
    assert [v.action for v in verdicts[:20]] == [H] * 20
    assert verdicts[20].action is R and verdicts[20].rule == "hold_timeout"
    assert verdicts[20].value == 20.0 and verdicts[29].action is R


def test_state_lists_active_holds_with_their_release():
    wd = Watchdog(LIM)
    wd.judge(smp(0, 10e-6, supply_current_a=30e-6))
    st_ = wd.state
    assert st_.action is H and st_.verdict.rule == "monitor_disagree"
    assert st_.holds[0].release == "ammeter and supply current monitor agree again"
    assert st_.recent[-1]["action"] == "hold" and st_.seq == 0


def test_every_param_a_rule_reads_exists_and_every_rule_has_a_release():
    from sequencer.rules import RULES
    for r in RULES:
        assert set(r.params) <= set(PARAMS), r.name
        assert r.release, r.name
    read = {p for r in RULES for p in r.params}
    # parameters read outside the rules: hold_max_time (the watchdog's hold timeout),
    # pressure_arm_max (arming, engine), slew_max (engine's slew limiter), backoff_fraction
    # (how far the engine lowers the voltage on a BACK_OFF)
    assert set(PARAMS) - read == {"hold_max_time", "pressure_arm_max", "slew_max",
                                  "backoff_fraction"}


def test_a_rule_that_raises_trips_fail_safe(monkeypatch):
    from sequencer import rules

    def broken(self, s, ctx):
        raise ZeroDivisionError("defect")
    monkeypatch.setattr(rules.Fluctuation, "judge", broken)
    v = Watchdog(LIM).judge(smp(0, 1e-6))
    assert v.action is T and v.rule == "watchdog_error" and "fluctuation" in v.message


# ------------------------------------------------------------------ property
_f = st.one_of(st.floats(allow_nan=True, allow_infinity=True),
               st.floats(min_value=-1e4, max_value=1e4), st.just(0.0))
_flags = st.lists(st.sampled_from([FLAG_CC, FLAG_OVERFLOW, FLAG_INVALID, FLAG_STALE,
                                   FLAG_SUPPLY_TRIP, FLAG_GAUGE_UNKNOWN, "gauge-under-range",
                                   "interlock-open", "missed-cycle"]), max_size=3)
_sample = st.builds(
    Sample, seq=st.integers(-5, 10 ** 6), t=_f, utc=_f, setpoint_v=_f, voltage_v=_f,
    gap_voltage_v=_f, current_a=_f, supply_current_a=_f, range_a=_f, pressure_pa=_f,
    pressure_age_s=_f, t_v=_f, t_i=_f, t_p=_f, step_index=st.integers(0, 5),
    step_kind=st.sampled_from(["ramp", "hold", "regulate", "condition", "sweep", "", "x"]),
    interlock_ok=st.sampled_from([None, True, False]), flags=_flags.map(tuple))
_ctx = st.builds(Context, intent=st.sampled_from(["constant", "ramping", "regulating"]),
                 slew_v_per_s=_f, v_ceiling=_f, v_floor=_f, target_current=_f,
                 has_gauge=st.booleans())


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(_sample, st.one_of(st.none(), _ctx)), max_size=40),
       st.one_of(st.none(), _f))
def test_no_stream_of_samples_makes_the_watchdog_raise(stream, survived):
    wd = Watchdog(LIM, survived_max_current=survived)
    for s, ctx in stream:
        v = wd.judge(s, ctx)
        assert v.rule != "watchdog_error", v.message
        assert isinstance(v.action, Action)
    for e in wd.events():
        json.dumps(e, allow_nan=False)
    wd.state
