"""In-process transport: reply delays on the instrument's clock, a reply that never
comes, abort from another thread, and resynchronisation after a late reply."""
import math
import os
import sys
import threading

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import Echo  # noqa: E402

from drivers.clock import VirtualClock, WallClock
from drivers.errors import DriverError, TransportAborted, TransportTimeout
from drivers.transport_inproc import InprocTransport


def test_finite_delay_advances_the_virtual_clock():
    clock = VirtualClock()
    echo = Echo(clock)
    echo.delays["MEAS:CURR?"] = 0.25
    t = InprocTransport(echo, timeout=1.0)
    assert t.query("MEAS:CURR?") == "MEAS:CURR"
    assert clock.now() == pytest.approx(0.25)       # simulated latency, no real wait


def test_late_reply_is_queued_and_resync_flushes_it():
    clock = VirtualClock()
    echo = Echo(clock)
    echo.delays["MEAS:CURR?"] = 2.0                  # answers after 2 s; we wait 0.5 s
    t = InprocTransport(echo, timeout=0.5)
    with pytest.raises(TransportTimeout):
        t.query("MEAS:CURR?")
    assert clock.now() == pytest.approx(0.5) and not t.trusted
    with pytest.raises(DriverError, match="untrusted"):
        t.query("MEAS:VOLT?")
    clock.advance(5.0)
    assert t.pending_replies == 1                    # the late reply arrived
    # this is the hazard: a session that ignored the rule would read the stale answer
    t.trusted = True
    assert t.query("MEAS:VOLT?") == "MEAS:CURR"
    # done properly: after a timeout, resync flushes and confirms with *OPC? (IEEE 488.2
    # §10.18, from memory: *OPC? answers "1")
    t = InprocTransport(echo, timeout=0.5)
    with pytest.raises(TransportTimeout):
        t.query("MEAS:CURR?")
    clock.advance(5.0)
    assert t.pending_replies == 1
    t.resync()
    assert t.trusted and t.pending_replies == 0
    assert t.query("MEAS:VOLT?") == "MEAS:VOLT"
    assert echo.lines[-2:] == ["*OPC?", "MEAS:VOLT?"]


def test_a_reply_that_never_comes_times_out_in_real_time():
    echo = Echo(VirtualClock())
    echo.delays["*IDN?"] = math.inf
    t = InprocTransport(echo, timeout=0.05)
    with pytest.raises(TransportTimeout):
        t.query("*IDN?")
    assert not t.trusted


def test_abort_wakes_a_call_blocked_forever():
    echo = Echo(WallClock())
    echo.delays["MEAS:CURR?"] = math.inf
    t = InprocTransport(echo, timeout=60.0)          # would block a minute without abort
    out = {}

    def owner():
        try:
            t.query("MEAS:CURR?")
        except DriverError as exc:
            out["exc"] = exc
    th = threading.Thread(target=owner)
    th.start()
    assert echo.received.wait(5)
    t.abort()
    th.join(5)
    assert not th.is_alive() and isinstance(out["exc"], TransportAborted)
    t.resync()
    assert t.query("*IDN?").startswith("KESTREL LANE")


def test_real_delay_on_wall_clock_is_waited():
    echo = Echo(WallClock())
    echo.delays["X?"] = 0.02
    t = InprocTransport(echo, timeout=1.0)
    assert t.query("X?") == "X"


def test_one_owner_thread_per_exchange():
    echo = Echo(WallClock())
    echo.delays["SLOW?"] = math.inf
    t = InprocTransport(echo, timeout=5.0)
    th = threading.Thread(target=lambda: pytest.raises(DriverError, t.query, "SLOW?"))
    th.start()
    assert echo.received.wait(5)
    with pytest.raises(DriverError, match="one owner thread"):
        t.query("X?")
    t.abort()
    th.join(5)


def test_commands_must_be_one_line_and_timeouts_finite():
    t = InprocTransport(Echo(VirtualClock()), timeout=0.1)
    with pytest.raises(DriverError, match="one line"):
        t.write("OUTP ON\nSOUR:VOLT 1000")
    with pytest.raises(DriverError, match="finite"):
        InprocTransport(Echo(), timeout=math.inf)
    with pytest.raises(DriverError, match="handle"):
        InprocTransport(object())
