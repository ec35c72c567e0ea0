"""The simulated vacuum gauge: its serial protocol, states and lag.

Unit factors: 1 mbar = 100 Pa, 1 Torr = 101325/760 Pa (ISO 80000-4 / definition of the
torr), via scipy.constants. A first-order lag x(t) = x_inf + (x0 - x_inf) e^(-t/tau)
(common practice for gauge response, no source)."""
import math

import pytest
import scipy.constants as C

from drivers.clock import VirtualClock
from simulators.stand import SimulatedStand

SEED = 3


class Chamber:
    """A chamber at a pressure the test sets (stand-in)."""

    def __init__(self, p):
        self.p = p

    def advance(self, t, current_a, voltage_v):
        return self.p


class NoEmission:
    lost = False
    events = []

    def emit(self, v, t, p):
        return 0.0


def stand(p=2e-6, **gauge):
    clock = VirtualClock()
    ch = Chamber(p)
    st = SimulatedStand({"gauge": gauge}, clock, seed=SEED, cathode=NoEmission(), chamber=ch)
    return st, clock, ch


def test_ok_reading_in_each_unit():
    st, _, _ = stand(p=2e-6)
    g = st.gauge
    assert g.handle("UNIT?") == "MBAR"
    status, value = g.handle("PR?").split(",")
    assert status == "0" and float(value) == pytest.approx(2e-6 / (C.bar / 1000), rel=5e-3)
    assert g.handle("UNIT TORR") == "OK"
    assert float(g.handle("PR?").split(",")[1]) == pytest.approx(2e-6 / C.torr, rel=5e-3)
    assert g.handle("UNIT PA") == "OK"
    assert float(g.handle("PR?").split(",")[1]) == pytest.approx(2e-6, rel=5e-3)


def test_under_and_over_range_states():
    # range 1e-8 .. 1e-1 Pa: below -> status 1 (under-range), above -> 2 (over-range)
    st, _, _ = stand(p=1e-9)
    assert st.gauge.handle("PR?").startswith("1,")
    st2, _, _ = stand(p=0.5, protect_pa=10.0)
    assert st2.gauge.handle("PR?").startswith("2,")


def test_words_reply_style():
    st, _, _ = stand(p=1e-9, reply_style="words")
    assert st.gauge.handle("PR?") == "UNR"
    st.gauge.handle("FIL OFF")
    assert st.gauge.handle("PR?") == "FIL,OFF"


def test_filament_off_on_command_and_after_warm_up():
    # FIL OFF -> status 3; FIL ON lights it after the 2 s warm-up
    st, clock, _ = stand()
    g = st.gauge
    assert g.handle("FIL OFF") == "OK" and g.handle("FIL?") == "OFF"
    assert g.handle("PR?").startswith("3,")
    g.handle("FIL ON")
    clock.sleep_until(clock.now() + 1.0)
    assert g.handle("PR?").startswith("3,")
    clock.sleep_until(clock.now() + 1.5)
    assert g.handle("PR?").startswith("0,")


def test_filament_protects_itself_above_its_pressure():
    # a burst to 5 Pa (above protect_pa 1 Pa): the filament goes out and stays out
    st, clock, ch = stand(p=1e-6, tau_s=0.1)
    ch.p = 5.0
    clock.sleep_until(2.0)
    assert st.gauge.handle("PR?").startswith("3,")
    ch.p = 1e-6
    clock.sleep_until(4.0)
    assert st.gauge.handle("PR?").startswith("3,")
    assert st.gauge.events[0][1] == "filament-off"


def test_gauge_lags_the_chamber():
    # a step from 1e-6 to 1e-4 Pa at t = 0 with tau 0.5 s: after one tau the reading
    # has gone 1 - 1/e of the way (first-order lag)
    st, clock, ch = stand(p=1e-6, tau_s=0.5, unit="PA")
    st.advance()
    ch.p = 1e-4
    clock.sleep_until(0.5)
    p = float(st.gauge.handle("PR?").split(",")[1])
    expect = 1e-4 + (1e-6 - 1e-4) * math.exp(-1)
    assert p == pytest.approx(expect, rel=0.01)


def test_filament_off_and_never_answer_quirks():
    q = {"gauge": {"faults": [{"kind": "filament-off", "from_s": 10},
                              {"kind": "never-answer", "from_s": 20}]}}
    clock = VirtualClock()
    st = SimulatedStand({"quirks": q}, clock, seed=SEED, cathode=NoEmission(), chamber=Chamber(1e-6))
    g = st.gauge
    assert g.handle("PR?").startswith("0,")
    clock.sleep_until(10.0)
    assert g.handle("PR?").startswith("3,")
    clock.sleep_until(20.0)
    assert g.handle("PR?") is None and g.reply_delay("PR?") == math.inf


def test_unknown_command_and_bad_argument():
    st, _, _ = stand()
    assert st.gauge.handle("HELLO") == "ERR,SYNTAX"
    assert st.gauge.handle("UNIT PSI") == "ERR,ARG"
    assert st.gauge.handle("ID?").startswith("FIELDRUN,SIM-GAUGE,")


def test_reply_takes_its_serial_transmission_time():
    # 9600 baud, 8N1: 10 bits per character; "0,2.00E-08" + CR LF = 12 characters
    # -> 12.5 ms (common practice for RS-232 framing, no source)
    st, _, _ = stand(p=2e-6)
    reply = st.gauge.handle("PR?")
    assert st.gauge.reply_delay("PR?") == pytest.approx((len(reply) + 2) * 10 / 9600)
