"""Figures of an analysis, as PNG files (matplotlib, Agg backend: no display needed).

Made to read both on screen and in print: 10-12 pt text, lines and markers that differ in
shape as well as colour (colour-blind safe palette of P. Tol, SRON/EPS/TN/09-002, 2021,
"bright" scheme), up branches filled circles, down branches open triangles, dropped points
grey crosses, units in every axis label.
"""
from __future__ import annotations

import logging
import os
import warnings
from typing import List

import numpy as np

import matplotlib
matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from . import forms  # noqa: E402

BLUE, RED, GREEN, YELLOW, CYAN, PURPLE, GREY = ("#4477AA", "#EE6677", "#228833", "#CCBB44",
                                               "#66CCEE", "#AA3377", "#BBBBBB")
ACTION_COLOUR = {"hold": YELLOW, "back_off": "#EE7733", "ramp_down": RED, "trip": "#882255"}
DPI = 130
log = logging.getLogger("fieldrun.report")

plt.rcParams.update({"font.size": 11, "axes.titlesize": 12, "axes.labelsize": 11,
                     "legend.fontsize": 9.5, "xtick.labelsize": 10, "ytick.labelsize": 10,
                     "axes.grid": True, "grid.alpha": 0.3, "lines.markersize": 5})


def _save(fig, out_dir, name):
    path = os.path.join(out_dir, name)
    fig.savefig(path, dpi=DPI, bbox_inches="tight")
    plt.close(fig)
    return path


UP_COLOURS = [BLUE, GREEN, CYAN, PURPLE]
DOWN_COLOURS = [RED, "#EE7733", YELLOW, "#882255"]


def _branches(pts, runs):
    """(name, style, mask of kept points) per branch; one per direction without runs."""
    if runs is None:
        runs = [(n, d, np.flatnonzero(pts.direction == d)) for n, d in (("up", 1), ("down", -1), ("all", 0))]
    out = []
    k_up = k_dn = 0
    for name, d, idx in runs:
        m = np.zeros(pts.V.size, dtype=bool)
        m[idx] = True
        m &= pts.keep
        if not np.any(m):
            continue
        if d == -1:
            st = dict(color=DOWN_COLOURS[k_dn % 4], marker="^v<>"[k_dn % 4], mfc="white", label=name)
            k_dn += 1
        else:
            st = dict(color=UP_COLOURS[k_up % 4], marker="osDp"[k_up % 4], label=name)
            st["mfc"] = st["color"]
            k_up += 1
        out.append((name, st, m))
    return out


def iv_plot(pts, out_dir, title, runs=None):
    fig, ax = plt.subplots(figsize=(8, 5))
    for name, st, m in _branches(pts, runs):
        ax.plot(pts.V[m], pts.I[m], ls="-", lw=1, **st)
    drop = ~pts.keep & (pts.I_raw > 0)
    if np.any(drop):
        ax.plot(pts.V[drop], np.abs(pts.I_raw[drop]), ls="none", marker="x", color="#777777",
                label="not used (floor, compliance, flagged)")
    ax.set_yscale("log")
    ax.set_xlabel("gap voltage V (V)")
    ax.set_ylabel("current I (A)")
    ax.set_title(title)
    ax.legend(loc="lower right")
    return _save(fig, out_dir, "iv.png")


def _darker(colour, by=0.45):
    """The colour mixed with black (fit lines stay visible over markers of their colour)."""
    r, g, b = matplotlib.colors.to_rgb(colour)
    return (r * (1 - by), g * (1 - by), b * (1 - by))


