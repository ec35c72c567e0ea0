"""``fieldrun whatif RUN_FOLDER --limits FILE``: re-judge a recorded run under other limits.

The recorded samples (samples.csv) are fed, offline, through the same watchdog that runs
live, with the run's recorded limits (manifest.json) overlaid by FILE. FILE is a YAML mapping
in the form of a protocol's ``limits`` block (``current_max: 50 uA``), or a whole protocol
whose ``limits`` block is taken; values are read with the protocol's own unit grammar.
Without ``--limits`` the run is re-judged with its own limits, which must reproduce the
recorded verdicts.

What it prints: the limits that differ; the verdict changes recorded in events.jsonl and the
what-if verdict changes side by side; the first action of every rule that would have acted;
and where the first trip or ramp-down moves. What it writes, under RUN_FOLDER/analysis/:
``whatif-<name>.png`` (current against time, both sets of verdicts marked) and
``whatif-<name>.json`` (the same comparison as data). The raw files are never altered.

A caveat printed with every result: the samples are what the recorded run did. Once the
what-if verdicts differ from the recorded ones, the run would have gone on differently (a
back-off lowers the voltage, a trip ends it), so later what-if verdicts are a lower bound on
what the new limits do, not a replay.
"""
from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple

from ..errors import FieldrunError
from ..limits import PARAMS, Limits
from ..rules import Context
from ..sample import Action, Sample
from ..watchdog import Watchdog

HELP = "re-judge a recorded run with other watchdog limits, offline"
DESCRIPTION = ("Feed a recorded run's samples through the watchdog offline with other limits "
               "and show, side by side with what happened, where each rule would have acted; "
               "writes a plot and the comparison under RUN_FOLDER/analysis/.")

ENGINE_RULES = ("engine-comm",)
"""Verdict rules the engine gives itself (not watchdog rules); shown, never compared."""


def add_arguments(p) -> None:
    p.add_argument("run_folder", metavar="RUN_FOLDER", help="a recorded run folder")
    p.add_argument("--limits", metavar="FILE", default=None,
                   help="YAML mapping of watchdog parameters with units, like a protocol's "
                        "limits block (default: the run's own limits)")
    p.add_argument("--name", default=None,
                   help="name of the outputs under analysis/ (default: the FILE's stem)")
    p.add_argument("--no-plot", action="store_true", help="do not write the PNG")


# --------------------------------------------------------------------------- inputs
def read_limits_file(path: str) -> Dict[str, float]:
    """Parameter name -> SI value from FILE; one ProtocolError (file:line:col) on mistakes."""
    from ..protocol import read_limits
    from ..yamlsafe import Fields, load
    root, _ = load(path)
    f = Fields(str(path))
    node = root
    if root.kind == "map" and root.get("limits") is not None:
        node = root.get("limits")     # a whole protocol (or {limits: ...}): its limits block
    values, _lines = read_limits(f, node, "limits")
    f.raise_if_any()
    return values


def recorded_limits(manifest: Dict[str, Any]) -> Tuple[Limits, List[str]]:
    """The run's limits from manifest.json over the defaults, and notes on what was missing."""
    notes = []
    base = Limits.defaults()
    lim = manifest.get("limits")
    if not isinstance(lim, dict):
        lim = (manifest.get("plan") or {}).get("limits") if isinstance(manifest.get("plan"), dict) else None
    if not isinstance(lim, dict):
        notes.append("manifest.json has no limits: the defaults stand in for the recorded ones")
        return base, notes
    known = {k: float(v) for k, v in lim.items()
             if k in PARAMS and isinstance(v, (int, float)) and not isinstance(v, bool)}
    unknown = sorted(set(lim) - set(PARAMS))
    if unknown:
        notes.append("recorded limits not known to this watchdog (ignored): " + ", ".join(unknown))
    return base.replace(**known), notes


def _plan_segments(folder: Path) -> Optional[Dict[int, Any]]:
    """Segment index -> params, by compiling the run's copied protocol.yaml and rig.yaml
    (None when they are missing or no longer compile)."""
    try:
        from ..compiler import compile_plan
        from ..protocol import load_protocol
        from ..rig import load_rig
        plan = compile_plan(load_protocol(folder / "protocol.yaml"), load_rig(folder / "rig.yaml"))
    except Exception:   # noqa: BLE001 - an old or missing input only costs the step params
        return None
    return {s.index: dict(s.params) for s in plan.segments}


