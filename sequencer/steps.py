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
regulate    a controller on ln I (``sequencer.regulate`` when present).
condition   step up on stability, back off on bursts (``sequencer.conditioning``
            when present).
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
    #: True while the runner decides voltages itself (regulate, condition)
    controls_voltage = False

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

    def on_verdict(self, verdict: Verdict, sample: Sample) -> Optional[float]:
        """Called for every verdict worse than CONTINUE. A runner that handles back-offs
        itself (condition) returns the voltage to back off to; None = engine default."""
        return None

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


def _rel_std(vals) -> float:
    n = len(vals)
    if n < 3:
        return math.inf
    mean = sum(vals) / n
    if mean <= 0:
        return math.inf
    return math.sqrt(sum((x - mean) ** 2 for x in vals) / (n - 1)) / mean


class RegulateRunner(Runner):
    """Hold the emission current at ``target_current`` by moving the voltage.

    Uses ``sequencer.regulate`` (the watchdog helper's controller) when it is importable
    and offers ``make_controller(segment, limits)``; otherwise a plain proportional step
    on ln I: ``dV = 0.5 * ln(I*/I) * V / m`` with ``m = 20`` the assumed logarithmic
    slope d ln I / d ln V of a field emitter near turn-on (common practice, no source),
    bounded by ``max_dv`` per sample and by ``[v_floor, v_ceiling]`` (a proportional
    step keeps no integral, so nothing winds up at a bound). A sample without a valid
    current keeps the voltage: regulate never chases a current it cannot see.
    """

    controls_voltage = True
    LOG_SLOPE = 20.0

    def __init__(self, seg, limits=None):
        super().__init__(seg)
        self.i_target = float(self.p["target_current"])
        self.duration = float(self.p["duration_s"])
        self.ceiling = float(self.p["v_ceiling"])
        self.floor = float(self.p.get("v_floor") or 0.0)
        self.max_dv = float(self.p.get("max_dv") or math.inf)
        self.v_next: Optional[float] = None
        self.controller = None
        try:
            from . import regulate as _reg   # noqa: WPS433 - optional until merged
            maker = getattr(_reg, "make_controller", None)
            if maker is not None:
                self.controller = maker(seg, limits)
        except ImportError:
            self.controller = None

    def target(self, v_applied, dt):
        if self.v_next is None:
            self.v_next = min(max(v_applied, self.floor), self.ceiling)
        return self.v_next

    def advance(self, sample, dt):
        super().advance(sample, dt)
        v = sample.setpoint_v
        if self.controller is not None:
            self.v_next = float(self.controller.update(sample, dt))
        elif sample.valid_current and sample.current_a > 0 and v > 0:
            err = math.log(self.i_target / sample.current_a)
            dv = 0.5 * err * v / self.LOG_SLOPE
            dv = max(-self.max_dv, min(self.max_dv, dv))
            self.v_next = min(max(v + dv, self.floor), self.ceiling)
        else:
            self.v_next = min(max(v, self.floor), self.ceiling)
        self.done = self.elapsed >= self.duration - 1e-9


class ConditionRunner(Runner):
    """Step the voltage up by ``v_step`` each time the current has been stable
    (std/mean below ``stable_fraction``) for ``stable_time`` of accepted samples; a
    back-off verdict lowers the voltage by ``backoff_v`` and counts a retry. Ends when
    ``v_target`` or ``i_target`` is reached (done), after ``timeout_s`` (done, noted) or
    after more than ``retries`` back-offs (the run ends under control).
    Uses ``sequencer.conditioning.make_controller`` when present."""

    controls_voltage = True

    def __init__(self, seg, limits=None):
        super().__init__(seg)
        p = self.p
        self.v_target = p.get("v_target")
        self.i_target = p.get("i_target")
        self.v_step = float(p["v_step"])
        self.v = float(p.get("v_start") or 0.0)
        self.stable_fraction = float(p["stable_fraction"])
        self.stable_time = float(p["stable_time"])
        self.backoff_v = float(p["backoff_v"])
        self.retries = int(p.get("retries") or 0)
        self.timeout = p.get("timeout_s")
        self.rate = float(p.get("rate") or math.inf)
        self.rejoin_rate = self.rate if math.isfinite(self.rate) else None
        self.backoffs = 0
        self.window: deque = deque()
        self.controller = None
        try:
            from . import conditioning as _cond   # noqa: WPS433 - optional until merged
            maker = getattr(_cond, "make_controller", None)
            if maker is not None:
                self.controller = maker(seg, limits)
        except ImportError:
            self.controller = None

    def target(self, v_applied, dt):
        if self.controller is not None:
            return float(self.controller.target(v_applied, dt))
        return approach(v_applied, self.v, self.rate * dt)

    def on_verdict(self, verdict, sample):
        if verdict.action is not Action.BACK_OFF:
            return None
        if self.controller is not None and hasattr(self.controller, "on_verdict"):
            return self.controller.on_verdict(verdict, sample)
        self.backoffs += 1
        self.window.clear()
        self.v = max(0.0, sample.setpoint_v - self.backoff_v)
        if self.backoffs > self.retries:
            self.done = True
            self.end_reason = (f"condition gave up after {self.backoffs} back-offs "
                               f"(retries {self.retries}) at {sample.setpoint_v:.6g} V")
        return self.v

    def advance(self, sample, dt):
        super().advance(sample, dt)
        if self.controller is not None:
            self.controller.update(sample, dt)
            self.done = bool(self.controller.done)
            self.end_reason = getattr(self.controller, "end_reason", None)
            return
        if self.i_target is not None and sample.valid_current and sample.current_a >= self.i_target:
            self.done = True
            self.notes.append({"message": f"condition reached i_target at {sample.setpoint_v:.6g} V"})
            return
        if not at(sample.setpoint_v, self.v):
            self.window.clear()
        elif sample.valid_current:
            self.window.append((sample.t, sample.current_a))
            while self.window and self.window[0][0] < sample.t - self.stable_time:
                self.window.popleft()
            span = self.window[-1][0] - self.window[0][0]
            if span >= self.stable_time - 1e-9 and _rel_std([i for _, i in self.window]) < self.stable_fraction:
                if self.v_target is not None and self.v >= self.v_target - 1e-9:
                    self.done = True
                    self.notes.append({"message": f"condition reached v_target {self.v_target:.6g} V"})
                    return
                nxt = self.v + self.v_step
                self.v = min(nxt, self.v_target) if self.v_target is not None else nxt
                self.window.clear()
        if not self.done and self.timeout is not None and self.elapsed >= self.timeout:
            self.done = True
            self.notes.append({"message": f"condition timed out at {sample.setpoint_v:.6g} V"})


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
