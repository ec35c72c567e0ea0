"""The simulated picoammeter: input shorted after *RST, special values, auto-range with
its glitch and delay, integration time on the virtual clock, bursts, zero correction.

Special values: SCPI-99 vol. 1, 7.2.1.5 (+9.9E37 positive overload/infinity, -9.9E37
negative, 9.91E37 not a number), from memory. Integration time NPLC / line frequency
(common practice, no source)."""
import pytest

from drivers.clock import VirtualClock
from simulators.instruments import OVERLOAD
from simulators.stand import SimulatedStand

SEED = 23


class FixedLoad:
    """A cathode emitting a chosen current whatever the voltage (stand-in)."""

    def __init__(self, amps):
        self.amps = amps
        self.lost = False
        self.events = []

    def emit(self, v_supply, t, pressure_pa):
        return self.amps


def stand(amps=1e-7, **sim):
    clock = VirtualClock()
    return SimulatedStand(dict(sim), clock, seed=SEED, cathode=FixedLoad(amps)), clock


def test_input_shorted_after_reset_until_configured():
    # after *RST the input is shorted (zero check on): 100 nA flows but the reading is
    # ~0 (offset and noise only, well under 1 % of the signal); CONF:CURR lifts it
    st, clock = stand(amps=1e-7)
    am = st.ammeter
    am.handle("*RST")
    assert am.handle("SYST:ZCH?") == "1" and am.handle("INP:SHOR?") == "1"
    am.handle("SENS:CURR:RANG 2e-7")
    assert abs(float(am.handle("READ?"))) < 1e-9
    am.handle("CONF:CURR 2e-7")
    assert am.handle("INP:SHOR?") == "0"
    assert float(am.handle("READ?")) == pytest.approx(1e-7, rel=1e-3)


def test_fixed_range_overload_gives_signed_special_values():
    # 1 uA on the 200 nA range: over range -> +9.9E37; with the ammeter wired the other
    # way round (polarity -1) -> -9.9E37
    st, _ = stand(amps=1e-6)
    st.ammeter.handle("CONF:CURR 2e-7")
    assert float(st.ammeter.handle("READ?")) == OVERLOAD
    st2, _ = stand(amps=1e-6, ammeter={"polarity": -1})
    st2.ammeter.handle("CONF:CURR 2e-7")
    assert float(st2.ammeter.handle("READ?")) == -OVERLOAD


def test_autorange_up_answers_overload_once_then_reads_on_the_new_range():
    # auto-range from the 2 nA range with 1 uA flowing: the reading that triggers the
    # change is the overload glitch; the change costs 3 range steps x 20 ms on the
    # clock (plus the 20 ms integration of NPLC 1 at 50 Hz); the next reading is good
    st, clock = stand(amps=1e-6)
    am = st.ammeter
    am.handle("CONF:CURR 2e-9")
    am.handle("SENS:CURR:RANG:AUTO ON")
    t0 = clock.now()
    assert float(am.handle("READ?")) == OVERLOAD
    assert clock.now() - t0 == pytest.approx(0.02 + 3 * 0.02)
    assert am.range_changes[-1][1:] == (2e-9, 2e-6)
    assert float(am.handle("READ?")) == pytest.approx(1e-6, rel=1e-3)
    assert float(am.handle("SENS:CURR:RANG?")) == pytest.approx(2e-6)


def test_autorange_down_steps_without_glitch():
    # 3 nA from the 20 mA range: the offset of a high range hides a small current, so
    # ranging down takes a few readings (never an overload value); it settles on 20 nA
    st, _ = stand(amps=3e-9)
    am = st.ammeter
    am.handle("CONF:CURR")                      # auto, from the top range
    readings = []
    for _ in range(8):
        readings.append(float(am.handle("READ?")))
        if len(am.range_changes) and am.range_changes[-1][2] == 2e-8:
            break
    assert OVERLOAD not in readings
    assert float(am.handle("SENS:CURR:RANG?")) == pytest.approx(2e-8)
    assert float(am.handle("READ?")) == pytest.approx(3e-9, rel=2e-3)


