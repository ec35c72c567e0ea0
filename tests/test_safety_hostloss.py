"""Host loss: ``kill -9`` of a running ``fieldrun run`` while the supply is at high voltage.

Set: the simulated stand lives in *this* process on real time, its supply, ammeter and
gauge served by loopback SCPI servers (127.0.0.1, free ports); ``fieldrun run`` in a
subprocess reaches them as LAN instruments (``TCPIP::127.0.0.1::PORT::SOCKET``), exactly
as it would reach hardware. The simulated supply keeps its output when its host vanishes
(``host_loss: keep``, its default), as real ones do. Expected (issue 5, deliverable 7;
issue 9, "a supply that keeps its output when the host vanishes"): with the rig's
``host_loss: supply-timeout``, fieldrun armed the supply's own communication timeout, so
after the kill the output goes off by itself within about that timeout; with
``host_loss: none`` nothing switches it off, which is why an unattended run refuses it.
Waits are on the simulated supply's state with a generous bound, never fixed sleeps.
"""
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytest.importorskip("simulators.loopback")
pytest.importorskip("simulators.stand")

from drivers.clock import WallClock
from simulators.loopback import LoopbackServer
from simulators.stand import SimulatedStand

ROOT = Path(__file__).resolve().parents[1]
BOUND_S = 30.0
TIMEOUT_S = 4.0     # the rig's host_loss_timeout (long beside a 0.5 s sample period)

PROTOCOL = """\
name: host-loss
sample_period: "0.5 s"
limits: {slew_max: "100 V/s"}
steps:
  - ramp: {to: "200 V", rate: "100 V/s"}
  - dwell: {duration: "1 h"}
  - return: {rate: "100 V/s"}
"""

RIG = """\
rig: stand-B-loopback
sample_id: KL-F12
polarity: positive
ammeter: {{electrode: anode, sign: 1}}
gap: "500 um"
anode: flat
series_resistance: "1 Mohm"
host_loss: {host_loss}
host_loss_timeout: "{timeout} s"
hard_limits: {{voltage_max: "1.5 kV", current_max: "100 uA", pressure_arm_max: "1e-4 Pa"}}
instruments:
  hv: {{role: supply, driver: scpi-supply, address: "{supply}",
        identity: {{model: SIM-SUPPLY, serial: SIM-SUP-00007}}}}
  pico: {{role: ammeter, driver: scpi-ammeter, address: "{ammeter}",
          identity: {{model: SIM-AMMETER, serial: SIM-AMM-00007}}}}
  gauge: {{role: gauge, driver: ascii-gauge, address: "{gauge}",
           identity: {{model: SIM-GAUGE, serial: SIM-GAU-00007}}}}
state_dir: {state}
"""


def _wait(pred, what):
    t_end = time.monotonic() + BOUND_S
    while time.monotonic() < t_end:
        if pred():
            return
        time.sleep(0.02)    # polling for the state change, not a timed wait
    pytest.fail(f"no {what} within the bound")


def _kill_during_dwell(tmp_path, host_loss):
    sim = SimulatedStand({"seed": 7}, WallClock(), seed=7)
    servers = {r: LoopbackServer(sim.interpreter(r)).start() for r in ("supply", "ammeter", "gauge")}
    try:
        rig = tmp_path / "rig.yaml"
        rig.write_text(RIG.format(host_loss=host_loss, timeout=TIMEOUT_S, state=tmp_path / "state",
                                  **{r: s.resource for r, s in servers.items()}))
        proto = tmp_path / "host-loss.yaml"
        proto.write_text(PROTOCOL)
        runs = tmp_path / "runs"
        proc = subprocess.Popen([sys.executable, "-m", "sequencer.cli", "run", str(proto),
                                 "--rig", str(rig), "--quiet", "--no-report", "--runs-dir", str(runs)],
                                cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)

        def dwell_started():
            if proc.poll() is not None:
                pytest.fail(f"run ended early: {proc.stderr.read().decode()[-2000:]}")
            for ev in runs.glob("*/events.jsonl"):
                for line in ev.read_text().splitlines():
                    try:
                        e = json.loads(line)
                    except ValueError:
                        continue
                    if e.get("kind") == "step" and e.get("index") == 1:
                        return True
            return False
        _wait(dwell_started, "dwell")
        assert sim.advance().output_on and sim.truth.voltage_v > 150.0
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=BOUND_S)
        t_kill = sim.clock.now()
        return sim, t_kill
    finally:
        for s in servers.values():
            s.stop()


def test_kill_9_with_supply_timeout_cover_the_supply_switches_itself_off(tmp_path):
    sim, t_kill = _kill_during_dwell(tmp_path, "supply-timeout")
    _wait(lambda: not sim.advance().output_on, "output off after the kill")
    offs = [(t, why) for t, kind, why in sim.supply.events if kind == "output-off"]
    # the supply switched itself off by its own communication timeout (armed by fieldrun
    # from the rig's host_loss_timeout), after the kill and no later than that timeout
    # after the last command the dead host sent
    assert offs and offs[-1][1] == "comm-timeout"
    assert sim.supply.comm_timeout == pytest.approx(TIMEOUT_S)
    assert offs[-1][0] <= t_kill + TIMEOUT_S + 1e-6


def test_kill_9_without_host_loss_cover_the_output_stays_on(tmp_path):
    sim, t_kill = _kill_during_dwell(tmp_path, "none")
    # wait past the timeout the other rig had armed, on the supply's own clock
    _wait(lambda: sim.clock.now() - t_kill > TIMEOUT_S + 1.0, "the timeout to pass")
    assert sim.advance().output_on and sim.truth.voltage_v > 150.0
    sim.supply.handle("OUTP OFF")    # tidy up the simulated stand
