"""Calibrate the simulated cathode to recorded runs: fit what I–V data can determine.

What is fitted (``simulators.cathode.FITTABLE``), and how:

* **enhancement-factor scale** (``height_median_m``) and **effective area**
  (``area_scale``), from the I–V sweeps (ramp and sweep steps). Each recorded run's settled
  points (``sequencer.analysis.hygiene.prepare``) are put through the Fowler–Nordheim
  extraction of ``sequencer.analysis.extract`` (FN plot form, phi = 4.8 eV, the analysis
  default): voltage conversion length zeta (beta = gap / zeta) and formal area A_f. The
  model is then run over the *same recorded conditions* (the recorded supply voltage and
  pressure at the recorded times, fed to ``simulators.cathode.Cathode.emit``) with flicker
  and ion hits off, and its currents analysed in exactly the same way. The parameters are
  moved until the simulated zeta and A_f equal the recorded ones (indirect inference: the
  FN extraction need not be exact for the ensemble; it only has to be applied alike to
  both). Update rule, a fixed point: height_median <- height_median x zeta_sim/zeta_rec
  (an emitter's enhancement grows about linearly with its height), area_scale <-
  area_scale x A_rec/A_sim (the current is linear in the emitting area). It converges in a
  few passes because beta depends on height a little less than linearly.
* **noise level** (``noise_level``), from the dwells (hold steps): the flicker is
  I = I0 exp(s x - s^2/2), x a normalised sum of n unit Ornstein–Uhlenbeck processes with
  correlation times tau_k (``simulators.equations.ar1_coefficients``, exact discretisation,
  Gillespie 1996). Between samples dt apart, Var(x(t+dt) - x(t)) = (1/n) sum 2 (1 -
  exp(-dt/tau_k)), so s = std(d ln I) / sqrt((1/n) sum 2 (1 - exp(-dt/tau_k))), with a
  robust standard deviation (1.4826 x the median absolute deviation; for a normal
  distribution, the consistency constant of the MAD, Rousseeuw and Croux, JASA 88 (1993)
  1273) so that jumps from ion hits do not count as noise. First differences remove the
  slow drift of a dwell.
* **burst rate** (``burst_rate_hz``), from the dwells: jumps in ln I beyond
  ``JUMP_SIGMAS`` robust standard deviations are counted; the exposure of the model's
  rate (ion hits per second at 10 uA and 1e-5 Pa, scaled with current x pressure) is
  sum (I / 10 uA)(p / 1e-5 Pa) dt over the recorded dwell; the share of hits that show as
  such a jump is found by running the model over the same dwell with a known rate. Rate =
  jumps / (share x exposure); its relative uncertainty is about 1 / sqrt(jumps) (Poisson).

Not fitted: heights and radii separately (only the enhancement they make is seen; the
radii, the height spread ``height_sigma`` and ``radius_sigma`` are kept from the prior
rig), and everything else in the cathode block (``simulators.cathode.PARAMS``), which is
kept. The output is the first run's rig file with the cathode block updated (a commented
YAML) and a PNG comparing recorded and simulated I–V and dwell.
"""
from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

from .errors import RefusedError

PHI_EV = 4.8               # FN extraction work function (sequencer.analysis default)
JUMP_SIGMAS = 6.0          # a jump: |d ln I - median| above this many robust sigmas
JUMP_MIN = 0.05            # ... and above 5 % (so a noiseless dwell's small steps are no jumps)
MAD_TO_SIGMA = 1.4826      # normal consistency constant of the MAD (Rousseeuw & Croux 1993)
MIN_SWEEP_POINTS = 6
MIN_DWELL_SAMPLES = 20
I_REF, P_REF = 1e-5, 1e-5  # the burst rate's reference current and pressure (cathode model)


@dataclass
class RecordedRun:
    folder: Path
    readings: Any                       # sequencer.analysis.csvin.Readings
    rig_doc: Dict[str, Any]             # rig.yaml as a plain dict
    cathode: Dict[str, Any]             # its simulation.cathode block
    seed: int
    series_r: Optional[float]
    sweep: Optional[Dict[str, float]] = None    # zeta, area of the recorded sweep
    dwells: List[np.ndarray] = field(default_factory=list)   # row indices of each dwell


@dataclass
class Fit:
    params: Dict[str, float]            # fitted values (cathode keys)
    prior: Dict[str, float]
    details: Dict[str, Any]


