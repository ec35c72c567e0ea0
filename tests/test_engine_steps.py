"""The engine executes every segment kind on a fake stand with the virtual clock.

Lab-notebook style: each test says what the plan asked, what the engine must do and why.
Expectations are arithmetic on the plan itself (rates, durations, sample periods), so they
come from the protocol, not from the code under test.
"""
import math

import pytest

from drivers.clock import VirtualClock
from sequencer.engine import Engine, EngineOptions, ListRecorder
from sequencer.sample import Action, Verdict, CONTINUE
from tests.engine_fakes import CeilingWatchdog, make_stand, plan_of, seg


def ramp(i, v_from, v_to, rate, period=0.1, step_v=None, settle_s=None, until_current=None):
    return seg(i, "ramp", period, abs(v_to - v_from) / rate, v_from, v_to, v_from=float(v_from),
               v_to=float(v_to), rate=float(rate), step_v=step_v, settle_s=settle_s,
               until_current=until_current)


def run(plan, watchdog=None, **opts):
    clock = VirtualClock()
    stand, box = make_stand(clock)
    rec = ListRecorder()
    eng = Engine(plan, stand, clock, recorder=rec, watchdog=watchdog,
                 options=EngineOptions(**opts))
    res = eng.run()
    return res, rec, box, clock


def test_continuous_ramp_then_return_follows_the_rate_and_ends_off():
    # Set: 0 -> 100 V at 10 V/s, sample period 0.1 s (1 V per sample); back at 20 V/s.
    plan = plan_of(ramp(0, 0, 100, 10.0),
                   seg(1, "return", 0.1, 5.0, 100.0, 0.0, v_from=100.0, v_to=0.0, rate=20.0),
                   slew_max=50.0)
    res, rec, box, clock = run(plan)
    assert res.outcome == "completed" and res.exit_code == 0 and res.confirmed_off
    sp = [s.setpoint_v for s in rec.samples]
    steps = [b - a for a, b in zip(sp, sp[1:])]
    # every rise is the ramp's 10 V/s x 0.1 s = 1 V (never more), every fall 2 V
    assert max(steps) == pytest.approx(1.0)
    assert min(steps) == pytest.approx(-2.0)
    assert max(sp) == pytest.approx(100.0)
    # simulated time: 100 samples up + 50 down (plus the 0 V start): at 0.1 s each
    assert clock.now() == pytest.approx(0.1 * len(rec.samples), abs=1e-9)
    assert not box.output_on and box.v == 0.0
    assert [e["kind"] for e in rec.events].count("safe-off") == 1


def test_slew_limiter_bounds_a_plan_faster_than_slew_max():
    # The plan asks 200 V/s; the rig's slew_max is 50 V/s -> at most 5 V per 0.1 s sample.
    plan = plan_of(ramp(0, 0, 100, 200.0), slew_max=50.0)
    res, rec, box, _ = run(plan)
    sp = [s.setpoint_v for s in rec.samples]
    assert max(b - a for a, b in zip(sp, sp[1:])) == pytest.approx(5.0)
    assert res.outcome == "completed"


def test_stepped_ramp_holds_each_level_for_its_settle_time():
    # 0 -> 300 V in 100 V steps, settle 0.5 s = 5 samples per level, slew 1000 V/s.
    plan = plan_of(ramp(0, 0, 300, 100.0, step_v=100.0, settle_s=0.5), slew_max=1000.0)
    res, rec, *_ = run(plan)
    levels = {}
    for s in rec.samples:
        if s.step_kind == "ramp":
            levels[s.setpoint_v] = levels.get(s.setpoint_v, 0) + 1
    assert levels[100.0] == 5 and levels[200.0] == 5   # 0.5 s / 0.1 s, arrival sample included
    assert res.outcome == "completed"


def test_until_current_ends_the_ramp_early():
    # FN-shaped fake: I(1500 V) = 1e-9 * 1500^2 * exp(-2) ~ 3.0e-4 A; stop at 1 uA.
    plan = plan_of(ramp(0, 0, 3000, 100.0, until_current=1e-6),
                   seg(1, "return", 0.1, 5.0, 3000.0, 0.0, v_from=3000.0, v_to=0.0, rate=500.0),
                   slew_max=500.0, current_max=1e-3)
    res, rec, *_ = run(plan)
    ramp_samples = [s for s in rec.samples if s.step_kind == "ramp"]
    assert ramp_samples[-1].current_a >= 1e-6
    assert all(s.current_a < 1e-6 for s in ramp_samples[:-1])
    assert any("until_current" in e.get("message", "") for e in rec.kinds("note"))


