"""The SCPI side of a simulated instrument: header matching, parameters, the error queue
and the IEEE 488.2 status registers. No physics here (see ``simulators.instruments``).

What is followed, section by section (all from memory of the published texts):

* SCPI-99 vol. 1, 6.2.1 (keywords): a keyword has a long form and a short form (the
  upper-case part of the long form as written here); either is accepted, nothing in
  between, and case does not matter. Bracketed nodes are optional. A numeric suffix of 1
  is accepted on any node (``OUTP1``).
* SCPI-99 vol. 1, 6.2.4 / IEEE 488.2 7.4.1: several program message units in one line are
  separated by ``;``; the replies of the queries among them are joined with ``;``
  (IEEE 488.2 8.4.1). Simplification: every unit after a ``;`` is read from the root
  (no relative path), which every real instrument also accepts when the header is full.
* SCPI-99 vol. 1, 7.7 (numeric parameters): NR1/NR2/NR3 with an optional unit suffix and
  multiplier (``mV``, ``kV``, ``uA``, ``nA``); ``MINimum``, ``MAXimum``, ``DEFault``.
  ``MA`` after a current is read as milliampere (common practice, although SCPI-99 7.7.3
  reserves ``MA`` for mega on bare numbers).
* SCPI-99 vol. 1, 7.3 (boolean): ``ON``, ``OFF``, ``1``, ``0`` (any non-zero number is on).
* SCPI-99 vol. 2, 21.8 (error/event queue): FIFO of ``<code>,"<text>"``; reading an empty
  queue answers ``0,"No error"``; when the queue is full the most recent entry is replaced
  by ``-350,"Queue overflow"``; ``*CLS`` empties it (IEEE 488.2 10.3).
* IEEE 488.2 11.5.1 (standard event status register): bit 0 OPC, bit 2 query error
  (-4xx), bit 3 device-dependent error (-3xx and positive codes), bit 4 execution error
  (-2xx), bit 5 command error (-1xx), bit 7 power on. ``*ESR?`` reads and clears it.
* IEEE 488.2 11.2 (status byte): bit 2 error queue not empty (SCPI-99 vol. 1, 9.1), bit 3
  questionable summary, bit 5 event summary (ESR & ESE), bit 6 master summary,
  bit 7 operation summary.
* IEEE 488.2 10.14 (``*IDN?``): four fields, maker, model, serial, firmware.
"""
from __future__ import annotations

import math
import re
from collections import deque
from dataclasses import dataclass
from typing import Callable, List, Optional, Sequence, Tuple

# SCPI-99 vol. 2, 21.8 (standard error codes and texts), from memory.
ERRORS = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -131: "Invalid suffix",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -300: "Device-specific error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
}

# IEEE 488.2 11.5.1.1 bit values of the standard event status register
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME, ESR_PON = 1, 4, 8, 16, 32, 128
# IEEE 488.2 11.2 / SCPI-99 9.1 bit values of the status byte
STB_EAV, STB_QUES, STB_MAV, STB_ESB, STB_MSS, STB_OPER = 4, 8, 16, 32, 64, 128


class ScpiError(Exception):
    """Raised by a command handler; the code goes to the error queue."""

    def __init__(self, code: int, detail: str = ""):
        self.code = code
        self.detail = detail
        super().__init__(f"{code}: {detail}")


def esr_bit_for(code: int) -> int:
    """The ESR bit an error code sets (IEEE 488.2 11.5.1.1; SCPI-99 vol. 2, 21.8)."""
    if -199 <= code <= -100:
        return ESR_CME
    if -299 <= code <= -200:
        return ESR_EXE
    if -499 <= code <= -400:
        return ESR_QYE
    return ESR_DDE


class ErrorQueue:
    """SCPI error/event queue (SCPI-99 vol. 2, 21.8.1): FIFO, bounded; on overflow the
    newest entry becomes -350."""

    def __init__(self, length: int = 10):
        self.length = max(2, int(length))
        self._q: deque = deque()

    def push(self, code: int, detail: str = "") -> None:
        text = ERRORS.get(code, "Device-specific error" if code > 0 else "Error")
        if detail:
            text = f"{text}; {detail}"
        if len(self._q) >= self.length:
            self._q[-1] = (-350, ERRORS[-350])
            return
        self._q.append((code, text))

    def pop(self) -> Tuple[int, str]:
        return self._q.popleft() if self._q else (0, ERRORS[0])

    def clear(self) -> None:
        self._q.clear()

    def __len__(self) -> int:
        return len(self._q)


def format_error(code: int, text: str) -> str:
    return f'{code},"{text}"'


def nr3(x: float) -> str:
    """A number in NR3 form (IEEE 488.2 8.7.4), e.g. ``+1.234560E-09``."""
    return f"{float(x):+.6E}"


# ---------------------------------------------------------------- header matching