class RunContexts:
    """The watchdog Context of each recorded sample, built the way the engine builds it
    (``Context.for_step`` of the segment, the supply's programmed slew, whether a gauge is
    fitted). The engine judges samples during its own back-off of a regulate step as
    "constant"; that is followed from the recorded BACK_OFF verdicts."""

    def __init__(self, manifest: Dict[str, Any], segments: Optional[Dict[int, Any]],
                 samples: List[Sample], limits: Limits):
        wd = manifest.get("watchdog") if isinstance(manifest.get("watchdog"), dict) else {}
        slew = wd.get("slew_v_per_s")
        self.slew = float(slew) if isinstance(slew, (int, float)) else math.inf
        inst = manifest.get("instruments")
        if isinstance(wd.get("has_gauge"), bool):
            self.has_gauge = wd["has_gauge"]
        elif isinstance(inst, dict) and inst:
            self.has_gauge = "gauge" in inst
        else:
            self.has_gauge = any(math.isfinite(s.pressure_pa) or "gauge-unknown" in s.flags
                                 for s in samples)
        self.segments = segments or {}
        self.limits = limits
        self.backoff_until: Optional[float] = None
        self._cache: Dict[Tuple[int, str, bool], Context] = {}

    def __call__(self, s: Sample) -> Context:
        held = self.backoff_until is not None and s.t < self.backoff_until
        key = (s.step_index, s.step_kind, held)
        c = self._cache.get(key)
        if c is None:
            c = Context.for_step(s.step_kind, self.segments.get(s.step_index, {}),
                                 slew_v_per_s=self.slew, has_gauge=self.has_gauge)
            if held:
                c = dataclasses.replace(c, intent="constant")
            self._cache[key] = c
        return c

    def saw(self, s: Sample, action: Optional[str]) -> None:
        """Follow the engine's back-off mode from the verdict recorded for ``s``."""
        if action == "back_off" and s.step_kind not in ("condition",):
            self.backoff_until = s.t + self.limits.backoff_hold
        elif self.backoff_until is not None and s.t >= self.backoff_until and action == "continue":
            self.backoff_until = None


# --------------------------------------------------------------------------- judging
def _recorded_changes(events: List[dict], samples: List[Sample]) -> List[dict]:
    """The recorded verdict changes, each tied to the sample it judged: the last sample that
    started at or before the event's time (the engine writes the event after reading)."""
    import bisect
    ts = [s.t for s in samples]
    out, last = [], None
    for e in events:
        if e.get("kind") not in ("verdict", "trip"):
            continue
        key = (e.get("action") or ("trip" if e.get("kind") == "trip" else None), e.get("rule"))
        if e.get("kind") == "trip" and last == key:
            continue          # the engine writes a trip as a verdict and again as a trip
        t = e.get("t")
        k = bisect.bisect_right(ts, float(t) + 1e-9) - 1 if isinstance(t, (int, float)) else -1
        if k < 0:
            continue
        last = key
        s = samples[k]
        out.append({"seq": s.seq, "t": s.t, "setpoint": s.setpoint_v, "action": key[0],
                    "rule": key[1], "value": e.get("value"), "threshold": e.get("threshold"),
                    "unit": e.get("unit", ""), "message": e.get("message", "")})
    return out


def rejudge(samples: List[Sample], limits: Limits, contexts, recorded: List[dict],
            survived: Optional[float] = None):
    """Feed the samples through a fresh watchdog. Returns (changes, first_by_rule) where
    ``changes`` are the what-if verdict changes and ``first_by_rule`` each rule's first
    non-continue verdict (rule -> dict)."""
    wd = Watchdog(limits, survived_max_current=survived)
    rec_by_seq = {r["seq"]: r["action"] for r in recorded}
    changes, first = [], {}
    for s in samples:
        v = wd.judge(s, contexts(s))
        for e in wd.events():
            changes.append({"seq": s.seq, "t": s.t, "setpoint": s.setpoint_v,
                            "action": e["action"], "rule": e["rule"], "value": e["value"],
                            "threshold": e["threshold"], "unit": e["unit"],
                            "message": e["message"]})
        for rv in wd.last_verdicts:
            if rv.action is not Action.CONTINUE and rv.rule not in first:
                first[rv.rule] = {"seq": s.seq, "t": s.t, "setpoint": s.setpoint_v,
                                  "action": rv.action.name.lower(), "value": _num(rv.value),
                                  "threshold": _num(rv.threshold), "unit": rv.unit,
                                  "message": rv.message}
        contexts.saw(s, rec_by_seq.get(s.seq))
    return changes, first


