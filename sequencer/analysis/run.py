"""Analyse a run folder or an outside CSV: results dict (JSON-ready) and figures.

Order of work: read (csvin) -> hygiene (settled points, floor, leakage, compliance) ->
series resistance (given, or fitted) -> per sweep direction: regimes by segmented
regression on the Murphy–Good plot (segments), then in each regime a weighted straight line
on each of the three plot forms (forms) with the extraction of zeta / beta and the formal
area (extract) and Forbes's orthodoxy test (orthodoxy) -> hysteresis, dwell stability,
figures of merit -> the trust verdict -> results.json and the PNG figures in ``analysis/``.

Regimes are found on the MG plot, the form that is straight for orthodox emission (Forbes
2019, APL 114, 123101), with the exact-MG bend taken out (forms.mg_bend); the FN and ML
plots of one population curve slightly by construction and would otherwise show a false
regime. The same partition of points is then used on all three forms.
"""
from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass
from typing import Any, Dict, List, Optional

import numpy as np

from .. import physics
from . import csvin, extract, forms, hygiene, hysteresis, merit, multigap, orthodoxy, resistance, segments, stability

DEFAULT_PHI_EV = 4.8          # typical for graphitic carbon / nanotubes (common practice, no source)
MIN_FIT_POINTS = 6
# Reference voltage for 'current at V_ref' unless given: one fixed value, so that runs of a
# sample compare (common practice, no source).
DEFAULT_V_REF = 1000.0
# Standard uncertainty of a gap set with a micrometer stage when none is given (common
# practice, no source); marked "default, assumed" wherever it is used.
DEFAULT_GAP_U_M = 10e-6
TRANSITION_WIDTHS = 3.0


@dataclass(frozen=True)
class Options:
    phi: Optional[float] = None          # eV
    phi_u: float = extract.DEFAULT_PHI_UNCERTAINTY_EV
    gap: Optional[float] = None          # m
    gap_u: Optional[float] = None        # m
    series_r: Optional[float] = None     # ohm
    fit_r: bool = False
    diameter: Optional[float] = None     # m
    v_ref: Optional[float] = None        # V
    voltage_column: Optional[str] = None
    current_column: Optional[str] = None
    max_segments: int = 3


# ---- run-folder files ------------------------------------------------------------

def _read_json(path):
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except (OSError, ValueError):
        return None


def read_events(folder: str) -> List[dict]:
    """The run's events (runfolder.parse_events: a torn last line of a run that died is
    skipped); none when the file is missing."""
    from ..runfolder import parse_events
    try:
        with open(os.path.join(folder, "events.jsonl"), "rb") as fh:
            return parse_events(fh.read())
    except OSError:
        return []


def _read_yaml(path):
    try:
        from drivers.yamllimits import load_limited
        with open(path, encoding="utf-8") as fh:
            return load_limited(fh.read())
    except Exception:  # noqa: BLE001 - a broken copy must not stop the analysis
        return None


def _read_text(path, limit=200_000):
    try:
        with open(path, encoding="utf-8", errors="replace") as fh:
            return fh.read(limit)
    except OSError:
        return None


def find_value(doc: Any, names) -> Any:
    """First value under any of ``names`` in a nested dict/list (depth first)."""
    if isinstance(doc, dict):
        for n in names:
            if n in doc and doc[n] not in (None, ""):
                return doc[n]
        for v in doc.values():
            got = find_value(v, names)
            if got is not None:
                return got
    elif isinstance(doc, list):
        for v in doc:
            got = find_value(v, names)
            if got is not None:
                return got
    return None


def quantity(value, unit: str) -> Optional[float]:
    """SI magnitude of a number (taken as SI) or a string with a unit: the project's strict
    grammar first (sequencer.quantities), then pint for units it does not list (eV)."""
    if value is None or isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return float(value)
    from ..quantities import QuantityError, parse_value
    try:
        return parse_value(str(value), unit)
    except QuantityError:
        pass
    try:
        q = csvin._ureg()(str(value).replace("µ", "u").replace("Ω", "ohm"))
        if not hasattr(q, "to"):
            return None
        return float(q.to(unit).magnitude)
    except Exception:  # noqa: BLE001 - pint raises many types; the caller reports None
        return None


