"""Protocol + Rig -> Plan: the schedule of setpoint segments the engine executes.

``compile_plan`` unrolls ``repeat``, turns ``dwell`` into ``hold``, sweeps into point
lists, field levels (V/m) times the rig's gap into volts, and computes each segment's
nominal duration:

* continuous ramp: |dV| / rate; stepped ramp: number of steps * settle (settle counts
  from the moment a step is set, so the move is inside it);
* dwell, rest, regulate: their duration;
* sweep: points * (settle + samples * period) + (move to the first point + moves between
  points) / rate;
* return: |V| / rate;
* condition and wait: their timeout (an upper bound); pause: its timeout, or 0 when it
  has none (such a pause is listed by ``unattended_problems``).

It merges the limits: parameter defaults, then the protocol's ``limits``, then bounded by
the rig's hard limits (the stricter wins; nothing in a protocol loosens a rig limit). Any
step asking for more than the merged ``voltage_max`` (which is never above the rig's), or a
current above the merged ``current_max``, is refused with its line.
"""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Tuple

from .errors import Problem, ProtocolError
from .limits import PARAMS, Limits, stricter
from .plan import Plan, Segment
from .protocol import Level, Protocol, Step
from .quantities import format_si
from .rig import Rig


def merge_limits(protocol: Protocol, rig: Optional[Rig]) -> Limits:
    """Defaults, overridden by the protocol, bounded by the rig (stricter wins)."""
    values = {p.name: p.default for p in PARAMS.values()}
    values.update(protocol.limits)
    if rig is not None:
        for name, bound in rig.hard_limits().items():
            values[name] = stricter(name, values[name], bound)
    return Limits(values)


def sweep_points(lo: float, hi: float, *, step: Optional[float] = None,
                 points: Optional[int] = None, spacing: str = "linear",
                 direction: str = "up", repeats: int = 1) -> Tuple[float, ...]:
    """The voltages of a sweep in execution order.

    linear: lo, lo + step, ..., hi (or ``points`` evenly spaced); inverse: evenly spaced in
    1/V from 1/lo to 1/hi (equal spacing on a Fowler-Nordheim plot), returned in
    ascending V. direction up: ascending; down: descending; up-down: ascending then back
    down without repeating the top point. ``repeats`` concatenates whole passes.
    """
    if spacing == "inverse":
        n = int(points)
        a, b = 1.0 / lo, 1.0 / hi
        pts = [1.0 / (a + (b - a) * i / (n - 1)) for i in range(n)]
        pts[0], pts[-1] = lo, hi
    elif step is not None:
        n = int(round((hi - lo) / step))
        pts = [lo + i * step for i in range(n + 1)]
        pts[-1] = hi
    else:
        n = int(points)
        pts = [lo + (hi - lo) * i / (n - 1) for i in range(n)]
    if direction == "down":
        one = pts[::-1]
    elif direction == "up-down":
        one = pts + pts[-2::-1]
    else:
        one = pts
    return tuple(one * int(repeats))


