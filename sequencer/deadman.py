"""The deadman: a thread on real monotonic time that switches the output off when the
sample loop stops checking in.

Why real time: a call hung inside a transport does not advance a ``VirtualClock`` either,
so the deadman always measures ``time.monotonic()``, in simulation as on hardware.

Protocol between the loop and the deadman:

* before each blocking phase the loop calls ``expect(seconds, what)``: "I will be back
  within ``seconds`` of real time". The engine's budget for a sample's I/O is the number
  of instrument calls times the worst call (timeout x (retries + 1)) plus a margin, so a
  call that merely times out and retries never fires it; only a call that blocks beyond
  its own timeout does.
* on a missed deadline the deadman (1) records ``fired`` and what was blocked,
  (2) calls the supply driver's ``abort()`` on the loop's session, which wakes the blocked
  call with ``TransportAborted``, (3) opens a *fresh* supply session through the stand's
  factory and runs ``safe_off()`` on it, and (4) keeps the report (or the
  ``UnsafeStateError``). The drivers' latch on the loop's session, plus the engine's own
  latch, keep a late-returning call from re-energising.
* if the loop does not come back within ``stuck_after`` real seconds of the abort, the
  deadman calls ``on_stuck(self)`` (the ``run`` command writes the end record, raises the
  alarm and exits the process).
* the loop checks ``alive`` every sample: a dead deadman thread (an exception inside it)
  ends the run at once; its exception is kept in ``error``.
"""
from __future__ import annotations

import threading
import time
from typing import Callable, Optional


class Deadman:
    def __init__(self, supply, open_fresh_supply: Optional[Callable[[], object]],
                 *, on_event: Optional[Callable[[dict], None]] = None,
                 on_stuck: Optional[Callable[["Deadman"], None]] = None,
                 stuck_after: float = 10.0, poll_s: float = 0.02, off_timeout: float = 60.0):
        self._supply = supply
        self._open_fresh = open_fresh_supply
        self._on_event = on_event or (lambda ev: None)
        self._on_stuck = on_stuck
        self.stuck_after = float(stuck_after)
        self.off_timeout = float(off_timeout)
        self.poll_s = float(poll_s)
        self._lock = threading.Lock()
        self._deadline: Optional[float] = None
        self._what = ""
        self._budget = 0.0
        self._stop = threading.Event()
        self._done = threading.Event()       # set when a firing has finished its safe_off
        self.fired = False
        self.fired_what = ""
        self.fired_at: Optional[float] = None   # time.monotonic() of the firing
        self.report = None                  # SafeOffReport from the fresh session
        self.unsafe: Optional[BaseException] = None   # UnsafeStateError or other failure
        self.error: Optional[BaseException] = None    # the deadman's own death
        self._thread = threading.Thread(target=self._main, name="fieldrun-deadman", daemon=True)

    # --- loop side -------------------------------------------------------------
    def start(self) -> "Deadman":
        self._thread.start()
        return self

    def expect(self, seconds: float, what: str) -> None:
        """The loop promises to call ``expect`` or ``clear`` again within ``seconds``."""
        with self._lock:
            self._deadline = time.monotonic() + seconds
            self._what = what
            self._budget = seconds

    def clear(self) -> None:
        with self._lock:
            self._deadline = None

    @property
    def alive(self) -> bool:
        return self._thread.is_alive() and self.error is None

    def wait_done(self, timeout: float) -> bool:
        """After a firing: wait (real time, bounded) for its safe_off to finish."""
        return self._done.wait(timeout)

    def stop(self, timeout: float = 2.0) -> None:
        self._stop.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(timeout)

    @property
    def confirmed_off(self) -> bool:
        return self.fired and self._done.is_set() and self.report is not None and self.unsafe is None

    # --- deadman side -----------------------------------------------------------
    def _main(self) -> None:
        try:
            while not self._stop.wait(self.poll_s):
                with self._lock:
                    late = self._deadline is not None and time.monotonic() > self._deadline
                    what, budget = self._what, self._budget
                if late:
                    self._fire(what, budget)
                    self._wait_for_loop()
                    return
        except BaseException as exc:   # noqa: BLE001 - recorded; the loop sees alive=False
            self.error = exc

    def _fire(self, what: str, budget: float) -> None:
        self.fired = True
        self.fired_what = what
        self.fired_at = time.monotonic()
        self._on_event({"kind": "note", "source": "deadman",
                        "message": f"deadman: the sample loop did not come back within "
                                   f"{budget:.3g} s of real time (blocked in {what}); "
                                   f"aborting the call and switching off through a fresh session"})
        try:
            self._supply.abort()
        except BaseException as exc:   # noqa: BLE001 - keep going: the fresh session matters
            self._on_event({"kind": "driver-error", "source": "deadman", "where": "abort",
                            "message": repr(exc)})
        # the fresh session's safe_off runs in a worker with a bounded wait: if it hangs
        # too (a supply that answers nobody, or a driver that makes a second safe_off
        # wait for the hung one), the deadman still ends, says unsafe, and on_stuck runs
        outcome = {}

        def off():
            try:
                if self._open_fresh is None:
                    raise RuntimeError("the stand has no way to open a fresh supply session")
                fresh = self._open_fresh()
                outcome["report"] = fresh.safe_off()
            except BaseException as exc:   # noqa: BLE001 - UnsafeStateError or anything else
                outcome["error"] = exc
        worker = threading.Thread(target=off, name="fieldrun-deadman-off", daemon=True)
        worker.start()
        worker.join(self.off_timeout)
        if worker.is_alive():
            outcome["error"] = TimeoutError(
                f"safe_off through a fresh session did not finish within {self.off_timeout:g} s")
        rep = outcome.get("report")
        if "error" not in outcome and getattr(rep, "confirmed", True) is False:
            outcome["error"] = RuntimeError(f"safe_off reported unconfirmed: {rep}")
        if "error" in outcome:
            self.unsafe = outcome["error"]
            self._on_event({"kind": "safe-off", "source": "deadman", "confirmed": False,
                            "message": f"deadman could not confirm output off: {self.unsafe}"})
        else:
            self.report = rep
            self._on_event({"kind": "safe-off", "source": "deadman", "confirmed": True,
                            "message": "output confirmed off through a fresh session",
                            "report": _report_dict(self.report)})
        self._done.set()

    def _wait_for_loop(self) -> None:
        """The loop should wake (TransportAborted) and call ``clear``/``stop``."""
        t0 = time.monotonic()
        while not self._stop.wait(self.poll_s):
            with self._lock:
                back = self._deadline is None or self._deadline > self.fired_at
            if back:
                return
            if time.monotonic() - t0 > self.stuck_after:
                if self._on_stuck is not None:
                    self._on_stuck(self)
                return


def _report_dict(report) -> object:
    if report is None:
        return None
    if hasattr(report, "__dataclass_fields__"):
        import dataclasses
        try:
            return {k: v for k, v in dataclasses.asdict(report).items()
                    if isinstance(v, (int, float, str, bool, type(None), list, tuple, dict))}
        except TypeError:
            pass
    if isinstance(report, dict):
        return report
    return str(report)