def _yaml_load(path: Path) -> Dict[str, Any]:
    import yaml
    from drivers.yamllimits import YamlLimit, load_limited
    try:
        doc = load_limited(path.read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError, YamlLimit) as exc:
        raise RefusedError(f"{path}: cannot read ({exc})") from None
    return doc if isinstance(doc, dict) else {}


def load_run(folder) -> RecordedRun:
    from .analysis import csvin, hygiene
    from .analysis.run import run_meta

    folder = Path(folder)
    if not (folder / "samples.csv").is_file():
        raise RefusedError(f"{folder}: not a run folder (no samples.csv)")
    readings = csvin.read_run_samples(str(folder / "samples.csv"))
    meta = run_meta(str(folder))
    rig_doc = _yaml_load(folder / "rig.yaml") if (folder / "rig.yaml").is_file() else {}
    sim = rig_doc.get("simulation") or {}
    cathode = dict(sim.get("cathode") or {})
    seed = (meta.get("manifest") or {}).get("seed")
    seed = int(seed if seed is not None else sim.get("seed", 0))
    run = RecordedRun(folder, readings, rig_doc, cathode, seed, meta.get("series_r_ohm"))
    # every row from a dwell's first to its last good one: flagged rows (a burst that
    # overflows the ammeter) stay in, as the jumps they are
    run.dwells = [np.arange(int(idx[0]), int(idx[-1]) + 1)
                  for _, idx in hygiene.hold_segments(readings) if idx.size >= MIN_DWELL_SAMPLES]
    return run


# --------------------------------------------------------------------------- sweeps
def sweep_points(readings, series_r=None) -> Optional[Dict[str, Any]]:
    """The settled up-sweep points of a recorded run (hygiene.prepare), or None: times,
    supply voltages, currents and fit weights."""
    from .analysis import forms, hygiene

    pts = hygiene.prepare(readings, series_r)
    keep = pts.keep & (pts.direction >= 0) & np.isfinite(pts.I) & (pts.I > 0) & np.isfinite(pts.t)
    if int(keep.sum()) < MIN_SWEEP_POINTS:
        return None
    I = pts.I[keep]
    return {"t": pts.t[keep], "Vs": pts.V_supply[keep], "I": I,
            "w": forms.weights_from(I, pts.u_I[keep]), "R": float(series_r or 0.0),
            "points": int(keep.sum())}


def fn_summary(Vs, I, w, R) -> Optional[Dict[str, Any]]:
    """zeta and formal area (FN plot form, sequencer.analysis.extract) of points at gap
    voltage Vs - I R."""
    from .analysis import extract

    V = np.asarray(Vs) - np.asarray(I) * R
    try:
        ex = extract.extract(V, I, w, "FN", PHI_EV, phi_u=0.0)
    except (ValueError, FloatingPointError):
        return None
    if not (math.isfinite(ex.zeta) and ex.zeta > 0 and math.isfinite(ex.area) and ex.area > 0):
        return None
    return {"zeta": ex.zeta, "area": ex.area, "V": V, "I": np.asarray(I)}


def simulated_points(sp: Dict[str, Any], readings, current) -> np.ndarray:
    """The model's current at the recorded points' times (the settled readings of a point
    share one setpoint, so the current between samples is interpolated)."""
    ok = np.isfinite(current)
    return np.interp(sp["t"], readings.t[ok], current[ok])


def _cathode_params(base: Dict[str, Any], **changes):
    from simulators.cathode import CathodeParams    # the model (calibrate fits the simulator)
    d = dict(base)
    d.update(changes)
    return CathodeParams.from_dict(d)


def simulate(cathode: Dict[str, Any], readings, seed: int, rows=None, **changes) -> np.ndarray:
    """The model's current over the recorded conditions: at each recorded time, the
    recorded supply voltage (setpoint where it is missing) and pressure."""
    from simulators.cathode import Cathode

    params = _cathode_params(cathode, **changes)
    # the ensemble drawn as the simulated stand draws it (simulators.stand._build_cathode)
    cath = Cathode(params, np.random.default_rng([seed & 0xFFFFFFFF, 1]))
    from simulators.stand import SimulatedStand
    step = SimulatedStand.max_step_s     # the stand advances its cathode in such steps
    n = readings.n
    rows = np.arange(n) if rows is None else np.asarray(rows)
    out = np.full(n, np.nan)
    p_last, v_last, t_last = 1e-6, 0.0, None
    for k in rows:
        v = readings.voltage[k]
        if not math.isfinite(v):
            v = readings.setpoint[k] if math.isfinite(readings.setpoint[k]) else 0.0
        v = abs(float(v))
        p = readings.pressure[k]
        p_last = p if math.isfinite(p) and p > 0 else p_last
        t = float(readings.t[k])
        if t_last is not None and t - t_last > step:
            # substeps between samples, as the stand takes them (what a burst does
            # between two readings is not seen by the ammeter, here either)
            m = int(math.ceil((t - t_last) / step))
            for j in range(1, m):
                f = j / m
                cath.emit(v_last + (v - v_last) * f, t_last + (t - t_last) * f, p_last)
        out[k] = cath.emit(v, t, p_last)
        v_last, t_last = v, t
    out.setflags(write=False)
    return out, cath