def _split_pattern(pattern: str) -> List[Tuple[str, str, bool]]:
    """``"[SOURce:]VOLTage[:LEVel]"`` -> [(long, short, optional), ...]."""
    nodes = []
    for m in re.finditer(r"\[:?([A-Za-z]+):?\]|:?([A-Za-z]+)", pattern):
        word = m.group(1) or m.group(2)
        optional = m.group(1) is not None
        short = "".join(c for c in word if c.isupper())
        nodes.append((word.upper(), short or word.upper(), optional))
    return nodes


_SUFFIX1 = re.compile(r"^([A-Z]+?)1$")


class Header:
    """A compiled SCPI header pattern; ``matches(tokens)`` per SCPI-99 6.2.1."""

    def __init__(self, pattern: str):
        self.pattern = pattern
        self.nodes = _split_pattern(pattern)

    @staticmethod
    def _token_ok(token: str, node: Tuple[str, str, bool]) -> bool:
        long, short, _ = node
        if token in (long, short):
            return True
        m = _SUFFIX1.match(token)
        return bool(m) and m.group(1) in (long, short)

    def matches(self, tokens: Sequence[str]) -> bool:
        nodes = self.nodes

        def rec(i: int, j: int) -> bool:
            if j == len(tokens):
                return all(n[2] for n in nodes[i:])
            if i == len(nodes):
                return False
            if self._token_ok(tokens[j], nodes[i]) and rec(i + 1, j + 1):
                return True
            return nodes[i][2] and rec(i + 1, j)

        return rec(0, 0)


@dataclass
class Command:
    header: Header
    setter: Optional[Callable[[str], None]]
    getter: Optional[Callable[[str], str]]


# ---------------------------------------------------------------- parameters

_NUM = re.compile(r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]*)\s*$")
_MULT = {"": 1.0, "K": 1e3, "M": 1e-3, "U": 1e-6, "N": 1e-9, "P": 1e-12, "MA": 1e6}


def parse_number(text: str, unit: str = "", lo: Optional[float] = None,
                 hi: Optional[float] = None, default: Optional[float] = None) -> float:
    """A numeric parameter (SCPI-99 vol. 1, 7.7). ``unit`` is the base unit accepted as a
    suffix (``V``, ``A``, ``S``); MIN/MAX/DEF use ``lo``/``hi``/``default``."""
    t = text.strip()
    if not t:
        raise ScpiError(-109)
    key = t.upper()
    if key in ("MIN", "MINIMUM") and lo is not None:
        return lo
    if key in ("MAX", "MAXIMUM") and hi is not None:
        return hi
    if key in ("DEF", "DEFAULT") and default is not None:
        return default
    m = _NUM.match(t)
    if not m:
        raise ScpiError(-104, t[:20])
    value = float(m.group(1))
    suffix = m.group(2).upper()
    if suffix:
        u = unit.upper()
        if u and suffix.endswith(u):
            mult = suffix[: len(suffix) - len(u)]
            if mult not in _MULT or mult == "MA":
                raise ScpiError(-131, suffix)
            value *= _MULT[mult]
        else:
            raise ScpiError(-131, suffix)
    if not math.isfinite(value):
        raise ScpiError(-224)
    return value


def parse_bool(text: str) -> bool:
    """Boolean parameter (SCPI-99 vol. 1, 7.3)."""
    t = text.strip().upper()
    if t == "ON":
        return True
    if t == "OFF":
        return False
    if not t:
        raise ScpiError(-109)
    try:
        return round(float(t)) != 0
    except ValueError:
        raise ScpiError(-104, t[:20]) from None


def split_units(line: str) -> List[str]:
    """Program message units of one line, split on ``;`` outside quotes."""
    if ";" not in line:
        unit = line.strip()
        return [unit] if unit else []
    units, cur, quote = [], [], None
    for ch in line:
        if quote:
            cur.append(ch)
            if ch == quote:
                quote = None
        elif ch in "\"'":
            quote = ch
            cur.append(ch)
        elif ch == ";":
            units.append("".join(cur))
            cur = []
        else:
            cur.append(ch)
    units.append("".join(cur))
    return [u.strip() for u in units if u.strip()]


_HEADER_TOKEN = re.compile(r"^[A-Za-z][A-Za-z0-9]*$")


def parse_unit(unit: str) -> Tuple[bool, List[str], str, bool]:
    """-> (is_common, tokens, argument text, is_query). Raises -102 on bad syntax."""
    parts = unit.split(None, 1)
    head = parts[0]
    arg = parts[1] if len(parts) > 1 else ""
    query = head.endswith("?")
    if query:
        head = head[:-1]
    if head.startswith("*"):
        if not head[1:].isalpha():
            raise ScpiError(-102, unit[:20])
        return True, [head.upper()], arg, query
    if head.startswith(":"):
        head = head[1:]
    tokens = head.split(":")
    if not all(_HEADER_TOKEN.match(tk) for tk in tokens):
        raise ScpiError(-102, unit[:20])
    return False, [tk.upper() for tk in tokens], arg, query
