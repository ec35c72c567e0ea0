"""``fieldrun analyze``: analyse a run folder or an outside CSV file.

Writes results.json and the figures into RUN_FOLDER/analysis/ (or CSV_STEM.analysis/ beside
a CSV file, or --out); the raw files are never altered. User mistakes give one line and
exit code 2.
"""
from __future__ import annotations

import json
import math
import sys

HELP = "analyse a run folder or CSV: FN/MG/ML fits, regimes, orthodoxy test, hysteresis, stability"
DESCRIPTION = (
    "Analyse a run folder (or an outside CSV file with voltage and current columns): data hygiene, "
    "Fowler–Nordheim, Murphy–Good and Millikan–Lauritsen fits per sweep direction, emission regimes "
    "with breakpoints, field enhancement factor and formal area with uncertainties, Forbes's "
    "orthodoxy test, hysteresis, dwell stability and figures of merit. Results and figures go to "
    "RUN_FOLDER/analysis/.")


def add_arguments(p) -> None:
    p.add_argument("paths", nargs="+", metavar="RUN_FOLDER_OR_CSV",
                   help="run folder(s) or CSV file(s); several runs of one sample at different gaps "
                        "also give threshold voltage against gap")
    p.add_argument("--work-function", metavar="PHI", help="emitter work function, e.g. 4.8eV "
                   "(default: from the run files, else 4.8 eV)")
    p.add_argument("--work-function-uncertainty", metavar="DPHI", default="0.2eV",
                   help="standard uncertainty of the work function (default 0.2eV)")
    p.add_argument("--gap", metavar="D", help="cathode-anode gap, e.g. 500um (gives beta = d/zeta)")
    p.add_argument("--gap-uncertainty", metavar="DD", help="standard uncertainty of the gap, e.g. 10um")
    p.add_argument("--series-resistance", metavar="R", help="resistance in series with the gap, e.g. 10Mohm")
    p.add_argument("--fit-resistance", action="store_true",
                   help="fit the series resistance from the data (assumes one emitting population)")
    p.add_argument("--diameter", metavar="D", help="fibre diameter for the macroscopic current density, e.g. 50um")
    p.add_argument("--reference-voltage", metavar="V", help="voltage at which to quote the current, e.g. 1kV")
    p.add_argument("--voltage-column", metavar="COL[:UNIT]", help="CSV voltage column (name or 1-based index)")
    p.add_argument("--current-column", metavar="COL[:UNIT]", help="CSV current column (name or 1-based index)")
    p.add_argument("--max-regimes", type=int, default=3, choices=(1, 2, 3),
                   help="largest number of emission regimes to consider (default 3)")
    p.add_argument("--out", metavar="DIR", help="write results here instead (one path only)")
    p.add_argument("--no-figures", action="store_true", help="skip the PNG figures")
    p.add_argument("--json", action="store_true", help="print the results as JSON on stdout")


UNIT_EXAMPLES = {"eV": "4.5 eV", "m": "500 um", "ohm": "1 Mohm", "V": "1 kV"}


def _q(text, unit, what):
    from ..analysis.csvin import AnalysisInputError
    from ..analysis.run import quantity
    if text is None:
        return None
    v = quantity(str(text), unit)
    if v is None or not math.isfinite(v):
        example = UNIT_EXAMPLES.get(unit, f"1 {unit}")
        try:
            float(str(text))
        except ValueError:
            raise AnalysisInputError(f"--{what} {text!r}: not a quantity in {unit}-compatible units "
                                     f"(for example '{example}')") from None
        raise AnalysisInputError(f"--{what} {text!r}: give the unit too (for example '{example}')")
    if v < 0:
        raise AnalysisInputError(f"--{what} {text!r}: must not be negative")
    return v


