"""``fieldrun campaign PROTOCOL --fibres N``: the protocol on N simulated fibres, each
guarded and unguarded (see ``sequencer.campaign``)."""
from __future__ import annotations

import json
import sys
import time
from pathlib import Path

from ..errors import RefusedError

HELP = "run a protocol on many simulated fibres, guarded and unguarded, and count the losses"
DESCRIPTION = (HELP + ". Fibre k's random stream is numpy SeedSequence(seed).spawn(N)[k], so "
               "the results do not depend on the number of workers (on one build). They show "
               "the self-consistency of the cathode model and the watchdog, not the "
               "protection of real fibres.")


def add_arguments(p) -> None:
    p.add_argument("protocol", metavar="PROTOCOL", help="protocol file (YAML)")
    p.add_argument("--fibres", type=int, required=True, metavar="N", help="number of simulated fibres")
    p.add_argument("--workers", type=int, default=None, metavar="W",
                   help="local worker processes (default: one per CPU, at most N; 1 runs in "
                        "this process)")
    p.add_argument("--rig", default=None, metavar="SIMRIG",
                   help="simulated rig file (default protocols/sim-rig.yaml)")
    p.add_argument("--dask", default=None, metavar="ADDRESS",
                   help="run on this Dask distributed scheduler (e.g. tcp://127.0.0.1:8786) "
                        "instead of local processes")
    p.add_argument("--seed", type=int, default=1, metavar="N", help="campaign seed (1)")
    p.add_argument("--out", default=None, metavar="DIR",
                   help="where campaign.json and campaign.png go (default "
                        "campaigns/<time>-<protocol>)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def run(args) -> int:
    from .. import campaign as C
    from ..compiler import compile_plan
    from ..protocol import load_protocol
    from ..replay import DEFAULT_SIM_RIG, _is_simulated
    from ..rig import load_rig
    from ..runfolder import sanitise_name

    if args.fibres < 1:
        raise RefusedError(f"--fibres must be at least 1, got {args.fibres}")
    if args.workers is not None and args.workers < 1:
        raise RefusedError(f"--workers must be at least 1, got {args.workers}")
    rig_path = Path(args.rig) if args.rig else DEFAULT_SIM_RIG
    if not rig_path.is_file():
        raise RefusedError(f"{rig_path}: no such rig file")
    protocol = load_protocol(args.protocol)     # bad input: one line, exit 2
    rig = load_rig(rig_path)
    if not _is_simulated(rig):
        raise RefusedError(f"{rig_path}: a campaign runs on a simulated rig only (every "
                           f"instrument a sim: address)")
    compile_plan(protocol, rig)
    workers = args.workers or C.default_workers(args.fibres)
    where = f"Dask scheduler {args.dask}" if args.dask else (
        "this process" if workers == 1 else f"{workers} local worker processes")
    print(f"fieldrun campaign: {args.fibres} simulated fibres, seed {args.seed}, on {where}; "
          f"each run guarded and unguarded", file=sys.stderr, flush=True)
    c = C.run_campaign(args.protocol, rig_path, args.fibres, seed=args.seed, workers=workers,
                       dask=args.dask, progress=not args.quiet)
    out = Path(args.out) if args.out else Path("campaigns") / (
        time.strftime("%Y%m%dT%H%M%SZ", time.gmtime()) + "-" + sanitise_name(protocol.name))
    try:
        out.mkdir(parents=True, exist_ok=True)
        (out / "campaign.json").write_text(json.dumps(c.to_dict(), indent=2) + "\n", encoding="utf-8")
        png = C.plot(c, out / "campaign.png")
    except OSError as exc:
        raise RefusedError(f"cannot write the campaign results under {out}: {exc}") from None
    from rich.console import Console
    Console().print(C.table(c))
    g, u = c.summary["guarded"], c.summary["unguarded"]
    print(f"fieldrun campaign: unguarded {u['fibres_lost']} of {args.fibres} fibres lost, "
          f"guarded {g['fibres_lost']}; {out / 'campaign.json'}, {png}")
    print("(simulated fibres: this is self-consistency of the cathode model and the watchdog, "
          "not protection of real fibres; results do not depend on the workers on one build)")
    return 0