def _with_current(readings, current):
    r = replace(readings, current=np.asarray(current, dtype=float))
    n = readings.n
    return replace(r, overflow=np.zeros(n, dtype=bool), cc=np.zeros(n, dtype=bool))


# --------------------------------------------------------------------------- dwells
def _dlog(readings, idx) -> np.ndarray:
    I = readings.current[idx]
    ok = np.isfinite(I) & (I > 0)
    lnI = np.log(np.where(ok, I, np.nan))
    d = np.diff(lnI)
    return d[np.isfinite(d)]


def robust_sigma(d: np.ndarray) -> float:
    med = float(np.median(d))
    return MAD_TO_SIGMA * float(np.median(np.abs(d - med)))


def flicker_unit(dt: float, cathode: Dict[str, Any]) -> float:
    """std of x(t+dt) - x(t) for the model's normalised flicker sum (module docstring)."""
    p = _cathode_params(cathode)
    lo, hi = p.noise_corners_hz
    n = int(p.noise_poles)
    taus = np.geomspace(1 / (2 * np.pi * hi), 1 / (2 * np.pi * lo), n) if n > 1 \
        else np.array([1 / (2 * np.pi * lo)])
    return float(math.sqrt(np.mean(2.0 * (1.0 - np.exp(-dt / taus)))))


def count_jumps(I: np.ndarray, sigma: float) -> int:
    """Jump events in a dwell's currents ``I``: a change of ln I between neighbouring
    valid readings beyond max(JUMP_SIGMAS x sigma, JUMP_MIN), or an invalid reading (a
    burst overflows the ammeter's range and reads as NaN) between valid ones; events within
    two samples of each other count once (a one-sample spike is one event)."""
    I = np.asarray(I, dtype=float)
    ok = np.isfinite(I) & (I > 0)
    lnI = np.where(ok, np.log(np.where(ok, I, 1.0)), np.nan)
    d = lnI[1:] - lnI[:-1]
    fin = np.isfinite(d)
    med = float(np.median(d[fin])) if fin.any() else 0.0
    thr = max(JUMP_SIGMAS * sigma, JUMP_MIN)
    pos = set((np.flatnonzero(fin & (np.abs(d - med) > thr)) + 1).tolist())
    inner = np.flatnonzero(~ok)
    pos.update(int(k) for k in inner if 0 < k < I.size - 1)
    events, last = 0, -10
    for k in sorted(pos):
        if k > last + 2:
            events += 1
        last = k
    return events


def exposure(readings, idx) -> float:
    t, I, p = readings.t[idx], readings.current[idx], readings.pressure[idx]
    dt = np.diff(t)
    w = (np.nan_to_num(I[:-1]) / I_REF) * (np.nan_to_num(p[:-1]) / P_REF)
    return float(np.sum(np.clip(w, 0, None) * dt))