def test_integration_time_advances_the_clock():
    # NPLC 5 at 60 Hz = 83.3 ms per reading; a burst of 4 takes 4 of them
    st, clock = stand()
    am = st.ammeter
    am.handle("CONF:CURR 2e-7;SENS:CURR:NPLC 5;SYST:LFR 60;TRIG:COUN 4")
    t0 = clock.now()
    values = am.handle("READ?").split(",")
    assert len(values) == 4
    assert clock.now() - t0 == pytest.approx(4 * 5 / 60)
    assert all(float(v) == pytest.approx(1e-7, rel=1e-3) for v in values)
    assert am.handle("FETC?") == ",".join(values)   # FETC? returns the last, no new


def test_fetch_before_any_reading_is_an_error():
    # SCPI-99 vol. 2, 21.8: -230 data corrupt or stale
    st, _ = stand()
    assert st.ammeter.handle("FETC?") is None
    assert st.ammeter.handle("SYST:ERR?").startswith("-230")


def test_zero_correction_removes_the_offset():
    # offset 5e-5 of range; zero correction subtracts the offset acquired on that range
    st, _ = stand(amps=0.0, ammeter={"noise_frac": 0.0})
    am = st.ammeter
    am.handle("CONF:CURR 2e-9")
    assert float(am.handle("READ?")) == pytest.approx(5e-5 * 2e-9)
    am.handle("SYST:ZCOR:ACQ;SYST:ZCOR ON")
    assert float(am.handle("READ?")) == pytest.approx(0.0, abs=1e-18)


def test_left_shorted_quirk_keeps_the_input_shorted():
    # quirk: the short cannot be lifted; the query tells the truth unless lie: true
    st, _ = stand(amps=1e-7, quirks={"ammeter": {"faults": [{"kind": "left-shorted"}]}})
    am = st.ammeter
    am.handle("*RST;CONF:CURR 2e-7;INP:SHOR OFF")
    assert am.handle("INP:SHOR?") == "1"
    assert abs(float(am.handle("READ?"))) < 1e-9
    st2, _ = stand(amps=1e-7, quirks={"ammeter": {"faults": [{"kind": "left-shorted", "lie": True}]}})
    st2.ammeter.handle("*RST;CONF:CURR 2e-7")
    assert st2.ammeter.handle("INP:SHOR?") == "0"
    assert abs(float(st2.ammeter.handle("READ?"))) < 1e-9


def test_special_value_quirk_on_schedule():
    # readings 3 and 4 replaced by the not-a-number value 9.91E37, the others good
    q = {"ammeter": {"faults": [{"kind": "special-value", "match": "READ", "at_command": 3,
                                 "count": 2, "value": "9.91E37"}]}}
    st, _ = stand(amps=1e-7, quirks=q)
    am = st.ammeter
    am.handle("CONF:CURR 2e-7")                              # command 1
    got = [float(am.handle("READ?")) for _ in range(4)]      # commands 2..5
    assert got[1] == got[2] == 9.91e37
    assert got[0] == pytest.approx(1e-7, rel=1e-3) and got[3] == pytest.approx(1e-7, rel=1e-3)


def test_autorange_without_glitch_measures_again_on_the_new_range():
    # autorange_glitch: false -> the reading that ranges up is taken again on the new
    # range: no overload value, one more integration on the clock
    st, clock = stand(amps=1e-6, ammeter={"autorange_glitch": False})
    am = st.ammeter
    am.handle("CONF:CURR 2e-9;SENS:CURR:RANG:AUTO ON")
    t0 = clock.now()
    assert float(am.handle("READ?")) == pytest.approx(1e-6, rel=1e-3)
    assert clock.now() - t0 == pytest.approx(2 * 0.02 + 3 * 0.02)


def test_the_range_asked_after_a_glitch_is_the_new_one():
    # what a driver sees: range asked before READ? is the range the overload happened
    # on (2 nA); asked after, the instrument has already moved to 2 uA
    st, _ = stand(amps=1e-6)
    am = st.ammeter
    am.handle("CONF:CURR 2e-9;SENS:CURR:RANG:AUTO ON")
    before = float(am.handle("SENS:CURR:RANG?"))
    value = float(am.handle("READ?"))
    after = float(am.handle("SENS:CURR:RANG?"))
    assert (before, value, after) == (pytest.approx(2e-9), OVERLOAD, pytest.approx(2e-6))