def _num(x):
    return float(x) if isinstance(x, (int, float)) and math.isfinite(x) else None


def _first_end(changes: List[dict]) -> Optional[dict]:
    return next((c for c in changes if c["action"] in ("trip", "ramp_down")), None)


def compare(recorded: List[dict], whatif: List[dict]) -> Dict[str, Any]:
    # a return to continue is compared by its time only: the engine records it with an
    # empty rule, the watchdog's own event names the rule released
    key = lambda c: (c["seq"], c["action"], "" if c["action"] == "continue" else c["rule"])
    rec = [c for c in recorded if c["rule"] not in ENGINE_RULES]
    same = [key(c) for c in rec] == [key(c) for c in whatif]
    first_diff = None
    for a, b in zip(rec + [None] * len(whatif), whatif + [None] * len(rec)):
        if a is None and b is None:
            break
        if a is None or b is None or key(a) != key(b):
            first_diff = min(c["t"] for c in (a, b) if c is not None)
            break
    r_end, w_end = _first_end(rec), _first_end(whatif)
    moved = None
    if r_end and w_end:
        moved = w_end["t"] - r_end["t"]
    return {"identical": same, "first_difference_t": first_diff, "recorded_end": r_end,
            "whatif_end": w_end, "end_moved_s": moved}


# --------------------------------------------------------------------------- output
def _fmt(c: Optional[dict]) -> str:
    if c is None:
        return ""
    rule = "" if c["action"] == "continue" else c["rule"]   # a release names no rule
    return f"t={c['t']:9.2f} s  {c['setpoint']:8.1f} V  {c['action']:<9} {rule}".rstrip()


def _unit_value(name: str, v: float) -> str:
    from ..quantities import format_si
    return format_si(v, PARAMS[name].unit)


def plot(path: Path, samples: List[Sample], recorded: List[dict], whatif: List[dict],
         title: str) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    t = [s.t for s in samples]
    i = [s.current_a if s.valid_current and s.current_a > 0 else math.nan for s in samples]
    by_seq = {s.seq: s for s in samples}
    colours = {"continue": "tab:green", "hold": "tab:olive", "back_off": "tab:orange",
               "ramp_down": "tab:purple", "trip": "tab:red"}
    fig, ax = plt.subplots(figsize=(10, 4.5))
    ax.semilogy(t, i, lw=0.8, color="0.3", label="current")
    finite_i = [x for x in i if math.isfinite(x)]
    top = max(finite_i) if finite_i else 1.0
    for group, marker, y, label in ((recorded, "v", top * 2.0, "recorded"),
                                    (whatif, "^", top * 4.0, "what-if")):
        for k, c in enumerate(group):
            ax.scatter([c["t"]], [y], marker=marker, color=colours.get(c["action"], "k"),
                       s=40, zorder=3)
            s = by_seq.get(c["seq"])
            if s is not None and s.valid_current and s.current_a > 0:
                ax.scatter([c["t"]], [s.current_a], marker=marker, facecolors="none",
                           edgecolors=colours.get(c["action"], "k"), s=30, zorder=3)
        ax.scatter([], [], marker=marker, color="k", label=label)
    arcs = [s.t for s in samples if s.overflow]
    if arcs:
        ax.scatter(arcs, [top * 1.2] * len(arcs), marker="x", color="0.4", s=20,
                   label="ammeter overflow")
    for name, col in colours.items():
        ax.scatter([], [], color=col, marker="s", label=name.replace("_", " "))
    ax.set_xlabel("t [s]")
    ax.set_ylabel("current [A]")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, ncol=4, loc="lower right")
    ax.grid(True, which="both", alpha=0.3)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)