class _Compiler:
    def __init__(self, protocol: Protocol, rig: Rig):
        self.protocol = protocol
        self.rig = rig
        self.limits = merge_limits(protocol, rig)
        self.problems: List[Problem] = []
        self.segments: List[Segment] = []
        self.v = 0.0   # nominal voltage where the previous segment ended

    # -- helpers -----------------------------------------------------------------------
    def problem(self, step: Step, message: str, hint: str = "") -> None:
        self.problems.append(Problem(self.protocol.file, step.line, step.col, message, hint))

    def volts(self, step: Step, key: str) -> Optional[float]:
        level = step.params.get(key)
        if level is None:
            return None
        assert isinstance(level, Level)
        v = level.volts(self.rig.gap_m)
        if v is None:
            self.problem(step, f"{step.kind}: {key} {level.text!r} is a field, but the rig file "
                               f"gives no gap", "add gap: \"500 um\" to the rig file, or "
                                                "give the level in volts")
            return None
        return v

    def check_voltage(self, step: Step, v: Optional[float], what: str) -> None:
        if v is None:
            return
        vmax = self.limits.voltage_max
        if v > vmax * (1 + 1e-12):
            if v > self.rig.voltage_max * (1 + 1e-12):
                whose = f"the rig's maximum voltage {format_si(self.rig.voltage_max, 'V')}"
                hint = f"the rig file ({self.rig.file or 'rig'}) allows at most that"
            else:
                whose = f"the protocol's voltage_max {format_si(vmax, 'V')}"
                hint = "raise limits: voltage_max (up to the rig's), or lower the step"
            self.problem(step, f"{step.kind}: {what} {format_si(v, 'V')} is above {whose}", hint)

    def check_current(self, step: Step, key: str) -> None:
        i = step.params.get(key)
        if i is not None and i > self.limits.current_max * (1 + 1e-12):
            self.problem(step, f"{step.kind}: {key} {format_si(i, 'A')} is above the current "
                               f"ceiling {format_si(self.limits.current_max, 'A')}",
                         "the watchdog would trip; lower it or raise limits: current_max "
                         "(never above the rig's)")

    def rate(self, step: Step, key: str = "rate") -> float:
        """The step's rate, or the slew limit when it gives none. A rate above the slew
        limit is refused: the limiter would cap it and the plan's durations would lie."""
        r = step.params.get(key)
        slew = float(self.limits.slew_max)
        if r is not None and r > slew * (1 + 1e-12):
            self.problem(step, f"{step.kind}: {key} {format_si(r, 'V/s')} is faster than the "
                               f"slew limit {format_si(slew, 'V/s')}",
                         "lower the rate, or raise limits: slew_max")
        return float(r) if r is not None else slew

    def add(self, step: Step, kind: str, label: str, duration: float, v_start: float,
            v_end: float, v_peak: float, params: Dict[str, Any]) -> None:
        period = step.period if step.period is not None else self.protocol.sample_period
        text = label + (f" '{step.label}'" if step.label else "")
        self.segments.append(Segment(
            index=len(self.segments), kind=kind, label=text, source_line=step.line,
            sample_period=float(period), nominal_duration=float(duration),
            v_start=float(v_start), v_end=float(v_end), v_peak=float(v_peak), params=params))
        self.v = float(v_end)

    # -- steps -------------------------------------------------------------------------
    def steps(self, steps, path: str, reps: str) -> None:
        for i, step in enumerate(steps, 1):
            where = f"{path}{i}"
            if step.kind == "repeat":
                n = step.params["times"]
                for k in range(1, n + 1):
                    self.steps(step.steps, f"{where}.", f"{reps} (repeat {k}/{n})")
                    if len(self.segments) > 100_000:
                        return
                continue
            getattr(self, "step_" + step.kind)(step, f"{where} {step.kind}{reps}")

    def step_ramp(self, step: Step, label: str) -> None:
        p = step.params
        v_to = self.volts(step, "to")
        self.check_voltage(step, v_to, "target")
        self.check_current(step, "until_current")
        if v_to is None:
            return
        dv = abs(v_to - self.v)
        step_v = self.volts(step, "step")
        rate = self.rate(step)
        if step_v is not None:
            n = math.ceil(dv / step_v - 1e-9) if dv > 0 else 0
            duration = n * p["settle"]
        else:
            duration = dv / rate
        self.add(step, "ramp", label, duration, self.v, v_to, max(self.v, v_to), {
            "v_from": self.v, "v_to": v_to, "rate": rate, "step_v": step_v,
            "settle_s": p["settle"], "until_current": p["until_current"]})

    def step_dwell(self, step: Step, label: str) -> None:
        d = step.params["duration"]
        self.add(step, "hold", label, d, self.v, self.v, self.v, {"v": self.v, "duration_s": d})

    def step_sweep(self, step: Step, label: str) -> None:
        p = step.params
        lo, hi = self.volts(step, "start"), self.volts(step, "stop")
        st = self.volts(step, "step") if p.get("step") is not None else None
        if lo is None or hi is None or (p.get("step") is not None and st is None):
            return
        if not hi > lo:
            self.problem(step, f"sweep: stop {format_si(hi, 'V')} is not above start "
                               f"{format_si(lo, 'V')}", "start is the low end")
            return
        if st is not None:
            n = (hi - lo) / st
            if abs(n - round(n)) > 1e-6 * max(1.0, n) or round(n) < 1:
                self.problem(step, f"sweep: step {format_si(st, 'V')} does not fit the range "
                                   f"{format_si(lo, 'V')} to {format_si(hi, 'V')}",
                             "choose a step that divides stop - start, or give points")
                return
        self.check_voltage(step, hi, "stop")
        pts = sweep_points(lo, hi, step=st, points=p.get("points"), spacing=p["spacing"],
                           direction=p["direction"], repeats=p["repeats"])
        rate = self.rate(step)
        period = step.period if step.period is not None else self.protocol.sample_period
        moves = abs(pts[0] - self.v) + sum(abs(b - a) for a, b in zip(pts, pts[1:]))
        duration = len(pts) * (p["settle"] + p["samples"] * period) + moves / rate
        self.add(step, "sweep", label, duration, self.v, pts[-1], max([self.v, *pts]), {
            "points": pts, "settle_s": p["settle"], "samples_per_point": p["samples"],
            "rate": rate})

    def step_return(self, step: Step, label: str) -> None:
        rate = self.rate(step)
        self.add(step, "return", label, self.v / rate, self.v, 0.0, self.v,
                 {"v_from": self.v, "v_to": 0.0, "rate": rate})

    def step_rest(self, step: Step, label: str) -> None:
        if self.v > 0:
            self.problem(step, f"rest starts at {format_si(self.v, 'V')}; it holds 0 V",
                         "put a return step before it")
            return
        d = step.params["duration"]
        self.add(step, "rest", label, d, 0.0, 0.0, 0.0, {"duration_s": d})

    def step_regulate(self, step: Step, label: str) -> None:
        p = step.params
        ceiling, floor = self.volts(step, "ceiling"), self.volts(step, "floor")
        self.check_voltage(step, ceiling, "ceiling")
        self.check_current(step, "current")
        if ceiling is None or floor is None:
            return
        if floor >= ceiling:
            self.problem(step, f"regulate: floor {format_si(floor, 'V')} is not below the "
                               f"ceiling {format_si(ceiling, 'V')}", "")
            return
        if self.v > ceiling:
            self.problem(step, f"regulate starts at {format_si(self.v, 'V')}, above its "
                               f"ceiling {format_si(ceiling, 'V')}",
                         "ramp down first or raise the ceiling")
            return
        # the loop may end anywhere up to its ceiling: plan the worst case onwards
        self.add(step, "regulate", label, p["duration"], self.v, ceiling,
                 max(self.v, ceiling), {
                     "target_current": p["current"], "duration_s": p["duration"],
                     "v_ceiling": ceiling, "v_floor": floor, "max_dv": p["max_step"]})

    def step_condition(self, step: Step, label: str) -> None:
        p = step.params
        v_target = self.volts(step, "to")
        ceiling = self.volts(step, "ceiling") if p.get("ceiling") is not None else v_target
        start = self.volts(step, "start") if p.get("start") is not None else self.v
        self.check_voltage(step, v_target, "target")
        if p.get("ceiling") is not None:
            self.check_voltage(step, ceiling, "ceiling")
        self.check_voltage(step, start, "start")
        self.check_current(step, "current")
        if ceiling is None or start is None or (p.get("to") is not None and v_target is None):
            return
        if v_target is not None and ceiling is not None and v_target > ceiling:
            self.problem(step, f"condition: target {format_si(v_target, 'V')} is above its "
                               f"ceiling {format_si(ceiling, 'V')}", "")
            return
        if start > ceiling:
            self.problem(step, f"condition: start {format_si(start, 'V')} is above its "
                               f"ceiling {format_si(ceiling, 'V')}", "")
            return
        end = v_target if v_target is not None else ceiling
        self.add(step, "condition", label, p["timeout"], self.v, end,
                 max(self.v, start, end, ceiling), {
                     "v_target": v_target, "i_target": p["current"], "v_step": p["step"],
                     "v_start": start, "v_ceiling": ceiling, "stable_fraction": p["stable"],
                     "stable_time": p["stable_time"], "backoff_v": p["backoff"],
                     "retries": p["retries"], "timeout_s": p["timeout"],
                     "rate": self.rate(step)})

    def step_wait(self, step: Step, label: str) -> None:
        p = step.params
        if p.get("pressure_below") is not None:
            until, value, window = "pressure_below", p["pressure_below"], None
        else:
            until, value, window = "current_stable", p["current_stable"], p["window"]
        self.add(step, "wait", label, p["timeout"], self.v, self.v, self.v, {
            "until": until, "value": value, "window_s": window, "timeout_s": p["timeout"]})

    def step_pause(self, step: Step, label: str) -> None:
        t = step.params.get("timeout")
        self.add(step, "pause", label, t or 0.0, self.v, self.v, self.v,
                 {"timeout_s": t, "message": step.params.get("message") or ""})


