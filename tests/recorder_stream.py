"""A synthetic, deterministic stream of Samples for the recorder tests (not a test module).

Sample ``k`` is a pure function of ``k``, so a test (or a child process that was killed)
can check every recorded row against what was meant to be written, bit for bit. The
values are chosen to be awkward for a text format: thirds, -0.0, the smallest subnormal,
NaN with its flags, huge and tiny magnitudes.
"""
from __future__ import annotations

import math

from sequencer.sample import (FLAG_CC, FLAG_INVALID, FLAG_OVERFLOW, FLAG_STALE, Sample)

STEP_KINDS = ("ramp", "hold", "sweep", "condition")


def stream_sample(k: int, dt: float = 1e-3, utc0: float = 1.8e9) -> Sample:
    t = k * dt
    flags = []
    current = 1e-12 * math.exp((k % 5000) / 400.0) + k / 3.0 * 1e-15
    if k % 97 == 13:
        current = math.nan
        flags.append(FLAG_INVALID)
    if k % 101 == 7:
        current = math.nan
        flags.append(FLAG_OVERFLOW)
    if k % 11 == 0:
        flags.append(FLAG_CC)
    if k % 13 == 5:
        flags.append(FLAG_STALE)
    v = 0.1 * k + 1.0 / 3.0
    return Sample(
        seq=k, t=t, utc=utc0 + t, setpoint_v=float(k) / 7.0, voltage_v=v,
        gap_voltage_v=v - (current if current == current else 0.0) * 1e6,
        current_a=current, supply_current_a=-0.0 if k % 2 else 5e-324,
        range_a=10.0 ** -(3 + k % 7), pressure_pa=1e-6 * (1.0 + math.sin(k)),
        pressure_age_s=(k % 10) * 0.1, t_v=t + 1e-4, t_i=t + 2e-4, t_p=t - 0.05 * (k % 10),
        step_index=k // 1000, step_kind=STEP_KINDS[(k // 1000) % len(STEP_KINDS)],
        interlock_ok=None if k % 3 == 0 else bool(k % 3 == 1), flags=tuple(flags),
    )


def stream_event(k: int) -> dict:
    return {"kind": "verdict", "seq": k, "t": k * 1e-3, "utc": 1.8e9 + k * 1e-3,
            "action": "hold", "rule": "pressure-rise", "value": 1e-6 * (1 + k / 3.0),
            "threshold": 2.5e-6, "unit": "Pa", "message": f"hold at sample {k}"}


def same_float(a: float, b: float) -> bool:
    """Equal as doubles: same value and sign (so -0.0 != 0.0), any NaN equals any NaN
    (the text 'nan' does not carry a NaN's payload)."""
    if math.isnan(a) or math.isnan(b):
        return math.isnan(a) and math.isnan(b)
    return a == b and math.copysign(1.0, a) == math.copysign(1.0, b)


def same_sample(a: Sample, b: Sample) -> bool:
    import dataclasses
    for f in dataclasses.fields(Sample):
        x, y = getattr(a, f.name), getattr(b, f.name)
        if isinstance(x, float) or isinstance(y, float):
            if not same_float(float(x), float(y)):
                return False
        elif x != y:
            return False
    return True
