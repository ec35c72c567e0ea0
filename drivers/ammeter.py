"""SCPI picoammeter driver: configure (function, range or auto-range, NPLC, line frequency,
input shorting and zero correction off), read back the configuration, read one value or a
burst. The SCPI special values become flagged readings (``value`` NaN), never numbers."""
from __future__ import annotations

import math
from typing import List, Optional

from .clock import Clock, WallClock
from .dialect import Dialect, load_dialect
from .errors import ArmRefused, DriverError
from .roles import Ammeter, CurrentReading, Identity
from .scpi import (ESR_ERRORS, drain_errors, parse_bool, parse_identity, parse_int,
                   parse_number, special_flag)


class ScpiAmmeter(Ammeter):
    def __init__(self, transport, dialect: Dialect | str = "generic-scpi-picoammeter",
                 name: str = "ammeter", clock: Optional[Clock] = None,
                 expected_model: Optional[str] = None, expected_serial: Optional[str] = None):
        self.transport = transport
        self.dialect = load_dialect(dialect, "ammeter")
        self.name = name
        self.clock = clock or WallClock()
        self.expected_model = expected_model
        self.expected_serial = expected_serial
        self.where = f"{name} ({getattr(transport, 'resource', '?')})"
        self._wanted: Optional[dict] = None
        self._range: float = math.nan
        self._auto_range_seen: float = math.nan   # last range seen in auto-range mode

    def _q(self, key: str) -> str:
        if not self.transport.trusted:
            self.transport.resync()
        return self.transport.query(self.dialect.command(key))

    def identify(self) -> Identity:
        if not self.transport.trusted:
            self.transport.resync()
        return parse_identity(self.where, self.transport.query("*IDN?"))

    def configure(self, range_a: Optional[float] = None, nplc: float = 1.0,
                  line_hz: float = 50.0) -> None:
        """Current function; ``range_a`` None = auto-range, else the smallest dialect range
        that holds it; integration ``nplc`` power-line cycles at ``line_hz``."""
        d = self.dialect
        lo, hi = d.number("nplc.min"), d.number("nplc.max")
        if not (lo <= nplc <= hi):
            raise DriverError(self.where, f"NPLC {nplc:g} outside the instrument's {lo:g}..{hi:g}")
        allowed_hz = d.get("line_hz") or [50.0, 60.0]
        if line_hz not in allowed_hz:
            raise DriverError(self.where, f"line frequency {line_hz:g} Hz not one of {allowed_hz}")
        full = None
        if range_a is not None:
            fits = sorted(r for r in d.get("ranges_a") if r >= abs(range_a))
            if not fits:
                raise DriverError(self.where, f"no range holds {range_a:g} A "
                                              f"(largest {max(d.get('ranges_a')):g} A)")
            full = float(fits[0])
        if not self.transport.trusted:
            self.transport.resync()
        w = self.transport.write
        w(d.command("clear_status"))
        w(d.command("set_function"))
        if full is None:
            w(d.command("set_autorange", on=1))
        else:
            w(d.command("set_autorange", on=0))
            w(d.command("set_range", amps=full))
        w(d.command("set_nplc", nplc=float(nplc)))
        if d.has("set_line_frequency"):
            w(d.command("set_line_frequency", hz=float(line_hz)))
        for key in ("input_short_off", "zero_correct_off"):
            if d.has(key):
                w(d.command(key))
        esr = parse_int(self.where, self.transport.query(d.command("event_status")))
        if esr & ESR_ERRORS:
            errors, _ = drain_errors(self.transport, self.where, d.command("error_query"),
                                     int(d.get("error_queue_cap", 32)))
            raise DriverError(self.where, f"configuration rejected (*ESR? = {esr}; queue {errors})")
        self._wanted = {"range_a": full, "nplc": float(nplc), "line_hz": float(line_hz)}
        self._range = full if full is not None else math.nan

    def verify_config(self) -> dict:
        """Read the configuration back; raise ``ArmRefused`` on any difference."""
        if self._wanted is None:
            raise ArmRefused(self.where, "ammeter not configured")
        d = self.dialect
        got = {"function": self._q("get_function").strip()}
        problems = []
        if got["function"] not in d.get("function_replies"):
            problems.append(f"function is {got['function']!r}")
        got["auto"] = parse_bool(self.where, self._q("get_autorange"))
        got["range_a"] = parse_number(self.where, self._q("get_range"))
        want = self._wanted
        if want["range_a"] is None and not got["auto"]:
            problems.append("auto-range is off")
        if want["range_a"] is not None:
            if got["auto"]:
                problems.append("auto-range is on")
            if not math.isclose(got["range_a"], want["range_a"], rel_tol=1e-6):
                problems.append(f"range is {got['range_a']:g} A, wanted {want['range_a']:g} A")
        got["nplc"] = parse_number(self.where, self._q("get_nplc"))
        if not math.isclose(got["nplc"], want["nplc"], rel_tol=d.number("readback.rel", 1e-3)):
            problems.append(f"NPLC is {got['nplc']:g}, wanted {want['nplc']:g}")
        if d.has("get_line_frequency"):
            got["line_hz"] = parse_number(self.where, self._q("get_line_frequency"))
            if got["line_hz"] != want["line_hz"]:
                problems.append(f"line frequency is {got['line_hz']:g} Hz")
        for key, label in (("get_input_short", "input shorting"), ("get_zero_correct", "zero correction")):
            if d.has(key):
                got[label] = parse_bool(self.where, self._q(key))
                if got[label]:
                    problems.append(f"{label} is on")
        if problems:
            raise ArmRefused(self.where, "configuration readback: " + "; ".join(problems))
        if not got["auto"]:
            self._range = got["range_a"]
        return got

    def _reading(self, reply: str) -> CurrentReading:
        t = self.clock.now()
        try:
            x = parse_number(self.where, reply)
        except DriverError:
            self.transport.trusted = False     # maybe a late reply: resync before the next
            raise
        flag = special_flag(x)
        rng = self._range
        if math.isnan(rng) and self._wanted is not None and self._wanted["range_a"] is None:
            try:
                rng = parse_number(self.where, self.transport.query(self.dialect.command("get_range")))
            except DriverError:
                rng = math.nan
            # In auto-range the range is asked *after* the reading, so an overload that
            # made the instrument range up would be pinned on the new, larger range (and
            # look like a current far above it). The reading was taken on the range in
            # force before: an overload says only "above that range".
            before = self._auto_range_seen
            if flag and math.isfinite(before) and (math.isnan(rng) or before < rng):
                rng = before
            elif math.isfinite(rng):
                self._auto_range_seen = rng
        if not flag and math.isfinite(rng) and rng > 0 and abs(x) > self.IMPLAUSIBLE_OVER_RANGE * rng:
            # A number the instrument cannot have measured on this range (it would have
            # answered +/-9.9E37): most likely a truncated reply ("5.17E-09" cut to
            # "5.17"). It is no current at all, so it is flagged, never used.
            flag = "invalid"
        return CurrentReading(value=math.nan if flag else x, range_a=rng, flag=flag, t=t)

    #: a reading above this multiple of its range cannot be a measurement (over-range is
    #: reported as the SCPI overflow value; instruments read a few % over range at most)
    IMPLAUSIBLE_OVER_RANGE = 2.0

    #: extra readings taken after an auto-range overload below the top range
    AUTO_RANGE_REREADS = 2

    def read(self) -> CurrentReading:
        """One reading. In auto-range an overload below the top range is the instrument
        ranging up (a current rising through a range boundary), not necessarily an arc:
        the reading is repeated, at most ``AUTO_RANGE_REREADS`` times, on the range the
        instrument moved to. An overload that persists, or one on the top range, is
        returned flagged."""
        r = self._reading(self._q("read"))
        auto = self._wanted is not None and self._wanted["range_a"] is None
        if not auto:
            return r
        top = max(self.dialect.get("ranges_a") or [math.inf])
        for _ in range(self.AUTO_RANGE_REREADS):
            if r.flag not in ("overflow", "overflow-negative") or not r.range_a < top:
                break
            r = self._reading(self._q("read"))
        return r

    def read_burst(self, n: int) -> List[CurrentReading]:
        if not isinstance(n, int) or n < 1:
            raise DriverError(self.where, f"burst length {n!r} must be a positive integer")
        return [self.read() for _ in range(n)]

    def abort(self) -> None:
        self.transport.abort()

    def close(self) -> None:
        self.transport.close()
