"""Run ``fieldrun`` in this process with in-process faults installed first.

``python -m tests.faults.launch INJECT_JSON -- run PROTOCOL --rig RIG ...`` installs what
INJECT_JSON (a JSON object) asks for, then calls ``sequencer.cli.main`` with the rest and
exits with its code. Test-only: nothing in fieldrun reads these settings; a production run
never imports this module. Keys (all optional):

``hooks``     list of ``{point, action, times, attempt, signal}``: at a ``drivers.hooks``
              point run ``action`` (``raise-runtime``, ``raise-driver-error``, ``signal``
              (send ``signal`` to this process, ``repeat`` times), ``clock-jump`` (the host's wall clock
              jumps by ``jump_s``)); ``times`` bounds how often it strikes (default 1;
              0 = every time); ``attempt`` restricts a safe_off point to that attempt.
``raise_in``  ``{target: "module:Class.method", after_calls: N, error: "RuntimeError"}``:
              that method raises from its N-th call on (an exception inside a driver).
``disk``      ``{kind: "enospc"|"eio", after_bytes: N, op: "write"|"fsync"}``: the
              recorder's file operations fail like a full disk or a dying one.
``sync_log``  a path: every fsync of the run folder's files is logged there as
              ``<file> <offset>`` (itself fsynced), for the power-loss truncation.
``recorder``  keyword arguments for ``Recorder`` (e.g. ``offset_interval_s``).
"""
from __future__ import annotations

import errno
import json
import os
import signal
import sys
import threading
import time


def _counter(times):
    state = {"n": 0}

    def strike() -> bool:
        state["n"] += 1
        return times == 0 or state["n"] <= times
    return strike


_jump = {"s": 0.0}


def _install_clock_jump() -> None:
    real_time = time.time

    def jumped() -> float:
        return real_time() + _jump["s"]
    time.time = jumped


def _hook_action(spec):
    from drivers.errors import DriverError
    action = spec["action"]
    strike = _counter(int(spec.get("times", 1)))
    want_attempt = spec.get("attempt")

    def fn(point, **ctx):
        if want_attempt is not None and ctx.get("attempt") != want_attempt:
            return
        if not strike():
            return
        print(f"fault-hook: {action} at {point}", file=sys.stderr, flush=True)
        if action == "raise-runtime":
            raise RuntimeError(f"injected fault at {point}")
        if action == "raise-driver-error":
            raise DriverError("fault-hook", f"injected driver fault at {point}")
        if action == "signal":
            for _ in range(int(spec.get("repeat", 1))):
                os.kill(os.getpid(), getattr(signal, spec["signal"]))
            return
        if action == "clock-jump":
            _jump["s"] += float(spec.get("jump_s", 3600.0))
            return
        raise ValueError(f"unknown hook action {action!r}")
    return fn


def _install_raise_in(spec) -> None:
    import importlib
    mod_name, attr = spec["target"].split(":")
    cls_name, meth = attr.split(".")
    cls = getattr(importlib.import_module(mod_name), cls_name)
    orig = getattr(cls, meth)
    after = int(spec.get("after_calls", 1))
    err = {"RuntimeError": RuntimeError, "ZeroDivisionError": ZeroDivisionError,
           "KeyError": KeyError}[spec.get("error", "RuntimeError")]
    calls = {"n": 0}
    lock = threading.Lock()

    def wrapped(self, *a, **kw):
        with lock:
            calls["n"] += 1
            n = calls["n"]
        if n >= after:
            raise err(f"injected {err.__name__} inside {spec['target']} (call {n})")
        return orig(self, *a, **kw)
    setattr(cls, meth, wrapped)


def _fileops(disk, sync_log):
    from sequencer.runfolder import FileOps

    class Faulty(FileOps):
        def __init__(self):
            self.paths = {}
            self.written = 0
            self.log_fd = None
            if sync_log:
                self.log_fd = os.open(sync_log, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)

        def open(self, path):
            fd = super().open(path)
            self.paths[fd] = os.path.basename(str(path))
            return fd

        def _fail(self, op):
            if disk and disk.get("op", "write") == op and self.written >= int(disk.get("after_bytes", 0)):
                code = errno.ENOSPC if disk.get("kind", "enospc") == "enospc" else errno.EIO
                raise OSError(code, os.strerror(code))

        def write(self, fd, data):
            self._fail("write")
            n = super().write(fd, data)
            self.written += n
            return n

        def fsync(self, fd):
            self._fail("fsync")
            super().fsync(fd)
            if self.log_fd is not None and fd in self.paths:
                off = os.lseek(fd, 0, os.SEEK_CUR)
                os.write(self.log_fd, f"{self.paths[fd]} {off}\n".encode())
                os.fsync(self.log_fd)
    return Faulty()


def install(inject: dict) -> None:
    from drivers import hooks
    if any(h.get("action") == "clock-jump" for h in inject.get("hooks", ())):
        _install_clock_jump()
    for spec in inject.get("hooks", ()):
        hooks.install(spec["point"], _hook_action(spec))
    if inject.get("raise_in"):
        _install_raise_in(inject["raise_in"])
    if inject.get("disk") or inject.get("sync_log") or inject.get("recorder"):
        import sequencer.recorder as rec_mod
        base = rec_mod.Recorder
        disk, sync_log, extra = inject.get("disk"), inject.get("sync_log"), inject.get("recorder") or {}

        class FaultRecorder(base):
            def __init__(self, folder, clock=None, **kw):
                kw.setdefault("fileops", _fileops(disk, sync_log))
                for k, v in extra.items():
                    kw.setdefault(k, v)
                super().__init__(folder, clock, **kw)
        rec_mod.Recorder = FaultRecorder


def main(argv) -> int:
    if "--" not in argv:
        print("usage: python -m tests.faults.launch INJECT_JSON -- VERB ARGS...", file=sys.stderr)
        return 2
    k = argv.index("--")
    inject = json.loads(argv[0]) if k > 0 else {}
    install(inject)
    from sequencer.cli import main as cli_main
    return cli_main(argv[k + 1:])


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
