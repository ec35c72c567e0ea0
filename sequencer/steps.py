"""How each segment kind of a Plan executes, one sample at a time.

A *runner* turns one ``Segment`` into setpoints. The engine asks it, every sample, for the
voltage it wants next (``target``), and tells it about each accepted sample
(``advance``). The plan advances on *progress*, never on clock time: ``advance`` is called
only for samples the watchdog let through (verdict CONTINUE), and every runner measures its
progress from the setpoint actually applied. So after a hold the run simply carries on from
where it stood, and after a back-off a ramp climbs again from the lower voltage at the
protocol's rate: nothing ever jumps to where the ramp "would be" by now.

Runners hold no instrument and no clock; they are plain state machines over Samples, so
they are tested without a rig. Magnitudes throughout (polarity is the engine's business).

==========  ====================================================================
ramp        continuous: approach ``v_to`` at ``rate``; stepped: levels ``step_v``
            apart, each held ``settle_s`` of accepted samples; ``until_current``
            ends either early when a valid current reaches it.
hold        go to ``v`` and stay ``duration_s`` of accepted samples there.
sweep       each point in turn at ``rate``; ``settle_s`` then ``samples_per_point``
            accepted samples at it.
return      approach ``v_to`` (0 V) at ``rate``.
rest        0 V (output on) for ``duration_s``.
regulate    the constant-current loop of ``sequencer.regulate``, fed every sample
            with its verdict.
condition   the state machine of ``sequencer.conditioning``: step up on stability,
            back off on bursts, fed every sample with its verdict.
wait        keep the voltage until ``pressure_below`` or ``current_stable``;
            a timeout ends the run under control (it is a gate, not a delay).
pause       keep the voltage until the operator resumes (``fieldrun ctl RUN resume``);
            a timeout continues the run; replays skip pauses (logged).
==========  ====================================================================
"""
from __future__ import annotations

import math
from collections import deque
from typing import Optional

from .plan import Segment
from .sample import Sample, Verdict, Action

#: two setpoints closer than this are "the same voltage" (V)
V_EPS = 1e-6


def approach(v: float, target: float, max_step: float) -> float:
    """``v`` moved toward ``target`` by at most ``max_step``."""
    if target > v:
        return min(target, v + max_step)
    return max(target, v - max_step)


def at(v: float, target: float) -> bool:
    return abs(v - target) <= V_EPS + 1e-9 * abs(target)


class Runner:
    """Base runner. Subclasses set ``done`` and may set ``end_reason`` (the run must
    stop under control, for example a ``wait`` that timed out) or append ``notes``
    (dicts recorded as ``note`` events by the engine)."""

    #: the protocol's rate used to climb back after a back-off (V/s); None = slew limit
    rejoin_rate: Optional[float] = None
    #: True while the runner decides voltages itself (regulate, condition): the engine
    #: then calls ``step(sample, verdict, dt)`` on every sample instead of ``advance``
    controls_voltage = False
    #: True when the runner applies a BACK_OFF itself (condition's backoff_v)
    handles_backoff = False

    def __init__(self, seg: Segment):
        self.seg = seg
        self.p = seg.params
        self.done = False
        self.end_reason: Optional[str] = None
        self.notes: list = []
        self.elapsed = 0.0     # accepted time in this segment (s)

    def begin(self, v_applied: float, t: float) -> None:
        self.t_begin = t

    def target(self, v_applied: float, dt: float) -> float:
        return v_applied

    def advance(self, sample: Sample, dt: float) -> None:
        self.elapsed += dt

    def on_resume(self) -> None:
        """The operator said resume (only a pause cares)."""

    def wall_time(self, t: float) -> float:
        return t - getattr(self, "t_begin", t)


class RampRunner(Runner):
    def __init__(self, seg: Segment):
        super().__init__(seg)
        self.v_to = float(self.p["v_to"])
        self.v_from = float(self.p.get("v_from") if self.p.get("v_from") is not None else seg.v_start)
        self.rate = float(self.p["rate"])
        self.rejoin_rate = self.rate
        self.step_v = self.p.get("step_v")
        self.settle = float(self.p.get("settle_s") or 0.0)
        self.until = self.p.get("until_current")
        self.levels = None
        if self.step_v:
            step = abs(float(self.step_v))
            n = max(1, int(math.ceil(abs(self.v_to - self.v_from) / step - 1e-9)))
            sign = 1.0 if self.v_to >= self.v_from else -1.0
            self.levels = [self.v_from + sign * step * k for k in range(1, n)] + [self.v_to]
        self.i = 0
        self.settled = 0.0

    def target(self, v_applied, dt):
        if self.levels is None:
            return approach(v_applied, self.v_to, self.rate * dt)
        return self.levels[self.i]   # a jump (the slew limiter bounds it)

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if self.until is not None and sample.valid_current and sample.current_a >= self.until:
            self.done = True
            self.notes.append({"message": f"until_current reached: {sample.current_a:.4g} A "
                                          f">= {self.until:.4g} A at {sample.setpoint_v:.6g} V",
                               "value": sample.current_a, "threshold": self.until})
            return
        if self.levels is None:
            self.done = at(sample.setpoint_v, self.v_to)
            return
        if at(sample.setpoint_v, self.levels[self.i]):
            self.settled += dt
            if self.settled >= self.settle - 1e-9:
                if self.i == len(self.levels) - 1:
                    self.done = True
                else:
                    self.i += 1
                    self.settled = 0.0


