"""Signals and stop requests: handlers only set flags; the sample loop acts on them.

* first SIGINT (Ctrl-C): ramp down under control, then switch off (exit 4);
* second SIGINT: switch off at once. If a ``safe_off()`` is already running it is *not*
  interrupted: the handler never raises, it only sets ``hard``, and the loop's next check
  (there is none inside ``safe_off``) sees a switch-off already under way;
* SIGTERM and SIGHUP: switch off at once (exit 4);
* SIGPIPE is left ignored (Python's default), so a dead terminal shows up as EPIPE on a
  write, which the console swallows: it never stops the control loop.

``StopFlags`` is also what ``fieldrun ctl RUN stop`` and tests set: one object, read by the
engine every sample and inside its sleeps.
"""
from __future__ import annotations

import signal
import threading
from typing import Optional


class StopFlags:
    def __init__(self):
        self.soft = False          # ramp down under control
        self.hard = False          # off at once
        self.reason = ""
        self.signals: list = []    # names of the signals seen, in order

    def request_soft(self, reason: str) -> None:
        if not self.soft and not self.hard:
            self.reason = reason
        self.soft = True

    def request_hard(self, reason: str) -> None:
        if not self.hard:
            self.reason = reason
        self.hard = True

    @property
    def any(self) -> bool:
        return self.soft or self.hard


_HARD_SIGNALS = ("SIGTERM", "SIGHUP")


class SignalGuard:
    """Installs the handlers for the duration of a run (a context manager; main thread
    only). ``flags`` is the StopFlags the engine reads."""

    def __init__(self, flags: Optional[StopFlags] = None):
        self.flags = flags or StopFlags()
        self._old = {}

    def _handler(self, signum, frame):   # runs in the main thread between bytecodes
        name = signal.Signals(signum).name
        self.flags.signals.append(name)
        if name == "SIGINT":
            if self.flags.soft or self.flags.hard:
                self.flags.request_hard("second Ctrl-C (SIGINT): off at once")
            else:
                self.flags.request_soft("stopped by Ctrl-C (SIGINT), ramped down under control")
        else:
            self.flags.request_hard(f"{name}: off at once")

    def __enter__(self) -> StopFlags:
        if threading.current_thread() is not threading.main_thread():
            return self.flags
        for name in ("SIGINT",) + _HARD_SIGNALS:
            sig = getattr(signal, name, None)
            if sig is not None:
                self._old[sig] = signal.signal(sig, self._handler)
        return self.flags

    def __exit__(self, *exc) -> None:
        for sig, old in self._old.items():
            try:
                signal.signal(sig, old)
            except (ValueError, TypeError):
                pass
        self._old.clear()
