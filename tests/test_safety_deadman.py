"""The deadman against a supply session that blocks forever.

What is set: a fake supply whose ``measure_voltage`` hangs (a wire that never answers),
on the virtual clock, so simulated time stands still while the call hangs: only the
deadman, on real monotonic time, can notice. What is expected (issue 5, deliverable 2;
the rule that every way out ends with the output confirmed off): the deadman aborts the
blocked call, switches off through a *fresh* session, the run ends "tripped" with the
output confirmed off, and nothing the hung session does afterwards re-energises the box.
Asserted on events and their order, never on how long anything took.
"""
import threading

import pytest

from drivers.clock import VirtualClock
from sequencer.engine import Engine, EngineOptions, ListRecorder
from tests.engine_fakes import FakeSupply, make_stand, plan_of, seg


def _plan():
    return plan_of(seg(0, "ramp", 0.1, 10.0, 0.0, 100.0, v_from=0.0, v_to=100.0, rate=10.0,
                       step_v=None, settle_s=None, until_current=None),
                   seg(1, "hold", 0.1, 100.0, 100.0, 100.0, v=100.0, duration_s=100.0),
                   slew_max=50.0)


def _blocking_stand(after_calls=40, abort_wakes=True):
    clock = VirtualClock()
    stand, box = make_stand(clock)
    stand.call_budget_s = 0.05
    sup = stand.supply
    sup.abort_wakes = abort_wakes
    release = threading.Event()
    orig = sup._enter

    def enter(what):
        # the 40th voltage readback hangs until ``release`` (forever, unless released)
        if what == "measure_voltage" and sup.calls.count("measure_voltage") == after_calls:
            sup.block = release
        else:
            sup.block = None
        orig(what)
    sup._enter = enter
    return clock, stand, box, release


def test_deadman_aborts_the_hung_call_and_switches_off_through_a_fresh_session():
    clock, stand, box, release = _blocking_stand()
    rec = ListRecorder()
    eng = Engine(_plan(), stand, clock, recorder=rec,
                 options=EngineOptions(deadman_margin_s=0.1))
    res = eng.run()
    assert res.outcome == "tripped" and res.exit_code == 3
    assert res.confirmed_off and not box.output_on and box.v == 0.0
    msgs = [(e["kind"], e.get("source"), e.get("message", "")) for e in rec.events]
    fired = next(i for i, m in enumerate(msgs) if m[1] == "deadman" and m[0] == "note")
    off = next(i for i, m in enumerate(msgs) if m[0] == "safe-off" and m[1] == "deadman")
    assert fired < off
    assert "measure_voltage" not in msgs[fired][2] or "sample" in msgs[fired][2]
    # the switch-off went through the fresh session, not the hung one
    offs = [entry for entry in box.log if entry[1] == "safe_off"]
    assert offs[0][2] == "fresh-session"
    # simulated time did not move while the call hung: the deadman runs on real time
    assert eng.deadman.fired_what.startswith("sample ")
    release.set()


def test_a_late_returning_call_cannot_re_energise():
    # This transport ignores abort(): the hung call returns only when released, after the
    # deadman has switched off. The loop must then stop without sending any voltage.
    clock, stand, box, release = _blocking_stand(abort_wakes=False)
    rec = ListRecorder()

    def stuck(deadman):
        release.set()          # the wire finally answers, late
    eng = Engine(_plan(), stand, clock, recorder=rec,
                 options=EngineOptions(deadman_margin_s=0.1, deadman_stuck_after=0.2,
                                       on_deadman_stuck=stuck))
    res = eng.run()
    assert res.outcome == "tripped" and res.confirmed_off
    kinds = [entry[1] for entry in box.log]
    first_off = kinds.index("safe_off")
    # after the fresh session's safe_off: no voltage and no output-on reached the box
    assert "volt" not in kinds[first_off:] and "output" not in kinds[first_off:]
    assert not box.output_on
    # and the drivers' latch refuses energising from any session until a new arm()
    late = FakeSupply(box, "late")
    try:
        late.set_voltage(500.0)
        raised = False
    except Exception:
        raised = True
    assert raised and box.v == 0.0


