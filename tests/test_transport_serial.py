"""Serial transport and the serial drivers: loop:// echo, a gauge on a pseudo-terminal pair,
interlock modem lines through a fake port registered with pyserial's URL handler
mechanism (``serial.protocol_handler_packages``), since pseudo-terminals carry no modem
lines."""
import math
import os
import sys
import threading
import types

import pytest
import serial
from serial.serialutil import SerialBase
from scipy import constants

from drivers.clock import VirtualClock
from drivers.errors import DriverError, TransportAborted
from drivers.gauge import AsciiGauge
from drivers.interlock import LineInterlock
from drivers.transport_serial import SerialTransport, parse_serial_address


# -- a fake port with modem lines -----------------------------------------------------------
class FakeLines:
    def __init__(self):
        self.dtr = self.rts = None
        self.cts = self.dsr = self.cd = self.ri = False
        self.history = []


PORTS = {}


class FakeLinesSerial(SerialBase):
    """pyserial port ``fakelines://NAME``: no data, modem lines from PORTS[NAME]."""

    def open(self):
        self.lines = PORTS.setdefault(self.portstr.split("://", 1)[1], FakeLines())
        self.is_open = True
        self._update_dtr_state()
        self._update_rts_state()

    def close(self):
        self.is_open = False

    def read(self, size=1):
        return b""

    def write(self, data):
        return len(data)

    @property
    def in_waiting(self):
        return 0

    def reset_input_buffer(self):
        pass

    def _update_dtr_state(self):
        self.lines.dtr = self._dtr_state
        self.lines.history.append(("DTR", self._dtr_state))

    def _update_rts_state(self):
        self.lines.rts = self._rts_state
        self.lines.history.append(("RTS", self._rts_state))

    @property
    def cts(self):
        return self.lines.cts

    @property
    def dsr(self):
        return self.lines.dsr

    @property
    def cd(self):
        return self.lines.cd

    @property
    def ri(self):
        return self.lines.ri


@pytest.fixture(scope="module", autouse=True)
def fake_port_handler():
    pkg = types.ModuleType("fieldrun_test_ports")
    pkg.__path__ = []
    mod = types.ModuleType("fieldrun_test_ports.protocol_fakelines")
    mod.Serial = FakeLinesSerial
    sys.modules["fieldrun_test_ports"] = pkg
    sys.modules["fieldrun_test_ports.protocol_fakelines"] = mod
    serial.protocol_handler_packages.append("fieldrun_test_ports")
    yield
    serial.protocol_handler_packages.remove("fieldrun_test_ports")


# -- tests -------------------------------------------------------------------------------------
def test_loop_url_echoes_a_line():
    t = SerialTransport("loop://", timeout=0.2, sentinel=None)
    t.write("PR?")
    assert t.read() == "PR?"
    t.close()


def test_serial_address_parsing():
    assert parse_serial_address("serial:/dev/ttyUSB0?baud=19200&parity=E") == (
        "/dev/ttyUSB0", {"baudrate": 19200, "bytesize": 8, "parity": "E", "stopbits": 1})
    assert parse_serial_address("socket://127.0.0.1:7000")[0] == "socket://127.0.0.1:7000"
    with pytest.raises(DriverError, match="unknown serial setting"):
        parse_serial_address("serial:/dev/ttyS0?speed=9600")
    with pytest.raises(DriverError, match="bad value"):
        parse_serial_address("serial:/dev/ttyS0?baud=fast")


def test_abort_wakes_a_blocked_serial_read():
    t = SerialTransport("loop://", timeout=60.0, sentinel=None)
    out = {}
    started = threading.Event()

    def owner():
        started.set()
        try:
            t.read()
        except DriverError as exc:
            out["exc"] = exc
    th = threading.Thread(target=owner)
    th.start()
    started.wait(5)
    t.abort()
    th.join(5)
    assert not th.is_alive() and isinstance(out["exc"], TransportAborted)
    t.resync()                       # no sentinel: flush only
    assert t.trusted
    t.close()


