"""The Plan: what the compiler makes of Protocol + Rig, and what the engine executes.

A Plan is a flat tuple of ``Segment`` (``repeat`` blocks are unrolled; ``dwell`` becomes a
``hold``), each with its kind, its sample period and its parameters in SI units, plus the
merged ``Limits``. Durations are *nominal*: the engine advances on progress, so holds and
back-offs lengthen a run but never make it skip ahead.

Segment kinds and their ``params`` (SI units; keys always present, None where unused):

=========  ==========================================================================
ramp       v_from, v_to (V), rate (V/s > 0), step_v (V or None: continuous),
           settle_s (s, stepped ramps), until_current (A or None: stop early)
hold       v (V), duration_s (s)                         (from ``dwell``)
sweep      points (tuple of V, in execution order: direction and repeats applied),
           settle_s (s), samples_per_point (int), rate (V/s between points)
return     v_from (V), v_to (0.0), rate (V/s)
rest       duration_s (s) at 0 V, output still on
regulate   target_current (A), duration_s (s), v_ceiling (V), v_floor (V),
           max_dv (V per sample)
condition  v_target (V or None), i_target (A or None), v_step (V), v_start (V),
           stable_fraction (relative std/mean), stable_time (s), backoff_v (V),
           retries (int), timeout_s (s), rate (V/s), v_ceiling (V: highest voltage
           the step may set; the v_target when only a voltage target is given)
wait       until ("pressure_below" | "current_stable"), value (Pa or relative
           fraction), window_s (s, for current_stable), timeout_s (s)
pause      timeout_s (s or None: until the operator resumes), message (str)
=========  ==========================================================================

Voltages in a plan are nominal. Where a step can end somewhere other than its planned end
(a ramp stopped early by ``until_current``, a ``regulate`` or ``condition`` step, a
back-off), the next segment starts from the voltage actually present: ``hold`` (from
``dwell``), ``wait`` and ``pause`` hold the voltage present when they begin, never the
nominal ``v``/``v_start`` (moving to it after an early stop would defeat ``until_current``);
ramps and returns start from the applied voltage. ``regulate``'s nominal ``v_end`` is its
ceiling (the worst case for what follows).
"""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Any, Mapping, Optional, Tuple

from .limits import Limits

KINDS = ("ramp", "hold", "sweep", "return", "rest", "regulate", "condition", "wait", "pause")


@dataclass(frozen=True)
class Segment:
    index: int                 # position in the plan
    kind: str                  # one of KINDS
    label: str                 # human label, e.g. "3 dwell" or "2.4 sweep (repeat 2/3)"
    source_line: int           # line of the step in the protocol file
    sample_period: float       # s
    nominal_duration: float    # s (timeouts count for wait/pause/condition)
    v_start: float             # V at the start (nominal)
    v_end: float               # V at the end (nominal)
    v_peak: float              # highest |V| the segment may ask for
    params: Mapping[str, Any] = field(default_factory=dict)

    def __post_init__(self):
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))

    def __reduce__(self):
        # picklable (campaign workers, multiprocessing): params travel as a plain dict
        return (self.__class__, (self.index, self.kind, self.label, self.source_line,
                                 self.sample_period, self.nominal_duration, self.v_start,
                                 self.v_end, self.v_peak, dict(self.params)))

    @property
    def nominal_samples(self) -> int:
        return int(math.ceil(self.nominal_duration / self.sample_period)) if self.sample_period > 0 else 0


@dataclass(frozen=True)
class Plan:
    name: str
    segments: Tuple[Segment, ...]
    limits: Limits
    sample_period: float            # default sample period (s)
    sample_id: str = ""
    polarity: int = 1
    notes: str = ""
    timing_budget: Optional[Mapping[str, float]] = None   # filled by the drivers layer

    @property
    def total_duration(self) -> float:
        return float(sum(s.nominal_duration for s in self.segments))

    @property
    def peak_voltage(self) -> float:
        return max((s.v_peak for s in self.segments), default=0.0)

    @property
    def sample_count(self) -> int:
        return int(sum(s.nominal_samples for s in self.segments))

    def to_dict(self) -> dict:
        def clean(v):
            if isinstance(v, float) and not math.isfinite(v):
                return None
            if isinstance(v, tuple):
                return [clean(x) for x in v]
            return v
        return {
            "name": self.name,
            "sample_id": self.sample_id,
            "polarity": self.polarity,
            "sample_period_s": self.sample_period,
            "total_duration_s": self.total_duration,
            "peak_voltage_v": self.peak_voltage,
            "sample_count": self.sample_count,
            "limits": {k: clean(v) for k, v in self.limits.values.items()},
            "timing_budget": dict(self.timing_budget) if self.timing_budget else None,
            "segments": [
                {
                    "index": s.index, "kind": s.kind, "label": s.label, "line": s.source_line,
                    "sample_period_s": s.sample_period, "duration_s": s.nominal_duration,
                    "v_start": s.v_start, "v_end": s.v_end, "v_peak": s.v_peak,
                    "params": {k: clean(v) for k, v in s.params.items()},
                }
                for s in self.segments
            ],
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2)
