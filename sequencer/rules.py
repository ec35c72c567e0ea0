"""Every watchdog rule, in one file.

A rule is a small class with a ``name``, the ``params`` (names in ``sequencer.limits.PARAMS``)
it reads, a ``release`` text (what ends its HOLD or BACK_OFF), and ``judge(sample, ctx)``
returning a ``Verdict``. State lives in a rule only where it is real: rolling windows kept in
sample time (``Sample.t``), never wall-clock time, so the same rule gives the same verdicts
live, offline over a recorded run and in tests.

Conventions shared by all rules:

* a *value* threshold is crossed when the value is strictly above it (``>``); a *duration*
  (``..._time``) is reached when it has lasted at least that long (``>=``);
* a window of ``W`` seconds holds the samples with ``t > t_now - W`` (spike counts), or, for
  rates and spreads, the samples back to the first one at or before ``t_now - W`` and is
  *full* once such a sample exists;
* "constant voltage" means the setpoint did not change over the rule's window (relative
  1e-4); the plan's intent in ``ctx`` is used only by the regulate rules;
* BACK_OFF is an instruction given once, on the sample that calls for it; the same rule then
  returns HOLD until its release condition is met. So the engine lowers the voltage once per
  BACK_OFF verdict, never once per sample;
* rules on ln I ignore currents at or below ``judge_min_current`` (the noise floor) and
  readings flagged overflow/invalid, except where a rule says otherwise (an overflow is an
  arc and counts as a spike).

Rule order in ``RULES`` is fixed: the watchdog returns the most severe verdict, ties going to
the rule listed first.
"""
from __future__ import annotations

import math
import statistics
from collections import deque
from dataclasses import dataclass, replace
from typing import Deque, Optional, Tuple

import numpy as np

from .fnfit_online import LEVEL_SHIFT_SAMPLES, Detrender, ln_or_nan, robust_sigma
from .limits import Limits
from .sample import (CONTINUE, FLAG_GAUGE_UNDER, FLAG_GAUGE_UNKNOWN, FLAG_INTERLOCK_OPEN,
                     FLAG_STALE, FLAG_SUPPLY_TRIP, Action, Sample, Verdict)

WINDOW_MAXLEN = 200_000
"""Bound on any rolling window (samples), so a stream with broken time stamps cannot grow
memory without end."""

STEADY_REL = 1e-4
"""Relative setpoint change below which the voltage counts as constant."""

RESPONSE_FRACTION = 0.1
"""No-response rule: a current rise of this fraction counts as a response."""

RUNAWAY_Z = 3.0
"""Runaway: standard errors by which a rate must exceed its limit (a one-sided 3-sigma
margin; common practice, no source)."""

RUNAWAY_SCALES = (1, 2, 4, 8)
"""Runaway: windows judged, as multiples of runaway_time / runaway_trip_time. A rise
sustained longer is judged over the longer window too, where noise weighs less."""

RUNAWAY_NOISE_COUNT = 31
"""Runaway: recent sample-to-sample changes of ln I its noise estimate is taken over."""

SETTLED_LN = 0.1
"""Regulate drift: samples within this of ln(target current) count as settled."""


# --------------------------------------------------------------------------- context
INTENTS = ("constant", "ramping", "regulating")

_KIND_INTENT = {
    "ramp": "ramping", "sweep": "ramping", "return": "ramping", "condition": "ramping",
    "hold": "constant", "rest": "constant", "wait": "constant", "pause": "constant",
    "regulate": "regulating", "ramp-down": "ramping",
}


@dataclass(frozen=True)
class Context:
    """What the plan intends at this sample (passed with every sample).

    ``intent``: "constant" (setpoint held), "ramping" (setpoint moves by plan) or
    "regulating" (the constant-current loop moves it). ``slew_v_per_s`` is the rate the
    supply itself is programmed to slew at (inf when it steps at once). ``v_ceiling``,
    ``v_floor`` and ``target_current`` describe a regulate step (NaN otherwise).
    ``has_gauge`` is False on a rig without a pressure gauge (pressure rules then stay
    quiet).
    """

    intent: str = "constant"
    slew_v_per_s: float = math.inf
    step_kind: str = ""
    v_ceiling: float = math.nan
    v_floor: float = math.nan
    target_current: float = math.nan
    has_gauge: bool = True

    @classmethod
    def for_step(cls, step_kind: str, segment_params=None, **kw) -> "Context":
        """The context for a sample of a plan segment of kind ``step_kind``; the engine and
        ``whatif`` both build it this way so live and offline judging agree."""
        p = dict(segment_params or {})
        intent = _KIND_INTENT.get(step_kind, "constant")
        extra = {}
        if step_kind == "regulate":
            for key, name in (("v_ceiling", "v_ceiling"), ("v_floor", "v_floor"),
                              ("target_current", "target_current")):
                if p.get(key) is not None:
                    extra[name] = float(p[key])
        extra.update(kw)
        return cls(intent=intent, step_kind=step_kind, **extra)


def finite(x) -> bool:
    """A finite number (never raises)."""
    try:
        return math.isfinite(x)
    except TypeError:
        return False


def _v(sample: Sample) -> float:
    """Best voltage of a sample: the measured one, else the setpoint."""
    return sample.voltage_v if finite(sample.voltage_v) else sample.setpoint_v


