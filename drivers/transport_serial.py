"""Serial transport through pyserial: device paths (``serial:/dev/ttyUSB0?baud=9600``) and
pyserial URLs (``socket://host:port``, ``loop://``, and handlers registered through
``serial.protocol_handler_packages``).

Reads are done in short slices so ``abort()`` from another thread wakes a blocked call
within one slice, whatever the URL handler. Modem lines: ``DTR`` and ``RTS`` out, ``CTS``,
``DSR``, ``CD`` (and ``RI``) in. Serial has no device clear: ``resync()`` flushes both
buffers, waits a quiet slice, flushes again and asks the sentinel (if the dialect has one).
"""
from __future__ import annotations

import time
import urllib.parse
from typing import Optional, Tuple

from .errors import DriverError, TransportAborted, TransportTimeout
from .session import DEFAULT_SENTINEL, LineSession

_SLICE = 0.02
_OUT_LINES = {"DTR": "dtr", "RTS": "rts"}
_IN_LINES = {"CTS": "cts", "DSR": "dsr", "CD": "cd", "DCD": "cd", "RI": "ri"}
_PARITY = {"N": "N", "E": "E", "O": "O", "M": "M", "S": "S"}


def parse_serial_address(address: str) -> Tuple[str, dict]:
    """Split ``serial:PATH?baud=9600&parity=N&bytesize=8&stopbits=1`` into a pyserial port
    and settings; pyserial URLs (``scheme://...``) pass through unchanged."""
    settings = {"baudrate": 9600, "bytesize": 8, "parity": "N", "stopbits": 1}
    if not address.startswith("serial:"):
        return address, settings
    rest = address[len("serial:"):]
    path, _, q = rest.partition("?")
    if not path:
        raise DriverError(address, "serial address has no device path")
    for key, values in urllib.parse.parse_qs(q, keep_blank_values=True).items():
        val = values[-1]
        try:
            if key in ("baud", "baudrate"):
                settings["baudrate"] = int(val)
            elif key == "bytesize":
                settings["bytesize"] = int(val)
            elif key == "stopbits":
                settings["stopbits"] = float(val) if val == "1.5" else int(val)
            elif key == "parity":
                settings["parity"] = _PARITY[val.upper()]
            else:
                raise DriverError(address, f"unknown serial setting {key!r} "
                                           "(baud, bytesize, parity, stopbits)")
        except (ValueError, KeyError):
            raise DriverError(address, f"bad value {val!r} for serial setting {key!r}") from None
    return path, settings


class SerialTransport(LineSession):
    """A pyserial port or URL, line terminated (``term``, default CR LF tolerant ``\\n``)."""

    def __init__(self, address: str, timeout: float = 1.0,
                 sentinel: Optional[Tuple[str, str]] = DEFAULT_SENTINEL, term: str = "\n",
                 write_term: Optional[str] = None):
        super().__init__(address, timeout, sentinel, term)
        self.port_name, self.settings = parse_serial_address(address)
        self.write_term = write_term
        self._port = None
        self._buf = b""
        self._open()

    def _open(self) -> None:
        import serial
        try:
            self._port = serial.serial_for_url(self.port_name, timeout=_SLICE,
                                               write_timeout=self.timeout, **self.settings)
        except (serial.SerialException, ValueError, OSError) as exc:
            raise DriverError(self.resource, f"cannot open serial port: {exc}") from None
        self._buf = b""
        self.trusted = True

    def _close(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            port.close()

    def _need(self):
        if self._port is None:
            raise DriverError(self.resource, "serial port is not open")
        return self._port

    def _send(self, text: str) -> None:
        import serial
        if self.write_term is not None:
            text = text.replace(self.term, self.write_term)
        try:
            self._need().write(text.encode("ascii"))
        except serial.SerialTimeoutException:
            raise TransportTimeout(self.resource, "write timed out") from None
        except serial.SerialException as exc:
            raise DriverError(self.resource, f"write failed: {exc}") from None

    def _recv_line(self, timeout: float) -> str:
        import serial
        port = self._need()
        term = self.term.encode("ascii")
        deadline = time.monotonic() + timeout
        while True:
            if term in self._buf:
                line, self._buf = self._buf.split(term, 1)
                try:
                    return line.decode("ascii").strip("\r\n")
                except UnicodeDecodeError:
                    raise DriverError(self.resource, f"reply is not ASCII: {line[:40]!r}") from None
            if self._aborted.is_set():
                raise TransportAborted(self.resource, "aborted while reading")
            if time.monotonic() >= deadline:
                raise TransportTimeout(self.resource, f"no reply within {timeout:g} s")
            try:
                chunk = port.read(max(1, port.in_waiting or 1))
            except serial.SerialException as exc:
                raise DriverError(self.resource, f"read failed: {exc}") from None
            if chunk:
                self._buf += chunk
                if len(self._buf) > 65536:
                    self._buf = b""
                    raise DriverError(self.resource, "reply longer than 64 KiB without a terminator")

    def _flush_input(self) -> None:
        port = self._need()
        self._buf = b""
        port.reset_input_buffer()
        time.sleep(_SLICE)
        while port.in_waiting:
            port.read(port.in_waiting)
        port.reset_input_buffer()

    # -- modem lines -------------------------------------------------------------------------
    def set_line(self, name: str, level: bool) -> None:
        attr = _OUT_LINES.get(name.upper())
        if attr is None:
            raise DriverError(self.resource, f"{name!r} is not an output line (DTR, RTS)")
        try:
            setattr(self._need(), attr, bool(level))
        except (OSError, ValueError) as exc:
            raise DriverError(self.resource, f"cannot drive {name}: {exc}") from None

    def get_line(self, name: str) -> bool:
        attr = _IN_LINES.get(name.upper())
        if attr is None:
            raise DriverError(self.resource, f"{name!r} is not an input line (CTS, DSR, CD, RI)")
        try:
            return bool(getattr(self._need(), attr))
        except (OSError, ValueError) as exc:
            raise DriverError(self.resource, f"cannot read {name}: {exc}") from None
