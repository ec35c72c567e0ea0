"""Exclusive per-resource locks, so a second fieldrun process (a probe, another run) cannot
take over a live run's instruments.

Hardware resources are locked with ``fcntl.flock`` on a file in the state folder
(``FIELDRUN_STATE_DIR`` or ``~/.local/state/fieldrun``; the sequencer keeps the
"unconfirmed" mark after an exit 5 in the same folder). The lock is released when the
holder closes it or dies. Simulated in-process instruments (``sim:`` resources) are keyed
by their stand id and locked in memory only, so the parallel workers of a campaign never
contend.
"""
from __future__ import annotations

import fcntl
import hashlib
import os
import re
import threading
from pathlib import Path
from typing import Optional, Set

from .errors import LockHeld


def default_state_dir() -> Path:
    env = os.environ.get("FIELDRUN_STATE_DIR")
    if env:
        return Path(env)
    base = os.environ.get("XDG_STATE_HOME") or os.path.join(os.path.expanduser("~"), ".local", "state")
    return Path(base) / "fieldrun"


def lock_file_name(resource: str) -> str:
    """A readable, collision-free file name for ``resource``."""
    readable = re.sub(r"[^A-Za-z0-9._-]+", "_", resource)[:48].strip("_") or "resource"
    digest = hashlib.sha256(resource.encode("utf-8")).hexdigest()[:10]
    return f"{readable}-{digest}.lock"


_SIM_HELD: Set[str] = set()
_SIM_GUARD = threading.Lock()


class ResourceLock:
    """``ResourceLock(resource, state_dir).acquire()``; ``release()`` or use as a context."""

    def __init__(self, resource: str, state_dir: Optional[os.PathLike] = None, holder: str = ""):
        self.resource = resource
        self.state_dir = Path(state_dir) if state_dir is not None else default_state_dir()
        self.holder = holder or f"pid {os.getpid()}"
        self.simulated = resource.startswith("sim:")
        self.path = None if self.simulated else self.state_dir / "locks" / lock_file_name(resource)
        self._fd: Optional[int] = None
        self._held = False

    def acquire(self) -> "ResourceLock":
        if self._held:
            return self
        if self.simulated:
            with _SIM_GUARD:
                if self.resource in _SIM_HELD:
                    raise LockHeld(self.resource, "simulated instrument already in use in this process")
                _SIM_HELD.add(self.resource)
            self._held = True
            return self
        self.path.parent.mkdir(parents=True, exist_ok=True)
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            try:
                who = os.read(fd, 200).decode("utf-8", "replace").strip() or "another process"
            except OSError:
                who = "another process"
            os.close(fd)
            raise LockHeld(self.resource, f"instrument is in use by {who} (lock {self.path})") from None
        os.ftruncate(fd, 0)
        os.write(fd, f"{self.holder}\n{self.resource}\n".encode("utf-8"))
        self._fd = fd
        self._held = True
        return self

    def release(self) -> None:
        if not self._held:
            return
        self._held = False
        if self.simulated:
            with _SIM_GUARD:
                _SIM_HELD.discard(self.resource)
            return
        fd, self._fd = self._fd, None
        if fd is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_UN)
            finally:
                os.close(fd)

    @property
    def held(self) -> bool:
        return self._held

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()


class _Shared:
    def __init__(self, lock: ResourceLock):
        self.lock = lock
        self.count = 0


_SHARED: dict = {}
_SHARED_GUARD = threading.Lock()


class LockHandle:
    """One session's share of a process-wide resource lock (see ``hold``)."""

    def __init__(self, key):
        self._key = key
        self._open = True

    def release(self) -> None:
        with _SHARED_GUARD:
            if not self._open:
                return
            self._open = False
            shared = _SHARED.get(self._key)
            if shared is None:
                return
            shared.count -= 1
            if shared.count <= 0:
                del _SHARED[self._key]
                shared.lock.release()


def hold(resource: str, state_dir: Optional[os.PathLike] = None) -> LockHandle:
    """Take this process's share of the exclusive lock on ``resource``.

    Sessions of one process share the lock (the deadman's fresh session must reach a
    supply the sample loop holds); another process gets ``LockHeld``. Released when the
    last handle is released.
    """
    sd = Path(state_dir) if state_dir is not None else default_state_dir()
    key = (resource, str(sd))
    with _SHARED_GUARD:
        shared = _SHARED.get(key)
        if shared is None:
            lk = ResourceLock(resource, sd)
            if lk.simulated:
                lk._held = True   # in-memory only; stand ids keep campaign workers apart
            else:
                lk.acquire()
            shared = _SHARED[key] = _Shared(lk)
        shared.count += 1
    return LockHandle(key)
