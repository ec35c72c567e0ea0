"""Record every exchange with an instrument to a JSON-lines transcript (test fixtures).

``TranscriptTransport(inner, path)`` wraps any ``Transport`` and behaves exactly like it,
writing one JSON object per call to ``path`` (appended, flushed per line)::

    {"n": 7, "t": 0.5132, "utc": 1764620000.1, "resource": "GPIB0::5::INSTR",
     "op": "exchange", "writes": ["VOLT 100"], "query": "MEAS:VOLT?", "reply": "+9.9991E+01",
     "elapsed_s": 0.0123}

``op`` is ``write``, ``query``, ``exchange``, ``read``, ``resync``, ``reopen``,
``device_clear``, ``abort`` or ``close``; a call that raised has ``error`` (the exception's
type and text) instead of ``reply``. ``t`` is real monotonic seconds since the transcript
opened, ``utc`` wall time. Nothing is ever evaluated from a transcript.

Recording a real stand: give the instrument ``options: {transcript: FILE}`` in the rig file
(``drivers.open_instrument`` wraps its transport) and run ``fieldrun probe`` or a short
commissioning run; ``simulators.replay.TranscriptReplay`` plays the file back as a
simulated instrument for tests (docs/acceptance.md).
"""
from __future__ import annotations

import json
import threading
import time
from pathlib import Path
from typing import Any, Iterable, List, Union


class TranscriptTransport:
    """A transport that logs what passes through it (see the module docstring)."""

    def __init__(self, inner, path: Union[str, Path]):
        self._inner = inner
        self._path = Path(path)
        self._path.parent.mkdir(parents=True, exist_ok=True)
        self._fh = open(self._path, "a", encoding="utf-8")
        self._t0 = time.monotonic()
        self._n = 0
        self._lock = threading.Lock()

    # everything not recorded (trusted, timeout, resource, on_close, set_line, ...)
    def __getattr__(self, name: str) -> Any:
        return getattr(self._inner, name)

    def _log(self, op: str, t_start: float, **fields) -> None:
        with self._lock:
            self._n += 1
            rec = {"n": self._n, "t": round(t_start - self._t0, 6), "utc": time.time(),
                   "resource": str(getattr(self._inner, "resource", "?")), "op": op,
                   **fields, "elapsed_s": round(time.monotonic() - t_start, 6)}
            try:
                self._fh.write(json.dumps(rec) + "\n")
                self._fh.flush()
            except (OSError, ValueError):
                pass   # a transcript that cannot be written never stops the instrument

    def _call(self, op: str, fn, *args, **fields):
        t = time.monotonic()
        try:
            out = fn(*args)
        except BaseException as exc:
            self._log(op, t, error=f"{type(exc).__name__}: {exc}", **fields)
            raise
        if isinstance(out, str):
            fields["reply"] = out
        elif out is not None:
            fields["result"] = out if isinstance(out, (bool, int, float)) else str(out)
        self._log(op, t, **fields)
        return out

    def write(self, cmd: str) -> None:
        return self._call("write", self._inner.write, cmd, cmd=cmd)

    def query(self, cmd: str) -> str:
        return self._call("query", self._inner.query, cmd, query=cmd)

    def exchange(self, writes: Iterable[str], query: str) -> str:
        writes = list(writes)
        return self._call("exchange", self._inner.exchange, writes, query, writes=writes, query=query)

    def read(self) -> str:
        return self._call("read", self._inner.read)

    def resync(self) -> None:
        return self._call("resync", self._inner.resync)

    def reopen(self) -> None:
        return self._call("reopen", self._inner.reopen)

    def device_clear(self):
        return self._call("device_clear", self._inner.device_clear)

    def abort(self) -> None:
        # from any thread: logged after the fact, never blocking on the owner
        return self._call("abort", self._inner.abort)

    def close(self) -> None:
        try:
            return self._call("close", self._inner.close)
        finally:
            with self._lock:
                try:
                    self._fh.close()
                except OSError:
                    pass


def read_transcript(path: Union[str, Path]) -> List[dict]:
    """The records of a transcript file (a torn last line is skipped)."""
    out = []
    for line in Path(path).read_text(encoding="utf-8").splitlines():
        try:
            rec = json.loads(line)
        except ValueError:
            continue
        if isinstance(rec, dict):
            out.append(rec)
    return out