def _steady(setpoints) -> bool:
    lo, hi = min(setpoints), max(setpoints)
    if not (finite(lo) and finite(hi)):
        return False
    return hi - lo <= STEADY_REL * max(abs(hi), abs(lo)) + 1e-9


def _ls_slope(ts, ys) -> float:
    """Least-squares slope dy/dt (NaN when undefined)."""
    n = len(ts)
    if n < 2:
        return math.nan
    mt = sum(ts) / n
    my = sum(ys) / n
    stt = sum((t - mt) ** 2 for t in ts)
    if not (stt > 0 and math.isfinite(stt)):
        return math.nan
    return sum((t - mt) * (y - my) for t, y in zip(ts, ys)) / stt


class Median3:
    """Running median of the last three samples, attributed to the middle sample's time:
    a single-sample spike never passes, and a monotone series comes out exact, one sample
    late. ``push`` returns (t_middle, median) or None while fewer than three are in."""

    def __init__(self):
        self.last: Deque[tuple] = deque(maxlen=3)

    def push(self, t: float, x: float):
        self.last.append((t, x))
        if len(self.last) < 3:
            return None
        return self.last[1][0], sorted(v for _, v in self.last)[1]

    def clear(self):
        self.last.clear()


class SpanWindow:
    """Samples (t, *values) back to the first at or before ``t_now - span``."""

    def __init__(self):
        self.items: Deque[tuple] = deque(maxlen=WINDOW_MAXLEN)

    def push(self, t: float, *values) -> None:
        self.items.append((t,) + values)

    def trim(self, t_now: float, span: float) -> None:
        while len(self.items) >= 2 and self.items[1][0] <= t_now - span:
            self.items.popleft()

    def full(self, t_now: float, span: float) -> bool:
        return bool(self.items) and self.items[0][0] <= t_now - span

    def column(self, k: int):
        return [it[k] for it in self.items]

    def clear(self):
        self.items.clear()


# --------------------------------------------------------------------------- base
class Rule:
    """Base of all rules. Subclasses set ``name``, ``params``, ``release`` and implement
    ``judge``. ``self.lim`` is the watchdog's present Limits (replaced on ``tighten``)."""

    name = "rule"
    params: Tuple[str, ...] = ()
    release = ""
    unit = ""

    def __init__(self, limits: Limits):
        self.lim = limits

    def judge(self, sample: Sample, ctx: Context) -> Verdict:  # pragma: no cover
        raise NotImplementedError

    def verdict(self, action: Action, value: float, threshold: float, message: str,
                unit: Optional[str] = None, release: Optional[str] = None) -> Verdict:
        return Verdict(action=action, rule=self.name, value=float(value),
                       threshold=float(threshold), unit=self.unit if unit is None else unit,
                       message=message,
                       release=self.release if release is None else release)


class Latched(Rule):
    """Base for BACK_OFF-then-HOLD rules: ``back_off`` once, then HOLD until ``quiet_until``."""

    def __init__(self, limits: Limits):
        super().__init__(limits)
        self.quiet_until = -math.inf
        self.last_hold: Optional[Verdict] = None

    def back_off(self, t: float, verdict: Verdict) -> Verdict:
        self.quiet_until = t + self.lim.backoff_hold
        self.last_hold = replace(verdict, action=Action.HOLD)
        return verdict

    def holding(self, t: float) -> Optional[Verdict]:
        if self.last_hold is not None and t < self.quiet_until:
            return self.last_hold
        self.last_hold = None
        return None


# --------------------------------------------------------------------------- trips
class Interlock(Rule):
    name = "interlock"
    release = "none: a trip latches"

    def judge(self, s, ctx):
        if s.interlock_ok is False or FLAG_INTERLOCK_OPEN in s.flags:
            return self.verdict(Action.TRIP, 0, 1, "interlock chain open", unit="")
        return CONTINUE


class SupplyState(Rule):
    """Constant-current mode or the supply's own over-current/arc trip: its own event."""

    name = "supply_state"
    params = ("supply_cc_trips", "backoff_hold")
    release = "supply back in constant-voltage mode, then backoff_hold s without it"

    def __init__(self, limits):
        super().__init__(limits)
        self.was_on = False
        self.quiet_until = -math.inf

    def judge(self, s, ctx):
        on = s.cc or FLAG_SUPPLY_TRIP in s.flags
        onset = on and not self.was_on
        self.was_on = on
        what = "supply reports its own over-current/arc trip" if FLAG_SUPPLY_TRIP in s.flags \
            else "supply entered constant-current mode"
        if on and self.lim.supply_cc_trips >= 0.5:
            return self.verdict(Action.TRIP, 1, self.lim.supply_cc_trips, what,
                                release="none: a trip latches")
        if on:
            self.quiet_until = s.t + self.lim.backoff_hold
            act = Action.BACK_OFF if onset else Action.HOLD
            return self.verdict(act, 1, self.lim.supply_cc_trips, what)
        if s.t < self.quiet_until:
            return self.verdict(Action.HOLD, 0, self.lim.supply_cc_trips,
                                "waiting after the supply left constant-current mode")
        return CONTINUE


