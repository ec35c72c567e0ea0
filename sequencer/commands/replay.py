"""``fieldrun replay PROTOCOL_OR_RUN_FOLDER``: rehearse a protocol, or re-run a recorded
run, on the simulated rig on the virtual clock (see ``sequencer.replay``)."""
from __future__ import annotations

import argparse
import sys

HELP = "replay a protocol or a recorded run on the simulated rig (virtual clock)"
DESCRIPTION = (HELP + ". Writes an ordinary run folder and report and prints the outcome: "
               "completed, tripped (rule, time, voltage) or, unguarded, fibre lost. "
               "Pauses are skipped. Simulated instruments only.")


def add_arguments(p) -> None:
    p.add_argument("source", metavar="PROTOCOL_OR_RUN_FOLDER",
                   help="a protocol file (YAML), or a run folder to replay from its own "
                        "protocol.yaml, limits, rig and seed")
    p.add_argument("--rig", default=None, metavar="SIMRIG",
                   help="simulated rig file (default: the run folder's rig.yaml, or "
                        "protocols/sim-rig.yaml for a protocol)")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="seed of the simulation (default: the recorded one, else the rig's)")
    p.add_argument("--unguarded", action="store_true",
                   help="switch the software watchdog off, to see what it prevents")
    p.add_argument("--quiet", action="store_true", help="no live console")
    p.add_argument("--speed", type=float, default=None, metavar="N",
                   help="pace the virtual clock at N times real time (default: as fast as "
                        "it goes)")
    p.add_argument("--runs-dir", default="runs", metavar="DIR",
                   help="where the replay's run folder goes (runs)")
    p.add_argument("--no-report", dest="report", action="store_false",
                   help="skip the analysis report (faster rehearsals)")


def run(args) -> int:
    from .. import replay
    from . import run as run_cmd

    inputs = replay.resolve(args.source, rig_path=args.rig, seed=args.seed,
                            unguarded=args.unguarded, runs_dir=args.runs_dir)
    if inputs.note:
        print(f"fieldrun replay: {inputs.note}", file=sys.stderr)
    ns = argparse.Namespace(
        verb="replay", protocol=str(inputs.protocol_path), rig=str(inputs.rig_path), unattended=False,
        speed=args.speed, unguarded=inputs.unguarded, quiet=args.quiet,
        runs_dir=args.runs_dir, seed=inputs.seed, skip_pauses=True,
        report=getattr(args, "report", True))
    finished: dict = {}
    code = run_cmd.run(ns, rig=inputs.rig, limits=inputs.limits, finished=finished)
    if "folder" in finished:
        summary = replay.summarise(finished["folder"])
        what = f"replay of {inputs.source_folder}" if inputs.source_folder else "replay"
        print(f"fieldrun replay: {what}: {replay.verdict_line(summary)}", flush=True)
    return code
