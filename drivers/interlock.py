"""Interlock lines on a transport's digital/modem lines (a serial port's CTS/DSR/CD in,
DTR/RTS out). The chain is read from one input line; the heartbeat line is toggled by the
sample loop itself (never by a thread of its own, so it stops when the loop stops) and
feeds an external hardware watchdog relay; the inhibit line asks the hardware to cut the
output. Levels are configurable: ``chain_closed_level`` is the level of a closed chain,
``inhibit_level`` the level that inhibits."""
from __future__ import annotations

from typing import Optional

from .errors import DriverError
from .roles import Interlock


class LineInterlock(Interlock):
    def __init__(self, transport, chain_line: Optional[str] = "CTS", chain_closed_level: bool = True,
                 heartbeat_line: Optional[str] = "DTR", inhibit_line: Optional[str] = "RTS",
                 inhibit_level: bool = True, name: str = "interlock"):
        self.transport = transport
        self.chain_line = chain_line
        self.chain_closed_level = bool(chain_closed_level)
        self.heartbeat_line = heartbeat_line
        self.inhibit_line = inhibit_line
        self.inhibit_level = bool(inhibit_level)
        self.name = name
        self.where = f"{name} ({getattr(transport, 'resource', '?')})"
        self._beat = False
        if inhibit_line:
            self.inhibit(False)

    def chain_closed(self) -> bool:
        if not self.chain_line:
            raise DriverError(self.where, "no interlock chain line declared")
        return self.transport.get_line(self.chain_line) == self.chain_closed_level

    def heartbeat(self) -> None:
        if not self.heartbeat_line:
            return
        self._beat = not self._beat
        self.transport.set_line(self.heartbeat_line, self._beat)

    def inhibit(self, on: bool) -> None:
        if not self.inhibit_line:
            raise DriverError(self.where, "no inhibit line declared")
        level = self.inhibit_level if on else not self.inhibit_level
        self.transport.set_line(self.inhibit_line, level)

    @property
    def has_inhibit(self) -> bool:
        return bool(self.inhibit_line)

    def close(self) -> None:
        self.transport.close()