def test_hold_lasts_its_duration_of_accepted_samples():
    plan = plan_of(ramp(0, 0, 50, 50.0), seg(1, "hold", 0.1, 2.0, 50.0, 50.0, v=50.0, duration_s=2.0),
                   slew_max=100.0)
    res, rec, *_ = run(plan)
    held = [s for s in rec.samples if s.step_kind == "hold"]
    assert len(held) == 20 and all(s.setpoint_v == 50.0 for s in held)
    # then the plan ended at 50 V: the engine came down under control (marked ramp-down)
    assert [s.step_kind for s in rec.samples[-5:]] == ["ramp-down"] * 5


def test_sweep_visits_points_in_order_with_settle_and_samples():
    plan = plan_of(seg(0, "sweep", 0.1, 3.0, 0.0, 0.0, points=(10.0, 30.0, 20.0), settle_s=0.2,
                       samples_per_point=3, rate=100.0), slew_max=200.0)
    res, rec, *_ = run(plan)
    plateaus = []     # voltages kept for more than one sample, in order
    sp = [s.setpoint_v for s in rec.samples if s.step_kind == "sweep"]
    for a, b in zip(sp, sp[1:]):
        if a == b and (not plateaus or plateaus[-1] != a):
            plateaus.append(a)
    assert plateaus == [10.0, 30.0, 20.0]
    at30 = [s for s in rec.samples if s.setpoint_v == 30.0]
    assert len(at30) == 2 + 3    # settle 0.2 s (2 samples) + 3 measured


def test_rest_and_wait_pressure_below():
    plan = plan_of(seg(0, "rest", 0.1, 1.0, duration_s=1.0),
                   seg(1, "wait", 0.1, 5.0, until="pressure_below", value=1e-5, window_s=None,
                       timeout_s=5.0))
    res, rec, *_ = run(plan)
    assert res.outcome == "completed"
    assert any("below" in e.get("message", "") for e in rec.kinds("note"))


def test_wait_timeout_ends_the_run_under_control():
    plan = plan_of(seg(0, "wait", 0.1, 1.0, until="pressure_below", value=1e-9, window_s=None,
                       timeout_s=1.0))
    res, rec, *_ = run(plan)
    assert res.outcome == "ramped-down" and res.exit_code == 3 and res.confirmed_off
    assert "timed out" in res.reason


def test_pause_is_skipped_in_a_replay_and_logged():
    plan = plan_of(seg(0, "pause", 0.1, 0.0, timeout_s=None, message="check the camera"),
                   seg(1, "rest", 0.1, 0.3, duration_s=0.3))
    res, rec, *_ = run(plan, skip_pauses=True)
    assert res.outcome == "completed"
    assert any("pause skipped" in e.get("message", "") for e in rec.kinds("note"))


def test_pause_with_timeout_continues():
    plan = plan_of(seg(0, "pause", 0.1, 1.0, timeout_s=1.0, message="look"),
                   seg(1, "rest", 0.1, 0.3, duration_s=0.3))
    res, rec, _, clock = run(plan)
    assert res.outcome == "completed"
    assert any("timed out" in e.get("message", "") for e in rec.kinds("note"))
    assert clock.now() >= 1.0


def test_regulate_brings_the_current_to_its_target():
    pytest.importorskip("sequencer.regulate")
    # target 1 uA; fake emitter I = 1e-9 V^2 exp(-3000/V): about 1 uA near 395 V.
    target = 1e-6
    plan = plan_of(ramp(0, 0, 300, 100.0),
                   seg(1, "regulate", 0.1, 20.0, 300.0, 300.0, target_current=target,
                       duration_s=20.0, v_ceiling=800.0, v_floor=100.0, max_dv=5.0),
                   slew_max=100.0, current_max=1e-4)
    res, rec, *_ = run(plan)
    reg = [s for s in rec.samples if s.step_kind == "regulate"]
    assert reg[-1].current_a == pytest.approx(target, rel=0.05)
    assert max(abs(b.setpoint_v - a.setpoint_v) for a, b in zip(reg, reg[1:])) <= 5.0 + 1e-9


def test_condition_steps_up_on_stability_to_its_target():
    pytest.importorskip("sequencer.conditioning")
    plan = plan_of(seg(0, "condition", 0.1, 60.0, 0.0, 400.0, v_target=400.0, i_target=None,
                       v_step=100.0, v_start=100.0, stable_fraction=0.05, stable_time=1.0,
                       backoff_v=50.0, retries=3, timeout_s=60.0, rate=100.0),
                   slew_max=200.0, current_max=1e-3)
    res, rec, *_ = run(plan)
    assert res.outcome == "completed"
    cond = [s.setpoint_v for s in rec.samples if s.step_kind == "condition"]
    assert max(cond) == pytest.approx(400.0)
    assert any("condition done" in e.get("message", "") for e in rec.kinds("note"))


