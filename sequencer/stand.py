"""Build the stand of a run from a Rig: the one place that imports ``simulators``.

A rig whose instruments all have ``sim:`` addresses becomes a
``simulators.stand.SimulatedStand`` on a ``VirtualClock`` (``--speed N`` paces it at N times
real time); its interpreters are handed to ``drivers.open_instrument`` as in-process
transports, so the engine drives simulated instruments through exactly the drivers it uses
on hardware. Any other rig gets real drivers on a ``WallClock``. A rig mixing the two is
refused: one run has one clock.

The engine never learns which it got: it sees a ``sequencer.engine.Stand``.
"""
from __future__ import annotations

from typing import Any, Dict, Optional

from drivers.clock import VirtualClock, WallClock

from .engine import Stand
from .errors import RefusedError

#: retries the drivers make after a timeout before raising (worst case, for the deadman)
DRIVER_RETRIES = 2


class BuiltStand:
    """What ``build_stand`` returns: the engine's Stand, the clock, the simulated stand
    (None on hardware) and the instrument identities."""

    def __init__(self, stand: Stand, clock, sim=None):
        self.stand = stand
        self.clock = clock
        self.sim = sim

    @property
    def simulated(self) -> bool:
        return self.sim is not None


def _driver_name(inst) -> Optional[str]:
    return getattr(inst, "driver", None) or None


def build_stand(rig, *, speed: Optional[float] = None, seed: Optional[int] = None,
                simulation_overrides: Optional[Dict[str, Any]] = None,
                clock=None) -> BuiltStand:
    """Open every instrument of ``rig``. On failure everything opened so far is closed and
    the error raised (``DriverError`` subclasses: LockHeld, IdentityMismatch, ...)."""
    from drivers import open_instrument

    insts = list(rig.instruments)
    sims = [i for i in insts if str(i.address).startswith("sim:")]
    if sims and len(sims) != len(insts):
        raise RefusedError("the rig mixes simulated (sim:) and real instruments; one run has "
                           "one clock, so use all of one kind")
    simulated = bool(sims)
    sim = None
    if simulated:
        from simulators.stand import SimulatedStand   # the one import of simulators
        clock = clock or VirtualClock(speed=speed)
        config = dict(rig.simulation or {})
        if simulation_overrides:
            config.update(simulation_overrides)
        sim = SimulatedStand(config, clock, seed=seed)
    else:
        if speed is not None:
            raise RefusedError("--speed paces a simulated rig; this rig has real instruments")
        clock = clock or WallClock()

    opened = []
    roles: Dict[str, Any] = {}
    timeouts = []

    def open_role(inst, role, lock=True):
        opts = dict(getattr(inst, "options", None) or {})
        opts.setdefault("name", f"{inst.name} ({role})")
        opts["lock"] = lock
        if rig.state_dir:
            opts.setdefault("state_dir", str(rig.state_dir))
        ident = getattr(inst, "identity", None)
        if ident is not None:
            if getattr(ident, "model", None):
                opts.setdefault("expected_model", ident.model)
            if getattr(ident, "serial", None):
                opts.setdefault("expected_serial", ident.serial)
        if role == "supply":
            opts.setdefault("rig_max_v", rig.voltage_max)
            opts.setdefault("rig_max_a", rig.current_max)
        interp = None
        if sim is not None:
            interp = sim.interpreter(str(inst.address)[4:])
            opts.setdefault("stand_id", f"{rig.name}-{id(sim):x}")
        return open_instrument(role, _driver_name(inst), str(inst.address),
                               dialect=getattr(inst, "dialect", None), clock=clock,
                               options=opts, interpreter=interp)

    try:
        for inst in insts:
            for role in inst.roles:
                if role in roles:
                    continue
                drv = open_role(inst, role)
                opened.append(drv)
                roles[role] = drv
                t = getattr(getattr(drv, "transport", None), "timeout", None)
                if t:
                    timeouts.append(float(t))
        if "supply" not in roles:
            raise RefusedError("the rig has no supply")
    except BaseException:
        for d in reversed(opened):
            try:
                d.close()
            except Exception:   # noqa: BLE001
                pass
        raise

    sup_inst = rig.instrument_for("supply")
    # The supply's safe_off() escalates to the inhibit line as its last step, where the
    # rig has an interlock instrument that drives one.
    inhibit = getattr(roles.get("interlock"), "inhibit", None)
    if inhibit is not None and getattr(roles["supply"], "inhibit_line", None) is None:
        roles["supply"].inhibit_line = inhibit

    def open_fresh_supply():
        # a new transport to the same supply, without the resource lock (this process
        # already holds it); used by the deadman and after a failed safe_off
        drv = open_role(sup_inst, "supply", lock=False)
        if inhibit is not None and getattr(drv, "inhibit_line", None) is None:
            drv.inhibit_line = inhibit
        stand.closers.append(drv.close)
        return drv

    identities = {}
    for role, drv in roles.items():
        fn = getattr(drv, "identify", None)
        if fn is None:
            identities[role] = {"simulated": simulated, "address": _address_of(rig, role)}
            continue
        ident = fn()
        identities[role] = {k: getattr(ident, k) for k in
                            ("maker", "model", "serial", "firmware", "raw", "simulated")}
        identities[role]["address"] = _address_of(rig, role)

    worst = max(timeouts, default=1.0)
    stand = Stand(
        supply=roles["supply"], ammeter=roles.get("ammeter"), gauge=roles.get("gauge"),
        interlock=roles.get("interlock"), polarity=int(rig.polarity),
        ammeter_sign=int(getattr(rig, "ammeter_sign", 1) or 1),
        series_resistance=float(rig.series_resistance_ohm or 0.0),
        open_fresh_supply=open_fresh_supply,
        call_budget_s=worst * (DRIVER_RETRIES + 1),
        simulated=simulated, identities=identities,
        closers=[d.close for d in opened])
    return BuiltStand(stand, clock, sim)


def _address_of(rig, role) -> str:
    inst = rig.instrument_for(role)
    return str(inst.address) if inst is not None else ""


def all_report_simulated(stand: Stand) -> bool:
    """True only when every instrument says it is simulated (``Identity.simulated``,
    or, for roles without ``*IDN?``, a ``sim:`` address)."""
    if not stand.identities:
        return False
    for role, ident in stand.identities.items():
        if not ident.get("simulated"):
            return False
        if not str(ident.get("address", "")).startswith("sim:") and "model" not in ident:
            return False
    return True
