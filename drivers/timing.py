"""The timing budget of one sample, from the instruments' dialects, and the check that a
sample period can be met.

One sample runs in sequence: the supply setpoint write (when it changes), the ammeter
reading (integration ``nplc / line_hz`` plus the dialect's per-reading overhead plus its
reply time), the supply's voltage (and state) readback, the gauge query (reply time plus
the serial transfer time of command and reply at the port's baud rate: 10 bits per
character for 8N1, common practice, no source). Times are worst cases from the dialects.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Optional, Tuple

from .dialect import Dialect, load_dialect
from .errors import DriverError

BITS_PER_CHAR = 10  # start + 8 data + stop (8N1)


class PeriodTooShort(DriverError):
    """The sample period cannot hold one sample's worst-case exchanges."""


@dataclass(frozen=True)
class Budget:
    items: Tuple[Tuple[str, float], ...]

    @property
    def total_s(self) -> float:
        return sum(s for _, s in self.items)

    def describe(self) -> str:
        parts = ", ".join(f"{what} {s * 1000:.1f} ms" for what, s in self.items)
        return f"{self.total_s * 1000:.1f} ms per sample ({parts})"


def serial_time_s(n_chars: int, baud: float) -> float:
    return n_chars * BITS_PER_CHAR / float(baud)


def sample_budget(supply: Optional[Dialect | str] = "generic-scpi-supply",
                  ammeter: Optional[Dialect | str] = "generic-scpi-picoammeter",
                  gauge: Optional[Dialect | str] = "generic-ascii-gauge",
                  nplc: float = 1.0, line_hz: float = 50.0, readings_per_sample: int = 1,
                  gauge_baud: Optional[float] = None, read_state: bool = True) -> Budget:
    """Worst-case time of one sample, item by item, in the order they run."""
    if not (nplc > 0 and line_hz > 0 and readings_per_sample >= 1):
        raise DriverError("timing", "NPLC, line frequency and readings per sample must be positive")
    items = []
    if supply is not None:
        s = load_dialect(supply, "supply")
        reply = s.number("timing.worst_reply_s")
        items.append(("supply setpoint + *ESR?", reply))
        items.append(("supply voltage readback", reply))
        if read_state:
            items.append(("supply state", reply * 2))
    if ammeter is not None:
        a = load_dialect(ammeter, "ammeter")
        one = nplc / line_hz + a.number("timing.overhead_s", 0.0) + a.number("timing.worst_reply_s")
        items.append((f"ammeter {readings_per_sample} x ({nplc:g} NPLC at {line_hz:g} Hz)",
                      one * readings_per_sample))
    if gauge is not None:
        g = load_dialect(gauge, "gauge")
        t = g.number("timing.worst_reply_s")
        baud = gauge_baud or g.get("serial.baud")
        if baud:
            chars = len(g.command("read")) + 2 + int(g.get("serial.reply_bytes", 16))
            items.append(("gauge serial transfer", serial_time_s(chars, baud)))
        items.append(("gauge reply", t))
    return Budget(tuple(items))


def check_period(period_s: float, budget: Budget, margin: float = 1.2) -> Budget:
    """Refuse a sample period shorter than ``margin`` x the budget."""
    need = budget.total_s * margin
    if not period_s > 0 or period_s < need:
        raise PeriodTooShort("timing", f"sample period {period_s * 1000:.1f} ms cannot be met: "
                                       f"one sample needs {budget.describe()}, x{margin:g} margin "
                                       f"= {need * 1000:.1f} ms")
    return budget
