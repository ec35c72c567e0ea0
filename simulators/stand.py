"""The simulated stand: cathode, chamber and the four simulated instruments on one clock.

``SimulatedStand(config, clock, seed)`` takes the ``simulation`` block of a rig file (or
a whole rig dict holding one) and builds

* the cathode from ``config["cathode"]`` through ``simulators.cathode.CathodeParams``
  (a plain Fowler–Nordheim stand-in is used only while that module is absent);
* the chamber from ``config["chamber"]`` through ``simulators.chamber`` (likewise);
* ``supply``, ``ammeter``, ``gauge`` and ``interlock`` interpreters from the blocks of
  those names, with the quirks of ``config["quirks"]``.

Physics advances lazily: every instrument, before it looks at a command, calls
``sync(clock.now())``. The supply's actual terminal voltage (slew, bleed-down,
constant current) drives the cathode; the ammeter reads the cathode's current; the
chamber sees that current and voltage; the gauge lags the chamber.

``truth`` says what the stand really does now (for tests), and
``host_lost()`` tells every instrument its host vanished.
"""
from __future__ import annotations

import math
import threading
import time
from dataclasses import dataclass
from typing import Any, Dict, Mapping, Optional

import numpy as np

from sequencer import physics

from .instruments import SimAmmeter, SimGauge, SimInterlock, SimSupply, check_keys
from .quirks import quirks_for

ROLES = ("supply", "ammeter", "gauge", "interlock")


@dataclass(frozen=True)
class Truth:
    """What the stand really did at time ``t`` (SI)."""

    t: float
    voltage_v: float        # supply terminal voltage
    current_a: float        # emitted (cathode) current, positive for emission
    pressure_pa: float      # chamber pressure (before the gauge's lag)
    output_on: bool
    cc: bool


class FowlerNordheimStandIn:
    """A bare cathode used only when ``simulators.cathode`` is missing (or in tests):
    I = A * J_MG(beta V_gap / d, phi), with V_gap = V - I R solved by fixed-point
    iteration. J_MG is the Murphy–Good current density of ``sequencer.physics``
    (Murphy and Good 1956, in the form of Forbes and Deane 2007).

    Config keys: ``beta`` (5000), ``phi_ev`` (4.8), ``gap_m`` (500e-6), ``area_m2``
    (1e-12), ``r_series_ohm`` (1e6)."""

    def __init__(self, params: Optional[Mapping[str, Any]] = None, rng=None):
        p = dict(params or {})
        self.beta = float(p.get("beta", 5000.0))
        self.phi = float(p.get("phi_ev", 4.8))
        self.gap = float(p.get("gap_m", 500e-6))
        self.area = float(p.get("area_m2", 1e-12))
        self.r_series = float(p.get("r_series_ohm", 1e6))
        self.lost = False
        self.events: list = []

    def current_at(self, v_gap: float) -> float:
        if v_gap <= 0:
            return 0.0
        return float(self.area * physics.murphy_good_j(self.beta * v_gap / self.gap, self.phi))

    def emit(self, v_supply: float, t: float, pressure_pa: float) -> float:
        if self.lost or v_supply <= 0:
            return 0.0
        # V_gap = V - I(V_gap) R: bisection on the monotonic residual
        lo, hi = 0.0, float(v_supply)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            if mid + self.current_at(mid) * self.r_series > v_supply:
                hi = mid
            else:
                lo = mid
        return self.current_at(lo)


class ConstantChamberStandIn:
    """A chamber used only when ``simulators.chamber`` is missing: base pressure plus a
    term growing with emitted power (outgassing), relaxing with the chamber's
    volume-over-pumping-speed time constant. Keys: ``base_pa`` (1e-6),
    ``pa_per_watt`` (1e-4), ``tau_s`` (2.0)."""

    def __init__(self, params: Optional[Mapping[str, Any]] = None):
        p = dict(params or {})
        self.base = float(p.get("base_pa", 1e-6))
        self.gain = float(p.get("pa_per_watt", 1e-4))
        self.tau = float(p.get("tau_s", 2.0))
        self.p = self.base
        self.t: Optional[float] = None

    def advance(self, t: float, current_a: float, voltage_v: float) -> float:
        target = self.base + self.gain * abs(current_a * voltage_v)
        if self.t is None:
            self.t, self.p = t, target
            return self.p
        dt = max(0.0, t - self.t)
        self.t = t
        self.p = target + (self.p - target) * math.exp(-dt / self.tau)
        return self.p


