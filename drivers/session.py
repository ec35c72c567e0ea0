"""Shared line-oriented session logic for every transport kind.

``LineSession`` implements the ``Transport`` contract once (trust, timeouts, abort,
resync with a sentinel, one exchange at a time); the VISA, serial and in-process
transports only say how to send bytes, receive one line, flush and reopen.
"""
from __future__ import annotations

import math
import threading
from typing import Iterable, Optional, Tuple

from .errors import DriverError, TransportAborted, TransportTimeout
from .transport import Transport

#: IEEE 488.2 §10.18 (*OPC?, from memory): answers "1" once pending operations are done.
DEFAULT_SENTINEL: Tuple[str, str] = ("*OPC?", "1")


def check_timeout(where: str, timeout: float) -> float:
    """A transport timeout must be a finite, positive number of seconds."""
    try:
        t = float(timeout)
    except (TypeError, ValueError):
        raise DriverError(where, f"timeout {timeout!r} is not a number of seconds") from None
    if not (t > 0 and math.isfinite(t)):
        raise DriverError(where, f"timeout must be finite and positive, got {timeout!r}")
    return t


class LineSession(Transport):
    """Line-terminated request/reply session with the trust rules of ``Transport``.

    Subclasses implement ``_send(text)``, ``_recv_line(timeout)`` (raise
    ``TransportTimeout``/``TransportAborted``), ``_flush_input()``, ``_open()``,
    ``_close()`` and ``_wake()`` (make a blocked ``_recv_line`` return at once).
    ``device_clear()`` returns True where the bus has a device clear.
    """

    #: raw sockets cannot drop bytes already in flight: resync reopens the connection
    reopen_on_resync: bool = False

    def __init__(self, resource: str, timeout: float = 1.0,
                 sentinel: Optional[Tuple[str, str]] = DEFAULT_SENTINEL, term: str = "\n"):
        self.resource = resource
        self.timeout = check_timeout(resource, timeout)
        self.sentinel = sentinel
        self.term = term
        self.trusted = True
        self._aborted = threading.Event()
        self._busy = threading.Lock()
        self._closed = False
        #: callables run once after close() (the factory releases the resource lock here)
        self.on_close: list = []

    # -- subclass hooks ------------------------------------------------------------------
    def _send(self, text: str) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def _recv_line(self, timeout: float) -> str:  # pragma: no cover - interface
        raise NotImplementedError

    def _flush_input(self) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def _open(self) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def _close(self) -> None:  # pragma: no cover - interface
        raise NotImplementedError

    def _wake(self) -> None:
        """Make a blocked receive return promptly (default: rely on the timeout)."""

    def device_clear(self) -> bool:
        """Bus device clear (IEEE 488.1 DCL/SDC). False where the bus has none."""
        return False

    # -- the contract ----------------------------------------------------------------------
    def _usable(self) -> None:
        if self._closed:
            raise DriverError(self.resource, "session is closed")
        if not self.trusted:
            raise DriverError(self.resource, "session is untrusted after a timeout or abort; "
                                             "resync() it first")

    def _run(self, fn):
        if not self._busy.acquire(blocking=False):
            raise DriverError(self.resource, "another thread is in the middle of an exchange "
                                             "on this session (one owner thread per session)")
        try:
            if self._aborted.is_set():
                raise TransportAborted(self.resource, "session was aborted")
            return fn()
        except (TransportTimeout, TransportAborted):
            self.trusted = False
            raise
        except DriverError:
            self.trusted = False
            raise
        except (OSError, ValueError, EOFError) as exc:
            self.trusted = False
            if self._aborted.is_set():
                raise TransportAborted(self.resource, "session was aborted") from None
            raise DriverError(self.resource, f"I/O error: {exc}") from None
        finally:
            self._busy.release()

    def _check_text(self, cmd: str) -> str:
        if not isinstance(cmd, str) or "\n" in cmd or "\r" in cmd:
            raise DriverError(self.resource, f"command {cmd!r} must be one line of text")
        return cmd

    def write(self, cmd: str) -> None:
        self._usable()
        text = self._check_text(cmd) + self.term
        self._run(lambda: self._send(text))

    def query(self, cmd: str) -> str:
        """Command and reply in one send (no small-write stall), then one reply line."""
        return self.exchange((), cmd)

    def exchange(self, writes: Iterable[str], query: str) -> str:
        """Send ``writes`` and then ``query`` in a single send; return the query's reply.

        Putting several program messages in one send keeps TCP from holding the second
        small segment back for the acknowledgement of the first (Nagle with delayed ACK).
        """
        self._usable()
        lines = [self._check_text(w) for w in writes] + [self._check_text(query)]
        text = "".join(line + self.term for line in lines)

        def go():
            self._send(text)
            return self._recv_line(self.timeout)
        return self._run(go)

    def read(self) -> str:
        self._usable()
        return self._run(lambda: self._recv_line(self.timeout))

    def abort(self) -> None:
        self._aborted.set()
        self.trusted = False
        try:
            self._wake()
        except Exception:  # noqa: BLE001 - waking is best effort; the timeout still holds
            pass

    def resync(self) -> None:
        if self._closed:
            raise DriverError(self.resource, "session is closed")
        self._aborted.clear()
        self.trusted = False
        try:
            if self.reopen_on_resync:
                self.reopen()
                self._aborted.clear()
                self.trusted = False          # not until the sentinel has answered
            else:
                self.device_clear()
                self._flush_input()
            if self.sentinel is not None:
                cmd, expected = self.sentinel

                def go():
                    self._send(cmd + self.term)
                    seen = []
                    for _ in range(8):
                        line = self._recv_line(self.timeout).strip()
                        if line == expected:
                            return
                        seen.append(line)
                    raise DriverError(self.resource, f"resync sentinel {cmd} never answered "
                                                     f"{expected!r} (got {seen!r})")
                with self._busy:
                    go()
                self._flush_input()
        except (OSError, ValueError, EOFError) as exc:
            raise DriverError(self.resource, f"resync failed: {exc}") from None
        except TransportTimeout:
            raise TransportTimeout(self.resource, "resync failed: sentinel not answered "
                                                  "within the timeout") from None
        self.trusted = True

    def reopen(self) -> None:
        self._aborted.clear()
        try:
            self._close()
        except Exception:  # noqa: BLE001 - the old connection may already be dead
            pass
        try:
            self._open()
        except (OSError, ValueError) as exc:
            raise DriverError(self.resource, f"reopen failed: {exc}") from None
        self._closed = False
        self.trusted = True

    def close(self) -> None:
        if self._closed:
            return
        self._closed = True
        self.trusted = False
        try:
            self._close()
        except Exception:  # noqa: BLE001 - closing a dead connection is not an error
            pass
        for fn in self.on_close:
            try:
                fn()
            except Exception:  # noqa: BLE001 - releasing a lock must not mask the close
                pass

    def set_line(self, name: str, level: bool) -> None:
        raise DriverError(self.resource, "this transport has no modem/digital lines")

    def get_line(self, name: str) -> bool:
        raise DriverError(self.resource, "this transport has no modem/digital lines")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
