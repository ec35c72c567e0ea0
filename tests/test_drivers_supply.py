"""Supply driver: arm() step by step and its refusals, write-on-change, safe_off() and its
escalation, and the shared latch. Fake supply from tests/drivers_fakes.py on a
VirtualClock, so bleed-down and polling run in simulated time.

Standards referred to (section numbers from memory): IEEE 488.2 §10.14 *IDN?, §10.3 *CLS,
§11.5.1 *ESR? bits, §10.18 *OPC?; SCPI-99 Vol. 2 §21.8 SYST:ERR? error queue.
"""
import math
import os
import sys
import threading

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import FakeSupply  # noqa: E402

from drivers import latch
from drivers.errors import (ArmRefused, DriverError, IdentityMismatch, LatchedOff,
                            TransportAborted, UnsafeStateError)
from drivers.roles import hardware_limits
from drivers.supply import ScpiSupply
from drivers.transport_inproc import InprocTransport


@pytest.fixture(autouse=True)
def _fresh_latches():
    latch.forget_all()
    yield
    latch.forget_all()


def make(fake=None, timeout=0.2, **kw):
    fake = fake or FakeSupply()
    t = InprocTransport(fake, resource="sim:test/supply", timeout=timeout)
    kw.setdefault("expected_model", "HV-30K")
    kw.setdefault("expected_serial", "SN1042")
    kw.setdefault("rig_max_v", 5000.0)
    kw.setdefault("rig_max_a", 1e-3)
    return fake, ScpiSupply(t, clock=fake.clock, **kw)


def heads(fake):
    return [line.split(" ")[0] for line in fake.log]


def test_arm_runs_the_steps_in_order_and_never_resets():
    fake, sup = make()
    rep = sup.arm(v_ovp=1050.0, i_limit=1.3e-4)
    # order required by the issue: output state, voltage, identity, *CLS, 0 V, limit, OVP,
    # error queue, output on, confirm
    order = ["OUTP?", "MEAS:VOLT?", "*IDN?", "*CLS", "SOUR:VOLT", "SOUR:VOLT?", "SOUR:CURR",
             "SOUR:CURR?", "SOUR:VOLT:PROT", "SOUR:VOLT:PROT?", "SYST:ERR?", "OUTP", "OUTP?",
             "MEAS:VOLT?", "*ESR?"]
    assert heads(fake) == order
    assert fake.log[4] == "SOUR:VOLT 0"
    assert "*RST" not in heads(fake)
    assert fake.output and fake.ilim == pytest.approx(1.3e-4) and fake.ovp == 1050.0
    assert rep.v_ovp == 1050.0 and [s for s, _ in rep.steps][-1] == "output on"
    assert not sup.latched


def test_arm_refuses_when_output_already_on_and_touches_nothing():
    fake, sup = make()
    fake.output, fake.setv = True, 800.0
    with pytest.raises(ArmRefused, match="already on"):
        sup.arm(1050.0, 1.3e-4)
    assert heads(fake) == ["OUTP?"]                 # nothing written
    assert fake.output and fake.setv == 800.0


def test_arm_refuses_a_charged_output_filter():
    fake, sup = make()
    fake._v_off, fake._t_off = 400.0, 0.0           # switched off a moment ago, still 400 V
    with pytest.raises(ArmRefused, match="with the output off"):
        sup.arm(1050.0, 1.3e-4)
    assert not any(h.startswith("SOUR") for h in heads(fake))


@pytest.mark.parametrize("idn, what", [("KESTREL LANE,HV-10K,SN1042,1.0", "model"),
                                       ("KESTREL LANE,HV-30K,SN9999,1.0", "serial")])
def test_arm_refuses_the_wrong_instrument(idn, what):
    fake, sup = make(FakeSupply(idn=idn))
    with pytest.raises(IdentityMismatch, match=what):
        sup.arm(1050.0, 1.3e-4)
    assert not any(h.startswith("SOUR") or h == "OUTP" for h in heads(fake))
    assert not fake.output


@pytest.mark.parametrize("head", ["SOUR:VOLT?", "SOUR:CURR?", "SOUR:VOLT:PROT?"])
def test_arm_refuses_a_readback_outside_tolerance(head):
    fake, sup = make()
    fake.readback_scale[head] = 1.5                 # the setting reads back 50 % off
    fake.setv = 0.0
    if head == "SOUR:VOLT?":
        fake.readback_scale.pop(head)
        fake.garbage["SOUR:VOLT?"] = "12.0"         # 0 V programmed, reads back 12 V
    with pytest.raises(ArmRefused, match="reads back"):
        sup.arm(1050.0, 1.3e-4)
    assert not fake.output and "OUTP ON" not in fake.log