class CurrentCeiling(Rule):
    name = "current_ceiling"
    params = ("current_max",)
    release = "none: a trip latches"
    unit = "A"

    def judge(self, s, ctx):
        seen = [x for x in (s.current_a if s.valid_current else math.nan, s.supply_current_a)
                if finite(x)]
        if seen and max(seen) > self.lim.current_max:
            return self.verdict(Action.TRIP, max(seen), self.lim.current_max,
                                "current above the ceiling")
        # An overflow does not trip here: the reading that makes an auto-ranging ammeter
        # range up is the overload value, recorded with the *new* range, so an overflow is
        # no proof of a current above its recorded range. A single one is an arc (bursts);
        # a lasting one is no reading at all (staleness).
        return CONTINUE


class PowerCeiling(Rule):
    name = "power_ceiling"
    params = ("power_max",)
    release = "none: a trip latches"
    unit = "W"

    def judge(self, s, ctx):
        v = s.gap_voltage_v if finite(s.gap_voltage_v) else _v(s)
        if s.valid_current and finite(v):
            p = abs(v) * s.current_a
            if p > self.lim.power_max:
                return self.verdict(Action.TRIP, p, self.lim.power_max,
                                    "gap power V*I above the ceiling")
        return CONTINUE


class VoltageCeiling(Rule):
    name = "voltage_ceiling"
    params = ("voltage_max",)
    release = "none: a trip latches"
    unit = "V"

    def judge(self, s, ctx):
        seen = [x for x in (s.voltage_v, s.setpoint_v) if finite(x)]
        if seen and max(seen) > self.lim.voltage_max:
            return self.verdict(Action.TRIP, max(seen), self.lim.voltage_max,
                                "voltage above the ceiling")
        return CONTINUE


class GaugeUnknown(Rule):
    name = "gauge_unknown"
    release = "none: a trip latches"
    unit = "Pa"

    def judge(self, s, ctx):
        if not ctx.has_gauge:
            return CONTINUE
        unknown = FLAG_GAUGE_UNKNOWN in s.flags or (
            not finite(s.pressure_pa) and FLAG_GAUGE_UNDER not in s.flags)
        if unknown:
            return self.verdict(Action.TRIP, math.nan, math.nan,
                                "gauge reports no valid pressure (filament off, over-range "
                                "or no answer)")
        return CONTINUE


class PressureCeiling(Rule):
    name = "pressure_ceiling"
    params = ("pressure_max",)
    release = "none: a trip latches"
    unit = "Pa"

    def judge(self, s, ctx):
        if ctx.has_gauge and finite(s.pressure_pa) and s.pressure_pa > self.lim.pressure_max:
            return self.verdict(Action.TRIP, s.pressure_pa, self.lim.pressure_max,
                                "pressure above the ceiling")
        return CONTINUE


class Staleness(Rule):
    """No fresh valid reading of current, voltage or pressure for too long."""

    name = "staleness"
    params = ("stale_time", "pressure_stale_time")
    release = "none: a trip latches"
    unit = "s"

    def __init__(self, limits):
        super().__init__(limits)
        self.last = {}  # quantity -> time of the last fresh valid reading
        self.prev_overflow = False

    def _fresh(self, key, t_now, ok, t_read, stale_flag):
        if ok:
            rt = t_read if finite(t_read) else (None if stale_flag else t_now)
            if rt is not None:
                prev = self.last.get(key)
                self.last[key] = rt if prev is None or not finite(prev) else max(prev, rt)
        self.last.setdefault(key, t_now)   # grace from the first sample on
        return t_now - self.last[key]

    def judge(self, s, ctx):
        stale = FLAG_STALE in s.flags
        # a single overflow is a reading (an arc); overflow after overflow is none
        first_overflow = s.overflow and not self.prev_overflow
        self.prev_overflow = s.overflow
        age_i = self._fresh("current", s.t, s.valid_current or first_overflow, s.t_i, stale)
        age_v = self._fresh("voltage", s.t, finite(s.voltage_v), s.t_v, stale)
        if age_i >= self.lim.stale_time:
            what = ("ammeter over range for too long" if s.overflow
                    else "no valid current reading for too long")
            return self.verdict(Action.TRIP, age_i, self.lim.stale_time, what)
        if age_v >= self.lim.stale_time:
            return self.verdict(Action.TRIP, age_v, self.lim.stale_time,
                                "no valid voltage reading for too long")
        if ctx.has_gauge:
            ok = finite(s.pressure_pa) or FLAG_GAUGE_UNDER in s.flags
            t_read = s.t_p if finite(s.t_p) else (
                s.t - s.pressure_age_s if finite(s.pressure_age_s) else math.nan)
            age_p = self._fresh("pressure", s.t, ok, t_read, stale)
            if age_p >= self.lim.pressure_stale_time:
                return self.verdict(Action.TRIP, age_p, self.lim.pressure_stale_time,
                                    "no valid pressure reading for too long")
        return CONTINUE