def _build_cathode(params: Mapping[str, Any], seed: int):
    try:
        from . import cathode as cathode_mod
    except ImportError:
        return FowlerNordheimStandIn(params)
    cp_cls = cathode_mod.CathodeParams
    if hasattr(cp_cls, "from_dict"):
        cp = cp_cls.from_dict(dict(params))
    else:
        cp = cp_cls(**dict(params))
    return cathode_mod.Cathode(cp, np.random.default_rng([seed & 0xFFFFFFFF, 1]))


def _build_chamber(params: Mapping[str, Any]):
    try:
        from . import chamber as chamber_mod
    except ImportError:
        return ConstantChamberStandIn(params)
    pcls = getattr(chamber_mod, "ChamberParams", None)
    if pcls is None:
        return chamber_mod.Chamber(dict(params))
    cp = pcls.from_dict(dict(params)) if hasattr(pcls, "from_dict") else pcls(**dict(params))
    return chamber_mod.Chamber(cp)


def _rig_identities(rig: Mapping[str, Any]) -> Dict[str, Dict[str, str]]:
    """role -> {serial, model} named in a rig file's ``instruments`` block, so the
    simulated ``*IDN?`` answers what the rig file expects (entries keyed by role or
    carrying ``role:``, with ``identity: {model, serial}`` or the keys at top level)."""
    out: Dict[str, Dict[str, str]] = {}
    instruments = rig.get("instruments") if isinstance(rig, Mapping) else None
    if not isinstance(instruments, Mapping):
        return out
    for name, entry in instruments.items():
        if not isinstance(entry, Mapping):
            continue
        roles = entry.get("role", name)
        roles = [roles] if isinstance(roles, str) else list(roles or [])
        ident = entry.get("identity") if isinstance(entry.get("identity"), Mapping) else entry
        found = {k: str(ident[k]) for k in ("serial", "model") if k in ident}
        for role in roles:
            if role in ROLES and found:
                out.setdefault(role, {}).update(found)
    return out


class ScaledClock:
    """Wall time running ``speed`` times faster (for ``sim-serve --speed``): ``now()``
    moves ``speed`` simulated seconds per real second."""

    simulated = False

    def __init__(self, speed: float = 1.0):
        self.speed = float(speed)
        self._m0 = time.monotonic()
        self._utc0 = time.time()

    def now(self) -> float:
        return (time.monotonic() - self._m0) * self.speed

    def utc(self) -> float:
        return self._utc0 + self.now()

    def sleep(self, dt: float) -> None:
        if dt > 0:
            time.sleep(dt / self.speed)

    def sleep_until(self, t: float) -> None:
        self.sleep(t - self.now())