def test_the_deadmans_own_death_is_detected_and_switches_off():
    clock = VirtualClock()
    stand, box = make_stand(clock)
    rec = ListRecorder()
    eng = Engine(_plan(), stand, clock, recorder=rec, options=EngineOptions())
    n = {"k": 0}
    orig = stand.ammeter.read

    def read():
        n["k"] += 1
        if n["k"] == 30:
            # kill the deadman thread: its next wait raises inside the thread only
            eng.deadman.poll_s = "not a number"
            eng.deadman._thread.join(2.0)
        return orig()
    stand.ammeter.read = read
    res = eng.run()
    assert res.outcome == "error" and res.exit_code == 1
    assert res.confirmed_off and not box.output_on
    assert any("deadman thread died" in e.get("message", "") for e in rec.events)


def test_an_unconfirmed_off_through_both_sessions_is_unsafe():
    clock, stand, box, release = _blocking_stand()
    box.ignore_off = True
    res = Engine(_plan(), stand, clock, options=EngineOptions(deadman_margin_s=0.1)).run()
    release.set()
    assert res.outcome == "unsafe" and res.exit_code == 5 and not res.confirmed_off


# --------------------------------------------------------------------------------------
# The same through the real drivers and the simulated supply.

def _real_stand(tmp_path):
    pytest.importorskip("simulators.stand")
    from drivers import latch
    from sequencer.rig import rig_from_text
    from sequencer.stand import build_stand
    from tests.engine_fakes import sim_rig_text
    latch.forget_all()
    rig = rig_from_text(sim_rig_text(tmp_path), "sim-rig.yaml")
    return build_stand(rig, seed=7)


def test_deadman_with_the_real_supply_driver_and_a_late_set_voltage(tmp_path):
    """The 60th reply on the loop's supply session never comes (the wire hangs beyond
    its own timeout and ignores abort). Expected, in order: the deadman fires, the fresh
    session's safe_off confirms the simulated output off, then the hung call returns late;
    the driver's latch makes a late set_voltage undo itself and raise LatchedOff, so the
    simulated supply's output stays off and its setpoint at 0 V."""
    built = _real_stand(tmp_path)
    stand, clock, sim = built.stand, built.clock, built.sim
    stand.call_budget_s = 0.2
    tr = stand.supply.transport
    release = threading.Event()
    count = {"n": 0}
    orig = tr._recv_line

    def recv(timeout):
        count["n"] += 1
        if count["n"] == 60:
            release.wait()          # a wire that ignores its timeout and abort()
        return orig(timeout)
    tr._recv_line = recv
    plan = _plan()
    rec = ListRecorder()
    stuck = []

    def on_stuck(deadman):
        stuck.append(sim.supply.output)   # output state when the late reply comes
        release.set()
    eng = Engine(plan, stand, clock, recorder=rec,
                 options=EngineOptions(deadman_margin_s=0.2, deadman_stuck_after=0.2,
                                       on_deadman_stuck=on_stuck))
    try:
        res = eng.run()
    finally:
        release.set()
        stand.close()
    assert res.outcome == "tripped" and res.exit_code == 3 and res.confirmed_off
    assert stuck == [False]                       # off before the late call returned
    assert sim.supply.output is False and sim.supply.v_set == 0.0
    order = [(e["kind"], e.get("source")) for e in rec.events]
    late = [i for i, e in enumerate(rec.events) if e["kind"] == "driver-error"
            and "late set_voltage refused" in e.get("message", "")]
    assert order.index(("note", "deadman")) < order.index(("safe-off", "deadman")) < late[0]


# --------------------------------------------------------------------------------------
# Deterministic faults at named points of the engine (issue 9, deliverable 2).