def test_plan_ending_above_zero_is_ramped_down_before_safe_off():
    plan = plan_of(ramp(0, 0, 40, 40.0), slew_max=20.0)
    res, rec, box, _ = run(plan)
    assert res.outcome == "completed"
    assert rec.samples[-1].setpoint_v == 0.0
    falls = [b.setpoint_v - a.setpoint_v for a, b in zip(rec.samples, rec.samples[1:])]
    assert min(falls) == pytest.approx(-2.0)   # 20 V/s x 0.1 s


class HoldThenContinue:
    """Holds for samples 20..29, backs off at sample 50, else continues."""

    def __init__(self):
        self.n = 0

    def judge(self, sample, ctx):
        self.n += 1
        if 20 <= sample.seq < 30:
            return Verdict(Action.HOLD, "test", 0, 0, "", "test hold")
        if sample.seq == 50:
            return Verdict(Action.BACK_OFF, "test", 0, 0, "", "test back-off")
        return CONTINUE


def test_cursor_advances_on_progress_after_hold_and_back_off():
    # Ramp 0 -> 100 V at 10 V/s (1 V/sample). A 10-sample hold must not skip ahead; a
    # back-off (5 %) at sample 50 drops the voltage, holds backoff_hold = 1 s (10 samples),
    # then the ramp climbs back at its own 1 V/sample, never faster.
    plan = plan_of(ramp(0, 0, 100, 10.0), slew_max=100.0, backoff_hold=1.0, backoff_fraction=0.05)
    res, rec, *_ = run(plan, watchdog=HoldThenContinue())
    sp = {s.seq: s.setpoint_v for s in rec.samples}
    held = [sp[k] for k in range(20, 31)]
    assert len(set(held)) == 1                      # no movement while held
    assert sp[31] - sp[30] == pytest.approx(1.0)    # re-join at the rate, no jump
    v50 = sp[50]
    assert sp[51] == pytest.approx(v50 * 0.95)
    rises = [sp[k + 1] - sp[k] for k in range(51, max(sp)) if sp[k + 1] > sp[k]]
    assert max(rises) <= 1.0 + 1e-9
    assert res.outcome == "completed"


def test_trip_acts_on_the_very_sample_that_crosses():
    # Ceiling 1 uA: the first sample whose current is above it must be the last sample
    # with the output on; safe_off runs before that sample is recorded.
    plan = plan_of(ramp(0, 0, 1000, 100.0), slew_max=200.0, current_max=1e-6)
    res, rec, box, _ = run(plan, watchdog=CeilingWatchdog(plan.limits), i_limit=1e-3)
    crossing = [s for s in rec.samples if s.current_a > 1e-6][0]
    assert res.tripped_on_seq == crossing.seq == rec.samples[-1].seq
    kinds = [e["kind"] for e in rec.events]
    assert kinds.index("safe-off") < kinds.index("trip")
    assert res.exit_code == 3 and res.confirmed_off and not box.output_on


def test_missed_cycles_are_logged_and_skipped_not_caught_up():
    # The fake ammeter takes 0.35 s of simulated time once (sample 5): 3 deadlines missed.
    clock = VirtualClock()
    stand, box = make_stand(clock)
    orig = stand.ammeter.read

    def slow():
        r = orig()
        if stand.ammeter.n == 6:
            clock.advance(0.35)
        return r
    stand.ammeter.read = slow
    rec = ListRecorder()
    plan = plan_of(seg(0, "rest", 0.1, 2.0, duration_s=2.0))
    res = Engine(plan, stand, clock, recorder=rec).run()
    missed = rec.kinds("missed-cycle")
    assert len(missed) == 1 and missed[0]["missed"] == 3
    ts = [s.t for s in rec.samples]
    gaps = [round(b - a, 9) for a, b in zip(ts, ts[1:])]
    assert max(gaps) == pytest.approx(0.4) and min(gaps) == pytest.approx(0.1)
    assert res.outcome == "completed"


def test_an_exception_from_a_driver_mid_hold_switches_off_then_reports():
    clock = VirtualClock()
    stand, box = make_stand(clock)
    plan = plan_of(ramp(0, 0, 50, 50.0), seg(1, "hold", 0.1, 5.0, 50.0, 50.0, v=50.0, duration_s=5.0),
                   slew_max=100.0)
    rec = ListRecorder()
    eng = Engine(plan, stand, clock, recorder=rec)
    calls = {"n": 0}
    orig = stand.supply.measure_current

    def boom():
        calls["n"] += 1
        if calls["n"] == 25:
            raise RuntimeError("driver bug")
        return orig()
    stand.supply.measure_current = boom
    res = eng.run()
    assert res.outcome == "error" and res.exit_code == 1 and res.confirmed_off
    kinds = [e["kind"] for e in rec.events]
    assert "safe-off" in kinds
    report = [i for i, e in enumerate(rec.events) if "unexpected exception" in e.get("message", "")]
    assert report and report[0] > kinds.index("safe-off")
    assert not box.output_on


