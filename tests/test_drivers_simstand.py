"""The drivers against the simulated stand's instruments (simulators/), through
open_instrument with sim: addresses: arm, a short ramp, readings, safe-off confirmed.
Everything on a VirtualClock; seed 7 shown in the stand config."""
import math

import pytest

from drivers import latch, open_instrument
from drivers.clock import VirtualClock

stand_mod = pytest.importorskip("simulators.stand")


@pytest.fixture
def rig():
    latch.forget_all()
    clock = VirtualClock()
    st = stand_mod.SimulatedStand({"seed": 7}, clock, seed=7)
    opts = {"stand_id": "test-simstand", "timeout": 0.5}
    inst = {}
    for role, drv in (("supply", "scpi-supply"), ("ammeter", "scpi-ammeter"),
                      ("gauge", "ascii-gauge"), ("interlock", "serial-lines")):
        o = dict(opts, rig_max_v=1500.0, rig_max_a=1e-4) if role == "supply" else opts
        inst[role] = open_instrument(role, drv, f"sim:{role}", clock=clock, options=o,
                                     interpreter=st.interpreter(role))
    yield clock, st, inst
    for d in inst.values():
        d.close()


def test_a_short_run_on_the_simulated_stand(rig):
    clock, st, inst = rig
    sup, am, gauge, il = inst["supply"], inst["ammeter"], inst["gauge"], inst["interlock"]
    assert sup.identify().simulated
    am.configure(range_a=None, nplc=1.0, line_hz=50.0)
    cfg = am.verify_config()
    assert cfg["auto"] and cfg["nplc"] == 1.0 and not cfg["input shorting"]
    p = gauge.read()
    assert p.state == "ok" and 0 < p.pa < 1e-4
    assert il.chain_closed()
    rep = sup.arm(1050.0, 1e-4, comm_timeout_s=5.0)
    assert rep.comm_timeout_s == 5.0
    readings = []
    for v in (100.0, 200.0, 300.0):
        sup.set_voltage(v)
        clock.sleep(1.0)
        il.heartbeat()
        assert abs(sup.measure_voltage() - v) < 1.0      # within 1 V after a second
        readings.append(am.read())
    assert all(r.range_a > 0 and (r.flag is None) == math.isfinite(r.value) for r in readings)
    off = sup.safe_off()
    assert off.confirmed and off.voltage_v < 5.0
    assert not st.advance().output_on