def run(args) -> int:
    from ..runfolder import RunFolder
    folder = RunFolder(args.run_folder)
    manifest = folder.manifest
    samples = list(folder.iter_samples())
    if not samples:
        raise FieldrunError(f"{folder.path}: samples.csv has no samples to judge")
    base, notes = recorded_limits(manifest)
    changes_in = read_limits_file(args.limits) if args.limits else {}
    limits = base.replace(**changes_in)
    name = args.name or (Path(args.limits).stem if args.limits else "recorded-limits")
    name = "".join(ch if ch.isalnum() or ch in "-_." else "-" for ch in name)[:60] or "limits"
    wdm = manifest.get("watchdog") if isinstance(manifest.get("watchdog"), dict) else {}
    survived = wdm.get("survived_max_current")
    survived = float(survived) if isinstance(survived, (int, float)) else None

    recorded = _recorded_changes(folder.events(), samples)
    contexts = RunContexts(manifest, _plan_segments(folder.path), samples, limits)
    whatif, first = rejudge(samples, limits, contexts, recorded, survived)
    cmp_ = compare(recorded, whatif)

    print(f"whatif: {folder.name}: {len(samples)} samples, t {samples[0].t:.1f} .. "
          f"{samples[-1].t:.1f} s")
    for n in notes:
        print(f"  note: {n}")
    for k, v in sorted(changes_in.items()):
        old = base.values[k]
        way = "same" if v == old else ("tighter" if base.is_tighter(k, v) else "looser")
        print(f"  {k}: {_unit_value(k, old)} -> {_unit_value(k, v)} ({way})")
    if not changes_in:
        print("  limits: as recorded")
    width = 52
    print(f"\n  {'recorded verdict changes':<{width}} | what-if verdict changes")
    rows = max(len(recorded), len(whatif))
    for k in range(rows):
        a = _fmt(recorded[k]) if k < len(recorded) else ""
        b = _fmt(whatif[k]) if k < len(whatif) else ""
        print(f"  {a:<{width}} | {b}")
    if rows == 0:
        print(f"  {'(none)':<{width}} | (none)")
    print("\n  rules that would have acted (first time each):")
    if not first:
        print("    none")
    for rule, c in sorted(first.items(), key=lambda kv: (kv[1]["t"], kv[0])):
        val = "" if c["value"] is None else f" seen {c['value']:.4g} {c['unit']}".rstrip()
        thr = "" if c["threshold"] is None else f", threshold {c['threshold']:.4g} {c['unit']}".rstrip()
        print(f"    {rule:<18} {c['action']:<9} t={c['t']:.2f} s at {c['setpoint']:.1f} V{val}{thr}")
    r_end, w_end = cmp_["recorded_end"], cmp_["whatif_end"]
    if cmp_["identical"]:
        print("\n  the what-if verdicts are the recorded ones")
    if r_end or w_end:
        rs = f"{r_end['action']} by {r_end['rule']} at t={r_end['t']:.2f} s" if r_end else "none"
        ws = f"{w_end['action']} by {w_end['rule']} at t={w_end['t']:.2f} s" if w_end else "none"
        line = f"  end of run: recorded {rs}; what-if {ws}"
        if cmp_["end_moved_s"] is not None and cmp_["end_moved_s"] != 0:
            d = cmp_["end_moved_s"]
            line += f" ({abs(d):.2f} s {'earlier' if d < 0 else 'later'})"
        print(line)
    if not cmp_["identical"] and cmp_["first_difference_t"] is not None:
        print(f"  caveat: from t={cmp_['first_difference_t']:.2f} s on the recorded run "
              "was already acting on other verdicts; later what-if verdicts judge what it did, "
              "not what it would have done")

    out = folder.analysis_dir
    out.mkdir(parents=True, exist_ok=True)
    result = {"run": folder.name, "limits_file": args.limits,
              "changed": changes_in, "limits": dict(limits.values), "recorded": recorded,
              "whatif": whatif, "first_by_rule": first, "comparison": cmp_, "notes": notes}
    (out / f"whatif-{name}.json").write_text(json.dumps(result, indent=1, allow_nan=False,
                                                        default=_num) + "\n")
    if not args.no_plot:
        png = out / f"whatif-{name}.png"
        plot(png, samples, recorded, whatif,
             f"{folder.name}: recorded (v) and what-if (^) verdicts, limits {name}")
        print(f"\n  plot: {png}")
    print(f"  data: {out / f'whatif-{name}.json'}")
    return 0
