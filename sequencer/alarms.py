"""Alarms: run the rig file's notification commands so an overnight run reaches a person.

The rig file names each command as an argument list (``["notify-send", "stand-B",
"{message}"]``); it is run without a shell, with a timeout, and its output is captured into
the events. ``{message}``, ``{outcome}``, ``{run}`` and ``{rig}`` in an argument are
replaced (plain ``str.replace``, never evaluated). Raised on a trip, on an unconfirmed
off, and at the end of an unattended run. An alarm command that fails is itself recorded;
it never changes the run's outcome.
"""
from __future__ import annotations

import subprocess
from typing import Callable, Iterable, List, Optional, Sequence

MAX_OUTPUT = 2000


def _fill(arg: str, fields: dict) -> str:
    for k, v in fields.items():
        arg = arg.replace("{" + k + "}", str(v))
    return arg


def raise_alarm(commands: Iterable[Sequence[str]], message: str, *, outcome: str = "",
                run: str = "", rig: str = "", timeout_s: float = 10.0,
                on_event: Optional[Callable[[dict], None]] = None) -> List[dict]:
    """Run every command; returns (and passes to ``on_event``) one ``alarm`` event each."""
    fields = {"message": message, "outcome": outcome, "run": run, "rig": rig}
    results = []
    cmds = [list(c) for c in (commands or [])]
    if not cmds:
        ev = {"kind": "alarm", "message": message, "command": None,
              "note": "the rig file names no notification command"}
        results.append(ev)
        if on_event:
            on_event(ev)
        return results
    for argv in cmds:
        if not argv or not all(isinstance(a, str) for a in argv):
            ev = {"kind": "alarm", "message": message, "command": argv,
                  "error": "not a list of strings"}
        else:
            argv = [_fill(a, fields) for a in argv]
            try:
                cp = subprocess.run(argv, shell=False, stdin=subprocess.DEVNULL,
                                    capture_output=True, timeout=timeout_s, check=False)
                ev = {"kind": "alarm", "message": message, "command": argv,
                      "returncode": cp.returncode,
                      "stdout": cp.stdout.decode("utf-8", "replace")[:MAX_OUTPUT],
                      "stderr": cp.stderr.decode("utf-8", "replace")[:MAX_OUTPUT]}
            except subprocess.TimeoutExpired as exc:
                ev = {"kind": "alarm", "message": message, "command": argv,
                      "error": f"timed out after {timeout_s:g} s",
                      "stdout": (exc.stdout or b"").decode("utf-8", "replace")[:MAX_OUTPUT]}
            except OSError as exc:
                ev = {"kind": "alarm", "message": message, "command": argv, "error": str(exc)}
        results.append(ev)
        if on_event:
            on_event(ev)
    return results