class HoldRunner(Runner):
    def __init__(self, seg):
        super().__init__(seg)
        self.v = float(self.p["v"])
        self.duration = float(self.p["duration_s"])
        self.at_v = 0.0

    def begin(self, v_applied, t):
        # A dwell holds the voltage present when it starts (plan voltages are nominal):
        # after a ramp stopped early by until_current, a condition step, or a back-off,
        # it must never climb on toward the plan's nominal level.
        super().begin(v_applied, t)
        self.v = float(v_applied)

    def target(self, v_applied, dt):
        return self.v

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if at(sample.setpoint_v, self.v):
            self.at_v += dt
        self.done = self.at_v >= self.duration - 1e-9


class SweepRunner(Runner):
    def __init__(self, seg):
        super().__init__(seg)
        self.points = [float(v) for v in self.p["points"]]
        self.rate = float(self.p["rate"])
        self.rejoin_rate = self.rate
        self.settle = float(self.p.get("settle_s") or 0.0)
        self.per_point = int(self.p.get("samples_per_point") or 1)
        self.i = 0
        self.settled = 0.0
        self.measured = 0
        self.done = not self.points

    def target(self, v_applied, dt):
        return approach(v_applied, self.points[self.i], self.rate * dt)

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if not at(sample.setpoint_v, self.points[self.i]):
            return
        if self.settled < self.settle - 1e-9:
            self.settled += dt
            return
        self.measured += 1
        if self.measured >= self.per_point:
            self.i += 1
            self.settled = 0.0
            self.measured = 0
            self.done = self.i >= len(self.points)


class ReturnRunner(Runner):
    def __init__(self, seg):
        super().__init__(seg)
        self.v_to = float(self.p.get("v_to") or 0.0)
        self.rate = float(self.p["rate"])

    def target(self, v_applied, dt):
        return approach(v_applied, self.v_to, self.rate * dt)

    def advance(self, sample, dt):
        super().advance(sample, dt)
        self.done = at(sample.setpoint_v, self.v_to)


class RestRunner(Runner):
    def __init__(self, seg):
        super().__init__(seg)
        self.duration = float(self.p["duration_s"])
        self.at_zero = 0.0

    def target(self, v_applied, dt):
        return 0.0

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if at(sample.setpoint_v, 0.0):
            self.at_zero += dt
        self.done = self.at_zero >= self.duration - 1e-9


class WaitRunner(Runner):
    """Keeps the voltage. ``pressure_below``: a valid pressure under ``value``.
    ``current_stable``: relative std/mean of the valid currents of the last ``window_s``
    under ``value``. Counts wall (clock) time for the timeout, since a wait is a gate."""

    def __init__(self, seg):
        super().__init__(seg)
        self.until = self.p["until"]
        self.value = float(self.p["value"])
        self.window = float(self.p.get("window_s") or 0.0)
        self.timeout = self.p.get("timeout_s")
        self.hist: deque = deque()

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if self.until == "pressure_below":
            if math.isfinite(sample.pressure_pa) and sample.pressure_pa < self.value:
                self.done = True
                self.notes.append({"message": f"pressure {sample.pressure_pa:.3g} Pa below "
                                              f"{self.value:.3g} Pa"})
        else:
            if sample.valid_current:
                self.hist.append((sample.t, sample.current_a))
            while self.hist and self.hist[0][0] < sample.t - self.window:
                self.hist.popleft()
            span = self.hist[-1][0] - self.hist[0][0] if len(self.hist) > 1 else 0.0
            if span >= self.window - 1e-9 * max(1.0, self.window) and len(self.hist) >= 3:
                vals = [i for _, i in self.hist]
                mean = sum(vals) / len(vals)
                if mean > 0:
                    sd = math.sqrt(sum((x - mean) ** 2 for x in vals) / (len(vals) - 1))
                    if sd / mean < self.value:
                        self.done = True
                        self.notes.append({"message": f"current stable: std/mean {sd / mean:.3g} "
                                                      f"< {self.value:.3g} over {self.window:g} s"})
        if not self.done and self.timeout is not None and self.wall_time(sample.t) >= self.timeout:
            self.done = True
            self.end_reason = f"wait ({self.until}) timed out after {self.timeout:g} s"