# --------------------------------------------------------------------------- the fit
def fit(runs: Sequence[RecordedRun], progress=None, max_iter: int = 8, tol: float = 0.01,
        prior_cathode: Optional[Dict[str, Any]] = None) -> Fit:
    """Fit ``runs``; ``prior_cathode`` (a rig's simulation.cathode block) is the starting
    point and supplies every parameter not fitted (default: the first run's rig)."""
    from simulators.cathode import CathodeParams, FITTABLE

    base = dict(runs[0].cathode if prior_cathode is None else prior_cathode)
    prior_full = CathodeParams.from_dict(base).fitted()
    prior = {k: float(v) for k, v in prior_full.items()}
    seed = runs[0].seed
    details: Dict[str, Any] = {"runs": [str(r.folder) for r in runs], "fittable": list(FITTABLE),
                               "kept": ["height_sigma", "radius_median_m", "radius_sigma"]}
    fitted = dict(prior)

    def tick(what):
        if progress is not None:
            progress(what)

    # ---- sweeps: height_median_m and area_scale
    sweeps = []
    for r in runs:
        sp = sweep_points(r.readings, r.series_r)
        s = fn_summary(sp["Vs"], sp["I"], sp["w"], sp["R"]) if sp is not None else None
        if s is not None:
            r.sweep = dict(s, points=sp["points"], sp=sp)
            sweeps.append(r)
    history = []
    if sweeps:
        quiet = {"noise_level": 0.0, "burst_rate_hz": 0.0}
        h, a = fitted["height_median_m"], fitted["area_scale"]
        for it in range(max_iter):
            lz, la = [], []
            for r in sweeps:
                sp = r.sweep["sp"]
                cur, _ = simulate(base, r.readings, seed, height_median_m=h, area_scale=a, **quiet)
                s = fn_summary(sp["Vs"], simulated_points(sp, r.readings, cur), sp["w"], sp["R"])
                if s is None:
                    raise RefusedError(f"{r.folder}: the model gives no usable I-V over this "
                                       f"sweep at height_median_m={h:.3g}, area_scale={a:.3g}")
                lz.append(math.log(s["zeta"] / r.sweep["zeta"]))
                la.append(math.log(r.sweep["area"] / s["area"]))
            fz, fa = math.exp(float(np.mean(lz))), math.exp(float(np.mean(la)))
            history.append({"height_median_m": h, "area_scale": a, "zeta_sim_over_rec": fz,
                            "area_rec_over_sim": fa})
            tick(f"sweep pass {it + 1}")
            h, a = h * fz, a * fa
            if abs(fz - 1) < tol and abs(fa - 1) < 3 * tol:
                break
        fitted["height_median_m"], fitted["area_scale"] = h, a
        details["sweep"] = {"passes": history,
                            "recorded": [{"run": str(r.folder), "zeta_m": r.sweep["zeta"],
                                          "formal_area_m2": r.sweep["area"],
                                          "points": r.sweep["points"]} for r in sweeps]}
    else:
        details["sweep"] = "no run with a usable I-V sweep: height_median_m and area_scale kept"

    # ---- dwells: noise_level and burst_rate_hz
    noise, jumps, expo, share_hits, share_seen, dwell_info = [], 0, 0.0, 0, 0, []
    for r in runs:
        for idx in r.dwells:
            d = _dlog(r.readings, idx)
            if d.size < MIN_DWELL_SAMPLES - 1:
                continue
            dt = float(np.median(np.diff(r.readings.t[idx])))
            sig = robust_sigma(d)
            s = sig / flicker_unit(dt, base)
            noise.append(s)
            n_j = count_jumps(r.readings.current[idx], sig)
            e = exposure(r.readings, idx)
            jumps += n_j
            expo += e
            dwell_info.append({"run": str(r.folder), "samples": int(idx.size), "dt_s": dt,
                               "noise_level": s, "jumps": n_j, "exposure": e})
            tick("dwell")
    if noise:
        fitted["noise_level"] = float(np.median(noise))
        # the share of ion hits that show as a jump, from the model over the same dwells
        # with a known rate (large enough for a few dozen hits)
        ref_rate = 30.0 / max(expo, 1e-9)
        for r in runs:
            for idx in r.dwells:
                rows = np.arange(int(idx[-1]) + 1)
                cur, cath = simulate(base, r.readings, seed + 1, rows=rows,
                                     height_median_m=fitted["height_median_m"],
                                     area_scale=fitted["area_scale"],
                                     noise_level=fitted["noise_level"], burst_rate_hz=ref_rate)
                t0, t1 = r.readings.t[idx[0]], r.readings.t[idx[-1]]
                hits = sum(1 for t, kind, _ in cath.events if kind == "ion-hit" and t0 < t <= t1)
                d = _dlog(_with_current(r.readings, cur), idx)
                share_hits += hits
                share_seen += count_jumps(cur[idx], robust_sigma(d))
                tick("burst share")
        share = min(1.0, share_seen / share_hits) if share_hits else 1.0
        share = max(share, 0.05)
        fitted["burst_rate_hz"] = jumps / (share * expo) if expo > 0 else prior["burst_rate_hz"]
        details["dwell"] = {"dwells": dwell_info, "jumps": jumps, "exposure": expo,
                            "share_seen": share, "model_hits": share_hits,
                            "model_jumps": share_seen,
                            "burst_rate_rel_u": (1 / math.sqrt(jumps)) if jumps else None}
    else:
        details["dwell"] = "no dwell of at least 20 samples: noise_level and burst_rate_hz kept"
    return Fit(fitted, prior, details)


