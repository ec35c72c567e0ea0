"""``fieldrun check FILE... [--rig RIG]``: validate protocols and rig files.

Each file is recognised by its content (a protocol has ``steps``, a rig file
``instruments``). Every problem found is printed as ``file:line:col: message (hint)``, all
of them in one pass. With ``--rig``, protocols are also compiled against that rig (its hard
limits, its gap for field levels). Exit 0 when every file is valid, 2 when any is not.
"""
from __future__ import annotations

import sys
from typing import List, Optional, Tuple

from ..errors import Problem, ProtocolError
from ..yamlsafe import Node, load

HELP = "check protocols and rig files; print every problem as file:line:col"
DESCRIPTION = ("Check protocol and rig files (recognised by content) and print every problem "
               "found, one per line, as file:line:col: message (hint). With --rig, check "
               "protocols against that rig's hard limits too. Exit 0: all valid; 2: not.")


def add_arguments(parser) -> None:
    parser.add_argument("files", nargs="+", metavar="FILE", help="protocol or rig files")
    parser.add_argument("--rig", metavar="RIG", help="rig file to check protocols against")
    parser.add_argument("--unattended", action="store_true",
                        help="also refuse what an unattended run refuses (a pause without "
                             "a timeout)")


def classify(root: Node) -> Optional[str]:
    """"protocol", "rig" or None, by content."""
    if root.kind != "map":
        return None
    keys = set(root.keys())
    if "instruments" in keys:
        return "rig"
    if "steps" in keys:
        return "protocol"
    return None


def check_file(path: str, rig=None, unattended: bool = False) -> Tuple[str, List[Problem]]:
    """(summary line, problems) for one file. ``rig`` is a parsed Rig or None."""
    from ..compiler import attach_timing_budget, compile_plan, unattended_problems
    from ..protocol import parse_protocol
    from ..rig import parse_rig
    try:
        root, _ = load(path)
        kind = classify(root)
        if kind is None:
            return "", [Problem(path, root.line, root.col,
                                "neither a protocol (no 'steps') nor a rig file "
                                "(no 'instruments')",
                                "a protocol lists its steps; a rig file its instruments")]
        if kind == "rig":
            r = parse_rig(root, path)
            sims = " (simulated)" if r.all_simulated else ""
            return (f"{path}: rig file ok: {r.name}{sims}, sample {r.sample_id}, "
                    f"{len(r.instruments)} instruments"), []
        proto = parse_protocol(root, path)
        if rig is None:
            return (f"{path}: protocol ok: {proto.name}, {len(proto.steps)} steps "
                    "(not checked against a rig: give --rig)"), []
        plan = attach_timing_budget(compile_plan(proto, rig), rig, path)
        if unattended:
            extra = unattended_problems(plan, path)
            if extra:
                return "", extra
        return (f"{path}: protocol ok on {rig.name}: {proto.name}, {len(plan.segments)} "
                f"segments, peak {plan.peak_voltage:.6g} V"), []
    except ProtocolError as exc:
        return "", exc.problems


def run(args) -> int:
    from ..rig import load_rig
    rig = None
    bad = False
    if args.rig:
        try:
            rig = load_rig(args.rig)
        except ProtocolError as exc:
            for p in exc.problems:
                print(p, file=sys.stderr)
            print(f"fieldrun check: the rig file {args.rig} is invalid; protocols are checked "
                  "without it", file=sys.stderr)
            bad = True
    for path in args.files:
        summary, problems = check_file(path, rig, getattr(args, "unattended", False))
        if problems:
            bad = True
            for p in problems:
                print(p, file=sys.stderr)
        else:
            print(summary)
    return 2 if bad else 0
