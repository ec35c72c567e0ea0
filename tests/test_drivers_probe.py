"""``fieldrun probe``: a rig's instruments on loopback SCPI servers answer with the right
identity and fill their roles; a wrong serial or a dead address fails with one line each;
serial (ASRL) resources found on a scan are never written to."""
import os
import socket
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import FakeAmmeter, FakeGauge, FakeSupply  # noqa: E402

from drivers.clock import WallClock
import argparse

from sequencer.commands import probe


def run_probe(argv):
    """The probe verb alone (the full CLI imports every verb; one test below uses it)."""
    parser = argparse.ArgumentParser(prog="fieldrun probe")
    probe.add_arguments(parser)
    return probe.run(parser.parse_args(argv))
from simulators.loopback import LoopbackServer

RIG = """\
rig: stand-B
sample_id: KL-Y07
polarity: positive
ammeter: {{electrode: anode, sign: 1}}
series_resistance: "1 Mohm"
host_loss: none
hard_limits: {{voltage_max: "2 kV", current_max: "100 uA"}}
state_dir: {state}
instruments:
  hv:
    role: supply
    driver: scpi-supply
    address: "{supply}"
    identity: {{model: HV-30K, serial: {serial}}}
  pico:
    role: ammeter
    driver: scpi-ammeter
    address: "{ammeter}"
    identity: {{model: PA-9, serial: SN77}}
  gauge:
    role: gauge
    driver: ascii-gauge
    address: "{gauge}"
    identity: {{model: G-1, serial: SN5}}
"""


@pytest.fixture
def servers():
    s1 = LoopbackServer(FakeSupply(clock=WallClock())).start()
    s2 = LoopbackServer(FakeAmmeter(clock=WallClock())).start()
    s3 = LoopbackServer(FakeGauge()).start()
    yield s1, s2, s3
    for s in (s1, s2, s3):
        s.stop()


def write_rig(tmp_path, supply, ammeter, gauge, serial="SN1042"):
    p = tmp_path / "stand-B.yaml"
    p.write_text(RIG.format(supply=supply, ammeter=ammeter, gauge=gauge, serial=serial,
                            state=tmp_path / "state"))
    return str(p)


def test_probe_a_rig_on_loopback_servers(servers, tmp_path, capsys):
    s1, s2, s3 = servers
    rc = run_probe(["--rig", write_rig(tmp_path, s1.resource, s2.resource, s3.resource),
               "--timeout", "0.5"])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "hv" in out and "KESTREL LANE,HV-30K,SN1042" in out and "output off" in out
    assert "function \"CURR\"" in out and "pressure state ok, 2.5e-05 Pa" in out


def test_probe_reports_a_wrong_serial_and_a_dead_instrument(servers, tmp_path, capsys):
    s1, _, s3 = servers
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    dead = f"TCPIP::127.0.0.1::{sock.getsockname()[1]}::SOCKET"
    sock.close()
    rc = run_probe(["--rig", write_rig(tmp_path, s1.resource, dead, s3.resource, serial="SN0001"),
               "--timeout", "0.3"])
    out = capsys.readouterr().out
    assert rc == 2
    lines = {line.split()[0]: line for line in out.splitlines()}
    assert "FAIL" in lines["hv"] and "SN0001" in lines["hv"]
    assert "FAIL" in lines["pico"] and "cannot open" in lines["pico"]


def test_scan_never_writes_to_serial_ports(servers, monkeypatch):
    s1 = servers[0]
    asked = []
    monkeypatch.setattr("drivers.transport_visa.list_resources",
                        lambda backend, query: ("ASRL/dev/ttyS0::INSTR", s1.resource))
    real = probe._idn
    monkeypatch.setattr(probe, "_idn", lambda r, t, b: (asked.append(r), real(r, t, b))[1])
    rows = dict((r, (ok, text)) for r, ok, text in probe.scan(0.3, "@py", []))
    assert asked == [s1.resource]
    assert "not written to" in rows["ASRL/dev/ttyS0::INSTR"][1]
    assert rows[s1.resource] == (True, "KESTREL LANE,HV-30K,SN1042,1.0")


def test_bad_timeout_is_one_line(capsys):
    from sequencer.cli import main
    rc = main(["probe", "--also", "TCPIP::127.0.0.1::1::SOCKET", "--timeout", "inf"])
    assert rc == 2 and "finite" in capsys.readouterr().err
