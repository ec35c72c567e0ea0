"""What a report says, independent of how it is typeset: sections as lists of rows of
plain strings (the HTML and Markdown writers escape them)."""
from __future__ import annotations

import math
from typing import List, Tuple

from ..quantities import format_si

FORM_NAMES = {"FN": "Fowler–Nordheim", "MG": "Murphy–Good", "ML": "Millikan–Lauritsen"}
EVENT_KINDS_SHOWN = ("verdict", "trip", "operator", "driver-error", "missed-cycle", "clock", "alarm",
                     "safe-off", "note", "arm")
MAX_EVENTS = 300


def num(x, digits=4, unit="") -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "–"
    if isinstance(x, (int, float)):
        s = f"{x:.{digits}g}"
    else:
        s = str(x)
    return f"{s} {unit}".strip()


def si(x, unit, digits=3) -> str:
    """Engineering prefix (quantities.format_si), with '–' for a missing or non-finite value."""
    if x is None or not isinstance(x, (int, float)) or not math.isfinite(x):
        return "–"
    return format_si(float(x), unit, digits)


def outcome(meta: dict) -> List[Tuple[str, str]]:
    end = meta.get("end")
    if not end:
        return [("outcome", "incomplete: the folder has no end.json (the run did not finish "
                            "writing; the numbers below cover what was recorded)")]
    rows = [("outcome", str(end.get("outcome", "?"))), ("exit code", str(end.get("exit_code", "?"))),
            ("reason", str(end.get("reason", ""))),
            ("output off confirmed", {True: "yes", False: "NO"}.get(end.get("confirmed_off"), "?"))]
    return rows


def run_rows(res: dict, meta: dict) -> List[Tuple[str, str]]:
    st = res.get("settings", {})
    rows = [("run folder", str(meta.get("name") or "")), ("protocol", str(meta.get("protocol_name") or "–")),
            ("sample", str(meta.get("sample") or "–")), ("started (UTC)", str(meta.get("utc_start") or "–")),
            ("work function", f"{st.get('phi_ev')} eV ± {st.get('phi_u_ev')} eV ({st.get('phi_source')})"),
            ("gap", si(st.get("gap_m"), "m") + (f" ± {si(st.get('gap_u_m'), 'm')}" if st.get("gap_u_m") else "")
             + (f" ({st['gap_u_source']})" if st.get("gap_u_source") else "")),
            ("fibre diameter", si(st.get("diameter_m"), "m")),
            ("series resistance", si(st.get("series_resistance_ohm"), "ohm") +
             (" (fitted)" if st.get("series_resistance_fit") else ""))]
    return rows


def fit_table(res: dict) -> Tuple[List[str], List[List[str]]]:
    head = ["branch", "regime", "voltage range", "points", "plot", "β (d/ζ)", "ζ = V/F", "formal area",
            "R²", "scaled field f", "orthodoxy test"]
    rows = []
    for bname, br in res.get("branches", {}).items():
        for seg in br.get("segments", []):
            vr = seg.get("v_range") or [None, None]
            for form in ("FN", "MG", "ML"):
                e = seg["forms"].get(form) or {}
                if "error" in e or not e:
                    rows.append([bname, str(seg["index"]), f"{num(vr[0], 4)}–{num(vr[1], 4)} V", str(seg["n"]),
                                 form, "–", "–", "–", "–", "–", e.get("error", "no fit")])
                    continue
                o = e.get("orthodoxy") or {}
                beta = (f"{e['beta']:.0f} ± {100 * e['beta_rel_u']:.1f} %" if e.get("beta") else "no gap")
                rows.append([
                    bname, str(seg["index"]), f"{num(vr[0], 4)}–{num(vr[1], 4)} V", str(seg["n"]), form, beta,
                    f"{si(e['zeta'], 'm')} ± {100 * e['zeta_rel_u']:.1f} %",
                    f"{e['area']:.3g} m² (×/÷ {e['area_u_factor']:.2f})",
                    f"{e['fit']['r2']:.5f}",
                    f"{num(o.get('f_low'), 3)}–{num(o.get('f_high'), 3)}",
                    str(o.get("verdict", "–"))])
    return head, rows


