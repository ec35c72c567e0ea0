"""The per-instrument safe-off latch, shared by every session open to the same instrument.

Keyed by (resource, serial number): a fresh session opened by the deadman and the old,
hung session of the sample loop see the same latch. After ``safe_off()`` the latch is set
and refuses every energising command (voltage, current limit up, output on) until a new
``arm()`` succeeds; each ``arm()`` starts a new *epoch*, so an old session armed in an
earlier epoch stays refused even after someone else re-arms.
"""
from __future__ import annotations

import threading
from dataclasses import dataclass, field
from typing import Dict, Optional, Tuple


@dataclass
class LatchEntry:
    key: Tuple[str, str]
    latched: bool = False
    epoch: int = 0
    #: single-flight safe-off: held while one is running; others wait for its result
    safe_off_lock: threading.Lock = field(default_factory=threading.Lock)
    last_report: object = None
    last_error: Optional[BaseException] = None
    #: set when a second safe_off() caller starts waiting for the running one
    waiter_arrived: threading.Event = field(default_factory=threading.Event)
    #: the driver whose safe_off() is running (so a stuck one can be woken)
    running: object = None
    #: the report of a second caller that took over from a stuck first one
    taken_over: object = None


_REGISTRY: Dict[Tuple[str, str], LatchEntry] = {}
_GUARD = threading.Lock()


def entry(resource: str, serial: str) -> LatchEntry:
    key = (str(resource), str(serial or "?"))
    with _GUARD:
        e = _REGISTRY.get(key)
        if e is None:
            e = _REGISTRY[key] = LatchEntry(key)
        return e


def set_latched(e: LatchEntry) -> None:
    with _GUARD:
        e.latched = True


def new_epoch(e: LatchEntry) -> int:
    """A successful arm: clear the latch, return the new epoch number."""
    with _GUARD:
        e.epoch += 1
        e.latched = False
        return e.epoch


def may_energise(e: LatchEntry, epoch: Optional[int]) -> bool:
    with _GUARD:
        return (not e.latched) and epoch is not None and epoch == e.epoch


def forget_all() -> None:
    """Tests only: drop every latch entry."""
    with _GUARD:
        _REGISTRY.clear()