class SimulatedStand:
    """Cathode + chamber + simulated instruments sharing ``clock``.

    ``config`` is the ``simulation`` block of a rig file (a dict); a whole rig dict with
    a ``simulation`` key is accepted too, and then serials and models named under
    ``instruments.<role>`` are used for the simulated identities. ``cathode`` and
    ``chamber`` may be handed in ready-made (tests): any object with
    ``emit(v_supply, t, pressure_pa) -> A`` (``lost``, ``events`` optional) and
    ``advance(t, current_a, voltage_v) -> Pa``.
    """

    #: longest physics step (s of simulated time); longer gaps are cut into steps,
    #: at most ``max_substeps`` of them
    max_step_s = 0.25
    max_substeps = 40
    #: shortest cathode/chamber step (s of simulated time; ``simulation:
    #: physics_step_s``): commands closer together than this see the last step's
    #: current and pressure, unless the supply's output has moved by more than
    #: ``step_dv_abs`` / ``step_dv_rel`` since that step. The supply's own output (slew,
    #: bleed-down, trips) is brought up to every command exactly. One cathode solve
    #: costs milliseconds, an instrument command microseconds.
    physics_step_s = 0.05
    step_dv_abs = 0.5
    step_dv_rel = 1e-3

    def __init__(self, config: Optional[Mapping[str, Any]], clock, seed: Optional[int] = None,
                 cathode=None, chamber=None):
        config = dict(config or {})
        rig: Mapping[str, Any] = {}
        if "simulation" in config or "instruments" in config:
            rig, config = config, dict(config.get("simulation") or {})
        check_keys("simulation", config, {"seed", "cathode", "chamber", "quirks",
                                          "physics_step_s", *ROLES})
        self.config = config
        self.physics_step_s = float(config.get("physics_step_s", self.physics_step_s))
        self.seed = int(config.get("seed", 0) if seed is None else seed)
        self.clock = clock
        self.lock = threading.RLock()
        self.cathode = cathode if cathode is not None else _build_cathode(config.get("cathode") or {}, self.seed)
        self.chamber = chamber if chamber is not None else _build_chamber(config.get("chamber") or {})
        identities = _rig_identities(rig)

        def block(role: str) -> Dict[str, Any]:
            b = dict(config.get(role) or {})
            for key, value in identities.get(role, {}).items():
                b.setdefault(key, value)
            if role == "ammeter" and "polarity" not in b:
                sign = (rig.get("ammeter") or {}).get("sign") if isinstance(rig.get("ammeter"), Mapping) else None
                if sign is not None:
                    b["polarity"] = sign     # reading x sign = emission current
            return b

        common = dict(clock=clock, seed=self.seed, sync=self.sync, lock=self.lock)
        self.supply = SimSupply(config=block("supply"), quirks=quirks_for("supply", config, self.seed), **common)
        self.ammeter = SimAmmeter(config=block("ammeter"), quirks=quirks_for("ammeter", config, self.seed),
                                  current=lambda: self._i, **common)
        self.gauge = SimGauge(config=block("gauge"), quirks=quirks_for("gauge", config, self.seed), **common)
        self.interlock = SimInterlock(config=block("interlock"), quirks=quirks_for("interlock", config, self.seed),
                                      **common)
        self.supply.inhibitors.append(self.interlock.inhibitor)
        if "tau_s" not in (config.get("gauge") or {}) and hasattr(self.chamber, "gauge_lag"):
            self.gauge.lag = self.chamber.gauge_lag()     # one gauge time constant, not two
        self.instruments = {"supply": self.supply, "ammeter": self.ammeter,
                            "gauge": self.gauge, "interlock": self.interlock}
        self.t = clock.now()
        self._slope_pair: Optional[tuple] = None
        self._v_step = 0.0
        self._p = float(self.chamber.advance(self.t, 0.0, 0.0))
        self._i = max(0.0, float(self.cathode.emit(0.0, self.t, self._p)))  # the start state
        self.supply.i_out = self._i
        self.gauge.observe(self.t, self._p)

    # -- lookups
    def interpreter(self, name: str):
        """The interpreter for ``sim:NAME`` addresses (supply, ammeter, gauge, interlock)."""
        try:
            return self.instruments[name]
        except KeyError:
            raise KeyError(f"no simulated instrument '{name}' (have {', '.join(ROLES)})") from None

    @property
    def truth(self) -> Truth:
        """The stand's real state now (as of the last physics step and any command
        since: an output switched on at this instant shows here at once)."""
        sup = self.supply
        return Truth(max(self.t, sup.t_last), sup.v_out, self._i, self._p, sup.output, sup.cc)

    @property
    def fibre_lost(self) -> bool:
        return bool(getattr(self.cathode, "lost", False))

    @property
    def cathode_events(self):
        return list(getattr(self.cathode, "events", []))

    # -- physics
    def advance(self, t: Optional[float] = None) -> Truth:
        """Bring cathode, chamber and instruments to time ``t`` (default now)."""
        self.sync(t)
        return self.truth

    def sync(self, t: Optional[float] = None) -> None:
        """``advance`` without building the ``Truth`` (the instruments' hook)."""
        with self.lock:
            t = self.clock.now() if t is None else float(t)
            if t <= self.t:
                return
            if t - self.t < self.physics_step_s:
                self.supply.evolve(t)
                dv = abs(self.supply.v_out - self._v_step)
                if dv <= max(self.step_dv_abs, self.step_dv_rel * self._v_step):
                    return
            t0, dt = self.t, t - self.t
            n = min(self.max_substeps, max(1, math.ceil(dt / self.max_step_s)))
            for k in range(1, n + 1):
                self._step(t0 + dt * k / n if k < n else t)

    def _exponent(self) -> float:
        """Local d ln I / d ln V of the load from the last two distinct points (about
        2 + B/V for Fowler–Nordheim emission, 1 for a resistor); 10 before there are
        two."""
        if self._slope_pair is None:
            return 10.0
        (v1, i1), (v2, i2) = self._slope_pair
        if v1 <= 0 or v2 <= 0 or i1 <= 0 or i2 <= 0 or abs(math.log(v2 / v1)) < 1e-6:
            return 10.0
        return float(min(60.0, max(0.5, math.log(i2 / i1) / math.log(v2 / v1))))

    def _note_point(self, v: float, i: float) -> None:
        if v <= 0 or i <= 0:
            return
        if self._slope_pair is None:
            self._slope_pair = ((v, i), (v, i))
        elif abs(v - self._slope_pair[1][0]) > 1e-6 * v:
            self._slope_pair = (self._slope_pair[1], (v, i))

    #: constant-current regulation: relative tolerance and most load evaluations per step
    cc_tolerance = 2e-3
    cc_iterations = 6

    def _step(self, t: float) -> None:
        sup = self.supply
        sup.evolve(t)                # in constant current the loop holds the voltage
        v = sup.v_out
        i = float(self.cathode.emit(v, t, self._p))
        self._note_point(v, i)
        limit = sup.i_limit
        over = i > limit * (1 + self.cc_tolerance)
        under = sup.cc and i < limit * (1 - self.cc_tolerance)
        if sup.output and limit > 0 and (over or under):
            # constant current: the supply's current loop moves the voltage until the
            # load draws the limit (secant steps on ln I = n ln V + c), never above what
            # the voltage loop allows (setpoint, slew); reaching that, it is back in
            # constant voltage
            v_cap = min(sup.cv_target(t), v + sup.slew * max(0.0, t - self.t)) if under else v
            for _ in range(self.cc_iterations):
                v = v * (limit / i) ** (1.0 / self._exponent()) if i > 0 else v_cap
                v = max(0.0, min(v, v_cap))
                i = float(self.cathode.emit(v, t, self._p))
                self._note_point(v, i)
                if v >= v_cap or (i > 0 and abs(i / limit - 1.0) < self.cc_tolerance):
                    break
            if v >= v_cap and i <= limit * (1 + self.cc_tolerance):
                sup.leave_cc()
                sup.v_out = v
            else:
                sup.enter_cc(v, t)
                v = sup.v_out
        elif sup.cc and (not sup.output or v >= sup.cv_target(t)):
            sup.leave_cc()           # the voltage loop has taken over again
        i = max(0.0, i)
        sup.i_out = i
        self._i = i
        self._v_step = v
        self._p = float(self.chamber.advance(t, i, v))
        self.gauge.observe(t, self._p)
        self.t = t

    # -- faults from outside the instruments
    def host_lost(self) -> None:
        """The host vanished: every instrument sees its connection go."""
        for inst in self.instruments.values():
            inst.disconnect()
