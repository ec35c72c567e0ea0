"""The simulated high-voltage supply on the virtual clock: slew, constant current, OVP,
bleed-down, host loss vs the communication timeout, interlock and watchdog relay.

Expectations are the behaviour of real HV supplies (common practice, no source) and the
RC discharge law V(t) = V0 exp(-t / RC) (any circuits textbook)."""
import math

import pytest

from drivers.clock import VirtualClock
from simulators.stand import SimulatedStand

SEED = 5


class Resistor:
    """A load drawing I = V / R (stand-in cathode with a known answer)."""

    def __init__(self, ohm):
        self.ohm = ohm
        self.lost = False
        self.events = []

    def emit(self, v_supply, t, pressure_pa):
        return max(0.0, v_supply) / self.ohm


def stand(load_ohm=1e12, **sim):
    clock = VirtualClock()
    cfg = {"supply": {"slew_v_per_s": 1000.0, "capacitance_f": 2e-9, "bleeder_ohm": 1e8}}
    for k, v in sim.items():
        cfg.setdefault(k, {}).update(v) if isinstance(v, dict) else cfg.__setitem__(k, v)
    return SimulatedStand(cfg, clock, seed=SEED, cathode=Resistor(load_ohm)), clock


def at(st, clock, t):
    clock.sleep_until(t)
    return st.advance()


def test_output_slews_up_at_its_rate():
    # set 500 V at 1000 V/s: 250 V after 0.25 s, 500 V from 0.5 s on
    st, clock = stand()
    st.supply.handle("SOUR:VOLT 500;OUTP ON")
    assert at(st, clock, 0.25).voltage_v == pytest.approx(250.0, rel=1e-6)
    assert at(st, clock, 0.6).voltage_v == pytest.approx(500.0)
    assert float(st.supply.handle("MEAS:VOLT?")) == pytest.approx(500.0, abs=0.2)


def test_bleed_down_after_output_off_follows_rc():
    # after OUTP OFF the output falls through bleeder and capacitance, tau = R C = 0.2 s:
    # V(tau) = V0 / e, V(5 tau) = V0 e^-5 (RC discharge law)
    st, clock = stand()
    st.supply.handle("SOUR:VOLT 1000;OUTP ON")
    at(st, clock, 2.0)
    st.supply.handle("OUTP OFF")
    v_tau = at(st, clock, 2.2).voltage_v
    v_5tau = at(st, clock, 3.0).voltage_v
    assert v_tau == pytest.approx(1000.0 / math.e, rel=1e-3)
    assert v_5tau == pytest.approx(1000.0 * math.exp(-5), rel=1e-3)
    assert st.supply.handle("OUTP?") == "0"


def test_constant_current_mode_at_the_limit():
    # 1 Gohm load at 1000 V would draw 1 uA; with a 0.5 uA limit the supply goes into
    # constant current and settles near 500 V, reporting CC (QUES bit 1, OUTP:MODE?)
    st, clock = stand(load_ohm=1e9)
    st.supply.handle("SOUR:CURR 0.5e-6;SOUR:VOLT 1000;OUTP ON")
    truth = at(st, clock, 3.0)
    assert truth.cc
    assert truth.current_a == pytest.approx(0.5e-6, rel=0.02)
    assert truth.voltage_v == pytest.approx(500.0, rel=0.02)
    assert st.supply.handle("OUTP:MODE?") == "CC"
    assert int(st.supply.handle("STAT:QUES:COND?")) & 2
    # lowering the setpoint below 500 V leaves CC again (constant voltage)
    st.supply.handle("SOUR:VOLT 300")
    truth = at(st, clock, 6.0)
    assert not truth.cc and truth.voltage_v == pytest.approx(300.0, rel=1e-3)
    assert st.supply.handle("OUTP:MODE?") == "CV"


def test_over_current_trip_when_enabled():
    # with the over-current trip enabled, reaching the limit switches the output off and
    # latches until OUTP:PROT:CLE (common practice, no source)
    st, clock = stand(load_ohm=1e9)
    st.supply.handle("SOUR:CURR 0.5e-6;CURR:PROT:STAT ON;SOUR:VOLT 1000;OUTP ON")
    at(st, clock, 2.0)
    assert st.supply.handle("OUTP?") == "0"
    assert st.supply.handle("CURR:PROT:TRIP?") == "1"
    assert int(st.supply.handle("STAT:QUES:COND?")) & (1 << 9)
    st.supply.handle("OUTP ON")                      # refused while tripped
    assert st.supply.handle("SYST:ERR?").startswith("-221")
    st.supply.handle("OUTP:PROT:CLE;SOUR:VOLT 100;OUTP ON")
    assert st.supply.handle("OUTP?") == "1"