def test_arm_refuses_error_queue_entries_and_reports_them():
    fake, sup = make()
    orig = fake.command

    def command(up):
        r = orig(up)
        if up.startswith("SOUR:VOLT:PROT "):
            fake.errors.append((-221, "Settings conflict"))
        return r
    fake.command = command
    with pytest.raises(ArmRefused, match="Settings conflict"):
        sup.arm(1050.0, 1.3e-4)
    assert not fake.output


def test_a_never_empty_error_queue_is_drained_a_bounded_number_of_times():
    fake, sup = make()
    fake.never_empty_queue = True
    with pytest.raises(ArmRefused, match="never emptied"):
        sup.arm(1050.0, 1.3e-4)
    cap = sup.dialect.get("error_queue_cap")
    assert heads(fake).count("SYST:ERR?") == cap == 32
    assert not fake.output


def test_limits_above_the_rig_maximum_are_refused_before_any_io():
    fake, sup = make()
    with pytest.raises(ArmRefused, match="exceeds the maximum"):
        sup.arm(v_ovp=6000.0, i_limit=1e-4)         # rig maximum is 5000 V
    with pytest.raises(ArmRefused, match="exceeds the maximum"):
        sup.arm(v_ovp=1000.0, i_limit=2e-3)         # rig maximum is 1 mA
    assert fake.log == []


def test_hardware_limits_sit_above_the_software_ceiling_and_below_the_rig():
    # current limit 1.2..1.5 x software ceiling (issue 3); OVP just above the plan's peak
    v, i = hardware_limits(peak_v=2000.0, ceiling_a=1e-4, rig_max_v=5000.0, rig_max_a=1e-3,
                           current_factor=1.3)
    assert i == pytest.approx(1.3e-4) and 2000.0 < v <= 2000.0 * 1.05 + 1e-9
    v, i = hardware_limits(peak_v=4990.0, ceiling_a=9e-4, rig_max_v=5000.0, rig_max_a=1e-3)
    assert v == 5000.0 and i == 1e-3                # clamped to the rig, never above
    with pytest.raises(ValueError):
        hardware_limits(2000.0, 1e-4, 5000.0, 1e-3, current_factor=2.0)
    with pytest.raises(ValueError):
        hardware_limits(6000.0, 1e-4, 5000.0, 1e-3)


def test_set_voltage_is_written_only_on_change_and_checked_with_esr():
    fake, sup = make()
    sup.arm(1050.0, 1.3e-4)
    n0 = len(fake.log)
    for v in (100.0, 100.0, 100.04, 200.0):         # 100.04 rounds to the 0.1 V resolution
        sup.set_voltage(v)
    sets = [x for x in fake.log[n0:] if x.startswith("SOUR:VOLT ")]
    assert sets == ["SOUR:VOLT 100", "SOUR:VOLT 200"]
    assert fake.log[n0:].count("*ESR?") == 2
    with pytest.raises(DriverError, match="over-voltage"):
        sup.set_voltage(1100.0)
    with pytest.raises(DriverError):
        sup.set_voltage(float("nan"))


def test_a_rejected_setpoint_is_reported():
    fake, sup = make()
    sup.arm(1050.0, 1.3e-4)
    fake.ovp = 500.0                                 # the supply refuses 600 V (-222)
    with pytest.raises(DriverError, match="ESR"):
        sup.set_voltage(600.0)


def test_safe_off_output_off_first_then_zero_volts_then_confirmed_after_bleed_down():
    fake, sup = make(FakeSupply(tau=0.5))
    sup.arm(1050.0, 1.3e-4)
    sup.set_voltage(1000.0)
    t0 = fake.clock.now()
    n0 = len(fake.log)
    rep = sup.safe_off()
    writes = [x for x in fake.log[n0:] if not x.endswith("?")]
    assert writes[:2] == ["OUTP OFF", "SOUR:VOLT 0"]
    assert rep.confirmed and not rep.escalated and rep.voltage_v < 5.0
    # 1000 V decaying with tau 0.5 s reaches the 5 V threshold after 0.5*ln(200) = 2.65 s
    assert fake.clock.now() - t0 == pytest.approx(0.5 * math.log(200), abs=0.11)
    assert sup.latched
    again = sup.safe_off()                            # idempotent
    assert again.confirmed


