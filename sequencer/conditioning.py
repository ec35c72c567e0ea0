"""The logic of a ``condition`` step, as a pure state machine.

    v, state = condition_step(state, sample, verdict)

A condition step raises the voltage in steps of ``v_step`` from ``v_start`` and advances only
when the current has been stable: its relative spread (population std / mean) over the last
``stable_time`` seconds of samples taken *at the present level* is at most
``stable_fraction``. The step is done when it is stable at ``v_target`` or at a mean current
of at least ``i_target``. A BACK_OFF verdict of the watchdog (bursts, pressure burst, supply
state) lowers the level by ``backoff_v`` and spends one of ``retries``; with none left the
step ends "exhausted". A HOLD freezes the level (no advance). A collapse (the watchdog's
collapse rule, or ``Watchdog.collapsed``) ends the step "collapsed" and the level is never
raised again: conditioning never chases a collapsed current. ``timeout_s`` of sample time
ends it "timeout"; stable at the voltage ceiling with ``i_target`` not reached ends it
"ceiling".

The engine ramps to the returned level at the step's ``rate`` through its slew limiter;
samples taken before the setpoint has arrived at the level do not count towards stability.
During a condition step the engine applies the watchdog's BACK_OFF as this module's
``backoff_v`` (the returned level), not as a second, generic back-off.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Mapping, Optional, Tuple

from .sample import CONTINUE, Action, Sample, Verdict

ARRIVED_V = 0.5
"""The setpoint counts as arrived at the level within this many volts (or 1e-4 of it)."""

RUNNING, DONE, EXHAUSTED, COLLAPSED, TIMEOUT, CEILING = (
    "running", "done", "exhausted", "collapsed", "timeout", "ceiling")


@dataclass(frozen=True)
class ConditionState:
    level: float                       # V, the level asked for now
    v_target: Optional[float]
    i_target: Optional[float]
    v_step: float
    v_ceiling: float                   # never ask for more than this (V)
    stable_fraction: float
    stable_time: float
    backoff_v: float
    retries_left: int
    timeout_s: float
    t_start: Optional[float] = None
    window: Tuple[Tuple[float, float], ...] = ()    # (t, I) at the present level
    status: str = RUNNING
    advances: int = 0
    backoffs: int = 0
    last_spread: float = math.nan

    @property
    def finished(self) -> bool:
        return self.status != RUNNING


def start(params: Mapping, v_ceiling: float = math.inf) -> ConditionState:
    """A condition state from a plan segment's ``params`` (see ``sequencer.plan``)."""
    v_target = params.get("v_target")
    i_target = params.get("i_target")
    if v_target is None and i_target is None:
        raise ValueError("condition needs v_target or i_target")
    ceiling = min(v_ceiling, v_target) if v_target is not None else v_ceiling
    return ConditionState(
        level=min(float(params["v_start"]), ceiling), v_target=v_target, i_target=i_target,
        v_step=float(params["v_step"]), v_ceiling=ceiling,
        stable_fraction=float(params["stable_fraction"]),
        stable_time=float(params["stable_time"]), backoff_v=float(params["backoff_v"]),
        retries_left=int(params["retries"]), timeout_s=float(params["timeout_s"]))


def _spread(window) -> float:
    xs = [i for _, i in window]
    m = sum(xs) / len(xs)
    if not m > 0:
        return math.inf
    return math.sqrt(sum((x - m) ** 2 for x in xs) / len(xs)) / m


def condition_step(state: ConditionState, sample: Sample,
                   verdict: Verdict = CONTINUE) -> Tuple[float, ConditionState]:
    """The level to ask for after ``sample`` and the new state."""
    if state.finished:
        return state.level, state
    t = sample.t
    if state.t_start is None:
        state = replace(state, t_start=t)
    if verdict.rule == "collapse":
        return state.level, replace(state, status=COLLAPSED, window=())
    if t - state.t_start >= state.timeout_s:
        return state.level, replace(state, status=TIMEOUT)
    if verdict.action is Action.BACK_OFF:
        if state.retries_left <= 0:
            return state.level, replace(state, status=EXHAUSTED, window=())
        level = max(state.level - state.backoff_v, 0.0)
        return level, replace(state, level=level, retries_left=state.retries_left - 1,
                              backoffs=state.backoffs + 1, window=())
    if verdict.action >= Action.RAMP_DOWN:
        return state.level, state
    arrived = abs(sample.setpoint_v - state.level) <= max(ARRIVED_V, 1e-4 * state.level)
    if not (arrived and sample.valid_current and sample.current_a > 0):
        return state.level, replace(state, window=())
    window = tuple(w for w in state.window if w[0] >= t - state.stable_time) + ((t, sample.current_a),)
    # keep one sample at or before the window start so "full" can be told
    older = [w for w in state.window if w[0] < t - state.stable_time]
    if older:
        window = (older[-1],) + window
    state = replace(state, window=window)
    full = window[0][0] <= t - state.stable_time and len(window) >= 3
    if not full:
        return state.level, state
    spread = _spread(window)
    state = replace(state, last_spread=spread)
    if verdict.action is Action.HOLD or spread > state.stable_fraction:
        return state.level, state
    mean_i = sum(i for _, i in window) / len(window)
    if state.i_target is not None and mean_i >= state.i_target:
        return state.level, replace(state, status=DONE)
    if state.v_target is not None and state.level >= state.v_target:
        return state.level, replace(state, status=DONE)
    level = min(state.level + state.v_step, state.v_ceiling)
    if level <= state.level:        # at the ceiling with i_target not reached
        return state.level, replace(state, status=CEILING)
    return level, replace(state, level=level, window=(), advances=state.advances + 1)
