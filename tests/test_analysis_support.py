"""Support for the analysis tests (this file holds no tests of its own).

- The reference emission law, written out here independently of sequencer.physics:
  Murphy–Good zero-temperature current density for a Schottky–Nordheim barrier,
  J = a phi^-1 t(f)^-2 F^2 exp(-v(f) b phi^(3/2) / F)  (E.L. Murphy and R.H. Good, Phys. Rev.
  102 (1956) 1464), with the constants a, b, c_S^2 computed from CODATA through
  scipy.constants and the exact v(f), t(f) from complete elliptic integrals through
  scipy.special (R.G. Forbes and J.H.B. Deane, Proc. R. Soc. A 463 (2007) 2907):
  with y = sqrt(f), m = (1 - y)/(1 + y),
      v = sqrt(1 + y) [E(m) - y K(m)],   t = [(1 + y) E(m) - y K(m)] / sqrt(1 + y).
- A writer of run folders in the format of BRIEF.md (samples.csv with the name[unit]
  header, events.jsonl, manifest.json, protocol.yaml, rig.yaml, end.json), so the analysis
  is tested on folders the tests make themselves.
"""
from __future__ import annotations

import json
import os

import numpy as np
import scipy.constants as C
from scipy import special

A_REF = C.e ** 3 / (8 * np.pi * C.h) / C.e                                # A eV V^-2
B_REF = 4.0 / 3.0 * np.sqrt(2 * C.m_e) / (C.e * C.hbar) * C.e ** 1.5      # eV^-3/2 V m^-1
CS2_REF = C.e ** 3 / (4 * np.pi * C.epsilon_0) / C.e ** 2                  # eV^2 V^-1 m

HEADER = ("seq[],utc[s],t[s],t_v[s],t_i[s],t_p[s],setpoint[V],voltage[V],gap_voltage[V],current[A],"
          "supply_current[A],range[A],pressure[Pa],pressure_age[s],step[],step_kind[],cc[],overflow[],"
          "interlock[],status[]")


def v_ref(f):
    y = np.sqrt(np.asarray(f, dtype=float))
    m = (1 - y) / (1 + y)
    return np.sqrt(1 + y) * (special.ellipe(m) - y * special.ellipk(m))


def t_ref(f):
    y = np.sqrt(np.asarray(f, dtype=float))
    m = (1 - y) / (1 + y)
    return ((1 + y) * special.ellipe(m) - y * special.ellipk(m)) / np.sqrt(1 + y)


def mg_current(V, beta, area, gap, phi):
    """Current (A) at gap voltage V for field enhancement beta over gap (m), area (m^2)."""
    F = np.asarray(V, dtype=float) * beta / gap
    f = CS2_REF * F / phi ** 2
    assert np.all(f < 1), "reference law used beyond the barrier top"
    return area * A_REF / (phi * t_ref(f) ** 2) * F ** 2 * np.exp(-v_ref(f) * B_REF * phi ** 1.5 / F)


def sweep_points(v_lo, v_hi, step, down=True):
    up = list(np.arange(v_lo, v_hi + step / 2, step))
    return up + (up[-2::-1] if down else [])


def write_run_folder(root, name, current_of_v, points, *, seed, samples_per_point=5,
                     zero_samples=20, floor_sigma=2e-12, noise=0.01, i_limit=None,
                     series_r=0.0, hold=None, protocol_name="KL-F12 sweep", sample="KL-F12",
                     gap="500 um", diameter="50 um", events=(), period=0.1, end=True,
                     manifest_extra=None, record_gap_voltage=True):
    """Write a run folder and return its path. ``current_of_v(V_gap)`` is the emission law;
    with ``series_r`` the gap voltage solves V_gap = V - I R (bisection); readings get
    multiplicative noise ``noise`` and an additive floor ``floor_sigma``; above ``i_limit``
    the supply is in compliance (current pinned, cc flag). ``hold`` = (voltage, n samples).
    ``record_gap_voltage=False`` writes the supply voltage as gap voltage (a rig that does not
    know its series resistance)."""
    rng = np.random.default_rng(seed)
    folder = os.path.join(root, name)
    os.makedirs(folder, exist_ok=True)
    rows = []
    t = 0.0
    seq = 0

    def emit(V):
        if series_r <= 0:
            return V, current_of_v(V)
        lo, hi = 0.0, V
        for _ in range(200):                     # solve V_g + I(V_g) R = V
            mid = (lo + hi) / 2
            if mid + current_of_v(mid) * series_r > V:
                hi = mid
            else:
                lo = mid
        return lo, current_of_v(lo)

    def add(step, kind, sp):
        nonlocal t, seq
        vg, i = emit(sp) if sp > 0 else (0.0, 0.0)
        cc = False
        if i_limit is not None and i > i_limit:
            i, cc = i_limit, True
        reading = i * (1 + noise * rng.standard_normal()) + floor_sigma * rng.standard_normal()
        status = "cc" if cc else ""
        rows.append([seq, 1.7e9 + t, t, t, t, t, sp, sp, float(vg if record_gap_voltage else sp), float(reading), float(i), 2e-5, 1e-6, 0.1, step, kind,
                     int(cc), 0, 1, status])
        seq += 1
        t += period

    for _ in range(zero_samples):
        add(0, "rest", 0.0)
    for v in points:
        for _ in range(samples_per_point):
            add(1, "sweep", float(v))
    if hold:
        for _ in range(hold[1]):
            add(2, "hold", float(hold[0]))
    with open(os.path.join(folder, "samples.csv"), "w", encoding="utf-8") as fh:
        fh.write(HEADER + "\n")
        for r in rows:
            fh.write(",".join(repr(x) if isinstance(x, float) else str(x) for x in r) + "\n")
    with open(os.path.join(folder, "events.jsonl"), "w", encoding="utf-8") as fh:
        fh.write(json.dumps({"seq": 0, "t": 0.0, "utc": 1.7e9, "kind": "arm"}) + "\n")
        for ev in events:
            fh.write(json.dumps(ev) + "\n")
    manifest = {"protocol_name": protocol_name, "sample": sample, "utc": "2026-12-01T10:00:00Z",
                "seed": seed}
    manifest.update(manifest_extra or {})
    with open(os.path.join(folder, "manifest.json"), "w", encoding="utf-8") as fh:
        json.dump(manifest, fh)
    with open(os.path.join(folder, "protocol.yaml"), "w", encoding="utf-8") as fh:
        fh.write(f"name: {json.dumps(protocol_name)}\nsample:\n  id: {sample}\n  kind: fibre\n"
                 f"  diameter: {diameter}\ngeometry:\n  gap: {gap}\nlimits:\n  current_max: 20 uA\n")
    with open(os.path.join(folder, "rig.yaml"), "w", encoding="utf-8") as fh:
        fh.write("stand: stand-B\nlab: Kestrel Lane cold-cathode lab\n")
    if end:
        with open(os.path.join(folder, "end.json"), "w", encoding="utf-8") as fh:
            json.dump({"outcome": "completed", "exit_code": 0, "reason": "plan finished",
                       "confirmed_off": True}, fh)
    return folder