def test_latch_refuses_energising_until_a_new_arm():
    fake, sup = make()
    sup.arm(1050.0, 1.3e-4)
    sup.safe_off()
    with pytest.raises(LatchedOff):
        sup.set_voltage(100.0)
    with pytest.raises(LatchedOff):
        sup.output(True)
    with pytest.raises(LatchedOff):
        sup.set_current_limit(5e-4)                   # raising the limit energises
    sup.set_current_limit(1e-4)                       # lowering it is allowed
    sup.arm(1050.0, 1.3e-4)
    sup.set_voltage(100.0)
    assert fake.setv == 100.0


def test_latch_is_shared_by_sessions_and_beats_a_late_returning_call():
    fake = FakeSupply()
    _, old = make(fake, timeout=5.0)
    old.arm(1050.0, 1.3e-4)
    old.set_voltage(500.0)
    gate = threading.Event()
    fake.block["SOUR:VOLT 900"] = gate                # the old session's write hangs
    result = {}

    def sample_loop():
        try:
            old.set_voltage(900.0)
            result["r"] = "returned"
        except DriverError as exc:
            result["r"] = exc
    th = threading.Thread(target=sample_loop)
    fake.received.clear()
    th.start()
    assert fake.received.wait(5)
    # the deadman opens a fresh session to the same instrument and safes it
    _, fresh = make(fake)
    rep = fresh.safe_off()
    assert rep.confirmed and old.latched and fresh.latched
    gate.set()                                         # the hung call returns late
    th.join(5)
    assert not th.is_alive()
    assert isinstance(result["r"], LatchedOff)
    assert not fake.output and fake.setv == 0.0        # the late 900 V was undone
    with pytest.raises(LatchedOff):
        old.output(True)
    # a new arm on the fresh session does not re-enable the old one (new epoch)
    fresh.arm(1050.0, 1.3e-4)
    with pytest.raises(LatchedOff):
        old.set_voltage(100.0)


def test_safe_off_against_a_supply_that_ignores_output_off_escalates_then_raises():
    fake, sup = make()
    inhibits = []
    sup.inhibit_line = inhibits.append
    sup.arm(1050.0, 1.3e-4)
    sup.set_voltage(1000.0)
    fake.ignore_output_off = True
    with pytest.raises(UnsafeStateError) as info:
        sup.safe_off()
    assert "supply (sim:test/supply)" in str(info.value)
    assert inhibits == [True]
    assert fake.disconnects == 1                       # reopened once


def test_escalation_order_and_inhibit_that_works():
    fake, sup = make()

    def inhibit(on):
        fake.ignore_output_off = False                 # a hardware inhibit drops the output
        fake._off()
    sup.inhibit_line = inhibit
    sup.arm(1050.0, 1.3e-4)
    fake.ignore_output_off = True
    rep = sup.safe_off()
    names = [s for s, _, _ in rep.steps]
    assert rep.confirmed and rep.escalated
    assert names.index("device clear") < names.index("reopen") < names.index("re-identify") \
        < names.index("inhibit line")
    assert dict((s, ok) for s, ok, _ in rep.steps)["re-identify"]


def test_safe_off_tries_every_step_even_when_the_transport_is_aborted():
    fake, sup = make()
    sup.arm(1050.0, 1.3e-4)
    sup.set_voltage(700.0)
    sup.abort()                                        # e.g. the deadman woke a hung call
    rep = sup.safe_off()                               # resyncs, then off, then 0 V
    assert rep.confirmed and not fake.output and fake.setv == 0.0
    assert [s for s, _, _ in rep.steps][:3] == ["resync", "output off", "0 V"]


def test_garbage_replies_are_driver_errors_not_crashes():
    fake, sup = make()
    fake.garbage["MEAS:VOLT?"] = "#$%garbage"
    with pytest.raises(DriverError, match="not a number"):
        sup.measure_voltage()
    # an unparseable reply may be someone else's late answer: resync before the next call
    del fake.garbage["MEAS:VOLT?"]
    assert sup.measure_voltage() == 0.0 and fake.log[-2:] == ["*OPC?", "MEAS:VOLT?"]
    fake.garbage = {"*IDN?": "HELLO"}
    with pytest.raises(DriverError, match="four comma-separated"):
        sup.identify()
    fake.garbage = {"OUTP?": "maybe"}
    with pytest.raises(DriverError, match="boolean"):
        sup.state()