def line_table(res: dict) -> Tuple[List[str], List[List[str]]]:
    """Slope, intercept and their standard errors of every weighted straight-line fit."""
    head = ["branch", "regime", "plot", "slope (V)", "intercept", "cov(slope, intercept)", "R²", "points",
            "slope correction s", "f at tangent"]
    rows = []
    for bname, br in res.get("branches", {}).items():
        for seg in br.get("segments", []):
            for form in ("FN", "MG", "ML"):
                e = seg["forms"].get(form) or {}
                f = e.get("fit")
                if not f:
                    continue
                rows.append([bname, str(seg["index"]), form, f"{f['slope']:.5g} ± {f['slope_se']:.3g}",
                             f"{f['intercept']:.5g} ± {f['intercept_se']:.3g}", f"{f['cov_si']:.3g}",
                             f"{f['r2']:.5f}", str(f["n"]), f"{e['s']:.4f}", f"{e['f0']:.3f}"])
    return head, rows


def regime_rows(res: dict) -> List[Tuple[str, str]]:
    rows = []
    for bname, br in res.get("branches", {}).items():
        reg = br.get("regimes") or {}
        k = reg.get("n_segments")
        bps = reg.get("breakpoints_v") or []
        ses = reg.get("breakpoint_se_v") or []
        bic = ", ".join(f"{kk}: {vv:.1f}" for kk, vv in (reg.get("bic") or {}).items())
        txt = f"{k} regime(s)"
        if bps:
            txt += "; breakpoint " + ", ".join(f"{b:.1f} ± {s:.1f} V" for b, s in zip(bps, ses))
        asym = [(seg["index"], seg.get("beta_asymptote") or seg.get("zeta_asymptote"))
                for seg in br.get("segments", []) if seg.get("zeta_asymptote")]
        if asym:
            unit = "β" if br["segments"][0].get("beta_asymptote") else "ζ (m)"
            txt += "; asymptote of each regime in the segmented MG model: " + ", ".join(
                f"regime {i} {unit} {num(v, 4)}" for i, v in asym)
        rows.append((branch_name(res, bname), f"{txt} (BIC by number of regimes: {bic})"))
    return rows


def hygiene_rows(res: dict) -> List[Tuple[str, str]]:
    h = res.get("hygiene") or {}
    drop = "; ".join(f"{k}: {v}" for k, v in (h.get("dropped") or {}).items()) or "none"
    rows = [("settled points", f"{h.get('points')} ({h.get('kept')} used)"), ("set aside", drop),
            ("ammeter offset (subtracted)", si(h.get("offset_a"), "A")),
            ("noise floor σ0", si(h.get("floor_sigma_a"), "A") + (f" from {h['floor_source']}" if h.get("floor_source") else "")),
            ("ohmic leakage (subtracted)", si(h.get("leakage_s"), "S") if h.get("leakage_s") else "none found"),
            ("turn-on (log-log slope > 4)", si(h.get("turn_on_v"), "V"))]
    for n in (h.get("notes") or []) + (res.get("notes") or []):
        rows.append(("note", str(n)))
    return rows


def merit_rows(res: dict) -> List[Tuple[str, str]]:
    m = res.get("merit") or {}
    rows = [("from branch", branch_name(res, res["merit_branch"]) if res.get("merit_branch") else "–"),
            ("largest current", si(m.get("i_max_a"), "A")), ("largest gap voltage", si(m.get("v_max"), "V"))]
    if m.get("v_ref") is not None:
        rows.append((f"current at {num(m.get('v_ref'))} V", si(m.get("i_at_v_ref_a"), "A")))
    if "j_max_a_per_m2" in m:
        rows.append(("largest macroscopic J", f"{m['j_max_a_per_m2'] / 1e4:.3g} A/cm² on {m.get('cross_section_m2'):.3g} m²"))
        for k, lab in (("turn_on", "turn-on (10 uA/cm²)"), ("threshold", "threshold (10 mA/cm²)")):
            v = m.get(f"{k}_v")
            fld = m.get(f"{k}_field_v_per_m")
            txt = (f"{v:.4g} V" + (f", {fld / 1e6:.3g} V/um" if fld else "")) if v else m.get(f"{k}_note", "–")
            rows.append((lab, txt))
    else:
        rows.append(("macroscopic J", "needs the fibre diameter (--diameter or the sample's diameter in the protocol)"))
    if m.get("child_langmuir_j_a_per_m2"):
        rows.append(("planar Child–Langmuir J at V max (indicator only)",
                     f"{m['child_langmuir_j_a_per_m2'] / 1e4:.3g} A/cm²" +
                     (f"; J/J_CL = {m['j_over_child_langmuir']:.3g}" if m.get("j_over_child_langmuir") else "")))
    return rows


