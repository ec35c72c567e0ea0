"""``fieldrun ctl RUN_FOLDER pause|resume|stop|tighten RULE PARAM VALUE``: live control of
a run in progress, without touching an instrument.

The command goes into the run folder's ``control/`` directory (``sequencer.control``); the
run's sample loop picks it up without blocking, records it as an ``operator`` event and
answers. ``tighten`` takes a value with its unit (``"20 uA"``) or a plain SI number and is
refused when it would loosen the parameter (each parameter declares which way is tighter).
"""
from __future__ import annotations

import sys
from pathlib import Path

from ..errors import RefusedError
from ..limits import PARAMS

HELP = "pause, resume, stop or tighten a run in progress (through its run folder)"

REPLY_WAIT_S = 5.0


def add_arguments(p) -> None:
    p.add_argument("run_folder", metavar="RUN_FOLDER", help="the folder of a run in progress")
    p.add_argument("command", choices=("pause", "resume", "stop", "tighten"),
                   help="pause: hold the voltage (a pause step ends on resume); resume; "
                        "stop: ramp down and end the run; tighten: make one watchdog "
                        "parameter stricter (loosening is refused)")
    p.add_argument("args", nargs="*", metavar="RULE PARAM VALUE",
                   help="for tighten: the rule, its parameter and the new value with its unit")
    p.add_argument("--no-wait", action="store_true", help="do not wait for the run's answer")


def _rule_reads(rule: str, param: str) -> bool:
    if PARAMS[param].rule == rule:
        return True
    try:
        from ..rules import RULES
    except ImportError:
        return False
    return any(r.name == rule and param in getattr(r, "params", ()) for r in RULES)


def _si_value(param: str, text: str) -> float:
    unit = PARAMS[param].unit
    try:
        return float(text)
    except ValueError:
        pass
    try:
        from ..quantities import parse_value   # the protocol helper's grammar
        return float(parse_value(text, unit))
    except ImportError:
        pass
    except Exception as exc:   # noqa: BLE001 - their error type: one clear line
        raise RefusedError(f"{param}: cannot read {text!r} as {unit or 'a number'}: {exc}") from None
    import pint
    ureg = pint.UnitRegistry()
    try:
        q = ureg.Quantity(text)
        return float(q.to(unit).magnitude) if unit else float(q.to("dimensionless").magnitude)
    except Exception as exc:   # noqa: BLE001 - pint raises many types
        raise RefusedError(f"{param}: cannot read {text!r} as {unit or 'a number'}: {exc}") from None


def run(args) -> int:
    from .. import control
    folder = Path(args.run_folder)
    if not (folder / "manifest.json").exists():
        raise RefusedError(f"{folder} is not a run folder (no manifest.json)")
    if (folder / "end.json").exists():
        raise RefusedError(f"{folder}: that run has ended")
    if not (folder / control.DIR).is_dir():
        raise RefusedError(f"{folder}: the run has no control channel")
    cmd = {"command": args.command}
    if args.command == "tighten":
        if len(args.args) != 3:
            raise RefusedError("tighten needs RULE PARAM VALUE, e.g. "
                               "tighten current_ceiling current_max \"20 uA\"")
        rule, param, value = args.args
        from ..rules import RULE_NAMES
        from ..yamlsafe import did_you_mean
        if rule not in RULE_NAMES:
            hint = did_you_mean(rule, RULE_NAMES) or f"rules: {', '.join(sorted(RULE_NAMES))}"
            raise RefusedError(f"no watchdog rule {rule!r} ({hint})")
        if param not in PARAMS:
            hint = did_you_mean(param, PARAMS)
            raise RefusedError(f"no watchdog parameter {param!r}" + (f" ({hint})" if hint else ""))
        if not _rule_reads(rule, param):
            raise RefusedError(f"rule {rule} does not read {param} (it belongs to rule "
                               f"{PARAMS[param].rule})")
        cmd.update(rule=rule, param=param, value=_si_value(param, value), text=value)
    elif args.args:
        raise RefusedError(f"{args.command} takes no further arguments")
    cid = control.send(folder, cmd)
    if args.no_wait:
        print(f"sent {args.command} ({cid})")
        return 0
    reply = control.wait_reply(folder, cid, REPLY_WAIT_S)
    if reply is None:
        if (folder / "end.json").exists():
            raise RefusedError(f"{folder}: the run ended before it took the command")
        print(f"sent {args.command}; no answer from the run within {REPLY_WAIT_S:g} s "
              f"(it will act when it next polls)", file=sys.stderr)
        return 0
    print(f"{args.command}: {'accepted' if reply.get('ok') else 'REFUSED'}: {reply.get('message', '')}")
    return 0 if reply.get("ok") else 2
