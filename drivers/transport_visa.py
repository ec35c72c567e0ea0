"""VISA transport through pyvisa; pyvisa-py (``"@py"``) is the default backend so no vendor
library is needed. Another backend may be named (``"@ivi"``), never given as a path.

Raw-socket sessions (``TCPIP::host::port::SOCKET``) get ``TCP_NODELAY`` and every query is
written together with its command in one send, so small writes never wait on TCP's
small-packet coalescing and delayed acknowledgements. ``abort()`` shuts the socket down
from another thread (a blocked read wakes at once); on other buses it waits for the
(finite) timeout. ``resync()`` reopens raw sockets and clears other devices (IEEE 488.1
device clear via ``viClear``), then asks ``*OPC?``.
"""
from __future__ import annotations

import os
import re
import socket
import threading
from typing import Optional, Tuple

from .errors import DriverError, TransportAborted, TransportTimeout
from .session import DEFAULT_SENTINEL, LineSession

_BACKEND = re.compile(r"^@[a-z][a-z0-9_-]{0,31}$")


def check_backend(backend: str) -> str:
    """A backend is named (``@py``, ``@ivi``, ...), never a file path."""
    if not isinstance(backend, str) or not _BACKEND.match(backend):
        raise DriverError("visa", f"backend {backend!r} must be a name such as '@py' or "
                                  "'@ivi' (library paths are not accepted)")
    return backend


_MANAGERS: dict = {}
_MANAGERS_LOCK = threading.Lock()


def resource_manager(backend: str = "@py"):
    """One pyvisa ResourceManager per backend name, created on first use."""
    backend = check_backend(backend)
    with _MANAGERS_LOCK:
        rm = _MANAGERS.get(backend)
        if rm is None:
            import pyvisa
            try:
                rm = pyvisa.ResourceManager(backend)
            except Exception as exc:  # noqa: BLE001 - pyvisa raises many kinds here
                why = " ".join(str(exc).split())[:200]      # one line, never a dump
                raise DriverError("visa", f"VISA backend {backend} is not available: "
                                          f"{why}") from None
            _MANAGERS[backend] = rm
        return rm


def is_raw_socket(resource: str) -> bool:
    return resource.upper().startswith("TCPIP") and resource.upper().endswith("::SOCKET")



_VISA_CODE = re.compile(r"-10738\d{5}")


def open_error_text(exc) -> str:
    """pyvisa's message for a failed open, on one line, with a bare VISA status code (pyvisa-py
    says "could not connect: -1073807339") given its name and meaning from pyvisa's own table
    (VPP-4.3 status codes)."""
    text = " ".join(str(exc).split())

    def name(m):
        try:
            from pyvisa.constants import StatusCode
            from pyvisa.errors import completion_and_error_messages
            abbr, desc = completion_and_error_messages[StatusCode(int(m.group(0)))]
            return f"{abbr} ({desc.rstrip('.')})"
        except (ImportError, KeyError, ValueError):
            return m.group(0)
    return _VISA_CODE.sub(name, text)

class VisaTransport(LineSession):
    """A pyvisa message-based session."""

    def __init__(self, resource: str, timeout: float = 1.0, backend: str = "@py",
                 sentinel: Optional[Tuple[str, str]] = DEFAULT_SENTINEL, nodelay: bool = True):
        super().__init__(resource, timeout, sentinel)
        self.backend = check_backend(backend)
        self.raw_socket = is_raw_socket(resource)
        self.reopen_on_resync = self.raw_socket
        self.nodelay = nodelay
        self._res = None
        self._open()

    # -- opening ---------------------------------------------------------------------------
    def _socket(self) -> Optional[socket.socket]:
        """The OS socket of a pyvisa-py raw-socket session, when it can be reached."""
        if self._res is None or not self.raw_socket:
            return None
        try:
            sess = self._res.visalib.sessions[self._res.session]
            sock = getattr(sess, "interface", None)
            return sock if isinstance(sock, socket.socket) else None
        except (AttributeError, KeyError, TypeError):
            return None

    def _open(self) -> None:
        import pyvisa
        rm = resource_manager(self.backend)
        try:
            res = rm.open_resource(self.resource, open_timeout=int(self.timeout * 1000))
        except (pyvisa.errors.Error, OSError, ValueError) as exc:
            raise DriverError(self.resource, f"cannot open VISA resource: {open_error_text(exc)}") from None
        except Exception as exc:  # noqa: BLE001 - pyvisa-py raises bare Exception on connect
            raise DriverError(self.resource, f"cannot open VISA resource: {open_error_text(exc)}") from None
        res.timeout = int(self.timeout * 1000)
        res.read_termination = self.term
        res.write_termination = ""
        self._res = res
        sock = self._socket()
        if sock is not None:
            # pyvisa-py reports a refused non-blocking connect as success: check it here
            err = sock.getsockopt(socket.SOL_SOCKET, socket.SO_ERROR)
            try:
                sock.getpeername()
            except OSError:
                err = err or 111
            if err:
                self._close()
                raise DriverError(self.resource, f"cannot open VISA resource: "
                                                 f"{os.strerror(err)}")
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1 if self.nodelay else 0)
        elif self.raw_socket:
            try:
                res.set_visa_attribute(pyvisa.constants.VI_ATTR_TCPIP_NODELAY,
                                       bool(self.nodelay))
            except Exception:  # noqa: BLE001 - attribute unsupported by this backend
                pass
        self.trusted = True

    def _close(self) -> None:
        res, self._res = self._res, None
        if res is not None:
            try:
                res.close()
            except Exception:  # noqa: BLE001 - already dead
                pass

    # -- I/O -------------------------------------------------------------------------------
    def _need(self):
        if self._res is None:
            raise DriverError(self.resource, "VISA session is not open")
        return self._res

    def _send(self, text: str) -> None:
        import pyvisa
        try:
            self._need().write_raw(text.encode("ascii"))
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                raise TransportTimeout(self.resource, "write timed out") from None
            raise DriverError(self.resource, f"write failed: {exc.description}") from None

    def _recv_line(self, timeout: float) -> str:
        import pyvisa
        res = self._need()
        try:
            raw = res.read_raw()
        except pyvisa.errors.VisaIOError as exc:
            if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
                if self._aborted.is_set():
                    raise TransportAborted(self.resource, "aborted while reading") from None
                raise TransportTimeout(self.resource, f"no reply within {timeout:g} s") from None
            raise DriverError(self.resource, f"read failed: {exc.description}") from None
        try:
            text = raw.decode("ascii")
        except UnicodeDecodeError:
            raise DriverError(self.resource, f"reply is not ASCII text: {raw[:40]!r}") from None
        return text.rstrip("\r\n")

    def _wake(self) -> None:
        sock = self._socket()
        if sock is not None:
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            try:
                sock.close()
            except OSError:
                pass

    def _flush_input(self) -> None:
        import pyvisa
        res = self._need()
        try:
            res.flush(pyvisa.constants.BufferOperation.discard_read_buffer_no_io)
        except Exception:  # noqa: BLE001 - not every backend supports every flush mask
            pass

    def device_clear(self) -> bool:
        if self.raw_socket or self._res is None:
            return False
        try:
            self._res.clear()
            return True
        except Exception:  # noqa: BLE001 - the bus may have no device clear
            return False


def list_resources(backend: str = "@py", query: str = "?*::INSTR") -> Tuple[str, ...]:
    """VISA resources the backend can find (raw sockets are never discoverable)."""
    rm = resource_manager(backend)
    try:
        return tuple(rm.list_resources(query))
    except Exception:  # noqa: BLE001 - discovery failures mean "none found"
        return ()