def hysteresis_rows(res: dict) -> List[Tuple[str, str]]:
    hs = res.get("hysteresis") or []
    if isinstance(hs, dict):
        hs = [hs]
    if not hs:
        return [("hysteresis", "no down branch overlapping an up branch")]
    rows = []
    for h in hs:
        pair = f"{h.get('up', 'up')} / {h.get('down', 'down')}"
        rows.append((f"{pair}: voltage shift V_down − V_up at {si(h.get('i_ref_a'), 'A')}",
                     num(h.get("dv_v"), 4, "V")))
        rows.append((f"{pair}: area between branches (FN coordinates, up − down)", num(h.get("fn_area"), 4, "1/V")))
    return rows


def stability_table(res: dict):
    head = ["step", "voltage", "readings", "duration", "mean current", "std/mean", "drift per hour", "bursts",
            "largest burst"]
    rows = []
    for s in res.get("stability") or []:
        if "mean_a" not in s:
            rows.append([_step_number(s.get("step")), "–", str(s.get("n")), "–", "–", "–", "–", "–", s.get("note", "")])
            continue
        rows.append([_step_number(s.get("step")), si(s.get("voltage_v"), "V"), str(s["n"]), num(s["duration_s"], 4, "s"),
                     si(s["mean_a"], "A"), f"{100 * s['relative_fluctuation']:.2f} %",
                     f"{100 * s['drift_per_h']:.2f} %", str(s["bursts"]),
                     f"{100 * s['largest_burst_relative']:.1f} %"
                     + (" (in compliance)" if s.get("cc_fraction", 0) > 0.5 else "")])
    return head, rows


def event_table(events: List[dict]):
    head = ["t (s)", "kind", "what"]
    rows = []
    for ev in events:
        if ev.get("kind") not in EVENT_KINDS_SHOWN:
            continue
        if len(rows) >= MAX_EVENTS:
            break
        t = ev.get("t")
        what = {k: v for k, v in ev.items() if k not in ("seq", "t", "utc", "kind", "n")}
        if ev.get("kind") == "verdict":
            txt = (f"{ev.get('action', '')} by {ev.get('rule', '')}: {ev.get('message', '')} "
                   f"(seen {num(ev.get('value'))} {ev.get('unit', '')}, threshold {num(ev.get('threshold'))} "
                   f"{ev.get('unit', '')})")
        else:
            txt = ", ".join(f"{k}={v}" for k, v in what.items())
        rows.append([num(t, 6) if isinstance(t, (int, float)) else "–", str(ev.get("kind")), txt])
    return head, rows


def limits_rows(meta: dict) -> List[Tuple[str, str]]:
    lim = meta.get("limits")
    if isinstance(lim, dict):
        return [(str(k), str(v)) for k, v in lim.items()]
    return []


def history_table(res: dict):
    head = ["run", "β (FN)", "turn-on", "current at ref. V", "verdict"]
    rows = [[str(h.get("run")), num(h.get("beta"), 4), si(h.get("turn_on_v"), "V"), si(h.get("i_at_v_ref_a"), "A"),
             str(h.get("verdict") or "–")] for h in (res.get("history") or [])]
    return head, rows


