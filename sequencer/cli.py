"""The ``fieldrun`` command line.

Each verb lives in ``sequencer/commands/<verb>.py`` (module name with '-' as '_'). User
mistakes become one line on stderr and an exit code, never a traceback:

0 completed as planned · 1 internal error · 2 refused before the output went on ·
3 stopped by the watchdog · 4 stopped by the operator · 5 unsafe (output-off not confirmed).
"""
from __future__ import annotations

import argparse
import importlib
import sys
from typing import List, Optional

from . import __version__
from .errors import FieldrunError

VERBS = [
    "check", "plan", "run", "watch", "ctl", "ack", "runs", "analyze", "report",
    "replay", "whatif", "calibrate", "campaign", "probe", "sim-serve",
]

EXIT_OK, EXIT_INTERNAL, EXIT_REFUSED, EXIT_WATCHDOG, EXIT_OPERATOR, EXIT_UNSAFE = range(6)


def _load(verb: str):
    try:
        return importlib.import_module(f"sequencer.commands.{verb.replace('-', '_')}")
    except ModuleNotFoundError as exc:
        if exc.name and exc.name.startswith("sequencer.commands."):
            return None
        raise


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="fieldrun",
        description="Unattended, watchdog-guarded field-emission runs on cold cathodes, "
                    "on real SCPI instruments or a simulated rig. The software is a second "
                    "line behind hardware interlocks: read safety.md.",
    )
    parser.add_argument("--version", action="version", version=f"fieldrun {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    for verb in VERBS:
        mod = _load(verb)
        if mod is None:
            continue
        p = sub.add_parser(verb, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP))
        mod.add_arguments(p)
        p.set_defaults(_module=mod)
    return parser


def main(argv: Optional[List[str]] = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_module", None):
        parser.print_help()
        return EXIT_REFUSED
    try:
        return int(args._module.run(args) or 0)
    except FieldrunError as exc:
        print(f"fieldrun {args.verb}: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"fieldrun {args.verb}: interrupted", file=sys.stderr)
        return EXIT_OPERATOR
    except BrokenPipeError:
        return EXIT_OK
    except Exception as exc:  # noqa: BLE001 - the last resort, named as such
        from drivers.errors import UnsafeStateError, DriverError
        if isinstance(exc, UnsafeStateError):
            print(f"fieldrun {args.verb}: UNSAFE: {exc}", file=sys.stderr)
            return EXIT_UNSAFE
        if isinstance(exc, DriverError):
            print(f"fieldrun {args.verb}: {exc}", file=sys.stderr)
            return EXIT_REFUSED
        import traceback
        traceback.print_exc()
        print(f"fieldrun {args.verb}: internal error: {exc!r}", file=sys.stderr)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