class SetpointFollowing(Rule):
    """The supply's measured voltage must stay within ``setpoint_tolerance`` of the band
    between its setpoint and where a supply slewing at its programmed rate would be."""

    name = "setpoint"
    params = ("setpoint_tolerance", "setpoint_time")
    release = "none: a trip latches"
    unit = "V"

    def __init__(self, limits):
        super().__init__(limits)
        self.expected = math.nan
        self.t_prev = math.nan
        self.sp_prev = math.nan
        self.off_since = None

    def judge(self, s, ctx):
        sp = s.setpoint_v
        if not finite(sp):
            return CONTINUE
        prev = self.sp_prev if finite(self.sp_prev) else sp
        if not finite(self.expected):
            self.expected = sp
        else:
            # over the last interval the supply slewed towards the setpoint written then
            dt = s.t - self.t_prev if finite(s.t) and finite(self.t_prev) else math.nan
            slew = ctx.slew_v_per_s
            if finite(slew) and finite(dt) and dt >= 0:
                step = max(-slew * dt, min(slew * dt, prev - self.expected))
                self.expected += step
            else:
                self.expected = prev
        self.t_prev, self.sp_prev = s.t, sp
        if not finite(s.voltage_v):
            return CONTINUE
        lo, hi = min(self.expected, sp, prev), max(self.expected, sp, prev)
        off = max(lo - s.voltage_v, s.voltage_v - hi, 0.0)
        if off > self.lim.setpoint_tolerance:
            if self.off_since is None:
                self.off_since = s.t
            lasted = s.t - self.off_since
            if lasted >= self.lim.setpoint_time:
                return self.verdict(Action.TRIP, off, self.lim.setpoint_tolerance,
                                    f"supply not following its setpoint for {lasted:.3g} s")
        else:
            self.off_since = None
        return CONTINUE


# --------------------------------------------------------------------------- ln I rules
class Bursts(Latched):
    """Spikes on ln I detrended against the running FN fit; an ammeter overflow is a spike.
    Spikes are counted at their onset (a spike lasting two samples is one spike)."""

    name = "bursts"
    params = ("spike_sigma", "burst_backoff_count", "burst_backoff_window",
              "burst_trip_count", "burst_trip_window", "backoff_hold", "judge_min_current")
    release = "no spike for backoff_hold s"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.detrend = Detrender()
        self.onsets: Deque[float] = deque(maxlen=WINDOW_MAXLEN)
        self.was_spike = False
        self.last_z = math.nan
        self.run_length = 0          # consecutive spike readings (not overflows)
        self.prev = None             # (setpoint, current) of the last valid reading

    def _spike(self, s: Sample) -> bool:
        if s.overflow:
            self.last_z = math.inf
            return True
        if not (s.valid_current and s.current_a > self.lim.judge_min_current):
            self.last_z = math.nan
            return False
        v = s.gap_voltage_v if finite(s.gap_voltage_v) else _v(s)
        j = self.detrend.judge(v, s.current_a)
        self.last_z = j.z
        spike = finite(j.z) and j.z > self.lim.spike_sigma
        prev = self.prev
        self.prev = (s.setpoint_v, s.current_a)
        if spike and prev is not None and _steady([prev[0], s.setpoint_v]) and \
                finite(prev[1]) and prev[1] > 0 and finite(j.sigma):
            # A spike is a transient: at the same setpoint it must also jump from the
            # reading before. A reading the fit mispredicts as much as the one before it
            # (a branch of a sweep where the cathode has changed, a fit lagging a drift)
            # is an offset of the fit, not a burst.
            if math.log(s.current_a / prev[1]) <= self.lim.spike_sigma * j.sigma:
                spike = False
        self.run_length = self.run_length + 1 if spike else 0
        if not spike:
            self.detrend = self.detrend.learn(s.t, v, s.current_a, j)
        elif self.run_length >= LEVEL_SHIFT_SAMPLES:
            # not a burst but a new level: judge what follows against it
            self.detrend = self.detrend.rebase(s.t, v, s.current_a)
            self.run_length = 0
        return spike

    def judge(self, s, ctx):
        spike = self._spike(s)
        onset = spike and not self.was_spike
        self.was_spike = spike
        if onset:
            self.onsets.append(s.t)
        if spike:
            self.quiet_until = max(self.quiet_until, s.t + self.lim.backoff_hold)
        longest = max(self.lim.burst_trip_window, self.lim.burst_backoff_window)
        while self.onsets and self.onsets[0] <= s.t - longest:
            self.onsets.popleft()
        n_trip = sum(1 for t in self.onsets if t > s.t - self.lim.burst_trip_window)
        n_back = sum(1 for t in self.onsets if t > s.t - self.lim.burst_backoff_window)
        if n_trip >= self.lim.burst_trip_count:
            return self.verdict(Action.TRIP, n_trip, self.lim.burst_trip_count,
                                f"{n_trip} spikes within {self.lim.burst_trip_window:g} s",
                                release="none: a trip latches")
        if onset and n_back >= self.lim.burst_backoff_count:
            return self.back_off(s.t, self.verdict(
                Action.BACK_OFF, n_back, self.lim.burst_backoff_count,
                f"{n_back} spikes within {self.lim.burst_backoff_window:g} s"))
        held = self.holding(s.t)
        return held if held is not None else CONTINUE