def test_unconfirmed_off_is_unsafe_exit_5():
    clock = VirtualClock()
    stand, box = make_stand(clock)
    box.ignore_off = True
    plan = plan_of(ramp(0, 0, 10, 10.0), slew_max=100.0)
    res = Engine(plan, stand, clock).run()
    assert res.outcome == "unsafe" and res.exit_code == 5 and not res.confirmed_off


def test_interlock_open_trips_even_unguarded_and_the_loop_drives_the_heartbeat():
    # The chain opens at its 30th read (the pre-arm check is read 1): the engine's own
    # last line trips on that very sample, watchdog or not; every sample before it
    # toggled the heartbeat line once.
    from tests.engine_fakes import FakeInterlock
    clock = VirtualClock()
    stand, box = make_stand(clock)
    stand.interlock = FakeInterlock(open_at=30)
    rec = ListRecorder()
    plan = plan_of(ramp(0, 0, 100, 10.0), slew_max=50.0)
    res = Engine(plan, stand, clock, recorder=rec, options=EngineOptions(unguarded=True)).run()
    assert res.outcome == "tripped" and res.exit_code == 3 and res.confirmed_off
    assert rec.samples[-1].interlock_ok is False and res.tripped_on_seq == rec.samples[-1].seq
    assert all(s.interlock_ok for s in rec.samples[:-1])
    assert stand.interlock.beats == len(rec.samples) - 1
    assert not box.output_on


def test_an_instrument_failing_before_output_on_is_a_refusal():
    from drivers.errors import TransportTimeout
    clock = VirtualClock()
    stand, box = make_stand(clock)

    def dead():
        raise TransportTimeout("gauge", "no reply within 1 s")
    stand.gauge.read = dead
    res = Engine(plan_of(ramp(0, 0, 10, 10.0)), stand, clock).run()
    assert res.outcome == "refused" and res.exit_code == 2 and res.confirmed_off
    assert not any(entry[1] == "output" and entry[2] for entry in box.log)


def test_a_failing_recorder_ramps_the_run_down_exit_3():
    # The recorder reports a full disk after 40 samples (its ``failed``/``reason`` flags,
    # docs/dev-recorder.md). Expected: a controlled ramp-down, exit 3, the reason named.
    class FullDisk(ListRecorder):
        failed = False
        backlogged = False
        reason = None

        def put_sample(self, sample):
            super().put_sample(sample)
            if len(self.samples) == 40:
                self.failed = True
                self.reason = "samples.csv: [Errno 28] No space left on device"
            return True
    clock = VirtualClock()
    stand, box = make_stand(clock)
    rec = FullDisk()
    plan = plan_of(ramp(0, 0, 100, 10.0), slew_max=20.0)
    res = Engine(plan, stand, clock, recorder=rec).run()
    assert res.outcome == "ramped-down" and res.exit_code == 3 and res.confirmed_off
    assert "No space left" in res.reason
    assert rec.samples[-1].setpoint_v == 0.0 and rec.samples[40].step_kind == "ramp-down"


def test_a_dwell_after_an_early_stopped_ramp_holds_where_the_ramp_stopped():
    # Set: ramp toward 3000 V stopping at 1 uA, then a dwell whose nominal level is the
    # ramp's nominal end (3000 V). The dwell must hold the voltage present when it starts
    # (where until_current stopped the ramp), never climb on to the nominal 3000 V: that
    # would defeat until_current, the point of which is protecting the sample.
    plan = plan_of(ramp(0, 0, 3000, 100.0, until_current=1e-6),
                   seg(1, "hold", 0.1, 1.0, 3000.0, 3000.0, v=3000.0, duration_s=1.0),
                   seg(2, "return", 0.1, 5.0, 3000.0, 0.0, v_from=3000.0, v_to=0.0, rate=500.0),
                   slew_max=500.0, current_max=1e-3)
    res, rec, *_ = run(plan)
    stop_v = [s for s in rec.samples if s.step_kind == "ramp"][-1].setpoint_v
    held = [s.setpoint_v for s in rec.samples if s.step_kind == "hold"]
    assert stop_v < 3000.0
    assert held and max(held) == pytest.approx(stop_v)
    assert res.outcome == "completed" and res.confirmed_off