def test_state_reads_cc_from_the_questionable_register():
    # SCPI-99 Vol. 1 ch. 9 (from memory): QUEStionable bit 1 is CURRent
    fake, sup = make()
    fake.cc = True
    st = sup.state()
    assert st.cc and not st.tripped and st.raw["questionable"] == 2 and st.interlock_open is False
    fake.cc = False
    fake.garbage["STAT:QUES:COND?"] = str(1 << 9 | 1 << 10)   # arc trip + interlock (dialect)
    st = sup.state()
    assert st.tripped and st.interlock_open and not st.cc


def test_aborted_call_raises_and_the_session_needs_resync():
    fake, sup = make(timeout=30.0)
    fake.delays["MEAS:CURR?"] = math.inf               # the reply never comes
    out = {}

    def reader():
        try:
            sup.measure_current()
        except DriverError as exc:
            out["e"] = exc
    th = threading.Thread(target=reader)
    fake.received.clear()
    th.start()
    assert fake.received.wait(5)
    sup.abort()
    th.join(5)
    assert not th.is_alive() and isinstance(out["e"], TransportAborted)
    fake.delays.clear()
    assert not sup.transport.trusted
    # the next call resynchronises first (flush, *OPC? == 1), then asks its own question
    assert sup.measure_voltage() == 0.0
    assert fake.log[-2:] == ["*OPC?", "MEAS:VOLT?"]


def test_safe_off_is_single_flight():
    fake = FakeSupply()
    _, a = make(fake, timeout=5.0)
    _, b = make(fake, timeout=5.0)
    a.arm(1050.0, 1.3e-4)
    gate = threading.Event()
    fake.block["OUTP OFF"] = gate
    reports = {}

    def off(name, sup):
        reports[name] = sup.safe_off()
    ta = threading.Thread(target=off, args=("a", a))
    fake.received.clear()
    ta.start()
    assert fake.received.wait(5)                       # a is inside its output-off write
    tb = threading.Thread(target=off, args=("b", b))
    tb.start()
    entry = latch.entry("sim:test/supply", "SN1042")
    assert entry.waiter_arrived.wait(5)                # b waits instead of starting its own
    gate.set()
    ta.join(5)
    tb.join(5)
    assert reports["a"] is reports["b"] and reports["a"].confirmed
    assert fake.log.count("OUTP OFF") == 1


def test_comm_timeout_is_programmed_or_the_arm_refused():
    fake, sup = make()
    orig = fake.command
    seen = []

    def command(up):
        if up.startswith("SYST:COMM:TIM "):
            seen.append(float(up.split()[1]))
            return None
        return orig(up)
    fake.command = command
    rep = sup.arm(1050.0, 1.3e-4, comm_timeout_s=5.0)
    assert seen == [5.0] and rep.comm_timeout_s == 5.0
    # a supply that does not know the command flags a command error (IEEE 488.2 §11.5.1
    # CME bit, from memory): arming stops before the output goes on
    latch.forget_all()
    fake2, sup2 = make()
    with pytest.raises(ArmRefused, match="communication timeout"):
        sup2.arm(1050.0, 1.3e-4, comm_timeout_s=5.0)
    assert not fake2.output and "OUTP ON" not in fake2.log


def test_comm_timeout_not_in_the_dialect_is_reported_not_sent(tmp_path):
    import yaml
    from drivers.dialect import load_dialect
    data = yaml.safe_load(open(load_dialect("generic-scpi-supply").source).read())
    data["name"] = "kl-hv-no-watchdog"
    data["commands"]["set_comm_timeout"] = None
    data["comm_timeout"]["supported"] = False
    p = tmp_path / "kl-hv-no-watchdog.yaml"
    p.write_text(yaml.safe_dump(data))
    fake, sup = make(dialect=str(p))
    rep = sup.arm(1050.0, 1.3e-4, comm_timeout_s=5.0)
    assert rep.comm_timeout_s is None
    assert ("communication timeout", "not supported by this supply") in rep.steps
    assert not any(x.startswith("SYST:COMM") for x in fake.log)