class Runaway(Rule):
    """d ln I/dt at constant voltage, on the 3-sample running median of ln I (``Median3``),
    so a single arc never reads as runaway; the cost is one sample of delay. A rate counts
    once the medians span the rule's time.

    "Sustained" is judged against the current's own noise: the least-squares rate must
    exceed the limit by ``RUNAWAY_Z`` standard errors, the error taken from the robust
    scatter of recent sample-to-sample changes of ln I at constant voltage
    (1.4826 MAD / sqrt 2). A flickering fibre (a few % per sample) then does not read as
    running away over a 5 s window, while a noiseless stream is judged at the limit itself.
    The verdict's threshold is that effective limit (rate + RUNAWAY_Z x error). And the
    rise must be sustained: the rate over each half of the window (at least two intervals
    of medians) clears the limit the same way, so a single upward step (an emitter sharpened by
    an ion hit) is a step, for ``step_up``, not a runaway.

    After a voltage change the current relaxes for a while at the new voltage (adsorbates,
    emitter temperatures and the chamber pressure follow the change); the ramp-down level
    is judged only on medians at least ``runaway_settle`` s after the last change, while
    the trip level is judged at once."""

    name = "runaway"
    params = ("runaway_rate", "runaway_time", "runaway_trip_rate", "runaway_trip_time",
              "runaway_settle", "judge_min_current")
    release = "none: a ramp-down ends the run"
    unit = "1/s"

    def __init__(self, limits):
        super().__init__(limits)
        self.win = SpanWindow()
        self.med = Median3()
        self.sp = math.nan
        self.prev_ln = math.nan
        self.diffs: Deque[float] = deque(maxlen=RUNAWAY_NOISE_COUNT)
        self.settled_from = -math.inf    # sample time from which the ramp-down level judges

    def noise(self) -> float:
        """Robust sigma of ln I per sample (0 with no history)."""
        return robust_sigma(list(self.diffs)) / math.sqrt(2.0)

    @staticmethod
    def _above(sums, a, b, rate, sigma) -> bool:
        """The LS rate over medians [a, b) exceeds ``rate`` by RUNAWAY_Z standard errors."""
        slope, stt = sums.fit(a, b)
        if not (finite(slope) and stt > 0):
            return False
        return slope > rate + RUNAWAY_Z * sigma / math.sqrt(stt)

    def judge(self, s, ctx):
        ln_i = ln_or_nan(s.current_a)
        if not (s.valid_current and s.current_a > self.lim.judge_min_current and finite(ln_i)
                and finite(s.t)):
            self.win.clear()
            self.med.clear()
            self.prev_ln = math.nan
            return CONTINUE
        if not _steady([self.sp, s.setpoint_v]):
            self.win.clear()
            self.med.clear()
            self.prev_ln = math.nan
            if finite(self.sp):              # a change, not the first reading
                settle = self.lim.runaway_settle if finite(self.lim.runaway_settle) else 0.0
                self.settled_from = s.t + max(settle, 0.0)
        if finite(self.prev_ln):
            self.diffs.append(ln_i - self.prev_ln)
        self.prev_ln = ln_i
        self.sp = s.setpoint_v
        m = self.med.push(s.t, ln_i)
        if m is None:
            return CONTINUE
        self.win.push(*m)
        t_now = m[0]
        self.win.trim(t_now, RUNAWAY_SCALES[-1] * max(self.lim.runaway_time,
                                                      self.lim.runaway_trip_time))
        sigma = self.noise()
        ts = np.fromiter((it[0] for it in self.win.items), float) - t_now
        ys = np.fromiter((it[1] for it in self.win.items), float)
        sums = _PrefixLS(ts, ys)
        settled = (ts + t_now) >= self.settled_from
        for (base_t, rate, act, what) in (
                (self.lim.runaway_trip_time, self.lim.runaway_trip_rate, Action.TRIP,
                 "current rising fast at constant voltage"),
                (self.lim.runaway_time, self.lim.runaway_rate, Action.RAMP_DOWN,
                 "sustained current rise at constant voltage")):
            if act is Action.RAMP_DOWN and not settled.all():
                if settled.sum() < 3:
                    continue  # too few settled readings to judge this level
                ts, sums = ts[settled], _PrefixLS(ts[settled], ys[settled])
            for scale in RUNAWAY_SCALES:
                v = self._judge_span(ts, sums, base_t * scale, rate, sigma, act, what)
                if v is not None:
                    return v
        return CONTINUE

    def _judge_span(self, ts, sums, limit_t, rate, sigma, act, what):
        """Judge the medians back to the first at or before -limit_t (times relative to
        the newest median), at least two intervals of them."""
        n = len(ts)
        i0 = int(np.searchsorted(ts, -limit_t, side="left"))
        if i0 > 0:
            i0 -= 1
        if n - i0 < 3 and i0 > 0:
            i0 -= 1
        if n - i0 < 3 or not ts[i0] <= -limit_t:
            return None
        slope, stt = sums.fit(i0, n)
        se = sigma / math.sqrt(stt) if stt > 0 else math.inf
        limit = rate + RUNAWAY_Z * se
        mid = i0 + (n - i0) // 2
        sustained = all(self._above(sums, a, b, rate, sigma) for a, b in ((i0, mid + 1), (mid, n)))
        if finite(slope) and finite(limit) and slope > limit and sustained:
            return self.verdict(act, slope, limit,
                                f"{what}: {slope:.3g}/s over {limit_t:g} s, limit "
                                f"{rate:g}/s + {RUNAWAY_Z:g} x noise {se:.2g}/s")
        return None