@pytest.mark.parametrize("point", ["arm", "after-output-on", "back-off", "before-safe-off"])
def test_a_fault_at_each_named_point_still_ends_confirmed_off(point):
    """An exception injected at ``point``. Expected: whatever the outcome, the output ends
    confirmed off (the fake box's output is off and its voltage 0), and the run says why."""
    from sequencer.sample import Action, CONTINUE, Verdict
    from tests.engine_fakes import CeilingWatchdog

    class BackOffOnce(CeilingWatchdog):
        def judge(self, sample, ctx):
            if sample.seq == 30:
                return Verdict(Action.BACK_OFF, "test", 0, 0, "", "test back-off")
            return super().judge(sample, ctx)

    def boom(engine):
        raise RuntimeError(f"fault injected at {point}")
    clock = VirtualClock()
    stand, box = make_stand(clock)
    plan = plan_of(seg(0, "ramp", 0.1, 10.0, 0.0, 1000.0, v_from=0.0, v_to=1000.0, rate=100.0,
                       step_v=None, settle_s=None, until_current=None),
                   slew_max=200.0, current_max=1e-6)
    rec = ListRecorder()
    res = Engine(plan, stand, clock, recorder=rec, watchdog=BackOffOnce(plan.limits),
                 options=EngineOptions(hooks={point: boom}, i_limit=1e-3)).run()
    assert res.confirmed_off, (point, res)
    assert not box.output_on and box.v == 0.0
    if point == "before-safe-off":
        # the trip's safe_off failed on the loop's session: the fresh session did it
        assert res.outcome == "tripped"
        assert any(e.get("source") == "fresh-session" for e in rec.events)
    else:
        assert res.outcome == "error" and res.exit_code == 1
        assert any(f"fault injected at {point}" in (e.get("message") or "") for e in rec.events)


def test_when_every_session_hangs_in_safe_off_the_deadman_still_ends_unsafe():
    """The trip's safe_off hangs on the loop's session (abort ignored) and the fresh
    session's safe_off hangs too (as a driver that makes a second safe_off wait for the
    first would). Expected: the deadman does not hang with them: it gives up after its
    bounded wait, declares the off unconfirmed, and calls on_stuck, where the run command
    marks the rig, raises the alarm and exits 5."""
    from tests.engine_fakes import CeilingWatchdog
    clock = VirtualClock()
    stand, box = make_stand(clock)
    stand.call_budget_s = 0.02
    release = threading.Event()
    for sup in (stand.supply,):
        sup.abort_wakes = False
        sup.block, sup.block_what = release, "safe_off"

    def hung_fresh():
        s = FakeSupply(box, "fresh-session")
        s.abort_wakes, s.block, s.block_what = False, release, "safe_off"
        return s
    stand.open_fresh_supply = hung_fresh
    seen = []

    def stuck(deadman):
        seen.append((deadman.fired, deadman.confirmed_off, repr(deadman.unsafe)))
        release.set()
    plan = plan_of(seg(0, "ramp", 0.1, 10.0, 0.0, 1000.0, v_from=0.0, v_to=1000.0, rate=100.0,
                       step_v=None, settle_s=None, until_current=None),
                   slew_max=200.0, current_max=1e-6)
    rec = ListRecorder()
    Engine(plan, stand, clock, recorder=rec, watchdog=CeilingWatchdog(plan.limits),
           options=EngineOptions(i_limit=1e-3, deadman_margin_s=0.1, deadman_stuck_after=0.2,
                                 on_deadman_stuck=stuck)).run()
    release.set()
    assert seen and seen[0][0] is True and seen[0][1] is False
    assert "did not finish" in seen[0][2]
    unconfirmed = [e for e in rec.events if e["kind"] == "safe-off" and e.get("source") == "deadman"]
    assert unconfirmed and unconfirmed[0]["confirmed"] is False