# --------------------------------------------------------------------------- outputs
_COMMENTS = {
    "height_median_m": "fitted: enhancement-factor scale (FN slope of the sweeps; radii kept)",
    "area_scale": "fitted: effective emission area (FN intercept of the sweeps)",
    "noise_level": "fitted: flicker rms from the dwells' sample-to-sample changes",
    "burst_rate_hz": "fitted: jumps in the dwells per ion-hit exposure",
}


def rig_text(base_doc: Dict[str, Any], f: Fit, sources: Sequence[str],
             cathode: Optional[Dict[str, Any]] = None, seed: Optional[int] = None) -> str:
    import yaml

    doc = copy.deepcopy(base_doc)
    sim = doc.setdefault("simulation", {})
    cath = dict(sim.get("cathode") or {}) if cathode is None else dict(cathode)
    if seed is not None:
        sim["seed"] = int(seed)
    for k in _COMMENTS:
        cath[k] = float(f"{f.params[k]:.4g}")
    sim["cathode"] = cath
    doc["simulation"] = sim
    if isinstance(doc.get("rig"), str) and not doc["rig"].endswith("-calibrated"):
        doc["rig"] = doc["rig"] + "-calibrated"
    body = yaml.safe_dump(doc, sort_keys=False, default_flow_style=False, allow_unicode=True)
    lines = []
    in_cathode = False
    for ln in body.splitlines():
        stripped = ln.strip()
        if ln.startswith("  cathode:"):
            in_cathode = True
        elif in_cathode and not ln.startswith("    "):
            in_cathode = False
        key = stripped.split(":", 1)[0]
        if in_cathode and key in _COMMENTS:
            prior = f.prior.get(key)
            ln = f"{ln}   # {_COMMENTS[key]} (was {prior:.4g})"
        lines.append(ln)
    head = [
        "# A simulated rig calibrated by `fieldrun calibrate` to recorded runs:",
        *[f"#   {s}" for s in sources],
        "# Fitted (what I-V data can determine): height_median_m (the enhancement-factor",
        "# scale, radii held), area_scale, noise_level, burst_rate_hz. Everything else in",
        "# the cathode block is the prior rig's. Simulated instruments only: nothing here",
        "# energises anything real. Limits tuned on it are tuned on a model of your fibres,",
        "# not on your fibres; keep the hardware interlocks and the lab's rules.",
    ]
    return "\n".join(head + lines) + "\n"


def plot(runs: Sequence[RecordedRun], f: Fit, path, cathode: Optional[Dict[str, Any]] = None) -> Path:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(1, 2, figsize=(11, 4.5))
    base = dict(runs[0].cathode if cathode is None else cathode)
    seed = runs[0].seed
    fitted = {k: f.params[k] for k in _COMMENTS}
    for r in runs:
        cur, _ = simulate(base, r.readings, seed, **fitted)
        if r.sweep is not None:
            sp = r.sweep["sp"]
            ax[0].semilogy(sp["Vs"], sp["I"], "o", mfc="none", label=f"recorded {r.folder.name[:24]}")
            ax[0].semilogy(sp["Vs"], simulated_points(sp, r.readings, cur), "-",
                           label="simulated (fitted)")
        for idx in r.dwells[:1]:
            t = r.readings.t[idx]
            rec_i = r.readings.current[idx]
            ax[1].semilogy(t - t[0], rec_i, ".", ms=3, label="recorded")
            ax[1].semilogy(t - t[0], cur[idx], "-", lw=0.8, label="simulated (fitted, one seed)")
            bad = ~np.isfinite(rec_i)
            if bad.any():
                top = float(np.nanmax(np.concatenate([rec_i[~bad], cur[idx]])))
                ax[1].plot((t - t[0])[bad], np.full(int(bad.sum()), top), "v", color="k",
                           label="recorded reading invalid (burst over range)")
    ax[0].set_xlabel("voltage (V)")
    ax[0].set_ylabel("current (A)")
    ax[0].set_title("I-V: settled sweep points")
    ax[0].legend(fontsize=7)
    ax[1].set_xlabel("time in the dwell (s)")
    ax[1].set_ylabel("current (A)")
    ax[1].set_title("dwell")
    if ax[1].lines:
        ax[1].legend(fontsize=7)
    fig.suptitle("recorded vs simulated with the calibrated cathode", fontsize=10)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=110)
    plt.close(fig)
    return path
