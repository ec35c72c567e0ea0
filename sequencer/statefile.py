"""The "unconfirmed" mark: after an exit 5 the rig may still be energised, so the next run
on it is refused (exit 2) until an operator acknowledges with ``fieldrun ack RIG``.

The mark is a small JSON file in the rig's state folder (the rig file names it; default a
``.fieldrun-state/<rig name>`` folder beside the rig file), written atomically (temp file,
fsync, rename). It says when, which run, and why.
"""
from __future__ import annotations

import json
import os
import re
import time
from pathlib import Path
from typing import Optional

from .errors import RefusedError

MARK = "unconfirmed.json"


def state_dir_for(rig_path, rig_name: str = "", state_dir=None) -> Path:
    if state_dir:
        return Path(state_dir)
    rig_path = Path(rig_path)
    name = re.sub(r"[^A-Za-z0-9_-]+", "-", rig_name or rig_path.stem).strip("-") or "rig"
    return rig_path.resolve().parent / ".fieldrun-state" / name


def mark_unconfirmed(state_dir, run_folder, reason: str) -> Path:
    d = Path(state_dir)
    d.mkdir(parents=True, exist_ok=True)
    path = d / MARK
    tmp = d / (MARK + ".tmp")
    body = {"utc": time.time(), "run_folder": str(run_folder) if run_folder else None,
            "reason": reason,
            "message": "output-off could not be confirmed; check the stand in person, then "
                       "run: fieldrun ack RIG"}
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(body, fh, indent=2)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    try:
        fd = os.open(d, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
    except OSError:
        pass
    return path


def read_mark(state_dir) -> Optional[dict]:
    path = Path(state_dir) / MARK
    if not path.exists():
        return None
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        # unreadable still counts as marked: refusing is the safe side
        return {"reason": "the mark exists but cannot be read", "run_folder": None}


def refuse_if_marked(state_dir, rig_label: str) -> None:
    mark = read_mark(state_dir)
    if mark is not None:
        raise RefusedError(
            f"rig {rig_label} is marked UNCONFIRMED since an earlier run could not confirm "
            f"its output off ({mark.get('reason')}; run {mark.get('run_folder')}). Check the "
            f"stand in person, then: fieldrun ack {rig_label}")


def clear_mark(state_dir) -> Optional[dict]:
    mark = read_mark(state_dir)
    path = Path(state_dir) / MARK
    if path.exists():
        path.unlink()
    return mark