class _PrefixLS:
    """Prefix sums of 1, t, y, t^2, t*y, so a least-squares line over any index range
    costs O(1)."""

    def __init__(self, ts, ys):
        z = np.zeros(1)
        with np.errstate(all="ignore"):
            self.c = [np.concatenate((z, np.cumsum(a))) for a in
                      (np.ones_like(ts), ts, ys, ts * ts, ts * ys)]

    def fit(self, a: int, b: int):
        """(slope, sum of squared deviations of t) over indices [a, b)."""
        n, st, sy, stt, sty = (c[b] - c[a] for c in self.c)
        if n < 2:
            return math.nan, 0.0
        dtt = float(stt - st * st / n)
        dty = float(sty - st * sy / n)
        if not dtt > 0:
            return math.nan, 0.0
        return dty / dtt, dtt


class Collapse(Rule):
    """Current falling by most of its value within a few samples while the voltage was not
    lowered: the fibre fell off or its contact failed. Ends the run; sets ``collapsed``."""

    name = "collapse"
    params = ("collapse_fraction", "collapse_samples", "collapse_min_current")
    release = "none: a ramp-down ends the run"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.recent: Deque[tuple] = deque(maxlen=WINDOW_MAXLEN)
        self.collapsed = False

    def judge(self, s, ctx):
        n = max(1, int(self.lim.collapse_samples)) if finite(self.lim.collapse_samples) else 1
        verdict = CONTINUE
        i_now = s.current_a if s.valid_current else math.nan
        if finite(i_now) and self.recent:
            past = [r for r in self.recent if finite(r[0])]
            not_lowered = finite(s.setpoint_v) and all(
                s.setpoint_v >= r[1] - STEADY_REL * abs(r[1]) - 1e-9 for r in self.recent)
            if past and not_lowered:
                # The level the current fell from: n samples ago, as the median of the
                # readings n-1, n and n+1 samples ago, so that one burst sample (an
                # emitter burning with a current burst, which leaves the current a little
                # lower after) is never taken for the level.
                lo, hi = max(1, n - 1), n + 1
                lagged = past[max(0, len(past) - hi):max(1, len(past) - lo + 1)]
                i_ref = statistics.median(r[0] for r in lagged)
                if i_ref > self.lim.collapse_min_current:
                    fall = (i_ref - max(i_now, 0.0)) / i_ref
                    if fall > self.lim.collapse_fraction:
                        self.collapsed = True
                        verdict = self.verdict(
                            Action.RAMP_DOWN, fall, self.lim.collapse_fraction,
                            f"current fell by {100 * fall:.0f} % within {n} samples at "
                            "constant voltage: fibre or contact lost")
        self.recent.append((i_now, s.setpoint_v))
        while len(self.recent) > n + 1:
            self.recent.popleft()
        return verdict


class Fluctuation(Rule):
    """Relative fluctuation (std/mean of I) over minutes at constant voltage."""

    name = "fluctuation"
    params = ("fluctuation_max", "fluctuation_window", "judge_min_current")
    release = "relative fluctuation back at or below fluctuation_max"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.win = SpanWindow()

    def judge(self, s, ctx):
        if not (s.valid_current and s.current_a > self.lim.judge_min_current):
            return CONTINUE
        if self.win.items and not _steady([self.win.items[-1][2], s.setpoint_v]):
            self.win.clear()
        self.win.push(s.t, s.current_a, s.setpoint_v)
        w = self.lim.fluctuation_window
        self.win.trim(s.t, w)
        if not self.win.full(s.t, w) or len(self.win.items) < 3:
            return CONTINUE
        xs = np.fromiter((it[1] for it in self.win.items), float)
        with np.errstate(all="ignore"):      # absurd readings give inf/NaN, not a warning
            rel = float(xs.std() / xs.mean())
        if rel > self.lim.fluctuation_max:
            return self.verdict(Action.HOLD, rel, self.lim.fluctuation_max,
                                f"relative fluctuation over {w:g} s too high")
        return CONTINUE


class StepUp(Rule):
    """An upward current step at constant voltage, on the 3-sample running median."""

    name = "step_up"
    params = ("step_up_factor", "step_up_hold", "judge_min_current")
    release = "no further step for step_up_hold s"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.med = Median3()
        self.prev = None     # previous median current
        self.sp = None
        self.hold_until = -math.inf
        self.last: Optional[Verdict] = None

    def judge(self, s, ctx):
        if not (s.valid_current and s.current_a > self.lim.judge_min_current):
            self.med.clear()
            self.prev = None
        else:
            if self.sp is not None and not _steady([self.sp, s.setpoint_v]):
                self.med.clear()
                self.prev = None
            self.sp = s.setpoint_v
            m = self.med.push(s.t, s.current_a)
            if m is not None:
                if self.prev is not None:
                    ratio = m[1] / self.prev
                    if ratio > self.lim.step_up_factor:
                        self.hold_until = s.t + self.lim.step_up_hold
                        self.last = self.verdict(Action.HOLD, ratio, self.lim.step_up_factor,
                                                 "current stepped up at constant voltage")
                self.prev = m[1]
        if self.last is not None and s.t < self.hold_until:
            return self.last
        self.last = None
        return CONTINUE