def forms_plot(res, pts, out_dir, phi, runs=None):
    fig, axes = plt.subplots(3, 1, figsize=(8, 11), sharex=True)
    regime_styles = ["-", "--", "-."]
    for ax, form in zip(axes, forms.FORMS):
        colour = {}
        for name, st, m in _branches(pts, runs):
            x, y = forms.transform(pts.V[m], pts.I[m], form, phi)
            ax.plot(1e3 * x, y, ls="none", **st)
            colour[name] = _darker(st["color"])
        for bname, br in res.get("branches", {}).items():
            segs = br.get("segments", [])
            for seg in segs:
                f = seg["forms"].get(form, {}).get("fit")
                if not f:
                    continue
                xs = np.linspace(f["x_min"], f["x_max"], 20)
                # each branch's fits in a darker shade of its colour (several up branches
                # must not share one), regimes told apart by the line style
                ls = regime_styles[(seg["index"] - 1) % 3]
                lab = f"{bname} fit" + (f", regime {seg['index']}" if len(segs) > 1 else "")
                ax.plot(1e3 * xs, f["intercept"] + f["slope"] * xs, ls=ls, color=colour.get(bname, "black"),
                        lw=2.2, label=lab, zorder=3)
            reg = br.get("regimes", {})
            for b, se in zip(reg.get("breakpoints_x", []), reg.get("breakpoint_se_x", [])):
                down = bname.startswith("down")
                ax.axvline(1e3 * b, color="black", ls=":", lw=1.2)
                ax.axvspan(1e3 * (b - se), 1e3 * (b + se), color="black", alpha=0.08)
                ax.annotate(f"{bname}: {1 / b:.0f} V", (1e3 * b, 0.03 if down else 0.97),
                            xycoords=("data", "axes fraction"), xytext=(-6, 0),
                            textcoords="offset points", ha="right",
                            va="bottom" if down else "top", fontsize=9, rotation=90)
        ax.set_title(forms.FORM_TITLES[form])
        lab = {"FN": "ln(I/V²)  [I in A, V in V]", "MG": "ln(I/V^(2−η/6))", "ML": "ln(I)  [I in A]"}[form]
        ax.set_ylabel(lab)
    # one legend for the three panels, outside the data (all panels show the same entries)
    h, l = axes[0].get_legend_handles_labels()
    uniq = dict(zip(l, h))
    axes[-1].set_xlabel("1/V (1/kV)")
    if len(uniq) <= 6:
        axes[0].legend(uniq.values(), uniq.keys(), loc="upper right", ncol=2)
        fig.tight_layout()
    else:
        fig.set_size_inches(10, 11)
        fig.tight_layout(rect=(0, 0, 0.8, 1))
        fig.legend(uniq.values(), uniq.keys(), loc="upper left", bbox_to_anchor=(0.8, 0.97),
                   fontsize=9.5, frameon=False)
    return _save(fig, out_dir, "forms.png")


def _time_axis(t):
    span = np.nanmax(t) - np.nanmin(t) if np.any(np.isfinite(t)) else 0
    if span > 2 * 3600:
        return 1 / 3600.0, "time (h)"
    if span > 600:
        return 1 / 60.0, "time (min)"
    return 1.0, "time (s)"


def _mark_events(ax, events, scale, legend=True):
    seen = set()
    for ev in events:
        kind = ev.get("kind")
        t = ev.get("t")
        if not isinstance(t, (int, float)):
            continue
        if kind == "verdict":
            act = str(ev.get("action", "")).lower()
            col = ACTION_COLOUR.get(act)
            if not col:
                continue
            lab = act.replace("_", " ") if act not in seen and legend else None
            seen.add(act)
            ax.axvline(t * scale, color=col, lw=1.5, alpha=0.9, label=lab)
        elif kind == "trip":
            lab = "trip" if "trip" not in seen and legend else None
            seen.add("trip")
            ax.axvline(t * scale, color=ACTION_COLOUR["trip"], lw=2.5, label=lab)


def timeline_plot(readings, events, out_dir):
    t = readings.t
    if not np.any(np.isfinite(t)):
        return None
    scale, xl = _time_axis(t)
    fig, (a1, a2) = plt.subplots(2, 1, figsize=(9, 6.5), sharex=True)
    a1.plot(t * scale, readings.setpoint, color=GREY, lw=2, label="setpoint")
    a1.plot(t * scale, readings.voltage, color=BLUE, lw=1, label="measured")
    a1.set_ylabel("voltage (V)")
    I = np.where(readings.current > 0, readings.current, np.nan)
    a2.plot(t * scale, I, color=GREEN, lw=1, label="current")
    if np.any(readings.cc):
        a2.plot(t[readings.cc] * scale, I[readings.cc], ls="none", marker="s", ms=3, color=RED,
                label="compliance")
    a2.set_yscale("log")
    a2.set_ylabel("current (A)")
    a2.set_xlabel(xl)
    _mark_events(a1, events, scale)
    _mark_events(a2, events, scale, legend=False)
    a1.legend(loc="lower left", bbox_to_anchor=(0.0, 1.01), ncol=6, frameon=False)
    a2.legend(loc="lower right")
    fig.suptitle("voltage and current; watchdog verdicts as vertical lines", y=1.0)
    fig.tight_layout()
    return _save(fig, out_dir, "timeline.png")


