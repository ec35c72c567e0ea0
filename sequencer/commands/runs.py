"""``fieldrun runs [DIR] [--sample ID] [--json]``: the runs recorded under a folder.

Without ``--sample``: one row per run (start, protocol, sample, outcome, peak voltage,
peak current, trips, duration, complete or not). With ``--sample ID``: the history of one
sample across runs, since conditioning is judged across runs: its turn-on voltage (the
first measured voltage at which the current reached ``--turn-on-current``), the current at
a reference voltage (``--at-voltage``; interpolated in ln I on the first upward crossing)
and the field-enhancement factor when ``RUN/analysis/results.json`` holds one.
"""
from __future__ import annotations

import json
import math
import sys
import time
from pathlib import Path
from typing import Any, Dict, List, Optional

from ..errors import FieldrunError
from ..runfolder import RunFolder, dumps, list_runs

HELP = "list past runs, or the history of one sample across runs"
DESCRIPTION = (__doc__.split("\n\n", 1)[1].replace("``", "") if __doc__ else HELP)  # no reST marks in --help

BETA_KEYS = ("enhancement_factor", "field_enhancement_factor", "beta", "gamma")


class NoRuns(FieldrunError):
    exit_code = 2


def add_arguments(p) -> None:
    p.add_argument("dir", nargs="?", default="runs", metavar="DIR",
                   help="folder holding run folders (default ./runs)")
    p.add_argument("--sample", metavar="ID", help="history of one sample (e.g. KL-F12)")
    p.add_argument("--json", action="store_true", help="JSON instead of a table")
    p.add_argument("--turn-on-current", type=float, default=1e-9, metavar="A",
                   help="current that defines turn-on, in A (default 1e-9)")
    p.add_argument("--at-voltage", type=float, default=None, metavar="V",
                   help="reference voltage for the current column, in V (default: the "
                        "lowest peak voltage among the sample's runs)")


# --------------------------------------------------------------------------- figures
def _valid(cols) -> Any:
    import numpy as np
    cur = cols["current"]
    return np.isfinite(cur) & ~cols["overflow"]


def run_summary(rf: RunFolder) -> Dict[str, Any]:
    """The figures of one run: from ``end.json``'s summary when present, else from the
    samples and events themselves (an incomplete run)."""
    import numpy as np
    end = rf.end
    summ = (end or {}).get("summary") if isinstance((end or {}).get("summary"), dict) else None
    row: Dict[str, Any] = {
        "folder": rf.name, "path": str(rf.path), "start_utc": rf.start_utc,
        "protocol": rf.protocol_name, "sample": rf.sample_id, "outcome": rf.outcome,
        "exit_code": (end or {}).get("exit_code"), "complete": end is not None,
    }
    if summ is not None and summ.get("samples") is not None:
        row.update(peak_voltage_v=summ.get("peak_voltage_v"), peak_current_a=summ.get("peak_current_a"),
                   trips=summ.get("trips", 0), duration_s=summ.get("duration_s"),
                   samples=summ.get("samples"))
        return row
    cols = rf.samples()
    n = len(cols["seq"])
    v = cols["voltage"]
    fin_v = v[np.isfinite(v)]
    ok = _valid(cols)
    row.update(
        peak_voltage_v=float(fin_v.max()) if fin_v.size else None,
        peak_current_a=float(cols["current"][ok].max()) if ok.any() else None,
        trips=len(rf.events("trip")),
        duration_s=float(cols["t"][-1] - cols["t"][0]) if n else 0.0,
        samples=n,
    )
    return row


def turn_on_voltage(cols, threshold_a: float) -> Optional[float]:
    """Measured voltage of the first valid sample whose current reached ``threshold_a``."""
    import numpy as np
    ok = _valid(cols) & np.isfinite(cols["voltage"]) & (cols["current"] >= threshold_a)
    idx = np.flatnonzero(ok)
    return float(cols["voltage"][idx[0]]) if idx.size else None


def current_at(cols, v_ref: float) -> Optional[float]:
    """Current at ``v_ref`` on the first upward crossing of it, interpolated linearly in
    ln I between the two valid samples around the crossing."""
    import numpy as np
    ok = _valid(cols) & np.isfinite(cols["voltage"]) & (cols["current"] > 0)
    v, i = cols["voltage"][ok], cols["current"][ok]
    above = np.flatnonzero(v >= v_ref)
    if not above.size:
        return None
    k = int(above[0])
    if k == 0 or v[k] == v_ref:
        return float(i[k])
    v0, v1 = v[k - 1], v[k]
    if v1 <= v0:
        return float(i[k])
    w = (v_ref - v0) / (v1 - v0)
    return float(math.exp((1 - w) * math.log(i[k - 1]) + w * math.log(i[k])))


