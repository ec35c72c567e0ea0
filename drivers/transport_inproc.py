"""In-process transport: a ``CommandInterpreter`` object (a simulated instrument) on the
other end instead of a wire.

Each line sent is handed to ``interpreter.handle(line)`` at once (the instrument acts on
the command); a reply, if any, becomes readable ``interpreter.reply_delay(line)`` seconds
later on the instrument's clock:

* finite delays advance the instrument's ``VirtualClock`` (or are real waits when the
  clock is a ``WallClock``); a delay longer than the timeout moves the clock on by the
  timeout, raises ``TransportTimeout`` and leaves the reply queued: it is *late* and the
  next query would read it, which is why the session is untrusted until ``resync()``
  flushes it;
* ``math.inf`` means the reply never comes: the call blocks in real time until the
  transport timeout or ``abort()``.
"""
from __future__ import annotations

import math
import threading
from collections import deque
from typing import Optional, Tuple

from .clock import Clock, WallClock
from .errors import DriverError, TransportAborted, TransportTimeout
from .session import DEFAULT_SENTINEL, LineSession
from .transport import CommandInterpreter


class InprocTransport(LineSession):
    """Transport to an in-process ``CommandInterpreter``."""

    def __init__(self, interpreter: CommandInterpreter, resource: str = "sim:instrument",
                 timeout: float = 1.0, clock: Optional[Clock] = None,
                 sentinel: Optional[Tuple[str, str]] = DEFAULT_SENTINEL):
        if not callable(getattr(interpreter, "handle", None)):
            raise DriverError(resource, "the in-process instrument has no handle(line) method")
        super().__init__(resource, timeout, sentinel)
        self.interpreter = interpreter
        self.clock: Clock = clock or getattr(interpreter, "clock", None) or WallClock()
        self._pending: deque = deque()  # (ready time on self.clock, reply text)
        self._cond = threading.Condition()

    def _delay(self, line: str) -> float:
        fn = getattr(self.interpreter, "reply_delay", None)
        if fn is None:
            return 0.0
        d = float(fn(line))
        return d if d > 0 else 0.0

    def _send(self, text: str) -> None:
        for line in text.split(self.term):
            if not line:
                continue
            try:
                reply = self.interpreter.handle(line)
            except Exception as exc:  # noqa: BLE001 - a broken simulator is a device fault
                raise DriverError(self.resource, f"simulated instrument failed on {line!r}: "
                                                 f"{exc!r}") from None
            if reply is None:
                continue
            delay = self._delay(line)
            ready = math.inf if math.isinf(delay) else self.clock.now() + delay
            with self._cond:
                self._pending.append((ready, str(reply)))
                self._cond.notify_all()

    def _wait_real(self, seconds: float) -> None:
        """Block in real time up to ``seconds``; return early on abort or new reply."""
        with self._cond:
            self._cond.wait_for(lambda: self._aborted.is_set(), timeout=seconds)

    def _recv_line(self, timeout: float) -> str:
        now = self.clock.now()
        with self._cond:
            head = self._pending[0] if self._pending else None
        if head is not None and head[0] <= now:
            with self._cond:
                self._pending.popleft()
            return head[1]
        if head is not None and math.isfinite(head[0]):
            wait = head[0] - now
            if self.clock.simulated:
                if wait <= timeout:
                    self.clock.sleep_until(head[0])
                    with self._cond:
                        self._pending.popleft()
                    return head[1]
                self.clock.sleep(timeout)
                raise TransportTimeout(self.resource, f"no reply within {timeout:g} s "
                                                      "(instrument time); reply is late")
            if wait <= timeout:
                self._wait_real(wait)
                if self._aborted.is_set():
                    raise TransportAborted(self.resource, "aborted while waiting for a reply")
                with self._cond:
                    self._pending.popleft()
                return head[1]
        # no reply coming (never, or later than the timeout): a real-time wait
        self._wait_real(timeout)
        if self._aborted.is_set():
            raise TransportAborted(self.resource, "aborted while waiting for a reply")
        raise TransportTimeout(self.resource, f"no reply within {timeout:g} s")

    def _wake(self) -> None:
        with self._cond:
            self._cond.notify_all()

    def _flush_input(self) -> None:
        with self._cond:
            self._pending.clear()

    @property
    def pending_replies(self) -> int:
        """Replies sent by the instrument and not yet read (late ones included)."""
        with self._cond:
            return len(self._pending)

    # digital lines: a simulated line box (``set_line``/``get_line`` on the interpreter)
    def set_line(self, name: str, level: bool) -> None:
        fn = getattr(self.interpreter, "set_line", None)
        if fn is None:
            return super().set_line(name, level)
        try:
            fn(name, bool(level))
        except ValueError as exc:
            raise DriverError(self.resource, str(exc)) from None

    def get_line(self, name: str) -> bool:
        fn = getattr(self.interpreter, "get_line", None)
        if fn is None:
            return super().get_line(name)
        try:
            return bool(fn(name))
        except ValueError as exc:
            raise DriverError(self.resource, str(exc)) from None

    def _open(self) -> None:
        self._flush_input()

    def _close(self) -> None:
        self._flush_input()
        fn = getattr(self.interpreter, "disconnect", None)
        if callable(fn):
            fn()
