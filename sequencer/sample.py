"""The values that flow through a run: ``Sample`` (one sample period's readings) and
``Verdict`` (what the watchdog says about it).

All quantities are SI floats. Polarity is already applied: ``setpoint_v``, ``voltage_v``,
``gap_voltage_v``, ``current_a`` and ``supply_current_a`` are magnitudes in the
emission sense (positive when the cathode emits), whatever the rig's polarity, so every
rule and limit treats a negative-polarity rig exactly like a positive one.
"""
from __future__ import annotations

import enum
import math
from dataclasses import dataclass, field
from typing import Optional, Tuple


# Flags a Sample may carry in ``flags`` (written to the CSV status column joined by '|').
FLAG_OVERFLOW = "overflow"          # ammeter +/-9.9E37: over range (counts as an arc)
FLAG_INVALID = "invalid"            # ammeter 9.91E37 (NaN) or unparseable reading
FLAG_CC = "cc"                      # supply in constant-current mode
FLAG_SUPPLY_TRIP = "supply-trip"    # supply reports its own over-current/arc trip
FLAG_INTERLOCK_OPEN = "interlock-open"
FLAG_GAUGE_UNKNOWN = "gauge-unknown"  # filament off, over-range, no answer
FLAG_GAUGE_UNDER = "gauge-under-range"
FLAG_STALE = "stale"                # a reading older than this sample (re-used)
FLAG_MISSED = "missed-cycle"        # the previous deadline was missed


@dataclass(frozen=True)
class Sample:
    seq: int                         # 0, 1, 2 ... within the run
    t: float                         # clock time at the start of the sample (s, monotonic)
    utc: float                       # UTC seconds since the epoch at ``t``
    setpoint_v: float                # voltage asked of the supply
    voltage_v: float                 # supply's measured voltage (NaN if unread)
    gap_voltage_v: float             # voltage across the gap: V - I * R_series
    current_a: float                 # ammeter current (NaN when flagged invalid/overflow)
    supply_current_a: float = math.nan   # supply's current monitor
    range_a: float = math.nan        # ammeter range in use (upper limit, A)
    pressure_pa: float = math.nan    # gauge pressure (NaN when unknown)
    pressure_age_s: float = 0.0      # age of the pressure reading at ``t``
    t_v: float = math.nan            # clock time of the voltage reading
    t_i: float = math.nan            # clock time of the current reading
    t_p: float = math.nan            # clock time of the pressure reading
    step_index: int = 0              # index of the plan segment
    step_kind: str = ""              # kind of the plan segment (ramp, hold, sweep, ...)
    interlock_ok: Optional[bool] = None  # None when the rig has no interlock line
    flags: Tuple[str, ...] = ()

    @property
    def cc(self) -> bool:
        return FLAG_CC in self.flags

    @property
    def overflow(self) -> bool:
        return FLAG_OVERFLOW in self.flags

    @property
    def valid_current(self) -> bool:
        return (FLAG_OVERFLOW not in self.flags and FLAG_INVALID not in self.flags
                and math.isfinite(self.current_a))


class Action(enum.IntEnum):
    """Graded watchdog actions, ordered by severity (a larger value wins)."""

    CONTINUE = 0   # carry on with the plan
    HOLD = 1       # keep the voltage where it is; the plan cursor does not advance
    BACK_OFF = 2   # lower the voltage by the back-off fraction, then hold
    RAMP_DOWN = 3  # ramp to 0 V under control and end the run
    TRIP = 4       # output off at once through safe_off(), latch, end the run


@dataclass(frozen=True)
class Verdict:
    """What the watchdog concluded from one sample.

    ``rule`` names the rule, ``value`` is what it saw and ``threshold`` what it compared
    against (both SI, unit in ``unit``); ``release`` says what ends a HOLD or BACK_OFF.
    """

    action: Action
    rule: str = ""
    value: float = math.nan
    threshold: float = math.nan
    unit: str = ""
    message: str = ""
    release: str = ""

    def __str__(self) -> str:
        if self.action is Action.CONTINUE:
            return "continue"
        return (f"{self.action.name.lower()} by {self.rule}: {self.message} "
                f"(seen {self.value:.4g} {self.unit}, threshold {self.threshold:.4g} {self.unit})")


CONTINUE = Verdict(Action.CONTINUE)
