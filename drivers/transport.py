"""The transport interface: how bytes reach an instrument, kept apart from what they mean.

Instrument drivers (``drivers.supply`` and friends) talk to a ``Transport`` and never know
which wire they are on. Three kinds implement it:

* VISA through pyvisa (pyvisa-py by default; another backend may be named, never a
  library path): GPIB, USB-TMC, LAN (VXI-11, HiSLIP, raw ``::SOCKET``);
* serial through pyserial: device paths and pyserial's ``socket://`` and ``loop://`` URLs;
* in-process: a Python object implementing ``CommandInterpreter`` (the simulated
  instruments plug in here).

Contract every implementation keeps:

* every call has a finite timeout (seconds, real time);
* one owner thread per session: only the owner calls write/query/read; any thread may
  call ``abort()``, which wakes a blocked call (it then raises ``TransportAborted``);
* after any timeout or abort the session is *untrusted* (``trusted`` is False) and every
  call except ``resync()``/``reopen()``/``close()`` raises until ``resync()`` has flushed
  stale input and seen a sentinel (``*OPC?`` answered ``1``), so a late reply is never
  read as the answer to the next query.
"""
from __future__ import annotations

from typing import Optional, Protocol, runtime_checkable


@runtime_checkable
class CommandInterpreter(Protocol):
    """What an in-process (simulated) instrument offers the in-process transport and the
    loopback server.

    ``handle(line)`` receives one command line (terminator stripped) and returns the
    reply text (no terminator) or ``None`` when the command produces no reply.
    ``reply_delay(line)`` returns the instrument's latency for that line in seconds of
    the instrument's own clock (0 for none, ``math.inf`` for a reply that never comes);
    implementations without quirks may omit it. ``disconnect()`` is called when the
    host side goes away (socket closed, process gone): a supply that keeps its output
    when its host vanishes simply ignores it.
    """

    def handle(self, line: str) -> Optional[str]: ...


class Transport:
    """Base class. Subclasses implement ``_write``, ``_read_line``, ``_close`` and may
    override ``abort``, ``device_clear``, ``reopen`` and the modem-line methods."""

    #: a human-readable resource string, e.g. ``TCPIP::127.0.0.1::5025::SOCKET``
    resource: str = "?"
    #: finite timeout of one call, seconds of real time
    timeout: float = 2.0
    #: False after a timeout or abort until ``resync()`` succeeds
    trusted: bool = True

    def write(self, cmd: str) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def query(self, cmd: str) -> str:  # pragma: no cover - interface
        raise NotImplementedError

    def read(self) -> str:  # pragma: no cover - interface
        raise NotImplementedError

    def abort(self) -> None:  # pragma: no cover - interface
        """Wake a call blocked in another thread. Safe to call from any thread."""
        raise NotImplementedError

    def resync(self) -> None:  # pragma: no cover - interface
        """Flush stale input (device clear where the bus has one), then confirm with a
        sentinel query. Raises ``DriverError`` if the session cannot be trusted again."""
        raise NotImplementedError

    def reopen(self) -> None:  # pragma: no cover - interface
        """Close the old connection (many instruments take one client only), open a
        fresh one."""
        raise NotImplementedError

    def close(self) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    # Modem/digital lines (serial ports; fake ports in tests). Transports without
    # lines raise DriverError.
    def set_line(self, name: str, level: bool) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def get_line(self, name: str) -> bool:  # pragma: no cover - interface
        raise NotImplementedError