def test_a_safe_off_stuck_on_a_hung_session_is_taken_over_by_a_fresh_one():
    # Set: session a's safe_off() hangs inside its output-off write (a wire that never
    # answers; a's own timeout is long). The deadman's fresh session b calls safe_off().
    # Expected: b waits for a only a bounded time, then wakes a (abort) and switches off
    # through its own session: output off and 0 V confirmed, instead of both hanging.
    fake = FakeSupply()
    _, a = make(fake, timeout=60.0)
    _, b = make(fake, timeout=0.5)
    b.takeover_after_s = 0.3
    a.arm(1050.0, 1.3e-4)
    a.output(True)
    a.set_voltage(400.0)
    gate = threading.Event()
    fake.block["OUTP OFF"] = gate
    outcome = {}

    def off_a():
        try:
            outcome["a"] = a.safe_off()
        except DriverError as exc:
            outcome["a"] = exc
    ta = threading.Thread(target=off_a, daemon=True)
    fake.received.clear()
    ta.start()
    assert fake.received.wait(5)                       # a is stuck in its OUTP OFF
    del fake.block["OUTP OFF"]                         # the wire to b works
    rep = b.safe_off()
    assert rep.confirmed
    assert not fake.output and fake.setv == 0.0
    gate.set()
    ta.join(10)
    assert not ta.is_alive()                           # a was woken, not left hanging
    # a's caller gets a confirmed report (its own, once woken, or b's), never "unsafe"
    assert not isinstance(outcome["a"], Exception) and outcome["a"].confirmed
    with pytest.raises(LatchedOff):
        a.set_voltage(400.0)


def test_a_supply_that_stops_answering_escalates_within_a_real_time_bound():
    # Set: after arming at 400 V the supply answers no query any more (writes still
    # arrive). Each readback is bounded by real time (bleed-down + 2 timeouts) as well as
    # by the instrument's clock, so an instrument that never answers cannot hold back the
    # escalation and the alarm. The real clock is replaced by one that advances 1 s per
    # reading (no wall-clock time in the test). Expected: UnsafeStateError naming the
    # supply after a handful of unanswered queries per escalation level.
    fake, sup = make(timeout=0.05)
    sup.arm(1050.0, 1.3e-4)
    sup.output(True)
    sup.set_voltage(400.0)
    ticks = iter(range(10 ** 6))
    sup._monotonic = lambda: float(next(ticks))
    for q in ("OUTP?", "MEAS:VOLT?", "*OPC?", "*IDN?", "*ESR?"):
        fake.delays[q] = math.inf
    before = len(fake.log)
    with pytest.raises(UnsafeStateError) as exc:
        sup.safe_off()
    assert sup.where in str(exc.value)
    bleed = sup.dialect.number("output_off.bleed_down_s")
    unanswered = [c for c in fake.log[before:] if c.endswith("?")]
    # per level (first try, device clear, reopen): at most bleed + 2 timeouts real seconds
    # of polls at one tick per reading, plus the level's own resyncs and identity query
    assert len(unanswered) <= 3 * (bleed + 2 * 0.05 + 1 + 4)


def test_a_woken_first_safe_off_reports_the_takeover_not_its_dead_session():
    # Set: as above, but a's session stays dead after it is woken (every later call of
    # a's fails). Expected: b confirms the output off; a's caller gets b's confirmed
    # report instead of an UnsafeStateError from a session that was abandoned.
    fake = FakeSupply()
    _, a = make(fake, timeout=60.0)
    _, b = make(fake, timeout=0.5)
    b.takeover_after_s = 0.3
    a.arm(1050.0, 1.3e-4)
    a.output(True)
    a.set_voltage(400.0)
    gate = threading.Event()
    fake.block["OUTP OFF"] = gate
    outcome = {}

    def dead(*_args, **_kw):
        raise DriverError(a.where, "session gone")

    def off_a():
        try:
            outcome["a"] = a.safe_off()
        except DriverError as exc:
            outcome["a"] = exc
    ta = threading.Thread(target=off_a, daemon=True)
    fake.received.clear()
    ta.start()
    assert fake.received.wait(5)
    del fake.block["OUTP OFF"]
    rep = b.safe_off()
    a.transport.write = a.transport.query = a.transport.resync = dead
    a.transport.reopen = a.transport.device_clear = dead
    gate.set()
    ta.join(30)
    assert not ta.is_alive()
    assert rep.confirmed and outcome["a"] is rep
