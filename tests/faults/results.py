"""Each row's actual outcome, recorded for ``tools/fault_table.py``.

Written to ``build/fault-results.json`` under the repository root (``$FIELDRUN_FAULT_RESULTS``
to change), one entry per fault id, updated in place by every test that runs a row (read,
update, atomic rename), so a partial test run keeps the other rows' last results.
"""
from __future__ import annotations

import json
import os
import platform
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any, Dict, List, Optional

ROOT = Path(__file__).resolve().parents[2]
_lock = threading.Lock()


def results_path() -> Path:
    env = os.environ.get("FIELDRUN_FAULT_RESULTS")
    return Path(env) if env else ROOT / "build" / "fault-results.json"


def load(path: Optional[Path] = None) -> Dict[str, Any]:
    path = Path(path or results_path())
    if not path.exists():
        return {"rows": {}}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except ValueError:
        return {"rows": {}}
    data.setdefault("rows", {})
    return data


def record(fault, actual: str, problems: List[str], detail: Optional[Dict[str, Any]] = None) -> None:
    """Record ``fault``'s actual outcome (``problems`` empty: the expected outcome was met)."""
    path = results_path()
    with _lock:
        data = load(path)
        data["rows"][fault.id] = {
            "id": fault.id, "item": fault.item, "expected": fault.expected_text,
            "actual": actual, "met": not problems, "problems": list(problems),
            "known_gap": fault.known_gap, "recorded_utc": time.time(),
            "python": platform.python_version(), **(detail or {}),
        }
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".fault-results.")
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            json.dump(data, fh, indent=1, sort_keys=True)
        os.replace(tmp, path)
    print(f"fault {fault.id}: expected {fault.expected_text}; got {actual}"
          + (f"; PROBLEMS: {problems}" if problems else ""), file=sys.stderr)
