"""Play a recorded instrument transcript back as a simulated instrument.

``TranscriptReplay(path_or_records)`` is a ``CommandInterpreter``: each line the host sends
is matched against the next command of the transcript (``drivers.transcript`` records),
and the recorded reply comes back; a query that timed out in the recording never answers
(``reply_delay`` is ``math.inf``), so the host meets the same timeout. The sentinel
``*OPC?`` that resynchronisation sends is always answered ``1`` when it is not the next
recorded line. A line that is not where the transcript expects it is looked for further
on (the lines skipped and the line itself are kept in ``mismatches``); a line the rest of
the transcript never sends is answered with nothing. A test asserts ``mismatches == []``:
the driver under test said exactly what the real instrument heard.

Used to turn real instrument sessions into test fixtures (docs/acceptance.md).
"""
from __future__ import annotations

import math
from pathlib import Path
from typing import Iterable, List, Optional, Tuple, Union

from drivers.transcript import read_transcript

Step = Tuple[str, Optional[str], bool]   # (line, reply or None, reply never came)


def steps_of(records: Iterable[dict]) -> List[Step]:
    """The line-by-line conversation of a transcript."""
    steps: List[Step] = []
    for r in records:
        op = r.get("op")
        timed_out = "Timeout" in str(r.get("error", ""))
        if op == "write" and "cmd" in r:
            steps.append((str(r["cmd"]), None, False))
        elif op in ("query", "exchange"):
            for w in r.get("writes") or ():
                steps.append((str(w), None, False))
            steps.append((str(r["query"]), r.get("reply"), timed_out or "reply" not in r))
    return steps


class TranscriptReplay:
    """A ``CommandInterpreter`` answering from a transcript (see the module docstring)."""

    def __init__(self, source: Union[str, Path, Iterable[dict]], look_ahead: int = 50):
        records = read_transcript(source) if isinstance(source, (str, Path)) else list(source)
        self.steps = steps_of(records)
        self.cursor = 0
        self.look_ahead = int(look_ahead)
        self.mismatches: List[str] = []
        self._never = False

    @property
    def finished(self) -> bool:
        return self.cursor >= len(self.steps)

    def handle(self, line: str) -> Optional[str]:
        line = line.strip()
        self._never = False
        end = min(len(self.steps), self.cursor + self.look_ahead)
        for j in range(self.cursor, end):
            if self.steps[j][0] == line:
                for skipped in self.steps[self.cursor:j]:
                    self.mismatches.append(f"skipped {skipped[0]!r} (host sent {line!r})")
                self.cursor = j + 1
                _, reply, never = self.steps[j]
                self._never = never
                return None if never else reply
        if line == "*OPC?":
            return "1"
        self.mismatches.append(f"unexpected {line!r} at step {self.cursor}")
        return None

    def reply_delay(self, line: str) -> float:
        return math.inf if self._never else 0.0

    def disconnect(self) -> None:
        pass