def pressure_plot(readings, events, out_dir):
    ok = np.isfinite(readings.pressure) & (readings.pressure > 0) & np.isfinite(readings.t)
    if np.count_nonzero(ok) < 2:
        return None
    scale, xl = _time_axis(readings.t)
    fig, ax = plt.subplots(figsize=(9, 3.8))
    pr = readings.pressure[ok]
    ax.plot(readings.t[ok] * scale, pr, color=PURPLE, lw=1.2)
    if pr.min() == pr.max():                  # a constant reading: give the axis a decade
        ax.set_yscale("log")
        ax.set_ylim(pr.min() / 3.0, pr.max() * 3.0)
    elif pr.max() / pr.min() < 3.0:
        # a narrow range (a good vacuum with small bursts): a log axis would label every
        # tick "1.0x × 10^-5"; a linear one in the power of ten reads plainly
        ax.ticklabel_format(axis="y", style="sci", scilimits=(0, 0), useMathText=True)
    else:
        ax.set_yscale("log")
    ax.set_ylabel("pressure (Pa)")
    ax.set_xlabel(xl)
    _mark_events(ax, events, scale)
    h, l = ax.get_legend_handles_labels()
    if h:
        ax.legend(loc="upper right")
    ax.set_title("chamber pressure")
    return _save(fig, out_dir, "pressure.png")


def history_plot(history, out_dir, sample):
    rows = [h for h in history if h.get("beta") or h.get("turn_on_v") or h.get("i_at_v_ref_a")]
    if len(rows) < 2:
        return None
    k = np.arange(len(rows))
    fig, axes = plt.subplots(3, 1, figsize=(8, 7.5), sharex=True)
    vref = rows[-1].get("v_ref")
    series = [("beta", "enhancement factor β (FN)", 1.0),
              ("turn_on_v", "turn-on voltage (V)", 1.0),
              ("i_at_v_ref_a", f"current at {vref:.0f} V (A)" if vref else "current at V_ref (A)", 1.0)]
    for ax, (key, lab, sc) in zip(axes, series):
        y = np.array([h.get(key) if h.get(key) is not None and (key != "i_at_v_ref_a" or h.get("v_ref") == vref)
                      else np.nan for h in rows], dtype=float)
        ax.plot(k, y * sc, marker="o", color=BLUE)
        bad = np.array([h.get("verdict") == "do not trust" for h in rows])
        if np.any(bad):
            ax.plot(k[bad], y[bad], ls="none", marker="x", ms=10, color=RED, label="orthodoxy test failed")
            ax.legend(loc="best")
        ax.set_ylabel(lab)
        if key == "i_at_v_ref_a" and np.any(y > 0):
            ax.set_yscale("log")
    axes[-1].set_xticks(k)
    axes[-1].set_xticklabels([h["run"][:16] for h in rows], rotation=30, ha="right", fontsize=8.5)
    axes[0].set_title(f"history of {sample} across runs")
    fig.tight_layout()
    return _save(fig, out_dir, "history.png")


def stability_plot(stab, out_dir):
    rows = [s for s in stab if s.get("allan_tau_s")]
    if not rows:
        return None
    fig, ax = plt.subplots(figsize=(7, 4.5))
    for s, c, mk in zip(rows, [BLUE, RED, GREEN, PURPLE, CYAN], "os^Dv"):
        v = s.get("voltage_v")
        ax.loglog(s["allan_tau_s"], s["allan_deviation"], marker=mk, color=c,
                  label=f"dwell, step {s['step'] + 1}" + (f" at {v:.0f} V" if v else ""))
    ax.set_xlabel("averaging time τ (s)")
    ax.set_ylabel("Allan deviation of I / mean")
    ax.set_title("current stability during dwells")
    ax.legend(loc="best")
    return _save(fig, out_dir, "stability.png")


def make_all(res, pts, readings, events, out_dir, runs=None) -> List[dict]:
    """Every figure the data allow; returns [{name, path, caption}]. A figure that fails is
    logged and left out, so one odd data set never costs the rest of the report."""
    phi = res["settings"]["phi_ev"]
    figs = []

    def add(make, caption, *args):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                path = make(*args)
        except Exception:  # noqa: BLE001 - see the docstring
            log.exception("figure %s failed", getattr(make, "__name__", make))
            plt.close("all")
            return
        if path:
            figs.append({"name": os.path.basename(path), "path": path, "caption": caption})
    if pts.V.size:
        add(iv_plot, "I–V: up branches filled markers, down branches open triangles; crosses were not used.",
            pts, out_dir, "current against voltage", runs)
        if res.get("branches"):
            add(forms_plot, "The three plot forms; each branch's fit is drawn in a darker shade of its colour (regime 1 solid, "
                "2 dashed, 3 dash-dot) and the breakpoints dotted, shaded ±1 standard uncertainty.", res, pts, out_dir, phi, runs)
    add(timeline_plot, "Voltage and current against time; watchdog verdicts marked.", readings, events, out_dir)
    add(pressure_plot, "Chamber pressure against time.", readings, events, out_dir)
    add(stability_plot, "Allan deviation of the current in each dwell.", res.get("stability") or [], out_dir)
    if res.get("history"):
        add(history_plot, "This sample's earlier analysed runs.", res["history"], out_dir,
            (res.get("run") or {}).get("sample"))
    return figs
