"""The generic loopback SCPI server: 127.0.0.1 on a free port, newline-terminated lines,
drops clients that send junk, an HTTP request or an oversized line, takes one client when
asked to, and stops cleanly."""
import os
import socket
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import Echo  # noqa: E402

from simulators.loopback import LoopbackServer, is_scpi_line


def connect(srv):
    s = socket.create_connection(("127.0.0.1", srv.port), timeout=2)
    return s, s.makefile("rb")


def closed_by_peer(sock, f):
    """True when the server closed the connection (EOF or reset); a timeout is False."""
    try:
        return f.readline() == b""
    except ConnectionResetError:
        return True
    except socket.timeout:
        return False


def test_serves_queries_on_a_free_localhost_port():
    with LoopbackServer(Echo()) as srv:
        assert srv.port > 0 and srv.resource == f"TCPIP::127.0.0.1::{srv.port}::SOCKET"
        s, f = connect(srv)
        s.sendall(b"*IDN?\nSOUR:VOLT 10\nMEAS:CURR?\n")    # several messages, one send
        assert f.readline() == b"KESTREL LANE,ECHO,SN1,0.1\n"
        assert f.readline() == b"MEAS:CURR\n"                # the write produced nothing
        s.close()


@pytest.mark.parametrize("junk", [b"GET / HTTP/1.1\r\n", b"\x00\xff\xfe binary\n",
                                  b"A" * 5000 + b"\n", b"B" * 5000])
def test_drops_a_client_sending_something_that_is_not_scpi(junk):
    with LoopbackServer(Echo(), max_line=4096) as srv:
        s, f = connect(srv)
        s.sendall(junk)
        assert closed_by_peer(s, f)
        assert srv.dropped == 1
        s2, f2 = connect(srv)                                 # the server keeps serving
        s2.sendall(b"*OPC?\n")
        assert f2.readline() == b"1\n"


def test_single_client_refuses_a_second_connection():
    with LoopbackServer(Echo(), max_clients=1) as srv:
        s1, f1 = connect(srv)
        s1.sendall(b"*OPC?\n")
        assert f1.readline() == b"1\n"
        s2, f2 = connect(srv)
        assert closed_by_peer(s2, f2) and srv.refused == 1
        s1.sendall(b"*OPC?\n")
        assert f1.readline() == b"1\n"


def test_stop_closes_clients_and_the_port():
    srv = LoopbackServer(Echo()).start()
    s, f = connect(srv)
    s.sendall(b"*OPC?\n")
    assert f.readline() == b"1\n"
    srv.stop()
    assert closed_by_peer(s, f)
    with pytest.raises(OSError):
        socket.create_connection(("127.0.0.1", srv.port), timeout=1)


def test_line_classifier():
    # IEEE 488.2 §7.3 program messages start with a header or a common command (from memory)
    assert is_scpi_line("*IDN?") and is_scpi_line(":SOUR:VOLT 1.5E3") and is_scpi_line("PR?")
    assert not is_scpi_line("GET /index.html HTTP/1.0")
    assert not is_scpi_line("\x16\x03\x01 tls hello") and not is_scpi_line("123")
