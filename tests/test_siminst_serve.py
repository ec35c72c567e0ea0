"""``fieldrun sim-serve``: the simulated instruments over TCP on 127.0.0.1, ports chosen
free at run time; HTTP requests and over-long lines drop the client; one client each.

What is expected: raw-socket SCPI instruments answer newline-terminated queries
(common practice for the VISA ::SOCKET resource kind, no source); an HTTP request line
(RFC 9112, 3) is not SCPI and is refused."""
import os
import signal
import socket
import subprocess
import sys
import threading
from pathlib import Path

import pytest

from sequencer.commands import sim_serve

SEED = 13
ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture()
def serving():
    s = sim_serve.start({"simulation": {"seed": SEED, "cathode": {"emitters": 1000},
                                        "supply": {"serial": "KL-HV-0042"}}}, max_line=256)
    yield s
    s.stop()


def connect(port):
    c = socket.create_connection(("127.0.0.1", port), timeout=2.0)
    c.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
    return c


def ask(c, line):
    c.sendall(line.encode() + b"\n")
    buf = b""
    while not buf.endswith(b"\n"):
        chunk = c.recv(4096)
        if not chunk:
            raise ConnectionError("closed")
        buf += chunk
    return buf.decode().strip()


def closed_by_peer(c):
    """Wait (bounded by the socket timeout) for the server to close the connection."""
    try:
        return c.recv(4096) == b""
    except ConnectionResetError:
        return True


def test_each_instrument_on_its_own_loopback_port(serving):
    res = serving.resources()
    assert set(res) == {"supply", "ammeter", "gauge", "interlock"}
    ports = {srv.port for srv in serving.servers.values()}
    assert len(ports) == 4
    for r in res.values():
        assert r.startswith("TCPIP::127.0.0.1::") and r.endswith("::SOCKET")
    with connect(serving.servers["supply"].port) as c:
        assert ask(c, "*IDN?") == serving.stand.supply.identity()
        assert "SIMULATED" in ask(c, "*IDN?")
        c.sendall(b"SOUR:VOLT 120\n")
        assert float(ask(c, "SOUR:VOLT?")) == 120.0
    with connect(serving.servers["gauge"].port) as g:
        assert ask(g, "PR?").split(",")[0] in {"0", "1"}


def test_http_request_drops_the_client(serving):
    with connect(serving.servers["supply"].port) as c:
        c.sendall(b"GET / HTTP/1.1\r\nHost: 127.0.0.1\r\n\r\n")
        assert closed_by_peer(c)
    with connect(serving.servers["supply"].port) as c:   # the server still serves
        assert ask(c, "*OPC?") == "1"


def test_over_long_line_drops_the_client(serving):
    with connect(serving.servers["ammeter"].port) as c:
        c.sendall(b"SOUR:VOLT " + b"9" * 1000)             # cap 256, no newline
        assert closed_by_peer(c)


def test_single_client(serving):
    port = serving.servers["supply"].port
    with connect(port) as first:
        assert ask(first, "*OPC?") == "1"
        with connect(port) as second:
            assert closed_by_peer(second)                   # refused while one is on
        assert ask(first, "*OPC?") == "1"


def test_drivers_through_pyvisa_py(serving):
    # the project's supply driver over VISA raw socket (pyvisa-py) to sim-serve
    from drivers import open_instrument
    sup = open_instrument("supply", "scpi", serving.servers["supply"].resource,
                          dialect="generic-scpi-supply",
                          options={"expected_serial": "KL-HV-0042", "rig_max_v": 1500.0,
                                   "rig_max_a": 1e-4, "lock": False, "timeout": 2.0})
    try:
        assert sup.identify().serial == "KL-HV-0042"
        state = sup.state()
        assert state.output_on is False and state.cc is False
        assert sup.measure_voltage() == pytest.approx(0.0, abs=0.2)
    finally:
        sup.close()


def test_loopback_check():
    assert sim_serve.is_loopback("127.0.0.1") and sim_serve.is_loopback("::1")
    assert sim_serve.is_loopback("localhost")
    assert not sim_serve.is_loopback("0.0.0.0") and not sim_serve.is_loopback("192.0.2.7")


