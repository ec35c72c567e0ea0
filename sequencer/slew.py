"""The independent per-sample slew limiter.

Every voltage the engine sends to the supply passes through here, whatever the step kind,
controller or verdict asked for. It knows nothing of the plan: it only remembers the last
setpoint it let through and refuses to move further than ``rate * period`` in one sample,
and never outside ``[0, v_ceiling]`` (magnitudes; polarity is applied by the engine at the
driver edge). A second, plan-independent line behind the step runners, common practice in
high-voltage conditioning (no source).
"""
from __future__ import annotations

import math


class SlewLimiter:
    """``limit(target, period) -> setpoint``: at most ``rate * period`` volts from the last
    setpoint, clamped to ``[0, v_ceiling]``. ``rate`` may only be tightened (lowered)."""

    def __init__(self, rate_v_per_s: float, v_ceiling: float, v0: float = 0.0):
        if not (rate_v_per_s > 0 and math.isfinite(rate_v_per_s)):
            raise ValueError(f"slew rate must be a positive finite number, got {rate_v_per_s!r}")
        self.rate = float(rate_v_per_s)
        self.v_ceiling = float(v_ceiling)
        self.last = float(v0)

    def tighten(self, rate_v_per_s: float) -> None:
        if 0 < rate_v_per_s < self.rate:
            self.rate = float(rate_v_per_s)

    def limit(self, target: float, period: float) -> float:
        """The setpoint to send this sample (also remembered as the new last setpoint)."""
        if not math.isfinite(target):
            target = self.last          # never pass NaN or inf to a supply
        target = min(max(target, 0.0), self.v_ceiling)
        step = self.rate * max(period, 0.0)
        v = min(max(target, self.last - step), self.last + step)
        self.last = v
        return v

    def reset(self, v: float = 0.0) -> None:
        """After safe_off the output is at 0 V: start again from there."""
        self.last = float(v)
