"""Arm-time checks of the roles around the supply, a serial transport over socket:// to
the loopback server, and the timing-budget hook of ``fieldrun plan``."""
import os
import sys
from types import SimpleNamespace

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import Echo, FakeAmmeter  # noqa: E402

from drivers.ammeter import ScpiAmmeter
from drivers.clock import WallClock
from drivers.errors import ArmRefused
from drivers.preflight import preflight
from drivers.roles import PressureReading
from drivers.timing import PeriodTooShort, sample_budget
from drivers.transport_inproc import InprocTransport
from drivers.transport_serial import SerialTransport
from simulators.loopback import LoopbackServer


class Lines:
    def __init__(self, closed):
        self.closed = closed

    def chain_closed(self):
        return self.closed


class Gauge:
    def __init__(self, pa, state="ok"):
        self.r = PressureReading(pa, state, 0.0)

    def read(self):
        return self.r


def configured_ammeter():
    fake = FakeAmmeter()
    am = ScpiAmmeter(InprocTransport(fake, timeout=0.2), clock=fake.clock)
    am.configure(range_a=2e-9)
    return fake, am


def test_preflight_passes_and_reports():
    _, am = configured_ammeter()
    seen = preflight(am, Gauge(2e-5), Lines(True), pressure_arm_max_pa=1e-4)
    assert seen["interlock"] == "closed" and seen["pressure_pa"] == 2e-5
    assert seen["ammeter"]["range_a"] == 2e-9


@pytest.mark.parametrize("gauge, lines, why", [
    (Gauge(2e-5), Lines(False), "chain is open"),
    (Gauge(float("nan"), "filament-off"), Lines(True), "no valid pressure"),
    (Gauge(5e-4), Lines(True), "not below the arm ceiling"),
])
def test_preflight_refusals(gauge, lines, why):
    _, am = configured_ammeter()
    with pytest.raises(ArmRefused, match=why):
        preflight(am, gauge, lines, pressure_arm_max_pa=1e-4)


def test_preflight_refuses_a_shorted_ammeter_input():
    fake, am = configured_ammeter()
    fake.short = True                                  # someone left the input shorted
    with pytest.raises(ArmRefused, match="input shorting is on"):
        preflight(am, Gauge(2e-5), Lines(True), pressure_arm_max_pa=1e-4)


def test_serial_transport_over_socket_url_to_the_loopback_server():
    with LoopbackServer(Echo(WallClock())) as srv:
        t = SerialTransport(f"socket://127.0.0.1:{srv.port}", timeout=0.5)
        assert t.query("*IDN?") == "KESTREL LANE,ECHO,SN1,0.1"
        t.close()


def plan_and_rig(period, nplc=1.0):
    inst = [SimpleNamespace(roles=("supply",), dialect=None, address="sim:supply", options={}),
            SimpleNamespace(roles=("ammeter",), dialect=None, address="sim:ammeter",
                            options={"nplc": nplc, "line_hz": 50.0}),
            SimpleNamespace(roles=("gauge",), dialect=None, address="serial:/dev/ttyS0?baud=9600",
                            options={})]
    plan = SimpleNamespace(sample_period=1.0,
                           segments=[SimpleNamespace(sample_period=1.0),
                                     SimpleNamespace(sample_period=period)])
    return plan, SimpleNamespace(instruments=inst)


def test_plan_hook_returns_named_parts_and_a_total():
    plan, rig = plan_and_rig(1.0)
    b = sample_budget(plan, rig)
    assert b["total"] == pytest.approx(sum(v for k, v in b.items() if k != "total"))
    assert "gauge serial transfer" in b                # the gauge is on a serial port


def test_plan_hook_refuses_a_period_that_cannot_be_met():
    # 10 NPLC at 50 Hz integrate for 0.2 s (1/50 s per cycle): a 0.25 s period is too short
    plan, rig = plan_and_rig(0.25, nplc=10.0)
    with pytest.raises(PeriodTooShort, match="sample period 250.0 ms cannot be met"):
        sample_budget(plan, rig)
