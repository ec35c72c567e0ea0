"""The constant-current loop of a ``regulate`` step, as a pure step function.

    v, state = next_voltage(state, sample, verdict)

The loop acts on ln I, because field emission makes I exponential in 1/V: an error in ln I
is a relative current error, the same size at 10 nA and at 10 uA. Its gain is scheduled on
the local Fowler–Nordheim slope s = d ln I/dV taken from the online FN fit
(``fnfit_online.FNFit.dlni_dv``), so one sample's correction is a fraction ``GAIN`` of the
Newton step e/s:

    dV = GAIN * (ln I_target - ln I) / s,     clipped to +/- max_dv, then to [floor, ceiling]

This is integral action in velocity form: the voltage itself is the integrator, and it is
clamped, so it cannot wind up at the ceiling or the floor (anti-windup); while the watchdog
holds (any verdict at or above HOLD) the loop does not integrate at all. For an exact slope
the error shrinks by (1 - GAIN) per sample with no overshoot; an under-estimated slope by a
factor r gives an effective gain GAIN * r, still without overshoot while GAIN * r <= 1. The
slope is therefore bounded to [SLOPE_FLOOR/V, SLOPE_CAP/V] and, before the fit knows one, taken as the conservative
FALLBACK_LOG_SLOPE / V (an over-estimate makes the loop slower, never unstable).

The loop integrates from the setpoint actually applied (``sample.setpoint_v``), so an
outside limit (the engine's slew limiter, a back-off) cannot wind it up either.

Never chase a collapsed current: once the watchdog's collapse rule fires, the loop keeps
its voltage and never raises it again. An invalid reading (overflow, NaN) keeps the voltage.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Optional, Tuple

from .fnfit_online import FNFit
from .sample import CONTINUE, Action, Sample, Verdict

GAIN = 0.5
"""Fraction of the Newton step taken per sample. Common practice, no source."""

FALLBACK_LOG_SLOPE = 40.0
"""d ln I / d ln V assumed before the fit has a slope. For I = A V^2 exp(-B/V) it is
2 + B/V, typically 10 to 40 for cold cathodes at turn-on (common practice, no source); the
top end is taken so the first steps are small."""

SLOPE_FLOOR = 6.0
"""Lower bound on d ln I / d ln V trusted from the fit: 2 (the V^2 prefactor) + B/V with
B/V >= 4, below which a cathode hardly emits (common practice, no source). A noisy fit
cannot make the loop take more than GAIN * (true/floor) of a Newton step."""

ERROR_CAP = 1.0
"""Largest ln I error acted on in one sample (one e-fold of current): with SLOPE_FLOOR it
bounds a step to V/12 even when ``max_dv`` is unlimited, and it is the error used while
there is no emission yet (a loop started below turn-on climbs, never jumps)."""

SLOPE_CAP = 200.0
"""Upper bound on d ln I / d ln V trusted from the fit."""


@dataclass(frozen=True)
class RegulateState:
    v: float                    # present setpoint (V)
    target_current: float       # A
    v_floor: float              # V
    v_ceiling: float            # V
    max_dv: float               # V per sample
    fit: FNFit = FNFit()
    collapsed: bool = False
    last_error: float = math.nan   # ln I_target - ln I of the last used sample
    slope: float = math.nan        # d ln I/dV used for the last step (1/V)


def start(target_current: float, v_start: float, v_floor: float, v_ceiling: float,
          max_dv: float, fit: Optional[FNFit] = None) -> RegulateState:
    """A loop starting at ``v_start`` (clamped to [floor, ceiling]); ``fit`` may carry the
    FN fit of the preceding ramp so the first step already has the right gain."""
    if not (v_floor <= v_ceiling and max_dv > 0 and target_current > 0):
        raise ValueError("regulate needs v_floor <= v_ceiling, max_dv > 0, target_current > 0")
    v0 = min(max(v_start, v_floor), v_ceiling)
    return RegulateState(v=v0, target_current=target_current, v_floor=v_floor,
                         v_ceiling=v_ceiling, max_dv=max_dv, fit=fit or FNFit())


def local_slope(fit: FNFit, v: float) -> float:
    """d ln I/dV for the gain schedule, bounded to [SLOPE_FLOOR/V, SLOPE_CAP/V]."""
    s = fit.dlni_dv(v)
    if not math.isfinite(s):
        s = FALLBACK_LOG_SLOPE / v
    return min(max(s, SLOPE_FLOOR / v), SLOPE_CAP / v)


def next_voltage(state: RegulateState, sample: Sample,
                 verdict: Verdict = CONTINUE) -> Tuple[float, RegulateState]:
    """The next setpoint and state after ``sample`` (judged by the watchdog as ``verdict``)."""
    if state.collapsed or verdict.rule == "collapse":
        return state.v, replace(state, collapsed=True)
    if verdict.action >= Action.HOLD:
        return state.v, state
    if not (sample.valid_current and math.isfinite(sample.current_a)):
        return state.v, state          # no information: keep the voltage
    # integrate from the voltage actually applied (the engine's slew limiter or a back-off
    # may have held it below what the loop asked): no windup against outside limits
    sp = sample.setpoint_v
    v_base = sp if math.isfinite(sp) and sp >= 0 else state.v
    v_meas = sample.gap_voltage_v if math.isfinite(sample.gap_voltage_v) else sample.voltage_v
    fit = state.fit
    if sample.current_a > 0 and math.isfinite(v_meas) and v_meas > 0:
        fit = fit.add(sample.t, v_meas, sample.current_a)
        err = min(math.log(state.target_current) - math.log(sample.current_a), ERROR_CAP)
    else:
        err = ERROR_CAP                # no emission yet: climb at the capped rate
    v_eff = max(v_base, state.v_floor, 1.0)
    slope = local_slope(fit, v_eff)
    dv = GAIN * err / slope
    dv = max(-state.max_dv, min(state.max_dv, dv))
    v = min(max(v_base + dv, state.v_floor), state.v_ceiling)
    return v, replace(state, v=v, fit=fit, last_error=err, slope=slope)
