"""``fieldrun calibrate RUN_FOLDER... --out SIMRIG``: fit the simulated cathode to recorded
runs and write a simulated rig file and a comparison plot (see ``sequencer.calibrate``)."""
from __future__ import annotations

import json
import sys
from pathlib import Path

from ..errors import RefusedError

HELP = "fit the simulated cathode to recorded runs (I-V sweeps, dwells); write a simulated rig"
DESCRIPTION = (HELP + ". Fits what I-V data can determine: the enhancement-factor scale, the "
               "effective area, the noise level and the burst rate; writes SIMRIG (YAML, "
               "commented) and SIMRIG's name with .png (recorded vs simulated).")


def add_arguments(p) -> None:
    p.add_argument("runs", nargs="+", metavar="RUN_FOLDER", help="recorded run folders")
    p.add_argument("--out", required=True, metavar="SIMRIG", help="simulated rig file to write")
    p.add_argument("--rig", default=None, metavar="PRIOR",
                   help="simulated rig to start from: its cathode block is the starting point "
                        "and gives every parameter not fitted (default: the first run's "
                        "rig.yaml when it has a simulation block, else protocols/sim-rig.yaml)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def run(args) -> int:
    from .. import calibrate as K

    out = Path(args.out)
    # refuse a bad --out before the (long) fit, not after it
    if out.is_dir():
        raise RefusedError(f"--out {out}: is a folder; give the simulated rig file to write, "
                           f"e.g. {out / 'sim-rig-fitted.yaml'}")
    if not out.parent.is_dir():
        raise RefusedError(f"--out {out}: the folder {out.parent} does not exist")
    runs = []
    for folder in args.runs:
        if not Path(folder).is_dir():
            raise RefusedError(f"{folder}: no such run folder")
        runs.append(K.load_run(folder))
    from ..replay import DEFAULT_SIM_RIG
    prior_path = Path(args.rig) if args.rig else None
    if prior_path is None and not (runs[0].rig_doc.get("simulation") or {}):
        prior_path = DEFAULT_SIM_RIG
    if prior_path is not None:
        if not prior_path.is_file():
            raise RefusedError(f"{prior_path}: no such rig file")
        prior_doc = K._yaml_load(prior_path)
    else:
        prior_doc = runs[0].rig_doc
    prior_cathode = dict((prior_doc.get("simulation") or {}).get("cathode") or {})
    out = Path(args.out)
    prog = None
    if not args.quiet:
        from rich.console import Console
        from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn
        prog = Progress(SpinnerColumn(), TextColumn("calibrating: {task.description}"),
                        TimeElapsedColumn(), console=Console(file=sys.stderr))
        prog.start()
        task = prog.add_task("reading runs", total=None)
    try:
        fit = K.fit(runs, prior_cathode=prior_cathode, progress=(lambda what: prog.update(task, description=what)) if prog else None)
    finally:
        if prog is not None:
            prog.stop()
    text = K.rig_text(prior_doc, fit, [str(r.folder) for r in runs], cathode=prior_cathode,
                      seed=runs[0].seed)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        out.write_text(text, encoding="utf-8")
        png = K.plot(runs, fit, out.with_suffix(".png"), cathode=prior_cathode)
        out.with_suffix(".json").write_text(json.dumps(
            {"fitted": fit.params, "prior": fit.prior, "details": fit.details}, indent=2,
            default=float) + "\n", encoding="utf-8")
    except OSError as exc:
        raise RefusedError(f"cannot write {out}: {exc}") from None
    kept = set()
    if not isinstance(fit.details.get("sweep"), dict):
        kept |= {"height_median_m", "area_scale"}
    if not isinstance(fit.details.get("dwell"), dict):
        kept |= {"noise_level", "burst_rate_hz"}
    for k in K._COMMENTS:
        note = "kept: no usable " + ("sweep" if k in ("height_median_m", "area_scale") else "dwell") \
            if k in kept else f"was {fit.prior[k]:.4g}"
        print(f"  {k:18s} {fit.params[k]:.4g}   ({note})")
    print(f"fieldrun calibrate: wrote {out} and {png}; replay a protocol on it with: "
          f"fieldrun replay PROTOCOL --rig {out}")
    return 0