class PtyGauge:
    """A gauge controller on the master side of a pty: answers ``PR?`` with the next
    scripted reply (CR LF terminated)."""

    def __init__(self, replies):
        self.master, slave = os.openpty()
        self.path = os.ttyname(slave)
        self._slave = slave
        self.replies = list(replies)
        self._stop = threading.Event()
        self.th = threading.Thread(target=self.run, daemon=True)
        self.th.start()

    def run(self):
        import select
        buf = b""
        while not self._stop.is_set():
            r, _, _ = select.select([self.master], [], [], 0.05)
            if not r:
                continue
            try:
                buf += os.read(self.master, 1024)
            except OSError:
                return
            while b"\r\n" in buf:
                line, buf = buf.split(b"\r\n", 1)
                if line.strip() == b"PR?" and self.replies:
                    rep = self.replies.pop(0)
                    if rep is not None:
                        os.write(self.master, rep.encode() + b"\r\n")

    def close(self):
        self._stop.set()
        self.th.join(2)
        os.close(self.master)
        os.close(self._slave)


def test_gauge_on_a_pty_pair_reports_pressure_and_states():
    replies = ["0,2.5E-07", "1,1.0E-10", "2,1.0E+03", "3,0.0", "0,garbage", None, "0,3.0E-07"]
    dev = PtyGauge(replies)
    try:
        t = SerialTransport(f"serial:{dev.path}?baud=9600", timeout=0.3, sentinel=None,
                            write_term="\r\n")
        g = AsciiGauge(t, clock=VirtualClock())
        r = g.read()
        assert r.state == "ok" and r.pa == pytest.approx(2.5e-5)   # 1 mbar = 100 Pa (definition)
        r = g.read()
        assert r.state == "under-range" and r.pa == pytest.approx(1e-8)
        assert [g.read().state for _ in range(2)] == ["over-range", "filament-off"]
        r = g.read()
        assert r.state == "no-answer" and math.isnan(r.pa) and "unparseable" in g.last_problem
        r = g.read()                                                 # controller silent
        assert r.state == "no-answer" and "no reply" in g.last_problem
        assert g.read().pa == pytest.approx(3.0e-5)                  # recovers after resync
        t.close()
    finally:
        dev.close()


def test_gauge_unit_torr(tmp_path):
    # 1 Torr = 101325/760 Pa (scipy.constants.torr, CODATA/definition)
    src = open(os.path.join(os.path.dirname(__file__), "..", "drivers", "dialects",
                            "generic-ascii-gauge.yaml")).read()
    p = tmp_path / "kl-torr-gauge.yaml"
    p.write_text(src.replace("name: generic-ascii-gauge", "name: kl-torr-gauge")
                 .replace("unit: mbar", "unit: Torr"))
    dev = PtyGauge(["0,1.0E-06"])
    try:
        t = SerialTransport(f"serial:{dev.path}", timeout=0.3, sentinel=None, write_term="\r\n")
        g = AsciiGauge(t, dialect=str(p), clock=VirtualClock())
        assert g.read().pa == pytest.approx(1.0e-6 * constants.torr, rel=1e-12)
        t.close()
    finally:
        dev.close()


def test_interlock_lines_through_a_fake_port():
    t = SerialTransport("fakelines://stand-B", timeout=0.2, sentinel=None)
    lines = PORTS["stand-B"]
    il = LineInterlock(t, chain_line="CTS", heartbeat_line="DTR", inhibit_line="RTS")
    assert lines.rts is False                       # inhibit released at start
    lines.cts = True
    assert il.chain_closed()
    lines.cts = False
    assert not il.chain_closed()
    for _ in range(4):
        il.heartbeat()
    assert [lvl for name, lvl in lines.history if name == "DTR"][-4:] == [True, False, True, False]
    il.inhibit(True)
    assert lines.rts is True
    il.inhibit(False)
    assert lines.rts is False
    with pytest.raises(DriverError, match="not an output line"):
        t.set_line("CTS", True)
    with pytest.raises(DriverError, match="not an input line"):
        t.get_line("DTR")
    t.close()


def test_interlock_with_inverted_levels_and_dsr_chain():
    t = SerialTransport("fakelines://stand-C", timeout=0.2, sentinel=None)
    lines = PORTS["stand-C"]
    il = LineInterlock(t, chain_line="DSR", chain_closed_level=False, heartbeat_line=None,
                       inhibit_line="DTR", inhibit_level=False)
    lines.dsr = False
    assert il.chain_closed()
    il.inhibit(True)
    assert lines.dtr is False
    before = list(lines.history)
    il.heartbeat()                                  # no heartbeat line: nothing is driven
    assert lines.history == before
    t.close()
