"""Checks made at arm time on the roles around the supply (issue 3, step 5): the ammeter's
configuration read back, a fresh valid gauge reading below the arm ceiling, the interlock
chain closed. ``preflight()`` raises ``ArmRefused`` naming the first role that forbids
arming and returns what it saw otherwise. The supply's own checks are ``Supply.arm()``."""
from __future__ import annotations

import math
from typing import Optional

from .errors import ArmRefused, DriverError


def preflight(ammeter=None, gauge=None, interlock=None,
              pressure_arm_max_pa: Optional[float] = None) -> dict:
    seen: dict = {}
    if interlock is not None:
        try:
            closed = interlock.chain_closed()
        except DriverError as exc:
            raise ArmRefused(getattr(interlock, "where", "interlock"),
                             f"interlock chain unreadable: {exc.why}") from None
        if not closed:
            raise ArmRefused(getattr(interlock, "where", "interlock"), "interlock chain is open")
        seen["interlock"] = "closed"
    if gauge is not None:
        r = gauge.read()
        where = getattr(gauge, "where", "gauge")
        if r.state not in ("ok", "under-range") or not math.isfinite(r.pa):
            raise ArmRefused(where, f"no valid pressure reading ({r.state})")
        if pressure_arm_max_pa is not None and not r.pa < pressure_arm_max_pa:
            raise ArmRefused(where, f"pressure {r.pa:.3g} Pa is not below the arm ceiling "
                                    f"{pressure_arm_max_pa:.3g} Pa")
        seen["pressure_pa"] = r.pa
    if ammeter is not None:
        seen["ammeter"] = ammeter.verify_config()      # raises ArmRefused on any difference
    return seen
