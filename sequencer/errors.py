"""Error types of the sequencer. Each carries where and why; the CLI prints one line."""
from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(frozen=True)
class Problem:
    """One thing wrong with an input file, located as ``file:line:col``."""

    file: str
    line: int
    col: int
    message: str
    hint: str = ""

    def __str__(self) -> str:
        hint = f" ({self.hint})" if self.hint else ""
        return f"{self.file}:{self.line}:{self.col}: {self.message}{hint}"


class FieldrunError(Exception):
    """Base of fieldrun's own errors (user-facing; printed without a traceback)."""

    exit_code = 1


class ProtocolError(FieldrunError):
    """A protocol, rig, limits or dialect file is invalid. Holds every problem found in
    one pass; ``str()`` lists them one per line."""

    exit_code = 2

    def __init__(self, problems):
        if isinstance(problems, Problem):
            problems = [problems]
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


class RefusedError(FieldrunError):
    """A run was refused before the output went on (lock held, unacknowledged rig,
    unattended refusal, output found on at arm)."""

    exit_code = 2