def options(args):
    from ..analysis.run import Options
    from ..analysis.csvin import AnalysisInputError
    opt = Options(
        phi=_q(args.work_function, "eV", "work-function"),
        phi_u=_q(args.work_function_uncertainty, "eV", "work-function-uncertainty"),
        gap=_q(args.gap, "m", "gap"), gap_u=_q(args.gap_uncertainty, "m", "gap-uncertainty"),
        series_r=_q(args.series_resistance, "ohm", "series-resistance"), fit_r=bool(args.fit_resistance),
        diameter=_q(args.diameter, "m", "diameter"), v_ref=_q(args.reference_voltage, "V", "reference-voltage"),
        voltage_column=args.voltage_column, current_column=args.current_column,
        max_segments=args.max_regimes)
    if opt.gap == 0 or opt.diameter == 0:
        raise AnalysisInputError("--gap and --diameter must be positive")
    if opt.fit_r and opt.series_r is not None:
        raise AnalysisInputError("give either --series-resistance or --fit-resistance, not both")
    return opt


def summary_lines(res) -> list:
    from ..report.content import si
    lines = [f"{res['source']['path']}: {res['hygiene']['kept']} of {res['hygiene']['points']} settled "
             f"points used (phi = {res['settings']['phi_ev']:g} eV)"]
    for bname, br in res.get("branches", {}).items():
        reg = br["regimes"]
        bp = ", ".join(f"{b:.0f} ± {s:.0f} V" for b, s in zip(reg["breakpoints_v"], reg["breakpoint_se_v"]))
        from ..analysis.run import branch_label
        lines.append(f"  {branch_label(res, bname)}: {reg['n_segments']} regime(s)"
                     + (f", breakpoint {bp}" if bp else ""))
        for seg in br["segments"]:
            fn = seg["forms"].get("FN", {})
            parts = []
            for form in ("FN", "MG", "ML"):
                e = seg["forms"].get(form, {})
                if "zeta" not in e:
                    continue
                val = (f"beta {e['beta']:.0f}±{100 * e['beta_rel_u']:.0f}%" if e.get("beta")
                       else f"zeta {si(e['zeta'], 'm')}")
                parts.append(f"{form} {val}, area {e['area']:.2g} m²")
            o = fn.get("orthodoxy", {})
            lines.append(f"    regime {seg['index']} ({seg['v_range'][0]:.0f}-{seg['v_range'][1]:.0f} V): "
                         + "; ".join(parts)
                         + (f"; orthodoxy {o.get('verdict')} (f {o.get('f_low'):.2f}-{o.get('f_high'):.2f})"
                            if o.get("f_low") is not None else ""))
    lines.append(f"  trust: {res['trust']['verdict']}")
    # how the data were read (a CSV without a header or units, rows set aside, the gap
    # voltage used): assumptions the user must see, not only find in results.json
    for n in (res.get("hygiene") or {}).get("notes", []):
        lines.append(f"  note: {n}")
    for n in res.get("notes", []):
        lines.append(f"  note: {n}")
    return lines


def run(args) -> int:
    from ..analysis import run as arun
    from ..analysis.csvin import AnalysisInputError
    opt = options(args)
    if args.out and len(args.paths) > 1:
        raise AnalysisInputError("--out takes one path only")
    results = []
    for path in args.paths:
        try:
            res = arun.analyze(path, opt, out_dir=args.out, figures=not args.no_figures)
        except OSError as exc:
            raise AnalysisInputError(f"cannot write the analysis of {path}: {exc.strerror or exc}") from None
        results.append(res)
    multi = arun.multigap_summary(results) if len(results) > 1 else None
    if args.json:
        doc = [{k: v for k, v in r.items() if not k.startswith("_")} for r in results]
        payload = doc[0] if len(doc) == 1 else {"runs": doc, "threshold_vs_gap": multi}
        json.dump(arun.clean(payload), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
        return 0
    for r in results:
        print("\n".join(summary_lines(r)))
        print(f"  wrote {r['_out_dir']}")
    if multi and "field_v_per_m" in multi:
        print(f"threshold voltage against gap: {multi['field_v_per_m'] / 1e6:.3g} V/um, "
              f"offset {multi['offset_v']:.3g} V over {len(multi['points'])} runs")
    elif multi:
        print(f"threshold voltage against gap: {multi.get('note')}")
    return 0
