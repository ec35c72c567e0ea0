"""Clocks shared by the sequencer and the simulated instruments.

``WallClock`` is real monotonic time, for hardware. ``VirtualClock`` is simulated time:
``sleep`` advances time at once (optionally paced at ``speed`` times real time), so a
one-hour dwell replays in seconds. The simulated instruments read the same clock object
as the engine. The deadman and the recorder's fsync interval always use real
``time.monotonic()``, never a ``Clock``.

All times are seconds (float). ``now()`` is monotonic; ``utc()`` is seconds since the Unix
epoch (UTC) that corresponds to ``now()``.
"""
from __future__ import annotations

import threading
import time


class Clock:
    """Interface: ``now()``, ``utc()``, ``sleep(dt)``, ``sleep_until(t)``, ``simulated``."""

    simulated: bool = False

    def now(self) -> float:  # pragma: no cover - interface
        raise NotImplementedError

    def utc(self) -> float:  # pragma: no cover - interface
        raise NotImplementedError

    def sleep(self, dt: float) -> None:
        if dt > 0:
            self.sleep_until(self.now() + dt)

    def sleep_until(self, t: float) -> None:  # pragma: no cover - interface
        raise NotImplementedError


class WallClock(Clock):
    """Real time: ``time.monotonic()`` with a UTC offset taken at construction."""

    simulated = False

    def __init__(self) -> None:
        self._offset = time.time() - time.monotonic()

    def now(self) -> float:
        return time.monotonic()

    def utc(self) -> float:
        return time.monotonic() + self._offset

    def sleep_until(self, t: float) -> None:
        while True:
            dt = t - time.monotonic()
            if dt <= 0:
                return
            time.sleep(min(dt, 0.5))


class VirtualClock(Clock):
    """Simulated time. Thread-safe.

    ``sleep_until(t)`` sets the time to ``t`` at once when ``speed`` is None (as fast as
    possible); with ``speed = N`` it waits ``(t - now) / N`` real seconds first, so a run
    can be watched live. ``advance(dt)`` moves time forward without sleeping (instruments
    use it to model their own latency). Time never goes backwards.
    """

    simulated = True

    def __init__(self, start: float = 0.0, utc_start: float = 1.8e9, speed: float | None = None):
        self._t = float(start)
        self._utc0 = float(utc_start) - float(start)
        self._lock = threading.Lock()
        self.speed = speed

    def now(self) -> float:
        with self._lock:
            return self._t

    def utc(self) -> float:
        with self._lock:
            return self._t + self._utc0

    def advance(self, dt: float) -> None:
        if dt <= 0:
            return
        with self._lock:
            self._t += dt

    def sleep_until(self, t: float) -> None:
        with self._lock:
            dt = t - self._t
        if dt <= 0:
            return
        if self.speed:
            time.sleep(dt / self.speed)
        with self._lock:
            if t > self._t:
                self._t = t
