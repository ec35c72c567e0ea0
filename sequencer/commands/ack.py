"""``fieldrun ack RIG``: the operator's acknowledgement after an exit 5.

An exit 5 means fieldrun could not confirm the output off; the rig was marked and every
run on it is refused until a person has checked the stand (meter on the output, supply
front panel, interlock) and says so here. The acknowledgement is recorded in the rig's
state folder (``acknowledged.jsonl``) with who and when.
"""
from __future__ import annotations

import getpass
import json
import time
from pathlib import Path

HELP = "acknowledge an unconfirmed output-off on a rig (after checking it in person)"


def add_arguments(p) -> None:
    p.add_argument("rig", metavar="RIG", help="rig file (YAML)")
    p.add_argument("--note", default="", help="what was checked")


def run(args) -> int:
    from .. import statefile
    from ..rig import load_rig
    from .run import _state_dir_of
    rig = load_rig(args.rig)
    state_dir = statefile.state_dir_for(args.rig, rig.name, _state_dir_of(rig, args.rig))
    mark = statefile.clear_mark(state_dir)
    if mark is None:
        print(f"{args.rig}: not marked; nothing to acknowledge")
        return 0
    try:
        user = getpass.getuser()
    except Exception:   # noqa: BLE001
        user = "?"
    Path(state_dir).mkdir(parents=True, exist_ok=True)
    with open(Path(state_dir) / "acknowledged.jsonl", "a", encoding="utf-8") as fh:
        fh.write(json.dumps({"utc": time.time(), "user": user, "note": args.note,
                             "mark": mark}) + "\n")
    print(f"{args.rig}: acknowledged (was marked: {mark.get('reason')}; run "
          f"{mark.get('run_folder')}). Runs on this rig are allowed again.")
    return 0
