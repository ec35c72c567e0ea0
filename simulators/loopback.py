"""A generic loopback TCP server that serves any ``CommandInterpreter`` as a raw-socket
SCPI instrument (the ``TCPIP::HOST::PORT::SOCKET`` VISA resource kind).

* binds ``127.0.0.1`` by default, on a free port when ``port=0``;
* newline-terminated lines in, one reply line out per query (``handle`` returning text);
* honours ``reply_delay(line)`` with real sleeps (``math.inf``: the reply never comes);
* drops a client that sends an unparseable line (binary junk, an HTTP request, a line
  longer than ``max_line``) and refuses clients beyond ``max_clients`` (1 = single client,
  as many LAN instruments are);
* ``stop()`` closes the listening socket and every client and joins the threads.
"""
from __future__ import annotations

import math
import re
import select
import socket
import threading
from typing import List, Optional

#: one SCPI program message line: printable ASCII, starting like a header or common command
_SCPI_LINE = re.compile(r"^[ \t]*[*:A-Za-z][\x20-\x7e\t]*$")
_HTTP_LINE = re.compile(r"^(GET|HEAD|POST|PUT|DELETE|OPTIONS|CONNECT|PATCH|TRACE|PRI) \S+"
                        r"( HTTP/\d(\.\d)?)?$")


def is_scpi_line(line: str) -> bool:
    """True when ``line`` could be a SCPI/IEEE 488.2 program message (no HTTP, no junk)."""
    return bool(_SCPI_LINE.match(line)) and not _HTTP_LINE.match(line.strip())


class LoopbackServer:
    """Serve ``interpreter`` on a TCP port until ``stop()``."""

    def __init__(self, interpreter, host: str = "127.0.0.1", port: int = 0,
                 max_line: int = 4096, max_clients: int = 1):
        if not callable(getattr(interpreter, "handle", None)):
            raise TypeError("interpreter needs a handle(line) method")
        self.interpreter = interpreter
        self.host = host
        self._want_port = int(port)
        self.max_line = int(max_line)
        self.max_clients = max(1, int(max_clients))
        self.port: Optional[int] = None
        self._listener: Optional[socket.socket] = None
        self._stop = threading.Event()
        self._lock = threading.Lock()          # one command at a time into the interpreter
        self._clients: List[socket.socket] = []
        self._threads: List[threading.Thread] = []
        self._accept_thread: Optional[threading.Thread] = None
        #: counters for tests and the sim-serve banner
        self.dropped = 0
        self.refused = 0
        self.served = 0

    # -- life cycle ------------------------------------------------------------------------
    @property
    def resource(self) -> str:
        return f"TCPIP::{self.host}::{self.port}::SOCKET"

    def start(self) -> "LoopbackServer":
        s = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        s.bind((self.host, self._want_port))
        s.listen(8)
        s.settimeout(0.2)
        self._listener = s
        self.port = s.getsockname()[1]
        self._accept_thread = threading.Thread(target=self._accept_loop, daemon=True,
                                               name=f"loopback-accept-{self.port}")
        self._accept_thread.start()
        return self

    def stop(self) -> None:
        self._stop.set()
        if self._listener is not None:
            try:
                self._listener.shutdown(socket.SHUT_RDWR)   # wakes accept() at once
            except OSError:
                pass
            try:
                self._listener.close()
            except OSError:
                pass
        with self._lock:
            clients = list(self._clients)
        for c in clients:
            self._shut(c)
        if self._accept_thread is not None:
            self._accept_thread.join(timeout=2.0)
        for t in list(self._threads):
            t.join(timeout=2.0)

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()

    @property
    def client_count(self) -> int:
        with self._lock:
            return len(self._clients)

    # -- internals -------------------------------------------------------------------------
    @staticmethod
    def _shut(c: socket.socket) -> None:
        try:
            c.shutdown(socket.SHUT_RDWR)
        except OSError:
            pass
        try:
            c.close()
        except OSError:
            pass

    @staticmethod
    def _alive(c: socket.socket) -> bool:
        """False when the peer has already closed (a client reconnecting at once must not
        be refused because its old connection is not yet reaped)."""
        try:
            readable, _, _ = select.select([c], [], [], 0)
            if not readable:
                return True
            return c.recv(1, socket.MSG_PEEK) != b""
        except (BlockingIOError, socket.timeout):
            return True
        except (OSError, ValueError):
            return False

    def _accept_loop(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self._listener.accept()
            except socket.timeout:
                continue
            except OSError:
                return
            with self._lock:
                full = len(self._clients) >= self.max_clients
                if full:
                    self._clients = [c for c in self._clients if self._alive(c)]
                    full = len(self._clients) >= self.max_clients
                if not full:
                    self._clients.append(conn)
            if full:
                self.refused += 1
                self._shut(conn)
                continue
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            conn.settimeout(0.2)
            t = threading.Thread(target=self._serve, args=(conn,), daemon=True,
                                 name=f"loopback-client-{self.port}")
            self._threads = [x for x in self._threads if x.is_alive()] + [t]
            t.start()

    def _delay(self, line: str) -> float:
        fn = getattr(self.interpreter, "reply_delay", None)
        return float(fn(line)) if fn is not None else 0.0

    def _serve(self, conn: socket.socket) -> None:
        buf = b""
        try:
            while not self._stop.is_set():
                try:
                    chunk = conn.recv(65536)
                except socket.timeout:
                    continue
                except OSError:
                    return
                if not chunk:
                    return
                buf += chunk
                while b"\n" in buf:
                    raw, buf = buf.split(b"\n", 1)
                    if not self._one(conn, raw):
                        self.dropped += 1
                        return
                if len(buf) > self.max_line:
                    self.dropped += 1
                    return
        finally:
            with self._lock:
                if conn in self._clients:
                    self._clients.remove(conn)
                fn = getattr(self.interpreter, "disconnect", None)
                if callable(fn) and not self._clients:
                    try:
                        fn()
                    except Exception:  # noqa: BLE001 - the simulator's business
                        pass
            self._shut(conn)

    def _one(self, conn: socket.socket, raw: bytes) -> bool:
        """Handle one line; False means drop the client."""
        if len(raw) > self.max_line:
            return False
        try:
            line = raw.decode("ascii").rstrip("\r")
        except UnicodeDecodeError:
            return False
        if not line.strip():
            return True
        if not is_scpi_line(line):
            return False
        try:
            with self._lock:
                reply = self.interpreter.handle(line)
                delay = self._delay(line) if reply is not None else 0.0
        except OSError:
            return False              # the instrument dropped the connection (a quirk)
        self.served += 1
        if reply is None:
            return True
        if math.isinf(delay):
            return True               # the reply never comes
        if delay > 0 and self._stop.wait(delay):
            return False
        conn.sendall(str(reply).encode("ascii", "replace") + b"\n")
        return True


def main(argv=None) -> int:  # pragma: no cover - manual use
    """Serve a trivial echo instrument (for trying a VISA client by hand)."""
    class _Echo:
        def handle(self, line):
            return "KESTREL LANE,ECHO,0,0" if line.strip().upper() == "*IDN?" else (
                "1" if line.strip().endswith("?") else None)
    srv = LoopbackServer(_Echo()).start()
    print(srv.resource, flush=True)
    try:
        threading.Event().wait()
    except KeyboardInterrupt:
        pass
    srv.stop()
    return 0
