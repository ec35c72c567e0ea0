"""Watchdog limits: every tunable parameter of every rule, in one table.

A protocol's ``limits`` block sets any of these by name with a unit string (for example
``current_max: "50 uA"``). The rig file's hard limits bound them: the stricter of protocol
and rig wins, and nothing in a protocol can loosen a rig limit. ``fieldrun ctl ... tighten``
may only move a parameter in its ``tighter`` direction.

Defaults are common practice in field-emission conditioning (no published source) unless a
source is named; they are deliberately conservative for a fresh fibre.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from types import MappingProxyType
from typing import Mapping


@dataclass(frozen=True)
class LimitParam:
    name: str
    rule: str          # the watchdog rule that reads it
    unit: str          # unit of the SI value as pint spells it ("A", "s", "1/s", "", "Pa", "V", "W")
    default: float     # SI value
    tighter: str       # "lower" or "higher": which direction is stricter
    doc: str
    source: str = "common practice, no source"


def _p(*args, **kw) -> LimitParam:
    return LimitParam(*args, **kw)


PARAMS: Mapping[str, LimitParam] = MappingProxyType({p.name: p for p in [
    # --- absolute ceilings (trip) ---
    _p("current_max", "current_ceiling", "A", 100e-6, "lower",
       "emission current ceiling; crossing it trips at once"),
    _p("power_max", "power_ceiling", "W", 0.5, "lower",
       "gap power ceiling V*I; crossing it trips at once"),
    _p("voltage_max", "voltage_ceiling", "V", 5000.0, "lower",
       "highest voltage any step may reach (also refused at check time)"),
    _p("supply_cc_trips", "supply_state", "", 1.0, "higher",
       "1: constant-current mode or the supply's own over-current/arc flag trips; "
       "0: it backs off instead"),
    # --- spikes and burst trains (on ln I, detrended against a running FN fit) ---
    _p("spike_sigma", "bursts", "", 5.0, "lower",
       "a spike is a residual of ln I above this many robust sigmas"),
    _p("burst_backoff_count", "bursts", "", 3.0, "lower",
       "back off after this many spikes within burst_backoff_window"),
    _p("burst_backoff_window", "bursts", "s", 60.0, "higher",
       "window for burst_backoff_count"),
    _p("burst_trip_count", "bursts", "", 10.0, "lower",
       "trip after this many spikes within burst_trip_window"),
    _p("burst_trip_window", "bursts", "s", 600.0, "higher",
       "window for burst_trip_count"),
    _p("backoff_fraction", "bursts", "", 0.05, "higher",
       "a back-off lowers the voltage by this fraction of the present setpoint"),
    _p("backoff_hold", "bursts", "s", 30.0, "higher",
       "after a back-off, hold this long without a spike before re-joining the plan"),
    # --- runaway at constant voltage ---
    _p("runaway_rate", "runaway", "1/s", 0.01, "lower",
       "sustained d ln I/dt above this at constant voltage ramps down"),
    _p("runaway_time", "runaway", "s", 5.0, "lower",
       "how long runaway_rate must be exceeded"),
    _p("runaway_settle", "runaway", "s", 10.0, "lower",
       "after a voltage change the ramp-down level of runaway judges only readings this "
       "long after it (the current relaxes at a new voltage); the trip level judges at once"),
    _p("runaway_trip_rate", "runaway", "1/s", 0.10, "lower",
       "d ln I/dt above this at constant voltage trips"),
    # --- collapse (fibre fell off, contact failed) ---
    _p("collapse_fraction", "collapse", "", 0.8, "lower",
       "current falling by this fraction of its value within collapse_samples at "
       "constant voltage ends the run"),
    _p("collapse_samples", "collapse", "", 3.0, "higher",
       "number of samples over which collapse_fraction is judged"),
    _p("collapse_min_current", "collapse", "A", 1e-9, "lower",
       "collapse is judged only above this current (below it the noise floor rules)"),
    # --- slower trends ---
    _p("fluctuation_max", "fluctuation", "", 0.5, "lower",
       "relative fluctuation (std/mean of I) over fluctuation_window above this holds"),
    _p("fluctuation_window", "fluctuation", "s", 120.0, "higher",
       "window for fluctuation_max"),
    _p("step_up_factor", "step_up", "", 3.0, "lower",
       "current jumping up by this factor from one sample to the next at constant "
       "voltage holds"),
    _p("new_max_factor", "new_maximum", "", 2.0, "lower",
       "a current above this factor times the highest the sample has survived holds "
       "for confirmation"),
    _p("new_max_confirm", "new_maximum", "s", 10.0, "higher",
       "how long a new maximum must stay steady before it is accepted"),
    # --- pressure ---
    _p("pressure_max", "pressure", "Pa", 1e-3, "lower",
       "chamber pressure ceiling while the output is on; crossing it trips"),
    _p("pressure_arm_max", "pressure", "Pa", 1e-4, "lower",
       "a fresh valid gauge reading below this is needed to arm"),
    _p("pressure_burst_factor", "pressure", "", 3.0, "lower",
       "pressure rising by this factor within pressure_burst_window backs off"),
    _p("pressure_burst_window", "pressure", "s", 10.0, "higher",
       "window for pressure_burst_factor"),
    # --- plausibility ---
    _p("no_response_volts", "plausibility", "V", 500.0, "lower",
       "voltage raised by this much above the turn-on region with no current response "
       "holds (a cable may be off)"),
    _p("monitor_disagree_fraction", "plausibility", "", 0.5, "lower",
       "ammeter and supply current monitor differing by more than this fraction (above "
       "the monitor's resolution) holds"),
    _p("monitor_resolution", "plausibility", "A", 1e-6, "higher",
       "below this the supply's current monitor is not compared"),
    # --- readings and setpoint following ---
    _p("stale_time", "staleness", "s", 2.0, "lower",
       "no valid current or voltage reading for this long trips"),
    _p("pressure_stale_time", "staleness", "s", 10.0, "lower",
       "no valid pressure reading for this long trips"),
    _p("setpoint_tolerance", "setpoint", "V", 20.0, "lower",
       "measured voltage off its (slew-allowed) setpoint by more than this ..."),
    _p("setpoint_time", "setpoint", "s", 3.0, "lower",
       "... for this long trips"),
    # --- slew ---
    _p("slew_max", "slew", "V/s", 50.0, "lower",
       "the independent per-sample slew limiter never changes the setpoint faster"),
    # --- regulate ---
    _p("regulate_drift_max", "regulate", "1/s", 0.002, "lower",
       "during regulate, relative voltage drift per second above this holds"),
    _p("regulate_drop_fraction", "regulate", "", 0.1, "lower",
       "during regulate, the voltage dropping by this fraction within a few samples "
       "(an emitter switched on hard) ramps down"),
    # --- added by the watchdog (backwards-compatible) ---
    _p("judge_min_current", "noise_floor", "A", 1e-9, "lower",
       "rules on ln I (spikes, steps, fluctuation, runaway, no-response, new maximum) "
       "judge only currents above this; below it the ammeter's noise floor rules"),
    _p("runaway_trip_time", "runaway", "s", 1.0, "lower",
       "window over which d ln I/dt is compared with runaway_trip_rate"),
    _p("step_up_hold", "step_up", "s", 10.0, "higher",
       "after an upward current step, hold this long without a further step"),
    _p("pressure_rise_fraction", "pressure_rise", "", 0.5, "lower",
       "pressure rising by this fraction within pressure_rise_window while the current "
       "also rises holds (emission-driven outgassing)"),
    _p("pressure_rise_window", "pressure_rise", "s", 60.0, "higher",
       "window for pressure_rise_fraction"),
    _p("regulate_drift_window", "regulate", "s", 60.0, "lower",
       "window over which the relative voltage drift of regulate is measured"),
    _p("regulate_drop_samples", "regulate", "", 3.0, "higher",
       "number of samples over which regulate_drop_fraction is judged"),
    _p("regulate_ceiling_time", "regulate", "s", 30.0, "lower",
       "during regulate, sitting at the step's voltage ceiling this long ramps down "
       "(the target current is out of reach)"),
    _p("hold_max_time", "hold_timeout", "s", 600.0, "lower",
       "any hold lasting longer than this ramps down and ends the run, so an unattended "
       "run never waits forever"),
]})


@dataclass(frozen=True)
class Limits:
    """Merged limits of one run: a read-only mapping name -> SI value, with attribute
    access (``limits.current_max``)."""

    values: Mapping[str, float]

    def __post_init__(self):
        object.__setattr__(self, "values", MappingProxyType(dict(self.values)))

    def __reduce__(self):
        # picklable (campaign workers, multiprocessing): rebuild from a plain dict
        return (self.__class__, (dict(self.values),))

    def __getattr__(self, name: str) -> float:
        try:
            return self.values[name]
        except KeyError:
            raise AttributeError(name) from None

    @classmethod
    def defaults(cls) -> "Limits":
        return cls({p.name: p.default for p in PARAMS.values()})

    def replace(self, **changes: float) -> "Limits":
        unknown = set(changes) - set(PARAMS)
        if unknown:
            raise KeyError(", ".join(sorted(unknown)))
        v = dict(self.values)
        v.update(changes)
        return Limits(v)

    def is_tighter(self, name: str, new: float) -> bool:
        """True when ``new`` is at least as strict as the present value of ``name``."""
        p = PARAMS[name]
        old = self.values[name]
        return new <= old if p.tighter == "lower" else new >= old

    def to_dict(self) -> dict:
        return dict(self.values)


def stricter(name: str, a: float, b: float) -> float:
    """The stricter of two values of parameter ``name``."""
    if math.isnan(a):
        return b
    if math.isnan(b):
        return a
    return min(a, b) if PARAMS[name].tighter == "lower" else max(a, b)
