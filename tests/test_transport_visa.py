"""VISA over pyvisa-py TCPIP SOCKET to the loopback server: queries, TCP_NODELAY, abort of
a read blocked forever, resync (reopen) after a late reply, and backend names."""
import math
import os
import socket
import sys
import threading

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import Echo, FakeSupply  # noqa: E402

from drivers import latch
from drivers.clock import WallClock
from drivers.errors import DriverError, TransportTimeout
from drivers.supply import ScpiSupply
from drivers.transport_visa import VisaTransport, check_backend
from simulators.loopback import LoopbackServer


@pytest.fixture
def echo_server():
    echo = Echo(WallClock())
    srv = LoopbackServer(echo, max_clients=2).start()
    yield echo, srv
    srv.stop()


def test_query_and_nodelay(echo_server):
    echo, srv = echo_server
    t = VisaTransport(srv.resource, timeout=1.0)
    try:
        assert t.query("*IDN?") == "KESTREL LANE,ECHO,SN1,0.1"
        sock = t._socket()
        assert sock is not None
        assert sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) == 1
        assert t.exchange(["SOUR:VOLT 5"], "MEAS:CURR?") == "MEAS:CURR"
        assert echo.lines[-2:] == ["SOUR:VOLT 5", "MEAS:CURR?"]
    finally:
        t.close()


def test_abort_wakes_a_blocked_read_and_resync_reopens(echo_server):
    echo, srv = echo_server
    echo.delays["HANG?"] = math.inf
    t = VisaTransport(srv.resource, timeout=30.0)
    out = {}

    def owner():
        try:
            t.query("HANG?")
        except DriverError as exc:
            out["exc"] = exc
    echo.received.clear()
    th = threading.Thread(target=owner)
    th.start()
    assert echo.received.wait(5)
    t.abort()
    th.join(5)
    assert not th.is_alive() and isinstance(out["exc"], DriverError)
    assert not t.trusted
    t.resync()                                       # raw socket: close, reopen, *OPC?
    assert t.query("*IDN?").startswith("KESTREL LANE")
    t.close()


def test_late_reply_is_not_read_after_resync(echo_server):
    echo, srv = echo_server
    echo.delays["MEAS:CURR?"] = 0.3
    t = VisaTransport(srv.resource, timeout=0.1)
    with pytest.raises(TransportTimeout):
        t.query("MEAS:CURR?")
    t.resync()
    assert t.query("MEAS:VOLT?") == "MEAS:VOLT"      # its own answer, not MEAS:CURR
    t.close()


def test_supply_over_visa_arms_and_safes():
    latch.forget_all()
    fake = FakeSupply(clock=WallClock(), tau=0.01)
    with LoopbackServer(fake) as srv:
        t = VisaTransport(srv.resource, timeout=1.0)
        sup = ScpiSupply(t, expected_serial="SN1042", rig_max_v=5000, rig_max_a=1e-3)
        sup.arm(1050.0, 1.3e-4)
        sup.set_voltage(250.0)
        assert sup.measure_voltage() == 250.0
        rep = sup.safe_off()
        assert rep.confirmed and not fake.output
        sup.close()


@pytest.mark.parametrize("bad", ["/usr/lib/libvisa.so", "@py; rm", "py", "@../x", ""])
def test_backend_is_a_name_never_a_path(bad):
    with pytest.raises(DriverError, match="backend"):
        check_backend(bad)
    assert check_backend("@py") == "@py" and check_backend("@ivi") == "@ivi"


def test_unreachable_resource_is_one_clear_error():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()                                          # nothing listens there now
    with pytest.raises(DriverError, match="cannot open"):
        VisaTransport(f"TCPIP::127.0.0.1::{port}::SOCKET", timeout=0.2)


def test_resync_that_gets_no_sentinel_leaves_the_session_untrusted(echo_server):
    echo, srv = echo_server
    t = VisaTransport(srv.resource, timeout=0.1)
    echo.delays["*OPC?"] = math.inf                  # the instrument stays deaf
    t.abort()
    with pytest.raises(DriverError):
        t.resync()
    assert not t.trusted
    with pytest.raises(DriverError, match="untrusted"):
        t.query("*IDN?")
    echo.delays.clear()
    t.resync()
    assert t.trusted and t.query("*IDN?").startswith("KESTREL LANE")
    t.close()
