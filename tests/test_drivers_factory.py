"""open_instrument: addresses pick the transport, rig driver names pick the class, mistakes
are one clear DriverError, the resource lock is taken and released."""
import os
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import FakeSupply  # noqa: E402

from drivers import latch, locks, open_instrument
from drivers.ammeter import ScpiAmmeter
from drivers.clock import VirtualClock, WallClock
from drivers.errors import DriverError
from drivers.factory import address_kind
from drivers.supply import ScpiSupply
from drivers.transport_inproc import InprocTransport
from drivers.transport_serial import SerialTransport
from drivers.transport_visa import VisaTransport
from simulators.loopback import LoopbackServer


def test_address_kinds():
    assert address_kind("sim:supply") == "sim"
    assert address_kind("serial:/dev/ttyUSB0?baud=9600") == "serial"
    assert address_kind("loop://") == "serial" and address_kind("socket://h:1") == "serial"
    assert address_kind("GPIB0::5::INSTR") == "visa"


def test_sim_address_keyed_by_stand_and_needs_the_object():
    fake = FakeSupply()
    a = open_instrument("supply", "scpi-supply", "sim:supply", options={"stand_id": "w1"},
                        interpreter=fake)
    assert isinstance(a, ScpiSupply) and isinstance(a.transport, InprocTransport)
    assert a.transport.resource == "sim:w1/supply"
    assert a.clock is fake.clock                     # the instrument's own virtual clock
    with pytest.raises(DriverError, match="simulated instrument object"):
        open_instrument("supply", "scpi-supply", "sim:supply")
    a.close()


def test_mistakes_are_one_line_errors():
    fake = FakeSupply()
    with pytest.raises(DriverError, match="unknown instrument option"):
        open_instrument("supply", None, "sim:supply", options={"volts": 3}, interpreter=fake)
    with pytest.raises(DriverError, match="cannot fill role"):
        open_instrument("gauge", "scpi-supply", "sim:gauge", interpreter=fake)
    with pytest.raises(DriverError, match="role"):
        open_instrument("kettle", None, "sim:x", interpreter=fake)
    with pytest.raises(DriverError, match="cannot open serial port"):
        open_instrument("gauge", "ascii-gauge", "serial:/dev/no-such-tty-KL")


def test_visa_instrument_over_loopback_takes_and_releases_the_lock(tmp_path):
    latch.forget_all()
    with LoopbackServer(FakeSupply(clock=WallClock())) as srv:
        sup = open_instrument("supply", "scpi-supply", srv.resource,
                              options={"state_dir": str(tmp_path), "timeout": 0.5})
        assert isinstance(sup.transport, VisaTransport)
        assert sup.identify().serial == "SN1042"
        lockfile = tmp_path / "locks" / locks.lock_file_name(srv.resource)
        assert lockfile.exists()
        other = locks.ResourceLock(srv.resource, tmp_path)
        with pytest.raises(DriverError, match="in use"):
            other.acquire()                          # what another process would meet
        sup.close()
        other.acquire().release()                    # free again after close


def test_serial_gauge_gets_the_dialect_write_terminator():
    g = open_instrument("gauge", "ascii-gauge", "loop://", options={"lock": False})
    assert isinstance(g.transport, SerialTransport) and g.transport.write_term == "\r\n"
    g.close()


def test_ammeter_class():
    from drivers_fakes import FakeAmmeter
    am = open_instrument("ammeter", "scpi-ammeter", "sim:ammeter", interpreter=FakeAmmeter(),
                         clock=VirtualClock())
    assert isinstance(am, ScpiAmmeter)
    am.close()