class NewMaximum(Rule):
    """A current more than new_max_factor above the highest the sample has survived holds
    until it has stayed below new_max_factor times its level for new_max_confirm s; the
    highest current of that confirmation is then the new survived level. So new territory
    is entered in confirmed steps of new_max_factor. Without a history
    (``survived_max_current`` None) the first current above the noise floor is the start."""

    name = "new_maximum"
    params = ("new_max_factor", "new_max_confirm", "judge_min_current")
    release = "current confirmed for new_max_confirm s without rising further"
    unit = "A"

    def __init__(self, limits, survived: Optional[float] = None):
        super().__init__(limits)
        self.survived = survived if (survived is not None and finite(survived)
                                     and survived > 0) else None
        self.med = Median3()
        self.confirm_since = None
        self.level = math.nan
        self.peak = math.nan

    def judge(self, s, ctx):
        if not (s.valid_current and s.current_a > self.lim.judge_min_current):
            self.med.clear()
            if self.confirm_since is not None:
                return self._hold(s.t)
            return CONTINUE
        m = self.med.push(s.t, s.current_a)
        if m is None:
            return self._hold(s.t) if self.confirm_since is not None else CONTINUE
        m = m[1]
        f = self.lim.new_max_factor
        if self.confirm_since is not None:
            self.peak = max(self.peak, m)
            if m > f * self.level:          # rose again: confirm from this level
                self.level, self.confirm_since = m, s.t
            if s.t - self.confirm_since >= self.lim.new_max_confirm:
                self.survived = max(self.survived or 0.0, self.peak)
                self.confirm_since = None
                return CONTINUE
            return self._hold(s.t)
        if self.survived is None:
            self.survived = m
            return CONTINUE
        if m > f * self.survived:
            self.confirm_since, self.level, self.peak = s.t, m, m
            return self._hold(s.t)
        return CONTINUE

    def _hold(self, t):
        return self.verdict(Action.HOLD, self.level, self.lim.new_max_factor * self.survived,
                            "new current maximum; holding for confirmation")


# --------------------------------------------------------------------------- pressure
class PressureBurst(Latched):
    name = "pressure_burst"
    params = ("pressure_burst_factor", "pressure_burst_window", "backoff_hold")
    release = "pressure back below the burst level for backoff_hold s"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.win = SpanWindow()
        self.above = False

    def judge(self, s, ctx):
        if not (ctx.has_gauge and finite(s.pressure_pa) and s.pressure_pa > 0):
            held = self.holding(s.t)
            return held if held is not None else CONTINUE
        w = self.lim.pressure_burst_window
        while self.win.items and self.win.items[0][0] <= s.t - w:
            self.win.items.popleft()
        base = min(self.win.column(1)) if self.win.items else math.nan
        self.win.push(s.t, s.pressure_pa)
        ratio = s.pressure_pa / base if finite(base) else math.nan
        up = finite(ratio) and ratio > self.lim.pressure_burst_factor
        if up:
            self.quiet_until = max(self.quiet_until, s.t + self.lim.backoff_hold)
        onset, self.above = up and not self.above, up
        if onset:
            return self.back_off(s.t, self.verdict(
                Action.BACK_OFF, ratio, self.lim.pressure_burst_factor,
                f"pressure rose {ratio:.3g}x within {w:g} s"))
        held = self.holding(s.t)
        return held if held is not None else CONTINUE


class PressureRise(Rule):
    """Pressure rising with the current (emission-driven outgassing) holds."""

    name = "pressure_rise"
    params = ("pressure_rise_fraction", "pressure_rise_window", "judge_min_current")
    release = "pressure no longer rising with the current"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.win = SpanWindow()

    def judge(self, s, ctx):
        if not (ctx.has_gauge and finite(s.pressure_pa) and s.pressure_pa > 0
                and s.valid_current and s.current_a > self.lim.judge_min_current):
            return CONTINUE
        w = self.lim.pressure_rise_window
        while self.win.items and self.win.items[0][0] <= s.t - w:
            self.win.items.popleft()
        self.win.push(s.t, s.pressure_pa, s.current_a)
        t0, p0, i0 = self.win.items[0]
        rise = s.pressure_pa / p0 - 1.0
        if rise > self.lim.pressure_rise_fraction and s.current_a > i0:
            return self.verdict(Action.HOLD, rise, self.lim.pressure_rise_fraction,
                                f"pressure up {100 * rise:.0f} % with the current within "
                                f"{w:g} s")
        return CONTINUE


# --------------------------------------------------------------------------- plausibility
class NoResponse(Rule):
    """Voltage raised by no_response_volts above the last point where the current was seen
    to rise, with no current response: a cable may be off. Not judged before turn-on (no
    current above the noise floor yet) nor while regulating."""

    name = "no_response"
    params = ("no_response_volts", "judge_min_current")
    release = "the current responds (rises) or the voltage is lowered"
    unit = "V"

    def __init__(self, limits):
        super().__init__(limits)
        self.anchor = None   # (V, I)

    def judge(self, s, ctx):
        if ctx.intent == "regulating":
            self.anchor = None
            return CONTINUE
        v = _v(s)
        if not finite(v):
            return CONTINUE
        above = s.valid_current and s.current_a > self.lim.judge_min_current
        if self.anchor is not None and v < self.anchor[0]:
            self.anchor = (v, s.current_a) if above else None
        if above and (self.anchor is None or s.current_a > self.anchor[1] * (1 + RESPONSE_FRACTION)):
            self.anchor = (v, s.current_a)
        if self.anchor is not None:
            raised = v - self.anchor[0]
            if raised > self.lim.no_response_volts:
                return self.verdict(Action.HOLD, raised, self.lim.no_response_volts,
                                    "voltage raised with no current response (cable off?)")
        return CONTINUE