def find_number(obj: Any, keys=BETA_KEYS) -> Optional[float]:
    """The first number stored under one of ``keys`` (searched in that order, at any
    depth) in an analysis results document."""
    for key in keys:
        stack = [obj]
        while stack:
            cur = stack.pop(0)
            if isinstance(cur, dict):
                val = cur.get(key)
                if isinstance(val, (int, float)) and not isinstance(val, bool) and math.isfinite(val):
                    return float(val)
                if isinstance(val, dict):
                    for sub in ("value", "estimate", "mean"):
                        x = val.get(sub)
                        if isinstance(x, (int, float)) and not isinstance(x, bool):
                            return float(x)
                stack.extend(cur.values())
            elif isinstance(cur, list):
                stack.extend(cur)
    return None


def enhancement_factor(rf: RunFolder, results: Optional[Dict[str, Any]]) -> Optional[float]:
    """The run's field-enhancement factor from analysis/results.json: the analysis's own
    headline (its ``history`` entry for this run, key ``beta``) when present, otherwise
    the first number under one of ``BETA_KEYS`` anywhere in the document."""
    if not isinstance(results, dict):
        return None
    for entry in results.get("history") or ():
        if isinstance(entry, dict) and entry.get("run") == rf.name:
            x = entry.get("beta", entry.get("enhancement_factor"))
            if isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x):
                return float(x)
    return find_number(results)


def sample_history(runs: List[RunFolder], threshold_a: float,
                   v_ref: Optional[float]) -> Dict[str, Any]:
    rows = []
    data = []
    for rf in runs:
        cols = rf.samples()
        data.append((rf, cols))
    if v_ref is None:
        import numpy as np
        peaks = [float(np.nanmax(c["voltage"])) for _, c in data
                 if len(c["voltage"]) and np.isfinite(c["voltage"]).any()]
        v_ref = min(peaks) if peaks else None
    for rf, cols in data:
        results = rf.analysis_results()
        rows.append({
            "folder": rf.name, "start_utc": rf.start_utc, "protocol": rf.protocol_name,
            "outcome": rf.outcome, "complete": rf.complete,
            "turn_on_voltage_v": turn_on_voltage(cols, threshold_a),
            "current_at_ref_a": current_at(cols, v_ref) if v_ref is not None else None,
            "enhancement_factor": enhancement_factor(rf, results),
        })
    return {"turn_on_current_a": threshold_a, "reference_voltage_v": v_ref, "runs": rows}


# --------------------------------------------------------------------------- output
def _utc(ts: Optional[float]) -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(ts)) if ts is not None else "?"


def _num(x: Optional[float], unit: str, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "--"
    return f"{x:.{digits}g} {unit}".strip()


def _dur(s: Optional[float]) -> str:
    from ..console import fmt_duration
    return fmt_duration(s)


def _print_table(title: str, headers: List[str], rows: List[List[str]]) -> None:
    from rich.table import Table
    from ..console import rich_console
    table = Table(title=title, title_justify="left")
    for h in headers:
        table.add_column(h, no_wrap=h not in ("protocol", "sample"))
    for r in rows:
        table.add_row(*r)
    con = rich_console(sys.stdout, force_terminal=None)
    if not con.is_terminal:
        con = rich_console(sys.stdout, force_terminal=None, width=200)
    con.print(table)


def run(args) -> int:
    d = Path(args.dir)
    if not d.is_dir():
        raise NoRuns(f"{d}: " + ("a file, not a folder of runs" if d.exists() else "no such folder"))
    runs = list_runs(d)
    if args.sample:
        mine = [rf for rf in runs if rf.sample_id.casefold() == args.sample.casefold()]
        if not mine:
            raise NoRuns(f"{d}: no runs of sample {args.sample!r}")
        hist = sample_history(mine, args.turn_on_current, args.at_voltage)
        hist["sample"] = args.sample
        if args.json:
            print(dumps(hist, indent=2))
            return 0
        vref = hist["reference_voltage_v"]
        _print_table(
            f"sample {args.sample}: {len(mine)} run{'' if len(mine) == 1 else 's'} (turn-on at {args.turn_on_current:.3g} A, "
            f"current at {_num(vref, 'V')})",
            ["start", "protocol", "outcome", "turn-on V", f"I at {_num(vref, 'V')}", "enhancement"],
            [[_utc(r["start_utc"]), r["protocol"], r["outcome"], _num(r["turn_on_voltage_v"], "V", 5),
              _num(r["current_at_ref_a"], "A"), _num(r["enhancement_factor"], "", 4)]
             for r in hist["runs"]])
        return 0
    rows = [run_summary(rf) for rf in runs]
    if args.json:
        print(dumps(rows, indent=2))
        return 0
    if not rows:
        print(f"{d}: no runs")
        return 0
    _print_table(
        f"{len(rows)} run{'' if len(rows) == 1 else 's'} in {d}",
        ["start", "protocol", "sample", "outcome", "peak V", "peak I", "trips", "duration", "record"],
        [[_utc(r["start_utc"]), r["protocol"], r["sample"] or "--", r["outcome"],
          _num(r["peak_voltage_v"], "V", 5), _num(r["peak_current_a"], "A"), str(r["trips"]),
          _dur(r["duration_s"]), "complete" if r["complete"] else "INCOMPLETE"] for r in rows])
    return 0