def _step_number(step) -> str:
    """A step as the console numbers it (from 1); results store the index from 0."""
    return str(step + 1) if isinstance(step, int) and step >= 0 else str(step if step is not None else "–")


def branch_name(res: dict, bname) -> str:
    """A branch's name with the step it comes from ("up 2 (step 3, condition)"), so that
    "up 1" and "up 2" say which part of the run they are; steps count from 1 as on the
    console."""
    br = (res.get("branches") or {}).get(bname) or {}
    step, kind = br.get("step"), br.get("step_kind")
    if not isinstance(step, int) or step < 0:
        return str(bname)
    return f"{bname} (step {step + 1}" + (f", {kind})" if kind else ")")


def summary_rows(res: dict) -> List[Tuple[str, str]]:
    """The headline numbers (analysis.run.headline) in words."""
    from ..analysis.run import headline
    h = headline(res)
    mb = res.get("merit_branch") or "–"
    rows = [("branch summarised", branch_name(res, mb) if mb != "–" else mb)]
    if h.get("beta"):
        rows.append(("field enhancement factor β (FN, highest regime that passes)", num(h["beta"], 4)))
    elif h.get("zeta_m"):
        rows.append(("voltage conversion length ζ (FN)", si(h["zeta_m"], "m")))
    if h.get("area_m2"):
        rows.append(("formal emission area (FN)", f"{h['area_m2']:.3g} m²"))
    if h.get("turn_on_v"):
        rows.append(("turn-on voltage (10 uA/cm²)", si(h["turn_on_v"], "V")))
    if h.get("i_at_v_ref_a") is not None:
        rows.append((f"current at {num(h.get('v_ref'))} V", si(h["i_at_v_ref_a"], "A")))
    rows.append(("trust verdict (the run's worst regime)", str(h.get("verdict") or "–")))
    return rows


def sections(res: dict, meta: dict, events: List[dict]) -> List[tuple]:
    """The report as (title, kind, data): kind is 'kv' (pairs), 'table' ((head, rows)),
    'para' (text), 'figures' (list of {path, caption}) or 'pre' (text)."""
    trust = res.get("trust") or {}
    out = [
        ("Outcome", "kv", outcome(meta)),
        ("Can these numbers be trusted?", "para", str(trust.get("text", ""))),
        ("Summary", "kv", summary_rows(res)),
        ("Run", "kv", run_rows(res, meta)),
        ("Field-emission fits", "table", fit_table(res)),
        ("Straight-line fits (weighted least squares, y = intercept + slope / V)", "table", line_table(res)),
        ("Emission regimes", "kv", regime_rows(res)),
        ("Figures of merit", "kv", merit_rows(res)),
        ("Hysteresis", "kv", hysteresis_rows(res)),
    ]
    st = stability_table(res)
    if st[1]:
        out.append(("Dwell stability", "table", st))
        out.append(("", "para", "From the recorded samples (one reading per sample period); the run "
                                "folder format holds no separate burst readings of the ammeter."))
    out.append(("Data hygiene", "kv", hygiene_rows(res)))
    out.append(("Figures", "figures", res.get("figures") or []))
    hist = history_table(res)
    if len(hist[1]) > 1:
        out.append(("This sample across runs", "table", hist))
    ev = event_table(events)
    counts = ", ".join(f"{k}: {v}" for k, v in ((res.get("events") or {}).get("by_kind") or {}).items())
    out.append(("Events", "para", f"{len(events)} events ({counts or 'none'}); verdicts, trips, alarms and "
                                  f"notes listed below (at most {MAX_EVENTS})."))
    if ev[1]:
        out.append(("", "table", ev))
    lim = limits_rows(meta)
    if lim:
        out.append(("Limits (from the protocol)", "kv", lim))
    if meta.get("protocol_text"):
        out.append(("Protocol (copy in the run folder)", "pre", meta["protocol_text"]))
    out.append(("About this report", "para",
                "Written by fieldrun from the run folder's files, which it never alters. Equations and "
                "their sources: sequencer/physics.py and sequencer/analysis/. The software is a second line "
                "behind the hardware interlocks: see safety.md."))
    return out