def test_ovp_trips_when_the_output_crosses_it():
    # OVP at 400 V, setpoint 600 V: the output slews up, trips at 400 V (QUES bit 0)
    st, clock = stand()
    st.supply.handle("SOUR:VOLT:PROT 400;SOUR:VOLT 600;OUTP ON")
    at(st, clock, 1.0)
    assert st.supply.handle("OUTP?") == "0"
    assert st.supply.handle("VOLT:PROT:TRIP?") == "1"
    assert int(st.supply.handle("STAT:QUES:COND?")) & 1
    trip = [e for e in st.supply.events if e[1] == "output-off"]
    assert trip and trip[0][2] == "ovp" and trip[0][0] == pytest.approx(0.4, abs=0.01)


def test_output_stays_on_when_the_host_vanishes_by_default():
    # real supplies keep their output when the host dies (common practice, no source):
    # the default of the simulated one
    st, clock = stand()
    st.supply.handle("SOUR:VOLT 800;OUTP ON")
    at(st, clock, 1.0)
    st.host_lost()
    truth = at(st, clock, 600.0)
    assert truth.output_on and truth.voltage_v == pytest.approx(800.0)


def test_comm_timeout_armed_turns_the_output_off_after_silence():
    # comm timeout 2 s, last command at t = 1 s, host gone: the output goes off at
    # t = 3 s and bleeds down (tau 0.2 s); the event is stamped with that time
    st, clock = stand()
    st.supply.handle("SYST:COMM:TIM 2;SOUR:VOLT 800;OUTP ON")
    clock.sleep_until(1.0)
    st.supply.handle("SOUR:VOLT?")
    st.host_lost()
    assert at(st, clock, 2.9).output_on
    truth = at(st, clock, 3.0 + 5 * 0.2)
    assert not truth.output_on
    assert truth.voltage_v == pytest.approx(800.0 * math.exp(-5), rel=1e-2)
    off = [e for e in st.supply.events if e[1] == "output-off"][0]
    assert off[0] == pytest.approx(3.0) and off[2] == "comm-timeout"
    assert int(st.supply.handle("STAT:QUES:COND?")) & (1 << 11)


def test_host_loss_off_setting():
    # some supplies do drop their output on a lost connection: host_loss: off
    st, clock = stand(supply={"host_loss": "off"})
    st.supply.handle("SOUR:VOLT 800;OUTP ON")
    at(st, clock, 1.0)
    st.host_lost()
    assert not at(st, clock, 1.01).output_on


def test_heartbeat_relay_drops_the_output_when_the_heartbeat_stops():
    # watchdog relay timeout 0.5 s: a heartbeat every 0.1 s keeps it closed; the last
    # beat at t = 1.0 s means the output is cut at t = 1.5 s and stays off (latched)
    st, clock = stand(interlock={"relay_timeout_s": 0.5})
    st.supply.handle("SOUR:VOLT 800;OUTP ON")
    level = False
    for k in range(1, 11):
        clock.sleep_until(0.1 * k)
        level = not level
        st.interlock.set_line("DTR", level)
        assert st.advance().output_on
    assert at(st, clock, 1.45).output_on
    assert not at(st, clock, 1.6).output_on
    off = [e for e in st.supply.events if e[1] == "output-off"][0]
    assert off[0] == pytest.approx(1.5) and off[2] == "interlock"
    assert st.interlock.get_line("DSR") is False                 # relay open
    st.interlock.set_line("DTR", not level)                      # heartbeat resumes
    assert st.interlock.get_line("DSR") is True
    assert not at(st, clock, 2.0).output_on                      # supply stays tripped


def test_interlock_chain_and_inhibit_line_cut_the_output():
    st, clock = stand()
    st.supply.handle("SOUR:VOLT 300;OUTP ON")
    at(st, clock, 0.5)
    st.interlock.open_chain()                 # a door opened
    assert not at(st, clock, 0.6).output_on
    assert st.supply.handle("SYST:INT?") == "0" and st.interlock.get_line("CTS") is False
    st.supply.handle("OUTP ON")
    assert st.supply.handle("SYST:ERR?").startswith("-221")
    st.interlock.close_chain()
    st.supply.handle("OUTP:PROT:CLE;OUTP ON")
    assert at(st, clock, 0.7).output_on
    st.interlock.set_line("RTS", True)        # the host asserts the inhibit
    assert not at(st, clock, 0.8).output_on