class MonitorDisagree(Rule):
    name = "monitor_disagree"
    params = ("monitor_disagree_fraction", "monitor_resolution")
    release = "ammeter and supply current monitor agree again"
    unit = ""

    def judge(self, s, ctx):
        if not (s.valid_current and finite(s.supply_current_a)):
            return CONTINUE
        big = max(s.current_a, s.supply_current_a)
        if big <= self.lim.monitor_resolution:
            return CONTINUE
        d = abs(s.current_a - s.supply_current_a) / big
        if d > self.lim.monitor_disagree_fraction:
            return self.verdict(Action.HOLD, d, self.lim.monitor_disagree_fraction,
                                "ammeter and supply current monitor disagree")
        return CONTINUE


# --------------------------------------------------------------------------- regulate
class RegulateDrop(Rule):
    name = "regulate_drop"
    params = ("regulate_drop_fraction", "regulate_drop_samples")
    release = "none: a ramp-down ends the run"
    unit = ""

    def __init__(self, limits):
        super().__init__(limits)
        self.recent: Deque[float] = deque(maxlen=WINDOW_MAXLEN)

    def judge(self, s, ctx):
        if ctx.intent != "regulating" or not finite(s.setpoint_v):
            self.recent.clear()
            return CONTINUE
        n = max(1, int(self.lim.regulate_drop_samples)) if finite(self.lim.regulate_drop_samples) else 1
        verdict = CONTINUE
        if self.recent:
            top = max(self.recent)
            if top > 0:
                drop = (top - s.setpoint_v) / top
                if drop > self.lim.regulate_drop_fraction:
                    verdict = self.verdict(Action.RAMP_DOWN, drop, self.lim.regulate_drop_fraction,
                                           "regulate voltage dropped suddenly (an emitter "
                                           "switched on hard)")
        self.recent.append(s.setpoint_v)
        while len(self.recent) > n:
            self.recent.popleft()
        return verdict


class RegulateCeiling(Rule):
    name = "regulate_ceiling"
    params = ("regulate_ceiling_time",)
    release = "none: a ramp-down ends the run"
    unit = "s"

    def __init__(self, limits):
        super().__init__(limits)
        self.since = None

    def judge(self, s, ctx):
        if ctx.intent != "regulating" or not finite(ctx.v_ceiling) or not finite(s.setpoint_v):
            self.since = None
            return CONTINUE
        if s.setpoint_v >= ctx.v_ceiling * (1 - STEADY_REL):
            if self.since is None:
                self.since = s.t
            sat = s.t - self.since
            if sat >= self.lim.regulate_ceiling_time:
                return self.verdict(Action.RAMP_DOWN, sat, self.lim.regulate_ceiling_time,
                                    f"regulate sat at its ceiling {ctx.v_ceiling:g} V: the "
                                    "target current is out of reach")
        else:
            self.since = None
        return CONTINUE


class RegulateDrift(Rule):
    name = "regulate_drift"
    params = ("regulate_drift_max", "regulate_drift_window")
    release = "voltage drift back at or below regulate_drift_max"
    unit = "1/s"

    def __init__(self, limits):
        super().__init__(limits)
        self.win = SpanWindow()

    def judge(self, s, ctx):
        settled = (ctx.intent == "regulating" and finite(s.setpoint_v) and s.setpoint_v > 0
                   and s.valid_current and finite(ctx.target_current) and ctx.target_current > 0
                   and s.current_a > 0
                   and abs(math.log(s.current_a / ctx.target_current)) <= SETTLED_LN)
        if not settled:
            self.win.clear()
            return CONTINUE
        w = self.lim.regulate_drift_window
        self.win.push(s.t, s.setpoint_v)
        self.win.trim(s.t, w)
        if not self.win.full(s.t, w) or len(self.win.items) < 3:
            return CONTINUE
        drift = _ls_slope(self.win.column(0), [math.log(v) for v in self.win.column(1)])
        if finite(drift) and abs(drift) > self.lim.regulate_drift_max:
            return self.verdict(Action.HOLD, abs(drift), self.lim.regulate_drift_max,
                                "regulate voltage drifting")
        return CONTINUE


# --------------------------------------------------------------------------- the list
RULES: Tuple[type, ...] = (
    Interlock, SupplyState, CurrentCeiling, PowerCeiling, VoltageCeiling, GaugeUnknown,
    PressureCeiling, Staleness, SetpointFollowing, Bursts, Runaway, Collapse,
    PressureBurst, PressureRise, StepUp, NewMaximum, Fluctuation, NoResponse,
    MonitorDisagree, RegulateDrop, RegulateCeiling, RegulateDrift,
)
"""Every rule class, in the fixed order that breaks ties between equally severe verdicts."""

RULE_NAMES: Tuple[str, ...] = tuple(r.name for r in RULES)
