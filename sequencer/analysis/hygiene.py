"""Data hygiene before any fit: from raw readings to settled I–V points.

What is done, in order (each step's numbers go to the results, so a reader can check):

1. Readings that cannot be trusted are set aside: current flagged overflow/invalid or not a
   number, interlock open, supply trip.
2. Zero-voltage readings (|setpoint| and |V| <= 1 V) give the ammeter's offset (their mean,
   subtracted from every current) and its noise floor sigma_0 (their standard deviation).
3. I–V points: readings of ramp, sweep and condition steps (every row of an outside CSV;
   a condition step climbs in levels and leaves each only when the current has been stable,
   so its levels are settled I–V points) are grouped
   into plateaus of one setpoint; the first readings after each change are skipped (the
   first third of a plateau of six or more, the first of three to five) and the rest give
   the settled mean, its spread and its standard uncertainty (std / sqrt(n)).
4. Sweep direction of each plateau: up when its setpoint is above the previous one of the
   same step, down when below.
5. Gap voltage: V - I R when a series resistance R is given, else the recorded gap voltage
   (the rig's V - I R_series), else V.
6. Ohmic leakage: turn-on is the lowest voltage above which d ln I / d ln V (a five-point
   local fit) stays above 4 for three points in a row (ohmic leakage has 1; field emission
   2 + s b phi^(3/2) zeta / V, above ten in practice; the threshold 4 is common practice, no
   source). Below turn-on, I = c + g V is fitted (c = 0 when the offset
   was measured and subtracted); a leakage conductance g > 3 u(g) is
   subtracted as g V from every point if it looks ohmic: where I - c stands three sigma clear
   of the scatter (at least three points), d ln(I - c) / d ln V must be below 2, else the
   rise is the start of emission and nothing is subtracted. Without zero-voltage readings the residual scatter of
   that fit stands in for sigma_0.
7. Dropped from the fits: points below ten times the noise floor, points in constant-current
   (compliance) mode or flagged, and - for files without a compliance flag - a plateau at the
   top of a branch (three or more of the highest-voltage points within 5 % of the median of
   the top three, spread over more than 2 % in voltage). Otherwise the floor and the compliance limit would show up
   as false emission regimes.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import List, Optional

import numpy as np

from .csvin import Readings

ZERO_V = 1.0
IV_KINDS = ("ramp", "sweep", "condition", "")
HOLD_KINDS = ("hold",)
FLOOR_MULTIPLE = 10.0
LOGLOG_TURN_ON = 4.0
PLATEAU_REL = 0.05
PLATEAU_SPAN = 0.02
BAD_FLAGS = ("overflow", "invalid", "supply-trip", "interlock-open")


@dataclass
class IVPoints:
    """Settled I–V points (numpy arrays of one length) and what was done to get them."""

    V: np.ndarray            # voltage used for the fits (gap voltage), V
    V_supply: np.ndarray     # supply voltage (mean of settled readings), V
    setpoint: np.ndarray
    I: np.ndarray            # corrected current (offset and leakage removed), A
    I_raw: np.ndarray        # settled mean as read, A
    u_I: np.ndarray          # standard uncertainty of the mean, A (NaN: one reading)
    spread: np.ndarray       # standard deviation of the settled readings, A
    n: np.ndarray            # settled readings per point
    direction: np.ndarray    # +1 up, -1 down, 0 unknown
    t: np.ndarray            # time of the point (mean of settled readings), s
    step: np.ndarray
    keep: np.ndarray         # bool: used in fits
    reason: List[str]        # why a point was dropped ('' if kept)
    offset: float = 0.0
    floor_sigma: float = math.nan
    floor_source: str = ""
    leakage_g: float = 0.0
    leakage_u: float = math.nan
    turn_on_v: float = math.nan
    series_r: Optional[float] = None
    notes: List[str] = field(default_factory=list)

    def subset(self, mask) -> "IVPoints":
        mask = np.asarray(mask, dtype=bool)
        kw = {k: (getattr(self, k)[mask] if isinstance(getattr(self, k), np.ndarray) else getattr(self, k))
              for k in self.__dataclass_fields__}
        kw["reason"] = [r for r, m in zip(self.reason, mask) if m]
        kw["notes"] = list(self.notes)
        return IVPoints(**kw)

    def summary(self) -> dict:
        dropped = {}
        for r in self.reason:
            if r:
                dropped[r] = dropped.get(r, 0) + 1
        return {"points": int(self.V.size), "kept": int(np.count_nonzero(self.keep)),
                "dropped": dropped, "offset_a": self.offset, "floor_sigma_a": self.floor_sigma,
                "floor_source": self.floor_source, "leakage_s": self.leakage_g,
                "leakage_u_s": self.leakage_u, "turn_on_v": self.turn_on_v,
                "series_resistance_ohm": self.series_r, "notes": list(self.notes)}


def bad_rows(r: Readings) -> np.ndarray:
    """Readings that cannot be trusted (step 1 of the module docstring)."""
    bad = ~np.isfinite(r.current) | r.overflow | r.interlock_open
    for k, s in enumerate(r.status):
        if s and any(f in s.split("|") for f in BAD_FLAGS):
            bad[k] = True
    return bad


def zero_voltage_stats(r: Readings, bad=None):
    """(offset, sigma_0, n) from the zero-voltage readings (step 2), NaN when too few."""
    bad = bad_rows(r) if bad is None else bad
    sp = np.where(np.isfinite(r.setpoint), r.setpoint, r.voltage)
    vv = np.where(np.isfinite(r.voltage), r.voltage, sp)
    zero = (~bad) & (np.abs(sp) <= ZERO_V) & (np.abs(vv) <= ZERO_V)
    I0 = r.current[zero]
    if I0.size >= 3:
        return float(np.mean(I0)), float(np.std(I0, ddof=1)), int(I0.size)
    return 0.0, math.nan, int(I0.size)


def _plateaus(r: Readings, rows: np.ndarray):
    """Consecutive rows (indices in ``rows``) with the same step and setpoint."""
    groups = []
    cur = []
    prev = None
    for k in rows:
        key = (int(r.step[k]), r.setpoint[k] if np.isfinite(r.setpoint[k]) else r.voltage[k])
        if prev is not None and (key != prev or k != cur[-1] + 1):
            groups.append(cur)
            cur = []
        cur.append(int(k))
        prev = key
    if cur:
        groups.append(cur)
    return groups


def _settled(idx: List[int]) -> List[int]:
    n = len(idx)
    if n >= 6:
        return idx[int(math.ceil(n / 3)):]
    if n >= 3:
        return idx[1:]
    return idx


def _loglog_slope(V, I, half=2):
    """Local d ln I / d ln V by a (2*half+1)-point straight-line fit (centred windows; the
    ends get NaN)."""
    out = np.full(V.size, np.nan)
    w = 2 * half + 1
    if V.size < w:
        return out
    lv = np.lib.stride_tricks.sliding_window_view(np.log(V), w)
    li = np.lib.stride_tricks.sliding_window_view(np.log(I), w)
    dv = lv - lv.mean(axis=1, keepdims=True)
    di = li - li.mean(axis=1, keepdims=True)
    den = (dv * dv).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out[half:V.size - half] = np.where(den > 0, (dv * di).sum(axis=1) / den, np.nan)
    return out


def prepare(r: Readings, series_r: Optional[float] = None) -> IVPoints:
    """From readings to settled, cleaned I–V points (module docstring, steps 1-7)."""
    bad = bad_rows(r)
    offset, sigma0, n0 = zero_voltage_stats(r, bad)
    notes = list(r.notes)
    kinds = np.array([k in IV_KINDS for k in r.step_kind], dtype=bool)
    sp_all = np.where(np.isfinite(r.setpoint), r.setpoint, r.voltage)
    rows = np.flatnonzero(kinds & (~bad) & (np.abs(sp_all) > ZERO_V))
    groups = _plateaus(r, rows)
    if not groups:
        return _empty(notes + ["no I–V readings (ramp or sweep steps above 1 V)"])

    P = {k: [] for k in ("V_supply", "gapv", "setpoint", "I_raw", "spread", "n", "t", "step", "cc")}
    for g in groups:
        s = _settled(g)
        if len(s) == 1:                       # a continuous ramp: one reading per point
            k = s[0]
            P["I_raw"].append(float(r.current[k]))
            P["spread"].append(math.nan)
            P["n"].append(1)
            P["V_supply"].append(float(r.voltage[k]) if np.isfinite(r.voltage[k]) else float(sp_all[k]))
            P["gapv"].append(float(r.gap_voltage[k]))
            P["setpoint"].append(float(sp_all[k]))
            P["t"].append(float(r.t[k]) if np.isfinite(r.t[k]) else float(k))
            P["step"].append(int(r.step[k]))
            P["cc"].append(bool(r.cc[k]))
            continue
        I = r.current[s]
        P["I_raw"].append(float(np.mean(I)))
        P["spread"].append(float(np.std(I, ddof=1)) if len(s) >= 2 else math.nan)
        P["n"].append(len(s))
        vs = r.voltage[s]
        P["V_supply"].append(float(np.nanmean(vs)) if np.any(np.isfinite(vs)) else float(sp_all[s[0]]))
        gv = r.gap_voltage[s]
        P["gapv"].append(float(np.nanmean(gv)) if np.any(np.isfinite(gv)) else math.nan)
        P["setpoint"].append(float(sp_all[s[0]]))
        ts = r.t[s]
        P["t"].append(float(np.nanmean(ts)) if np.any(np.isfinite(ts)) else float(s[0]))
        P["step"].append(int(r.step[s[0]]))
        P["cc"].append(bool(np.any(r.cc[s])))
    A = {k: np.array(v) for k, v in P.items()}
    m = A["I_raw"].size

    # direction of each plateau within its step
    direction = np.zeros(m, dtype=int)
    for k in range(m):
        for j in (k - 1, k + 1):
            if 0 <= j < m and A["step"][j] == A["step"][k] and A["setpoint"][j] != A["setpoint"][k]:
                up = A["setpoint"][k] > A["setpoint"][j] if j < k else A["setpoint"][j] > A["setpoint"][k]
                direction[k] = 1 if up else -1
                break
    if r.source == "csv" and np.all(direction == 0) and m > 1:
        direction[:] = 1

    I = A["I_raw"] - offset
    if series_r is not None:
        V = A["V_supply"] - A["I_raw"] * series_r
        notes.append(f"gap voltage V - I R with R = {series_r:.4g} ohm")
    elif np.any(np.isfinite(A["gapv"])):
        V = np.where(np.isfinite(A["gapv"]), A["gapv"], A["V_supply"])
    else:
        V = A["V_supply"]

    # turn-on and ohmic leakage (step 6), on the upward (or all) points sorted by voltage
    sel = np.flatnonzero(direction >= 0) if np.any(direction >= 0) else np.arange(m)
    sel = sel[np.argsort(V[sel])]
    pos = sel[I[sel] > (3 * sigma0 if sigma0 == sigma0 else 0.0)]
    turn_on = math.nan
    if pos.size >= 5:
        sl = _loglog_slope(V[pos], I[pos])
        above = sl > LOGLOG_TURN_ON
        for k in range(pos.size - 2):
            if above[k] and above[k + 1] and above[k + 2]:
                turn_on = float(V[pos[k]])
                break
    g = 0.0
    gu = math.nan
    floor_sigma, floor_source = sigma0, f"{n0} zero-voltage readings" if sigma0 == sigma0 else ""
    low = sel[V[sel] < turn_on] if turn_on == turn_on else np.array([], dtype=int)
    if low.size >= 3:
        # with a measured offset (already subtracted) the leak line goes through the origin
        through_origin = sigma0 == sigma0
        X = V[low][:, None] if through_origin else np.column_stack([np.ones(low.size), V[low]])
        coef, *_ = np.linalg.lstsq(X, I[low], rcond=None)
        res = I[low] - X @ coef
        dof = max(low.size - X.shape[1], 1)
        s2 = float(res @ res) / dof
        cov = s2 * np.linalg.pinv(X.T @ X)
        gfit, gse = float(coef[-1]), float(math.sqrt(max(cov[-1, -1], 0.0)))
        coef = np.array([0.0, gfit]) if through_origin else coef
        # ohmic, not the first of the emission: where I - c stands clear of the scatter, its
        # log-log slope must be near 1, not the steep rise of an emission tail
        sig_level = 3 * (sigma0 if sigma0 == sigma0 else math.sqrt(s2))
        lift = I[low] - coef[0]
        sig = lift > sig_level
        ohmic = False
        if np.count_nonzero(sig) >= 3 and np.ptp(np.log(V[low][sig])) > 0:
            ohmic = np.polyfit(np.log(V[low][sig]), np.log(lift[sig]), 1)[0] < 2.0
        if gfit > 0 and gfit > 3 * gse and ohmic:
            g, gu = gfit, gse
            notes.append(f"ohmic leakage {g:.3g} S (R_leak {1 / g:.3g} ohm) measured on {low.size} "
                         f"points below turn-on, subtracted")
        if not floor_sigma == floor_sigma:
            floor_sigma = float(math.sqrt(s2)) if g else float(np.std(I[low], ddof=1))
            floor_source = f"scatter of {low.size} points below turn-on"
    if not floor_sigma == floor_sigma:
        notes.append("no zero-voltage readings and no points below turn-on: noise floor not measured, "
                     "no floor cut")
    I = I - g * V

    reason = [""] * m
    for k in range(m):
        if A["cc"][k]:
            reason[k] = "compliance (constant-current mode)"
        elif not (V[k] > 0):
            reason[k] = "gap voltage not positive"
        elif floor_sigma == floor_sigma and I[k] <= FLOOR_MULTIPLE * floor_sigma:
            reason[k] = "below 10x noise floor"
        elif not I[k] > 0:
            reason[k] = "current not positive"
    # compliance-like plateau at the top of each branch (files without a compliance flag)
    for d in (1, -1, 0):
        br = sorted((k for k in range(m) if direction[k] == d and not reason[k]), key=lambda k: V[k])
        if len(br) < 3:
            continue
        i_top = float(np.median([I[k] for k in br[-3:]]))
        top = []
        for k in reversed(br):
            if abs(I[k] / i_top - 1.0) > PLATEAU_REL:
                break
            top.append(k)
        vs = [V[k] for k in top]
        if len(top) >= 3 and (max(vs) - min(vs)) > PLATEAU_SPAN * max(vs):
            for k in top:
                reason[k] = "plateau at the top (compliance-like)"
            notes.append(f"{len(top)} points of a current plateau near {i_top:.3g} A dropped "
                         "(no compliance flag in the file)")
    keep = np.array([not x for x in reason], dtype=bool)
    with np.errstate(invalid="ignore", divide="ignore"):
        u = A["spread"] / np.sqrt(A["n"])
    return IVPoints(V=V, V_supply=A["V_supply"], setpoint=A["setpoint"], I=I, I_raw=A["I_raw"],
                    u_I=u, spread=A["spread"], n=A["n"], direction=direction, t=A["t"], step=A["step"],
                    keep=keep, reason=reason, offset=offset, floor_sigma=floor_sigma,
                    floor_source=floor_source, leakage_g=g, leakage_u=gu, turn_on_v=turn_on,
                    series_r=series_r, notes=notes)


def _empty(notes) -> IVPoints:
    e = np.array([])
    return IVPoints(V=e, V_supply=e, setpoint=e, I=e, I_raw=e, u_I=e, spread=e, n=e.astype(int),
                    direction=e.astype(int), t=e, step=e.astype(int), keep=e.astype(bool), reason=[],
                    notes=notes)


def hold_segments(r: Readings):
    """Row indices of each hold (dwell) step, as a list of (step, indices)."""
    bad = bad_rows(r)
    out = []
    steps = sorted({int(s) for s, k in zip(r.step, r.step_kind) if k in HOLD_KINDS})
    for s in steps:
        idx = np.flatnonzero((r.step == s) & ~bad)
        if idx.size:
            out.append((s, idx))
    return out


SHORT_REVERSAL = 3


def sweep_runs(pts: IVPoints):
    """Split the points into branches: runs of consecutive points with one sweep direction
    within one step (so the three up-sweeps of a repeated sweep, each in its own emitter
    state, are not pooled). A reversal of fewer than three points between two runs of the
    other direction in the same step (a watchdog back-off in the middle of a ramp) is set
    aside (reason "short reversal (back-off)") and the runs on either side are joined.
    Returns [(name, direction, indices)]: names "up", "down", "all", numbered "up 1",
    "up 2", ... when a direction has several runs."""
    runs = []
    for k in range(pts.V.size):
        d, s = int(pts.direction[k]), int(pts.step[k])
        if runs and runs[-1][0] == d and runs[-1][1] == s:
            runs[-1][2].append(k)
        else:
            runs.append([d, s, [k]])
    changed = True
    while changed:
        changed = False
        for i in range(1, len(runs) - 1):
            a, b, c = runs[i - 1], runs[i], runs[i + 1]
            if len(b[2]) < SHORT_REVERSAL and a[0] == c[0] != b[0] and a[1] == b[1] == c[1]:
                for k in b[2]:
                    if not pts.reason[k]:
                        pts.reason[k] = "short reversal (back-off)"
                    pts.keep[k] = False
                runs[i - 1] = [a[0], a[1], a[2] + b[2] + c[2]]
                del runs[i:i + 2]
                changed = True
                break
    base = {1: "up", -1: "down", 0: "all"}
    count = {d: sum(1 for r in runs if r[0] == d) for d in base}
    seen = {d: 0 for d in base}
    out = []
    for d, _s, idx in runs:
        seen[d] += 1
        name = base[d] if count[d] == 1 else f"{base[d]} {seen[d]}"
        out.append((name, d, np.array(sorted(idx), dtype=int)))
    return out
