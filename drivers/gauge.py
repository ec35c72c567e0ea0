"""ASCII vacuum gauge driver: one query, a reply pattern with status and value, a unit.
States (filament off, over-range, under-range, no answer) are explicit, never numbers."""
from __future__ import annotations

import math
import re
from typing import Optional

from .clock import Clock, WallClock
from .dialect import PRESSURE_UNITS_PA, Dialect, load_dialect
from .errors import DriverError
from .roles import Gauge, PressureReading


class AsciiGauge(Gauge):
    def __init__(self, transport, dialect: Dialect | str = "generic-ascii-gauge",
                 name: str = "gauge", clock: Optional[Clock] = None):
        self.transport = transport
        self.dialect = load_dialect(dialect, "gauge")
        self.name = name
        self.clock = clock or WallClock()
        self.where = f"{name} ({getattr(transport, 'resource', '?')})"
        self._rx = re.compile(self.dialect.get("reply.pattern"))
        self._states = {str(k): v for k, v in self.dialect.get("reply.states").items()}
        self._scale = PRESSURE_UNITS_PA[self.dialect.get("unit")]
        #: the last reason a reading was "no-answer" (timeout text, garbage reply)
        self.last_problem = ""

    def read(self) -> PressureReading:
        t = self.clock.now()
        try:
            if not self.transport.trusted:
                self.transport.resync()
            reply = self.transport.query(self.dialect.command("read"))
        except DriverError as exc:
            self.last_problem = str(exc)
            return PressureReading(math.nan, "no-answer", t)
        m = self._rx.match(reply)
        if not m:
            self.last_problem = f"unparseable reply {reply[:60]!r}"
            self.transport.trusted = False   # framing unknown: resync before the next read
            return PressureReading(math.nan, "no-answer", t)
        state = self._states.get(m.group("status"))
        if state is None:
            self.last_problem = f"unknown status {m.group('status')!r}"
            return PressureReading(math.nan, "no-answer", t)
        value = float(m.group("value")) * self._scale
        if state in ("ok", "under-range") and math.isfinite(value) and value >= 0:
            self.last_problem = ""
            return PressureReading(value, state, t)
        if state in ("ok", "under-range"):
            self.last_problem = f"impossible pressure {value!r} Pa"
            return PressureReading(math.nan, "no-answer", t)
        return PressureReading(math.nan, state, t)

    def abort(self) -> None:
        self.transport.abort()

    def close(self) -> None:
        self.transport.close()