def test_ignore_output_off_quirk_keeps_voltage_and_can_lie():
    # quirk: OUTP OFF accepted and ignored; with lie: true OUTP? says 0 while the
    # terminal voltage stays up (only a voltage readback tells the truth)
    quirks = {"supply": {"faults": [{"kind": "ignore-output-off", "lie": True}]}}
    st, clock = stand(quirks=quirks)
    st.supply.handle("SOUR:VOLT 700;OUTP ON")
    at(st, clock, 1.0)
    st.supply.handle("OUTP OFF")
    truth = at(st, clock, 3.0)
    assert truth.output_on and truth.voltage_v == pytest.approx(700.0)
    assert st.supply.handle("OUTP?") == "0"
    assert float(st.supply.handle("MEAS:VOLT?")) == pytest.approx(700.0, abs=1.0)
    st.supply.handle("SOUR:VOLT 0")            # 0 V still works: the output falls
    assert at(st, clock, 5.0).voltage_v < 1.0


def test_drift_quirk_moves_the_output_off_its_setpoint():
    # drift 2 V/s from t = 10 s, capped at 15 V: at t = 15 s the output is 10 V high,
    # at t = 30 s 15 V high; the programmed setpoint still reads back unchanged
    quirks = {"supply": {"faults": [{"kind": "drift", "from_s": 10, "rate_v_per_s": 2.0, "max_v": 15}]}}
    st, clock = stand(quirks=quirks)
    st.supply.handle("SOUR:VOLT 500;OUTP ON")
    assert at(st, clock, 9.0).voltage_v == pytest.approx(500.0)
    assert at(st, clock, 15.0).voltage_v == pytest.approx(510.0, abs=0.5)
    assert at(st, clock, 30.0).voltage_v == pytest.approx(515.0, abs=0.5)
    assert float(st.supply.handle("SOUR:VOLT?")) == 500.0


def test_constant_current_on_a_fowler_nordheim_load():
    # a Murphy-Good emitter (sequencer.physics; Murphy and Good 1956) behind 1 Mohm:
    # the current rises steeply with voltage; with a 1 uA limit and 1500 V asked the
    # supply settles in CC at the voltage where the load draws 1 uA, below 1500 V
    from simulators.stand import FowlerNordheimStandIn
    fn = FowlerNordheimStandIn({"beta": 5000, "phi_ev": 4.8, "gap_m": 500e-6, "area_m2": 1e-12})
    clock = VirtualClock()
    st = SimulatedStand({"supply": {"slew_v_per_s": 500.0}}, clock, seed=SEED, cathode=fn)
    st.supply.handle("SOUR:CURR 1e-6;SOUR:VOLT 1500;OUTP ON")
    truth = at(st, clock, 5.0)
    assert truth.cc and truth.current_a == pytest.approx(1e-6, rel=0.01)
    assert truth.voltage_v < 1500.0
    # the same load at that voltage, solved directly, draws the limit
    assert fn.emit(truth.voltage_v, 5.0, 1e-6) == pytest.approx(1e-6, rel=0.01)


def test_identity_and_ammeter_sign_from_a_whole_rig_dict():
    rig = {"ammeter": {"sign": -1},
           "instruments": {"hv": {"role": "supply", "address": "sim:supply",
                                  "identity": {"model": "SIM-SUPPLY", "serial": "KL-HV-0007"}}},
           "simulation": {"seed": 2}}
    st = SimulatedStand(rig, VirtualClock())
    assert st.supply.handle("*IDN?").split(",")[2] == "KL-HV-0007"
    assert st.ammeter.polarity == -1.0


def test_ignore_comm_timeout_quirk_keeps_the_output_on():
    # quirk: the comm timeout is accepted (reads back 2 s) but never acts: 60 s after
    # the host went silent the output is still on
    st, clock = stand(quirks={"supply": {"faults": [{"kind": "ignore-comm-timeout"}]}})
    st.supply.handle("SYST:COMM:TIM 2;SOUR:VOLT 800;OUTP ON")
    assert float(st.supply.handle("SYST:COMM:TIM?")) == 2.0
    st.host_lost()
    truth = at(st, clock, 60.0)
    assert truth.output_on and truth.voltage_v == pytest.approx(800.0)
