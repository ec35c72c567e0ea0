"""Deterministic fault hooks at named points of the code (for fault-injection tests).

A hook is a callable installed at one of the named ``POINTS``; the code at that point calls
``fire(point, **context)``, which runs every callable installed there, in the order they
were installed. A hook may raise (the exception leaves the instrumented code exactly as a
real fault at that instant would), send a signal, change a simulated instrument, or just
record that the point was reached.

Nothing is installed in normal use, and then ``fire`` costs one test of an empty dict.
Hooks are process-wide (a module-level registry), installed only by test code::

    from drivers import hooks
    with hooks.installed("supply.safe_off.after-output-off", lambda **ctx: ...):
        ...

The points (who fires them, with which context keys):

==================================== ======================================================
``supply.safe_off.after-output-off`` ``drivers.supply``: ``OUTP OFF`` written, 0 V not yet
                                     (``supply``, ``attempt``: 1 first try, 2 after device
                                     clear, 3 after reopen)
``supply.safe_off.after-zero-volts`` ``drivers.supply``: 0 V written, readback not yet
``supply.safe_off.before-confirm``   ``drivers.supply``: about to read output state and V
``engine.arm``                       ``sequencer.engine``: arming begins (``engine``)
``engine.after-output-on``           ``sequencer.engine``: output on, first sample not taken
``engine.back-off``                  ``sequencer.engine``: a back-off decided, not yet applied
``engine.before-safe-off``           ``sequencer.engine``: the engine is about to call
                                     ``safe_off()``
==================================== ======================================================
"""
from __future__ import annotations

import contextlib
import threading
from typing import Callable, Dict, Iterator, List

POINTS = (
    "supply.safe_off.after-output-off",
    "supply.safe_off.after-zero-volts",
    "supply.safe_off.before-confirm",
    "engine.arm",
    "engine.after-output-on",
    "engine.back-off",
    "engine.before-safe-off",
)

_installed: Dict[str, List[Callable[..., None]]] = {}
_lock = threading.Lock()


def fire(point: str, **context) -> None:
    """Run the hooks installed at ``point`` (nothing installed: returns at once)."""
    if not _installed:
        return
    for fn in tuple(_installed.get(point, ())):
        fn(point=point, **context)


def install(point: str, fn: Callable[..., None]) -> Callable[[], None]:
    """Install ``fn`` at ``point``; returns a function that removes it again."""
    if point not in POINTS:
        raise ValueError(f"no fault hook point {point!r} (known: {', '.join(POINTS)})")
    with _lock:
        _installed.setdefault(point, []).append(fn)

    def remove() -> None:
        with _lock:
            fns = _installed.get(point, [])
            if fn in fns:
                fns.remove(fn)
            if not fns:
                _installed.pop(point, None)
    return remove


@contextlib.contextmanager
def installed(point: str, fn: Callable[..., None]) -> Iterator[None]:
    remove = install(point, fn)
    try:
        yield
    finally:
        remove()


def clear() -> None:
    """Remove every hook (test teardown)."""
    with _lock:
        _installed.clear()


def active() -> bool:
    return bool(_installed)
