"""The timing budget of one sample, from the instruments' dialects, and the check that a
sample period can be met.

One sample runs in sequence: the supply setpoint write (when it changes), the ammeter
reading (integration ``nplc / line_hz`` plus the dialect's per-reading overhead plus its
reply time), the supply's voltage (and state) readback, the gauge query (reply time plus
the serial transfer time of command and reply at the port's baud rate: 10 bits per
character for 8N1, common practice, no source). Times are worst cases from the dialects.

(An auto-range overload is re-read up to twice in the same sample; that rare case is not
in the budget: a sample that overruns its deadline is logged as a missed cycle.)
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


def sample_budget(plan=None, rig=None, **kw):
    """The hook ``fieldrun plan`` calls: ``sample_budget(plan, rig)`` returns a mapping of
    named parts to seconds with a ``"total"`` entry, and raises ``PeriodTooShort`` when a
    segment's sample period cannot hold one sample. Called with dialects (or nothing)
    instead, it is ``dialect_budget(...)`` and returns a ``Budget``."""
    if plan is not None and hasattr(plan, "segments") and rig is not None:
        budget = rig_budget(rig)
        periods = [p for p in [getattr(plan, "sample_period", None)]
                   + [getattr(s, "sample_period", None) for s in plan.segments] if p]
        if periods:
            check_period(min(periods), budget)
        out = {what: s for what, s in budget.items}
        out["total"] = budget.total_s
        return out
    if plan is not None:
        kw.setdefault("supply", plan)
    if rig is not None:
        kw.setdefault("ammeter", rig)
    return dialect_budget(**kw)


def rig_budget(rig) -> Budget:
    """Budget from a rig's instruments: each one's dialect (default per role) and, for the
    ammeter, ``options: {nplc:, line_hz:, readings_per_sample:}``; the gauge's baud rate
    from a ``serial:...?baud=`` address (in-process and VISA gauges have no serial time)."""
    from .dialect import DEFAULT_DIALECTS
    import re
    chosen = {}
    for inst in getattr(rig, "instruments", ()):
        for role in getattr(inst, "roles", ()):
            if role in DEFAULT_DIALECTS and role not in chosen:
                chosen[role] = inst
    kw: dict = {}
    for role in DEFAULT_DIALECTS:
        inst = chosen.get(role)
        kw[role] = (inst.dialect or DEFAULT_DIALECTS[role]) if inst is not None else None
    am = chosen.get("ammeter")
    opts = dict(getattr(am, "options", None) or {}) if am is not None else {}
    g = chosen.get("gauge")
    baud = None
    serial_gauge = False
    if g is not None:
        m = re.search(r"[?&]baud=(\d+)", g.address)
        baud = float(m.group(1)) if m else None
        serial_gauge = g.address.startswith("serial:") or "://" in g.address
    return dialect_budget(supply=kw["supply"], ammeter=kw["ammeter"], gauge=kw["gauge"],
                          nplc=float(opts.get("nplc", 1.0)), line_hz=float(opts.get("line_hz", 50.0)),
                          readings_per_sample=int(opts.get("readings_per_sample", 1)),
                          gauge_baud=baud, gauge_serial=serial_gauge)


def dialect_budget(supply: Optional[Dialect | str] = "generic-scpi-supply",
                  ammeter: Optional[Dialect | str] = "generic-scpi-picoammeter",
                  gauge: Optional[Dialect | str] = "generic-ascii-gauge",
                  nplc: float = 1.0, line_hz: float = 50.0, readings_per_sample: int = 1,
                  gauge_baud: Optional[float] = None, read_state: bool = True,
                  gauge_serial: bool = True) -> Budget:
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
        if baud and gauge_serial:
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
