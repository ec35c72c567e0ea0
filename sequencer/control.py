"""The live-control channel of a run: command files in ``RUN_FOLDER/control/``.

``fieldrun ctl`` writes one JSON file per command (temp name, then an atomic rename to
``<id>.cmd.json``); the engine's sample loop polls the folder without blocking (one
``os.scandir`` at most every ``interval_s`` of real time), takes each command in name
order (renamed to ``<id>.taken``), acts, and writes ``<id>.reply.json`` for the waiting
``ctl``. No instrument is ever touched from outside the loop.
"""
from __future__ import annotations

import json
import os
import time
import uuid
from pathlib import Path
from typing import List

DIR = "control"
COMMANDS = ("pause", "resume", "stop", "tighten")


class ControlChannel:
    """Engine side: ``poll() -> [dict]``, ``reply(cmd, result)``."""

    def __init__(self, run_folder, interval_s: float = 0.2):
        self.dir = Path(run_folder) / DIR
        self.dir.mkdir(exist_ok=True)
        self.interval_s = interval_s
        self._last = -1e18

    def poll(self) -> List[dict]:
        now = time.monotonic()
        if now - self._last < self.interval_s:
            return []
        self._last = now
        out = []
        with os.scandir(self.dir) as it:
            names = sorted(e.name for e in it if e.name.endswith(".cmd.json"))
        for name in names:
            path = self.dir / name
            taken = self.dir / (name[:-len(".cmd.json")] + ".taken")
            try:
                os.replace(path, taken)
                cmd = json.loads(taken.read_text(encoding="utf-8"))
                if not isinstance(cmd, dict):
                    raise ValueError("not an object")
            except (OSError, ValueError) as exc:
                cmd = {"command": "invalid", "error": str(exc)}
            cmd.setdefault("id", name[:-len(".cmd.json")])
            out.append(cmd)
        return out

    def reply(self, cmd: dict, result: dict) -> None:
        path = self.dir / f"{cmd['id']}.reply.json"
        tmp = self.dir / f".{cmd['id']}.reply.tmp"
        tmp.write_text(json.dumps(result), encoding="utf-8")
        os.replace(tmp, path)


def send(run_folder, command: dict) -> str:
    """``ctl`` side: queue one command; returns its id."""
    d = Path(run_folder) / DIR
    if not d.is_dir():
        raise FileNotFoundError(d)
    cid = f"{time.time_ns():020d}-{uuid.uuid4().hex[:6]}"
    tmp = d / f".{cid}.tmp"
    tmp.write_text(json.dumps(dict(command, id=cid)), encoding="utf-8")
    os.replace(tmp, d / f"{cid}.cmd.json")
    return cid


def wait_reply(run_folder, cid: str, timeout_s: float):
    """Wait (real time, bounded) for the engine's reply; None when none came."""
    path = Path(run_folder) / DIR / f"{cid}.reply.json"
    t_end = time.monotonic() + timeout_s
    while time.monotonic() < t_end:
        if path.exists():
            try:
                return json.loads(path.read_text(encoding="utf-8"))
            except ValueError:
                pass
        time.sleep(0.05)
    return None