class PauseRunner(Runner):
    def __init__(self, seg, skip: bool = False):
        super().__init__(seg)
        self.timeout = self.p.get("timeout_s")
        self.message = self.p.get("message") or "paused"
        if skip:
            self.done = True
            self.notes.append({"message": f"pause skipped (replay): {self.message}"})

    def on_resume(self):
        self.done = True
        self.notes.append({"message": "resumed by the operator"})

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if not self.done and self.timeout is not None and self.wall_time(sample.t) >= self.timeout:
            self.done = True
            self.notes.append({"message": f"pause timed out after {self.timeout:g} s; continuing"})


class RegulateRunner(Runner):
    """Hold the emission current at ``target_current`` by moving the voltage, with the
    watchdog helper's loop (``sequencer.regulate.next_voltage``: gain scheduled on the
    local FN slope, per-sample limit, floor, ceiling, anti-windup). The controller sees
    every sample with its verdict (it freezes itself on a hold and never chases a
    collapsed current); the step's duration counts accepted samples only."""

    controls_voltage = True

    def __init__(self, seg, limits=None):
        super().__init__(seg)
        from . import regulate as reg
        self._reg = reg
        self.duration = float(self.p["duration_s"])
        self.state = None

    def begin(self, v_applied, t):
        super().begin(v_applied, t)
        p = self.p
        self.state = self._reg.start(float(p["target_current"]), v_applied,
                                     float(p.get("v_floor") or 0.0), float(p["v_ceiling"]),
                                     float(p.get("max_dv") or math.inf))

    def target(self, v_applied, dt):
        return self.state.v

    def step(self, sample: Sample, verdict: Verdict, dt: float) -> None:
        _, self.state = self._reg.next_voltage(self.state, sample, verdict)
        if verdict.action is Action.CONTINUE:
            self.elapsed += dt
        self.done = self.elapsed >= self.duration - 1e-9

    def rebase(self, v: float) -> None:
        """The engine backed off: the loop goes on from the lower voltage."""
        from dataclasses import replace
        self.state = replace(self.state, v=v)


class ConditionRunner(Runner):
    """Raise the voltage in steps on stability, back off on bursts, with the watchdog
    helper's state machine (``sequencer.conditioning.condition_step``), which sees every
    sample with its verdict and applies a BACK_OFF as its own ``backoff_v``. The level is
    approached at the step's ``rate``. Ends: ``done`` (target reached), ``timeout`` and
    ``ceiling`` (noted, the plan goes on), ``exhausted`` (no retries left) and
    ``collapsed`` (the run ends under control)."""

    controls_voltage = True
    handles_backoff = True

    def __init__(self, seg, limits=None):
        super().__init__(seg)
        from . import conditioning as cond
        self._cond = cond
        self.rate = float(self.p.get("rate") or math.inf)
        self.rejoin_rate = self.rate if math.isfinite(self.rate) else None
        self.state = None
        self.v_ceiling = math.inf

    def begin(self, v_applied, t):
        super().begin(v_applied, t)
        self.state = self._cond.start(self.p, v_ceiling=self.v_ceiling)

    def target(self, v_applied, dt):
        return approach(v_applied, self.state.level, self.rate * dt)

    def step(self, sample: Sample, verdict: Verdict, dt: float) -> None:
        _, self.state = self._cond.condition_step(self.state, sample, verdict)
        if verdict.action is Action.CONTINUE:
            self.elapsed += dt
        st = self.state.status
        if st == self._cond.RUNNING:
            return
        self.done = True
        msg = (f"condition {st} at {sample.setpoint_v:.6g} V after {self.state.advances} "
               f"advances and {self.state.backoffs} back-offs")
        if st in (self._cond.EXHAUSTED, self._cond.COLLAPSED):
            self.end_reason = msg
        else:
            self.notes.append({"message": msg})


def make_runner(seg: Segment, limits=None, skip_pauses: bool = False) -> Runner:
    kinds = {
        "ramp": RampRunner, "hold": HoldRunner, "sweep": SweepRunner, "return": ReturnRunner,
        "rest": RestRunner, "wait": WaitRunner,
    }
    if seg.kind in kinds:
        return kinds[seg.kind](seg)
    if seg.kind == "pause":
        return PauseRunner(seg, skip=skip_pauses)
    if seg.kind == "regulate":
        return RegulateRunner(seg, limits)
    if seg.kind == "condition":
        return ConditionRunner(seg, limits)
    raise ValueError(f"unknown segment kind {seg.kind!r}")
