"""The simulated vacuum chamber: pressure from a base gas load, anode outgassing driven by
the beam, and pumping, with the chamber's volume-over-pumping-speed lag; and the gauge's
own lag as a separate filter the gauge instrument applies.

Gas balance (throughput form, Pa m^3/s; common practice, no source; see e.g. J.F. O'Hanlon,
A User's Guide to Vacuum Technology, ch. 3, from memory):
    V dp/dt = Q_base + Q_esd + Q_heat + Q_des - S p
- Q_base = S p_base (what holds the chamber at its base pressure);
- Q_esd = y_esd I c: electron-stimulated desorption from the anode, proportional to the
  current and to the anode's remaining surface coverage c, which the beam depletes (dose
  D_c coulombs per e-fold) and which recovers slowly (tau_recover);
- Q_heat = k_heat P_anode: thermal outgassing of the anode, proportional to the beam power
  I x V, through the anode's own first-order thermal lag (tau_anode);
- Q_des: a slowly relaxing desorption load after venting/bake-out, decaying with tau_des.
Each step is integrated exactly for piecewise-constant inputs, so the result does not depend
on how often ``advance`` is called as long as current and voltage are sampled finely enough.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any, Mapping


class ChamberParamError(ValueError):
    """A bad ``simulation: chamber:`` entry (one clear line for the user)."""


@dataclass(frozen=True)
class ChamberParams:
    base_pressure_pa: float = 1e-5           # base pressure with no beam
    volume_m3: float = 0.01                  # chamber volume (10 L)
    pumping_speed_m3_s: float = 0.05         # effective pumping speed (50 L/s); V/S = 0.2 s
    esd_yield_pa_m3_per_c: float = 2e-3      # gas released per coulomb on a fully covered anode
    esd_depletion_c: float = 0.05            # charge that depletes the anode coverage by 1/e
    esd_recovery_s: float = 3600.0           # time for the anode coverage to recover
    heating_pa_m3_per_j: float = 2e-6        # thermal outgassing load (Pa m^3/s) per watt of beam power on the anode
    anode_time_constant_s: float = 30.0      # anode thermal lag
    initial_desorption_pa_m3_s: float = 0.0  # extra load at t = 0 (after venting)
    desorption_time_constant_s: float = 3600.0  # decay of that extra load
    gauge_time_constant_s: float = 0.5       # first-order lag of the gauge reading

    @classmethod
    def from_dict(cls, d: Mapping[str, Any] | None = None) -> "ChamberParams":
        d = dict(d or {})
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(d) - known)
        if unknown:
            raise ChamberParamError(f"simulation.chamber: unknown key {unknown[0]!r} "
                                    f"(known: {', '.join(sorted(known))})")
        vals = {}
        for k, v in d.items():
            try:
                x = float(v)
            except (TypeError, ValueError):
                raise ChamberParamError(f"simulation.chamber.{k}: expected a number, got {v!r}") from None
            if not math.isfinite(x) or x < 0:
                raise ChamberParamError(f"simulation.chamber.{k}: must be a finite number >= 0")
            vals[k] = x
        p = cls(**vals)
        for k in ("base_pressure_pa", "volume_m3", "pumping_speed_m3_s", "esd_depletion_c",
                  "esd_recovery_s", "anode_time_constant_s", "desorption_time_constant_s"):
            if getattr(p, k) <= 0:
                raise ChamberParamError(f"simulation.chamber.{k}: must be > 0")
        return p


class Chamber:
    """``advance(t, current_a, voltage_v) -> pressure_pa``: the pressure at time t, the
    current and voltage being those of the interval since the previous call."""

    def __init__(self, params: ChamberParams | Mapping | None = None):
        if not isinstance(params, ChamberParams):
            params = ChamberParams.from_dict(params)
        self.params = params
        self.pressure_pa = params.base_pressure_pa
        self.anode_coverage = 1.0
        self.anode_power_w = 0.0      # lagged beam power (the anode's temperature, in watts)
        self._t = None

    def gauge_lag(self) -> "GaugeLag":
        """A gauge lag filter with this chamber's ``gauge_time_constant_s`` (the gauge
        instrument applies it to ``advance``'s pressure)."""
        return GaugeLag(self.params.gauge_time_constant_s)

    def gas_load(self, current_a: float, voltage_v: float) -> float:
        """Total gas load Q (Pa m^3/s) for the present state."""
        p = self.params
        q_base = p.pumping_speed_m3_s * p.base_pressure_pa
        q_esd = p.esd_yield_pa_m3_per_c * abs(current_a) * self.anode_coverage
        q_heat = p.heating_pa_m3_per_j * self.anode_power_w
        q_des = p.initial_desorption_pa_m3_s * math.exp(-(self._t or 0.0) / p.desorption_time_constant_s)
        return q_base + q_esd + q_heat + q_des

    def advance(self, t: float, current_a: float, voltage_v: float) -> float:
        p = self.params
        t = float(t)
        if self._t is None:
            self._t = t
            return self.pressure_pa
        dt = max(t - self._t, 0.0)
        self._t = t
        if dt == 0:
            return self.pressure_pa
        I = abs(float(current_a))
        power = I * abs(float(voltage_v))
        # anode coverage: depleted by the beam dose, recovering towards 1
        k_dep = I / p.esd_depletion_c
        k_rec = 1.0 / p.esd_recovery_s
        c_eq = k_rec / (k_dep + k_rec)
        self.anode_coverage = c_eq + (self.anode_coverage - c_eq) * math.exp(-(k_dep + k_rec) * dt)
        # anode heating lag
        self.anode_power_w = power + (self.anode_power_w - power) * math.exp(-dt / p.anode_time_constant_s)
        # pressure: V dp/dt = Q - S p, exact for constant Q over dt
        p_eq = self.gas_load(I, voltage_v) / p.pumping_speed_m3_s
        tau = p.volume_m3 / p.pumping_speed_m3_s
        self.pressure_pa = p_eq + (self.pressure_pa - p_eq) * math.exp(-dt / tau)
        return self.pressure_pa


class GaugeLag:
    """First-order lag of a gauge reading, tau dp_shown/dt = p - p_shown (common practice,
    no source). ``apply(t, pressure_pa) -> shown_pa``."""

    def __init__(self, time_constant_s: float = 0.5):
        self.tau = float(time_constant_s)
        self.shown = None
        self._t = None

    def apply(self, t: float, pressure_pa: float) -> float:
        if self.shown is None or self.tau <= 0:
            self.shown, self._t = float(pressure_pa), float(t)
            return self.shown
        dt = max(float(t) - self._t, 0.0)
        self._t = float(t)
        self.shown = pressure_pa + (self.shown - pressure_pa) * math.exp(-dt / self.tau)
        return self.shown
