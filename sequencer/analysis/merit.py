"""Figures of merit of a cathode from its upward I–V branch.

- macroscopic current density J_M = I / A_x on the fibre's cross-section A_x = pi D^2 / 4
  (the convention of large-area field emitters: current over the emitter's footprint;
  common practice, no source);
- turn-on and threshold fields: the macroscopic field F_M = V/d at which J_M reaches the
  conventional 10 uA/cm^2 (0.1 A/m^2) and 10 mA/cm^2 (100 A/m^2) (conventions of the
  nanotube field-emission literature, e.g. J.-M. Bonard et al., Adv. Mater. 13 (2001) 184;
  from memory), interpolated linearly in ln J; without a gap the voltages are given;
- the current at a reference voltage (interpolated in ln I);
- the planar Child–Langmuir current density at the largest voltage (physics.child_langmuir_j;
  Child 1911, Langmuir 1913) and J_M / J_CL, as an indicator only: space charge at a fibre
  tip is local and starts far below the planar value.
"""
from __future__ import annotations

import math
from typing import Optional

import numpy as np

from .. import physics

TURN_ON_J = 0.1        # A/m^2  (10 uA/cm^2)
THRESHOLD_J = 100.0    # A/m^2  (10 mA/cm^2)


def _crossing(V, y, level):
    """First V at which y (increasing on the way) reaches level, linear interpolation."""
    for k in range(1, V.size):
        if y[k - 1] < level <= y[k]:
            return float(V[k - 1] + (level - y[k - 1]) * (V[k] - V[k - 1]) / (y[k] - y[k - 1]))
    if y.size and y[0] >= level:
        return None
    return None


def figures_of_merit(V, I, gap: Optional[float] = None, diameter: Optional[float] = None,
                     v_ref: Optional[float] = None) -> dict:
    """The numbers of the module docstring (V in V, I in A, gap and diameter in m)."""
    V = np.asarray(V, dtype=float)
    I = np.asarray(I, dtype=float)
    ok = (V > 0) & (I > 0)
    V, I = V[ok], I[ok]
    o = np.argsort(V)
    V, I = V[o], I[o]
    out = {"gap_m": gap, "diameter_m": diameter, "v_max": float(V.max()) if V.size else None,
           "i_max_a": float(I.max()) if I.size else None}
    if V.size < 2:
        out["note"] = "fewer than two emitting points"
        return out
    lnI = np.log(I)
    if v_ref is not None:
        out["v_ref"] = float(v_ref)
        out["i_at_v_ref_a"] = (float(math.exp(np.interp(v_ref, V, lnI)))
                               if V[0] <= v_ref <= V[-1] else None)
    if diameter:
        ax = math.pi * diameter ** 2 / 4.0
        out["cross_section_m2"] = ax
        J = I / ax
        out["j_max_a_per_m2"] = float(J.max())
        for name, level in (("turn_on", TURN_ON_J), ("threshold", THRESHOLD_J)):
            v = _crossing(V, np.log(J), math.log(level))
            out[f"{name}_v"] = v
            out[f"{name}_field_v_per_m"] = (v / gap) if (v is not None and gap) else None
            if v is None:
                out[f"{name}_note"] = ("not reached" if J.max() < level else "already above at the lowest point")
    if gap:
        jcl = float(physics.child_langmuir_j(V[-1], gap))
        out["child_langmuir_j_a_per_m2"] = jcl
        if diameter:
            out["j_over_child_langmuir"] = out["j_max_a_per_m2"] / jcl
    return out