def _utc_text(value):
    """A UTC time as the run folder names write it (2026-12-01T20:40:57Z); text unchanged."""
    if isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value):
        import datetime
        return datetime.datetime.fromtimestamp(value, datetime.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    return value


def run_meta(folder: str) -> dict:
    """What the run folder says about the run, tolerant of missing or broken files."""
    manifest = _read_json(os.path.join(folder, "manifest.json")) or {}
    end = _read_json(os.path.join(folder, "end.json"))
    protocol = _read_yaml(os.path.join(folder, "protocol.yaml"))
    rig = _read_yaml(os.path.join(folder, "rig.yaml"))
    docs = [manifest, protocol or {}, rig or {}]

    def pick(names, unit=None):
        for d in docs:
            v = find_value(d, names)
            if v is not None:
                return quantity(v, unit) if unit else v
        return None
    sample = pick(("sample_id", "sample"))
    if isinstance(sample, dict):
        sample = sample.get("id") or sample.get("name")
    return {
        "folder": os.path.abspath(folder), "name": os.path.basename(os.path.normpath(folder)),
        "manifest": manifest, "end": end, "complete": end is not None,
        "protocol_name": pick(("protocol_name", "name")) if protocol is None else
                         (find_value(protocol, ("name",)) or manifest.get("protocol_name")),
        "sample": str(sample) if sample is not None else None,
        "gap_m": pick(("gap", "gap_m", "anode_gap"), "m"),
        "gap_u_m": pick(("gap_uncertainty", "gap_u"), "m"),
        "phi_ev": pick(("work_function", "work_function_ev", "phi"), "eV"),
        "series_r_ohm": pick(("series_resistance", "series_resistor", "ballast"), "ohm"),
        "diameter_m": pick(("diameter", "fibre_diameter", "fiber_diameter"), "m"),
        "limits": find_value(protocol or {}, ("limits",)),
        "protocol_text": _read_text(os.path.join(folder, "protocol.yaml")),
        "rig_text": _read_text(os.path.join(folder, "rig.yaml")),
        "utc_start": _utc_text(manifest.get("utc") or manifest.get("started_utc") or manifest.get("start_utc")
                               or manifest.get("written_utc")),
    }


# ---- the analysis --------------------------------------------------------------

def clean(obj):
    """JSON-safe copy: numpy scalars to Python, NaN/inf to None."""
    if isinstance(obj, dict):
        return {str(k): clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [clean(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [clean(v) for v in obj.tolist()]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return obj


def _segment_points(labels, model, x, j):
    """Points of segment j, without those inside the rounded corners next to it."""
    mask = labels == j
    core = mask.copy()
    for bi in (j - 1, j):                       # breakpoints bordering segment j
        if 0 <= bi < model.n_segments - 1:
            b = model.breakpoints[model.n_segments - 2 - bi]
            wdt = model.transition_width(model.n_segments - 2 - bi)
            core &= np.abs(x - b) > TRANSITION_WIDTHS * wdt
    return core if np.count_nonzero(core) >= 4 else mask


def analyse_branch(pts: hygiene.IVPoints, phi: float, opt: Options, gap, gap_u) -> dict:
    """Regimes and per-regime fits of one sweep direction (points already kept-only)."""
    V, I = pts.V, pts.I
    w = forms.weights_from(I, pts.u_I)
    x, y = forms.transform(V, I, "MG", phi)
    first = forms.wls_line(x, y, w)
    if first.slope < 0:
        y = y - forms.mg_bend(V, phi, -first.slope / (physics.B_FN * phi ** 1.5))
    model = segments.find_segments(x, y, w, max_segments=opt.max_segments)
    out = {"n": int(V.size), "v_range": [float(V.min()), float(V.max())],
           "regimes": model.as_dict(), "segments": [], "model_line": None}
    gx = np.linspace(x.min(), x.max(), 200)
    out["model_line"] = {"x": gx.tolist(), "y_mg": (model.predict(gx)).tolist()}
    bphi = physics.B_FN * phi ** 1.5
    for j, slope in zip(range(model.n_segments), model.segment_slopes()):
        sel = _segment_points(model.labels, model, x, j)
        seg = {"index": j + 1, "n": int(np.count_nonzero(sel)),
               "v_range": [float(V[sel].min()), float(V[sel].max())], "forms": {}}
        # the regime's asymptote in the segmented model of the (bend-corrected) MG plot: with
        # several regimes it separates populations better than a line through the regime's
        # own points, which the neighbour's tail still bends (MG: s = 1, Forbes 2019)
        if model.n_segments > 1 and slope < 0:
            seg["zeta_asymptote"] = -slope / bphi
            seg["beta_asymptote"] = (gap * bphi / -slope) if gap else None
        for form in forms.FORMS:
            try:
                e = extract.extract(V[sel], I[sel], w[sel], form, phi, gap=gap, gap_u=gap_u, phi_u=opt.phi_u)
            except ValueError as exc:
                seg["forms"][form] = {"error": str(exc)}
                continue
            o = orthodoxy.check_segment(e.fit.slope, e.fit.x_min, e.fit.x_max, phi, form)
            seg["forms"][form] = {**e.as_dict(), "orthodoxy": o.as_dict()}
        out["segments"].append(seg)
    return out


def trust_paragraph(res: dict) -> dict:
    """The plain 'can these numbers be trusted' verdict, driven by the orthodoxy test."""
    verdicts = []
    for dname, br in res.get("branches", {}).items():
        for seg in br.get("segments", []):
            fn = seg["forms"].get("FN", {})
            o = fn.get("orthodoxy")
            if o:
                verdicts.append((dname, seg["index"], o["verdict"], o["f_low"], o["f_high"]))
    phi = res["settings"]["phi_ev"]
    if not verdicts:
        return {"verdict": "no fit", "text": (
            "No straight-line field-emission fit could be made from these data (too few clean "
            "points above the noise floor and below compliance), so no enhancement factor or "
            "area is given." + _caveats(res))}
    bad = [v for v in verdicts if v[2] == orthodoxy.VERDICT_BAD]
    mid = [v for v in verdicts if v[2] == orthodoxy.VERDICT_MID]

    def where(vs):
        return ", ".join(f"{d} regime {i} (f {lo:.2f}-{hi:.2f})" for d, i, _, lo, hi in vs)
    lim = (f"Forbes's orthodoxy test (Proc. R. Soc. A 469 (2013) 20130271) calls scaled fields "
           f"{orthodoxy.REASONABLE[0]:.2f}-{orthodoxy.REASONABLE[1]:.2f} apparently reasonable and "
           f"below {orthodoxy.UNREASONABLE_BELOW:.2f} or above {orthodoxy.UNREASONABLE_ABOVE:.2f} "
           f"clearly unreasonable (limits for phi = 4.50 eV, quoted from memory; here phi = {phi:g} eV).")
    if bad:
        verdict = "do not trust"
        text = (f"Do not trust the enhancement factor and emission area of {where(bad)}: the scaled "
                "field extracted from the FN slope lies where orthodox field emission cannot be, so the "
                "slope is not set by the barrier alone (series resistance, space charge, a changing "
                "emitter, leakage or several emitters switching on are usual causes) and the formulas "
                "that turn slope and intercept into beta and area do not apply." + _changing_emitter(res, bad))
        if mid:
            text += (f" Treat those of {where(mid)} with caution: their scaled fields are neither clearly "
                     "reasonable nor clearly unreasonable.")
        text += " " + lim
    elif mid:
        verdict = "caution"
        text = (f"Treat the enhancement factor and area of {where(mid)} with caution: the extracted "
                "scaled fields are neither clearly reasonable nor clearly unreasonable, so the test "
                "cannot vouch for them." + _changing_emitter(res, mid) + " " + lim)
    else:
        verdict = "apparently reasonable"
        text = ("The extracted scaled fields of every regime are apparently reasonable, so the "
                "enhancement factor and area follow from the slopes and intercepts within the stated "
                "uncertainties (which include the fit, the work function and the gap). " + lim)
    text += _caveats(res)
    return {"verdict": verdict, "text": text, "checks": [list(v) for v in verdicts]}


def _step_kind(readings, step: int) -> str:
    """The step kind recorded for ``step`` ('' for an outside CSV)."""
    for s, k in zip(readings.step, readings.step_kind):
        if int(s) == step:
            return k
    return ""


def _changing_emitter(res: dict, failing) -> str:
    """A sentence when a failing regime is a condition step's climb: that step changes the
    emitter as it climbs (it waits at each level for the current to settle), so its upper
    levels need not lie on one emitter's line."""
    names = sorted({d for d, *_ in failing
                    if (res.get("branches", {}).get(d) or {}).get("step_kind") == "condition"})
    if not names:
        return ""
    which = " and ".join(names)
    return (f" The {which} branch{'es are' if len(names) > 1 else ' is'} the climb of a condition step, "
            "which holds each level until the current settles while the emitter changes (adsorbates "
            "leave, the sharpest emitters blunt or burn), so its upper levels need not lie on one "
            "emitter's line; quote the regimes that pass.")


def _caveats(res: dict) -> str:
    """Sentences that qualify any verdict: an assumed work function, a run that ended early."""
    out = ""
    st = res.get("settings", {})
    if st.get("phi_source", "").startswith("default"):
        out += (f" The work function was not given; {st['phi_ev']:g} eV was assumed (beta scales as "
                "phi^(3/2): give --work-function for your material).")
    end = (res.get("run") or {}).get("end")
    if (res.get("run") or {}).get("complete") is False:
        out += " The run folder is incomplete (no end.json): only what was recorded is analysed."
    elif isinstance(end, dict) and end.get("outcome") not in (None, "completed"):
        out += (f" The run ended early ({end.get('outcome')}: {end.get('reason', '')}); the fits cover "
                "the part that was recorded.")
    if not st.get("gap_m"):
        out += " No gap was given, so voltage conversion lengths zeta = V/F are given instead of beta."
    return out


def analyze(path: str, opt: Optional[Options] = None, out_dir: Optional[str] = None,
            figures: bool = True) -> dict:
    """Analyse ``path`` (run folder or CSV); write results.json and figures to ``out_dir``
    (default: RUN/analysis, or <csv>.analysis beside a CSV). Returns the results dict."""
    opt = opt or Options()
    parent = os.path.dirname(os.path.abspath(path))
    if (os.path.basename(path) == "samples.csv" and
            any(os.path.exists(os.path.join(parent, n)) for n in ("manifest.json", "events.jsonl"))):
        path = parent                                 # a run folder's own samples.csv
    is_run = os.path.isdir(path)
    meta = run_meta(path) if is_run else {"folder": None, "name": os.path.basename(path), "complete": None}
    events = read_events(path) if is_run else []
    readings = csvin.read_any(path, opt.voltage_column, opt.current_column)
    phi = opt.phi or meta.get("phi_ev") or DEFAULT_PHI_EV
    phi_source = "option" if opt.phi else ("run files" if meta.get("phi_ev") else "default, assumed")
    gap = opt.gap or meta.get("gap_m")
    gap_u = opt.gap_u or meta.get("gap_u_m")
    gap_u_source = "option" if opt.gap_u else ("run files" if meta.get("gap_u_m") else None)
    if gap and not gap_u:
        gap_u, gap_u_source = DEFAULT_GAP_U_M, "default, assumed"
    series_r = opt.series_r if opt.series_r is not None else meta.get("series_r_ohm")
    diameter = opt.diameter or meta.get("diameter_m")
    notes = []
    if not 1.0 <= phi <= 10.0:
        raise csvin.AnalysisInputError(f"work function {phi:g} eV is outside 1-10 eV")
    pts = hygiene.prepare(readings, series_r)
    r_fit = None
    if opt.fit_r:
        kept = pts.subset(pts.keep & (pts.direction >= 0))
        try:
            R, (lo, hi) = resistance.fit_series_resistance(kept.V_supply, kept.I_raw,
                                                           forms.weights_from(kept.I, kept.u_I), phi)
            r_fit = {"ohm": R, "interval_ohm": [lo, hi]}
            series_r = R
            pts = hygiene.prepare(readings, R)
            notes.append(f"series resistance fitted: {R:.4g} ohm (68 % interval {lo:.3g}-{hi:.3g}); "
                         "assumes one emitting population")
        except ValueError as exc:
            notes.append(f"series resistance not fitted: {exc}")
    res: Dict[str, Any] = {
        "source": {"path": os.path.abspath(path), "kind": readings.source, "columns": readings.columns,
                   "rows": readings.n},
        "settings": {"phi_ev": phi, "phi_source": phi_source, "phi_u_ev": opt.phi_u, "gap_m": gap,
                     "gap_u_m": gap_u, "gap_u_source": gap_u_source, "series_resistance_ohm": series_r, "series_resistance_fit": r_fit,
                     "diameter_m": diameter, "v_ref": opt.v_ref},
        "hygiene": pts.summary(), "branches": {}, "notes": notes,
        "run": {k: v for k, v in meta.items() if k not in ("protocol_text", "rig_text")},
    }
    runs = hygiene.sweep_runs(pts)
    res["hygiene"] = pts.summary()
    fitted = []
    for name, d, idx in runs:
        m = np.zeros(pts.V.size, dtype=bool)
        m[idx] = True
        sub = pts.subset(pts.keep & m)
        if sub.V.size >= MIN_FIT_POINTS:
            try:
                res["branches"][name] = analyse_branch(sub, phi, opt, gap, gap_u)
                res["branches"][name]["step"] = int(pts.step[idx[0]])
                res["branches"][name]["step_kind"] = _step_kind(readings, int(pts.step[idx[0]]))
                fitted.append((name, d, sub))
            except ValueError as exc:
                notes.append(f"{name} branch not fitted: {exc}")
        elif sub.V.size:
            notes.append(f"{name} branch: only {sub.V.size} clean points, not fitted")
    # hysteresis: each up branch with the down branch that follows it
    res["hysteresis"] = []
    for i, (name, d, sub) in enumerate(fitted):
        if d == 1 and i + 1 < len(fitted) and fitted[i + 1][1] == -1:
            dn = fitted[i + 1][2]
            h = hysteresis.hysteresis(sub.V, sub.I, dn.V, dn.I, phi)
            if h:
                res["hysteresis"].append({"up": name, "down": fitted[i + 1][0], **h})
    ups = [f for f in fitted if f[1] == 1] or [f for f in fitted if f[1] == 0]
    up = ups[-1][2] if ups else pts.subset(pts.keep & (pts.direction >= 0))
    res["merit_branch"] = ups[-1][0] if ups else None
    res["stability"] = []
    for step, idx in hygiene.hold_segments(readings):
        st = stability.dwell_stability(readings.t[idx], readings.current[idx] - pts.offset)
        st["step"] = step
        st["cc_fraction"] = float(np.mean(readings.cc[idx]))
        v = readings.setpoint[idx]
        st["voltage_v"] = float(np.nanmean(v)) if np.any(np.isfinite(v)) else None
        res["stability"].append(st)
    v_ref = opt.v_ref if opt.v_ref is not None else DEFAULT_V_REF
    res["merit"] = merit.figures_of_merit(up.V, up.I, gap, diameter, v_ref)
    res["trust"] = trust_paragraph(res)
    res["events"] = {"count": len(events), "by_kind": _count_kinds(events)}
    res["figures"] = []
    if out_dir is None:
        out_dir = os.path.join(path, "analysis") if is_run else os.path.splitext(path)[0] + ".analysis"
    os.makedirs(out_dir, exist_ok=True)
    if is_run and meta.get("sample"):
        res["history"] = sample_history(path, meta["sample"], res)
    if figures:
        from . import plots
        res["figures"] = plots.make_all(res, pts, readings, events, out_dir, runs)
    res = clean(res)
    tmp = os.path.join(out_dir, "results.json.tmp")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(res, fh, indent=1, allow_nan=False)
    os.replace(tmp, os.path.join(out_dir, "results.json"))
    res["_out_dir"] = out_dir
    return res


def no_data_results(folder: str, meta: dict, why: str) -> dict:
    """Results of a run folder whose samples cannot be analysed (``why``), for the report."""
    events = read_events(folder)
    out_dir = os.path.join(folder, "analysis")
    os.makedirs(out_dir, exist_ok=True)
    res = {"source": {"path": os.path.abspath(folder), "kind": "run-folder", "columns": {}, "rows": 0},
           "settings": {"phi_ev": meta.get("phi_ev") or DEFAULT_PHI_EV, "phi_source": "run files"
                        if meta.get("phi_ev") else "default, assumed", "phi_u_ev": None,
                        "gap_m": meta.get("gap_m"), "diameter_m": meta.get("diameter_m")},
           "hygiene": {"points": 0, "kept": 0, "dropped": {}, "notes": [why]}, "branches": {},
           "notes": [why], "hysteresis": None, "stability": [], "merit": {},
           "run": {k: v for k, v in meta.items() if k not in ("protocol_text", "rig_text")},
           "events": {"count": len(events), "by_kind": _count_kinds(events)}, "figures": []}
    res["trust"] = {"verdict": "no fit", "text": f"No field-emission analysis: {why}."}
    res = clean(res)
    res["_out_dir"] = out_dir
    return res


def _count_kinds(events):
    c: Dict[str, int] = {}
    for e in events:
        k = str(e.get("kind", "?"))
        c[k] = c.get(k, 0) + 1
    return c


def headline(res: dict) -> dict:
    """The few numbers a sample's history tracks: the FN beta (or zeta) of the highest-voltage
    regime of the last up branch that does not fail the orthodoxy test (else the highest one),
    turn-on field, current at the reference voltage and the trust verdict."""
    branches = res.get("branches", {})
    mb = res.get("merit_branch")
    br = branches.get(mb) if mb in branches else (branches.get("up") or branches.get("all") or {})
    segs = br.get("segments") or []
    ok = [sg for sg in segs if ((sg["forms"].get("FN") or {}).get("orthodoxy") or {}).get("verdict")
          != orthodoxy.VERDICT_BAD]
    pick = (ok or segs)[-1] if segs else None        # the highest-voltage regime that passes
    fn = pick["forms"].get("FN", {}) if pick else {}
    m = res.get("merit") or {}
    return {"beta": fn.get("beta"), "zeta_m": fn.get("zeta"), "area_m2": fn.get("area"),
            "turn_on_field_v_per_m": m.get("turn_on_field_v_per_m"), "turn_on_v": m.get("turn_on_v"),
            "threshold_v": m.get("threshold_v"), "i_at_v_ref_a": m.get("i_at_v_ref_a"),
            "v_ref": m.get("v_ref"), "gap_m": res.get("settings", {}).get("gap_m"),
            "verdict": (res.get("trust") or {}).get("verdict")}


def sample_history(run_folder: str, sample: str, current: dict) -> List[dict]:
    """Headlines of this sample's analysed runs in the same runs/ directory, oldest first
    (folder names start with the UTC start time, so they sort in time order)."""
    parent = os.path.dirname(os.path.abspath(run_folder))
    me = os.path.basename(os.path.abspath(run_folder))
    out = []
    try:
        names = sorted(os.listdir(parent))
    except OSError:
        return out
    for name in names:
        folder = os.path.join(parent, name)
        if name == me:
            out.append({"run": name, **headline(current)})
            continue
        r = _read_json(os.path.join(folder, "analysis", "results.json"))
        if not isinstance(r, dict) or (r.get("run") or {}).get("sample") != sample:
            continue
        out.append({"run": name, **headline(r)})
    return out


def multigap_summary(results: List[dict]) -> dict:
    """Threshold voltage (or turn-on voltage) against gap over several analysed runs."""
    gaps = [r.get("settings", {}).get("gap_m") for r in results]
    vth = [(r.get("merit") or {}).get("threshold_v") or (r.get("merit") or {}).get("turn_on_v")
           for r in results]
    labels = [(r.get("run") or {}).get("name") or r["source"]["path"] for r in results]
    return multigap.threshold_vs_gap(gaps, vth, labels)