def compile_plan(protocol: Protocol, rig: Rig) -> Plan:
    """The Plan of ``protocol`` on ``rig``; raises one ``ProtocolError`` listing every step
    that cannot run on this rig."""
    c = _Compiler(protocol, rig)
    c.steps(protocol.steps, "", "")
    if len(c.segments) > 100_000:
        c.problems.append(Problem(protocol.file, protocol.line, 1,
                                  "the protocol unrolls to more than 100000 segments",
                                  "check the repeat counts"))
    if c.problems:
        unique = {(p.line, p.col, p.message): p for p in c.problems}   # repeats report once
        raise ProtocolError([unique[k] for k in sorted(unique)])
    return Plan(name=protocol.name, segments=tuple(c.segments), limits=c.limits,
                sample_period=protocol.sample_period, sample_id=rig.sample_id,
                polarity=rig.polarity, notes=protocol.notes)


TIMING_MARGIN = 1.2   # the sample period must hold 1.2 x the worst-case budget (common practice)


def attach_timing_budget(plan: Plan, rig: Rig, file: str = "") -> Plan:
    """The plan with ``timing_budget`` filled in from the drivers layer: the worst-case
    time of one sample's exchanges on this rig's instruments, item by item, plus "total".
    A segment whose sample period cannot hold ``TIMING_MARGIN`` x that total is refused
    (``ProtocolError`` at its line). Returns the plan unchanged if the drivers layer offers
    no budget."""
    import dataclasses
    try:
        from drivers import timing
    except ImportError:
        return plan
    if not hasattr(timing, "sample_budget"):
        return plan
    from drivers.dialect import DEFAULT_DIALECTS

    def dialect(role):
        inst = rig.instrument_for(role)
        if inst is None:
            return None
        return inst.dialect or DEFAULT_DIALECTS[role]

    gauge = rig.instrument_for("gauge")
    baud = None
    if gauge is not None and "baud=" in gauge.address:
        try:
            baud = float(gauge.address.split("baud=")[1].split("&")[0])
        except ValueError:
            baud = None
    try:
        budget = timing.sample_budget(supply=dialect("supply"), ammeter=dialect("ammeter"),
                                      gauge=dialect("gauge"), gauge_baud=baud)
    except Exception as exc:   # a dialect the drivers refuse: report it, never crash
        raise ProtocolError(Problem(rig.file, 1, 1, f"timing budget: {exc}", "")) from None
    total = float(budget.total_s)
    need = total * TIMING_MARGIN
    problems = []
    seen = set()
    for s in plan.segments:
        if s.sample_period < need and s.source_line not in seen:
            seen.add(s.source_line)
            problems.append(Problem(
                file or "protocol", s.source_line, 1,
                f"{s.label}: sample period {s.sample_period:g} s cannot be met on this rig: "
                f"one sample takes up to {total * 1000:.1f} ms ({TIMING_MARGIN:g} x = "
                f"{need * 1000:.1f} ms)", "lengthen sample_period (or the step's period)"))
    if problems:
        raise ProtocolError(problems)
    items = {str(k): float(v) for k, v in budget.items}
    items["total"] = total
    return dataclasses.replace(plan, timing_budget=items)


def unattended_problems(plan: Plan, file: str = "") -> List[Problem]:
    """What ``--unattended`` refuses: pauses that wait for an operator with no timeout."""
    out = []
    for s in plan.segments:
        if s.kind == "pause" and s.params.get("timeout_s") is None:
            out.append(Problem(file, s.source_line, 1,
                               f"{s.label}: a pause without a timeout waits for an operator, "
                               "and an unattended run has none",
                               'give it a timeout, e.g. timeout: "30 min"'))
    return out
