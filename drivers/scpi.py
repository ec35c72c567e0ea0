"""IEEE 488.2 / SCPI pieces shared by the SCPI drivers: identity, numbers, special values,
status bytes and the bounded error-queue drain."""
from __future__ import annotations

import math
import re
from typing import List, Optional, Tuple

from .errors import DriverError
from .roles import INVALID, OVERFLOW, OVERFLOW_NEGATIVE, Identity

#: SCPI-99 Vol. 1 §7.2.1.5 (from memory): INFinity is sent as 9.9E37, NINFinity as
#: -9.9E37 and NAN (not a number) as 9.91E37.
SCPI_INF = 9.9e37
SCPI_NINF = -9.9e37
SCPI_NAN = 9.91e37
_SPECIAL_RTOL = 1e-4   # 9.9E37 and 9.91E37 differ by 1e-3 relative: matched by value

_NUMBER = re.compile(r"^\s*([-+]?(\d+(\.\d*)?|\.\d+)([eE][-+]?\d+)?)\s*$")

#: IEEE 488.2 §11.5.1 standard event status register bits (from memory)
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME = 0x01, 0x04, 0x08, 0x10, 0x20
ESR_ERRORS = ESR_QYE | ESR_DDE | ESR_EXE | ESR_CME


def special_flag(x: float) -> Optional[str]:
    """Which SCPI special value ``x`` is (by value, not by text), or None."""
    for ref, flag in ((SCPI_NAN, INVALID), (SCPI_INF, OVERFLOW), (SCPI_NINF, OVERFLOW_NEGATIVE)):
        if math.isclose(x, ref, rel_tol=_SPECIAL_RTOL):
            return flag
    return None


def parse_number(where: str, reply: str, field: int = 0) -> float:
    """Field ``field`` of a comma-separated reply as a float; garbage raises DriverError."""
    parts = reply.split(",")
    if field >= len(parts):
        raise DriverError(where, f"reply {reply[:60]!r} has no field {field}")
    m = _NUMBER.match(parts[field])
    if not m:
        raise DriverError(where, f"reply {reply[:60]!r} is not a number")
    return float(m.group(1))


def parse_bool(where: str, reply: str) -> bool:
    """SCPI boolean response: ``0``/``1`` (and ``ON``/``OFF`` from lenient instruments)."""
    text = reply.strip().upper()
    if text in ("1", "ON"):
        return True
    if text in ("0", "OFF"):
        return False
    try:
        v = parse_number(where, text)
    except DriverError:
        raise DriverError(where, f"reply {reply[:60]!r} is not a boolean") from None
    if v in (0.0, 1.0):
        return bool(v)
    raise DriverError(where, f"reply {reply[:60]!r} is not a boolean")


def parse_int(where: str, reply: str) -> int:
    v = parse_number(where, reply)
    if v != int(v) or v < 0:
        raise DriverError(where, f"reply {reply[:60]!r} is not a register value")
    return int(v)


def parse_identity(where: str, raw: str) -> Identity:
    """``*IDN?``: four comma-separated fields, maker, model, serial, firmware
    (IEEE 488.2 §10.14, from memory). ``SIMULATED`` anywhere marks a simulated unit."""
    parts = [p.strip() for p in raw.split(",")]
    if len(parts) != 4 or not parts[1]:
        raise DriverError(where, f"*IDN? reply {raw[:80]!r} is not four comma-separated fields")
    return Identity(maker=parts[0], model=parts[1], serial=parts[2], firmware=parts[3],
                    raw=raw, simulated="SIMULATED" in raw.upper())


def parse_error(where: str, reply: str) -> Tuple[int, str]:
    """``SYST:ERR?``: ``<code>,"<text>"``; code 0 means the queue is empty
    (SCPI-99 Vol. 2 §21.8.8, from memory)."""
    code, _, text = reply.partition(",")
    try:
        n = int(code.strip())
    except ValueError:
        raise DriverError(where, f"SYST:ERR? reply {reply[:60]!r} has no error code") from None
    return n, text.strip().strip('"')


def drain_errors(transport, where: str, command: str = "SYST:ERR?", cap: int = 32
                 ) -> Tuple[List[Tuple[int, str]], bool]:
    """Read the error queue until ``0,...`` or ``cap`` entries. Returns (errors, emptied);
    ``emptied`` is False when the cap was reached first (a queue that never empties)."""
    errors: List[Tuple[int, str]] = []
    for _ in range(cap):
        code, text = parse_error(where, transport.query(command))
        if code == 0:
            return errors, True
        errors.append((code, text))
    return errors, False