def test_missing_rig_file_is_one_line_and_exit_2(tmp_path, capsys):
    from sequencer.cli import main
    code = main(["sim-serve", "--rig", str(tmp_path / "nope.yaml")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "nope.yaml" in err[0]


def test_cli_serves_and_stops_on_ctrl_c():
    # the verb as a user runs it on the example simulated rig: banner with resource
    # strings, then SIGINT -> exit 0
    rig = ROOT / "protocols" / "sim-rig.yaml"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    p = subprocess.Popen([sys.executable, "-m", "sequencer.cli", "sim-serve", "--rig", str(rig)],
                         cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                         text=True)
    guard = threading.Timer(60.0, p.kill)    # a hung child fails the test, never hangs it
    guard.start()
    try:
        lines = []
        for line in p.stdout:                # waits for the banner, line by line
            lines.append(line)
            if line.startswith("serving"):
                break
        supply = next(l for l in lines if l.startswith("supply"))
        port = int(supply.split()[1].split("::")[2])
        with connect(port) as c:
            assert ask(c, "*IDN?").startswith("FIELDRUN,SIM-SUPPLY,")
        p.send_signal(signal.SIGINT)
        assert p.wait(timeout=10) == 0
        assert "stopped" in p.stderr.read()
    finally:
        guard.cancel()
        if p.poll() is None:
            p.kill()
            p.wait()


def test_gauge_and_ammeter_drivers_through_sim_serve(serving):
    # the gauge as a serial-style instrument over pyserial's socket:// URL, the
    # picoammeter over VISA raw socket (pyvisa-py)
    from drivers import open_instrument
    g = open_instrument("gauge", "ascii", f"socket://127.0.0.1:{serving.servers['gauge'].port}",
                        dialect="generic-ascii-gauge", options={"lock": False, "timeout": 2.0})
    try:
        p = g.read()
        assert p.state in ("ok", "under-range") and p.pa > 0
    finally:
        g.close()
    am = open_instrument("ammeter", "scpi", serving.servers["ammeter"].resource,
                         dialect="generic-scpi-picoammeter", options={"lock": False, "timeout": 2.0})
    try:
        am.configure(range_a=2e-9, nplc=1.0, line_hz=50.0)
        r = am.read()
        assert r.flag is None and abs(r.value) < 2e-9        # output off: ~0 A
        assert serving.stand.ammeter.zero_check is False
    finally:
        am.close()


def test_more_clients_when_the_quirks_allow():
    s = sim_serve.start({"simulation": {"seed": SEED, "cathode": {"emitters": 1000},
                                        "quirks": {"supply": {"single_client": False}}}})
    try:
        port = s.servers["supply"].port
        with connect(port) as a, connect(port) as b:
            assert ask(a, "*OPC?") == "1" and ask(b, "*OPC?") == "1"
    finally:
        s.stop()


@pytest.mark.filterwarnings("ignore::pytest.PytestUnhandledThreadExceptionWarning")
def test_drop_connection_fault_closes_the_socket_mid_session():
    # quirk: the supply drops the connection on its 3rd command (a dwell interrupted);
    # the client sees the close, and a new connection is served again
    s = sim_serve.start({"simulation": {"seed": SEED, "cathode": {"emitters": 1000}, "quirks": {
        "supply": {"faults": [{"kind": "drop-connection", "at_command": 3}]}}}})
    try:
        port = s.servers["supply"].port
        with connect(port) as c:
            assert ask(c, "*OPC?") == "1"
            assert ask(c, "*OPC?") == "1"
            c.sendall(b"*OPC?\n")
            assert closed_by_peer(c)
        with connect(port) as c:
            assert ask(c, "*OPC?") == "1"
        assert s.stand.supply.disconnects >= 1
    finally:
        s.stop()


def test_a_rig_of_real_instruments_is_refused(capsys):
    # sim-serve serves simulated rigs only; the example real stand is refused in one line
    from sequencer.cli import main
    code = main(["sim-serve", "--rig", str(ROOT / "protocols" / "rig-stand-b.yaml")])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "simulated" in err[0]


def test_an_address_that_cannot_be_bound_is_one_line(capsys):
    # 256.1.1.1 is not an IPv4 address: nothing is bound, exit 2 with one line
    from sequencer.cli import main
    code = main(["sim-serve", "--bind", "256.1.1.1"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and "cannot listen on 256.1.1.1" in err[-1]
    assert "WARNING" in err[0]                     # a non-loopback bind is warned about
