"""The Recorder: a writer thread that owns a run folder's ``samples.csv`` and
``events.jsonl``, fed from the sample loop through a bounded queue.

The loop calls ``put_sample`` / ``put_event``; both only append to an in-memory deque and
return at once (False when the queue is full or the recorder has failed). The writer
thread formats rows (floats with ``repr()``), writes each batch straight to the kernel
(``os.write``, no user-space buffer, so a ``kill -9`` loses nothing written), and fsyncs
after any batch holding an event and otherwise every ``fsync_interval_s`` of *real*
time (``time.monotonic()``, even when the run is on a virtual clock).

Problems never raise into the loop: a full queue sets ``backlogged``, a failing write
(OSError, e.g. ENOSPC) sets ``failed``; ``reason`` says why in words and an ``alarm``
event records it when the disk still takes it. The engine turns either into a
ramp-down with that reason (exit 3).

See docs/dev-recorder.md for how the engine drives it.
"""
from __future__ import annotations

import collections
import threading
import time
from pathlib import Path
from typing import Any, Callable, Deque, Dict, List, Optional, Tuple, Union

from . import runfolder
from .runfolder import EVENTS_FILE, HEADER, SAMPLES_FILE, FileOps, dumps, format_row, write_all

_SAMPLE = 0
_EVENT = 1


class Recorder:
    """Writer thread for one run folder. Thread-safe for one or more producers."""

    def __init__(self, folder: Union[str, Path], clock=None, *, queue_size: int = 65536,
                 fsync_interval_s: float = 1.0, offset_interval_s: float = 60.0,
                 poll_s: float = 0.02, fileops: Optional[FileOps] = None,
                 on_problem: Optional[Callable[[str], None]] = None,
                 keep_sync_log: bool = False, start: bool = True,
                 monotonic: Callable[[], float] = time.monotonic):
        self.folder = Path(folder)
        self.clock = clock
        self.queue_size = int(queue_size)
        self.fsync_interval_s = float(fsync_interval_s)
        self.offset_interval_s = float(offset_interval_s)
        self.poll_s = float(poll_s)
        self.ops = fileops or FileOps()
        self.on_problem = on_problem
        self._monotonic = monotonic   # real time for fsync/offset intervals (injectable)

        self._q: Deque[Tuple[int, Any]] = collections.deque()
        self._wake = threading.Event()
        self._closing = False
        self._closed = threading.Event()
        self._problem_lock = threading.Lock()
        self._backlog_reported = False

        # flags the engine reads (plain attributes: cheap, never block)
        self.backlogged = False
        self.failed = False
        self.reason: Optional[str] = None
        self.dropped = 0

        # bookkeeping (writer thread)
        self._last_seq = -1
        self._n_events = 0
        self._written = {SAMPLES_FILE: 0, EVENTS_FILE: 0}
        self.synced_offsets: Dict[str, int] = {SAMPLES_FILE: 0, EVENTS_FILE: 0}
        self.sync_log: Optional[List[Dict[str, int]]] = [] if keep_sync_log else None
        self._fds: Dict[str, int] = {}
        self.summary: Dict[str, Any] = {
            "samples": 0, "events": 0, "peak_voltage_v": None, "peak_current_a": None,
            "trips": 0, "first_t": None, "last_t": None,
        }
        self._thread = threading.Thread(target=self._run, name=f"recorder:{self.folder.name}",
                                        daemon=True)
        self._started = False
        # the monotonic-to-UTC offset at start, stamped now (on the caller's thread)
        self._q.append((_EVENT, self._clock_event()))
        if start:
            self.start()

    # ------------------------------------------------------------------ producer side
    @property
    def ok(self) -> bool:
        return not (self.failed or self.backlogged)

    def start(self) -> None:
        if not self._started:
            self._started = True
            self._thread.start()

    def _room(self) -> bool:
        """May one more item be queued? (Counts and flags it when not.)"""
        if self.failed or self._closing:
            self.dropped += 1
            return False
        if len(self._q) >= self.queue_size:
            self._backlog()
            return False
        return True

    def put_sample(self, sample) -> bool:
        """Queue one Sample; never blocks. False if it was not queued."""
        if not self._room():
            return False
        self._last_seq = getattr(sample, "seq", self._last_seq)
        self._q.append((_SAMPLE, sample))
        return True

    def put_event(self, event: Dict[str, Any]) -> bool:
        """Queue one event dict (needs ``kind``); never blocks. Fills ``seq``, ``t`` and
        ``utc`` when missing. False if it was not queued."""
        if not self._room():
            return False
        try:
            ev = dict(event)
        except (TypeError, ValueError):
            ev = {"kind": "note", "message": f"not an event: {event!r:.200}"}
        ev.setdefault("kind", "note")
        self._q.append((_EVENT, self._stamp(ev)))
        self._wake.set()
        return True

    def _backlog(self) -> None:
        self.dropped += 1
        if not self.backlogged:
            self.backlogged = True
            self._problem(f"recorder queue full ({self.queue_size} items): "
                          f"the disk is not keeping up")

    def _problem(self, reason: str) -> None:
        with self._problem_lock:
            first = self.reason is None
            if first:
                self.reason = reason
        if first and self.on_problem is not None:
            try:
                self.on_problem(reason)
            except Exception:  # noqa: BLE001 - a callback must not break recording
                pass

    # ------------------------------------------------------------------ end of run
    def close(self, timeout: float = 5.0) -> bool:
        """Drain the queue, fsync and close the files. Waits at most ``timeout`` seconds;
        True when the writer finished in time."""
        self._closing = True
        self._wake.set()
        if not self._started:
            self.start()
        self._thread.join(timeout)
        return not self._thread.is_alive()

    def end(self, outcome: str, exit_code: int, reason: str, confirmed_off: Optional[bool],
            timeout: float = 5.0, **extra: Any) -> bool:
        """``close()`` then write ``end.json`` atomically with a summary. Never raises;
        waits at most about ``2 * timeout``. True when both succeeded."""
        drained = self.close(timeout)
        summary = dict(self.summary)
        first, last = summary.get("first_t"), summary.get("last_t")
        summary["duration_s"] = (last - first) if first is not None and last is not None else 0.0
        summary["dropped"] = self.dropped
        summary["recorder_failure"] = self.reason
        summary["drained"] = drained
        done = threading.Event()
        result: List[bool] = [False]

        def write() -> None:
            try:
                runfolder.write_end(self.folder, outcome, exit_code, reason, confirmed_off,
                                    ops=self.ops, summary=summary, **extra)
                result[0] = True
            except Exception as exc:  # noqa: BLE001 - reported as a flag, never raised
                self.failed = True
                self._problem(f"could not write end.json: {exc}")
            finally:
                done.set()

        t = threading.Thread(target=write, name="recorder-end", daemon=True)
        t.start()
        done.wait(timeout)
        return drained and result[0]

    # ------------------------------------------------------------------ writer side
    def _open(self) -> None:
        for name in (SAMPLES_FILE, EVENTS_FILE):
            path = self.folder / name
            fresh = not path.exists() or path.stat().st_size == 0
            fd = self.ops.open(path)
            self._fds[name] = fd
            if name == SAMPLES_FILE and fresh:
                data = (HEADER + "\n").encode()
                write_all(self.ops, fd, data)
                self._written[name] += len(data)
            elif not fresh:
                self._written[name] = path.stat().st_size
        self._fsync_all()
        self.ops.fsync_dir(self.folder)

    def _fail(self, where: str, exc: BaseException) -> None:
        first = not self.failed
        self.failed = True
        self._problem(f"recorder could not write {where}: {exc}")
        if first and where != EVENTS_FILE and EVENTS_FILE in self._fds:
            try:
                self._write_events([self._stamp({"kind": "alarm", "what": "recorder-failed",
                                                 "message": self.reason, "file": where})])
                self.ops.fsync(self._fds[EVENTS_FILE])
            except Exception:  # noqa: BLE001 - the disk is already failing
                pass

    def _stamp(self, ev: Dict[str, Any]) -> Dict[str, Any]:
        ev.setdefault("seq", self._last_seq)
        if "t" not in ev:
            ev["t"] = self.clock.now() if self.clock is not None else time.monotonic()
        if "utc" not in ev:
            ev["utc"] = self.clock.utc() if self.clock is not None else time.time()
        return ev

    def _clock_event(self) -> Dict[str, Any]:
        if self.clock is not None:
            t, utc, sim = self.clock.now(), self.clock.utc(), bool(self.clock.simulated)
        else:
            t, utc, sim = time.monotonic(), time.time(), False
        return self._stamp({"kind": "clock", "t": t, "utc": utc, "offset_s": utc - t,
                            "host_monotonic": time.monotonic(), "host_utc": time.time(),
                            "simulated": sim})

    def _write_events(self, events: List[Dict[str, Any]]) -> None:
        parts = []
        for ev in events:
            ev["n"] = self._n_events
            self._n_events += 1
            try:
                parts.append(dumps(ev))
            except (TypeError, ValueError, RecursionError) as exc:
                parts.append(dumps({"kind": "note", "n": ev["n"], "seq": ev.get("seq"),
                                    "t": ev.get("t"), "utc": ev.get("utc"),
                                    "message": f"an event could not be written as JSON ({exc})",
                                    "event_kind": str(ev.get("kind"))}))
            if ev.get("kind") == "trip":
                self.summary["trips"] += 1
        data = ("\n".join(parts) + "\n").encode()
        write_all(self.ops, self._fds[EVENTS_FILE], data)
        self._written[EVENTS_FILE] += len(data)
        self.summary["events"] = self._n_events

    def _write_samples(self, samples: List[Any]) -> None:
        data = "".join(format_row(s) for s in samples).encode()
        write_all(self.ops, self._fds[SAMPLES_FILE], data)
        self._written[SAMPLES_FILE] += len(data)
        sm = self.summary
        sm["samples"] += len(samples)
        if sm["first_t"] is None:
            sm["first_t"] = samples[0].t
        sm["last_t"] = samples[-1].t
        pv, pi = sm["peak_voltage_v"], sm["peak_current_a"]
        for s in samples:
            v, i = s.voltage_v, s.current_a
            if v == v and (pv is None or v > pv):
                pv = v
            if i == i and (pi is None or i > pi):
                pi = i
        sm["peak_voltage_v"], sm["peak_current_a"] = pv, pi

    def _fsync_all(self) -> None:
        for name, fd in self._fds.items():
            self.ops.fsync(fd)
            self.synced_offsets[name] = self._written[name]
        if self.sync_log is not None:
            self.sync_log.append(dict(self.synced_offsets))

    def _write_batch(self, batch: List[Tuple[int, Any]]) -> bool:
        """Write one batch in order; returns True when it held an event."""
        samples: List[Any] = []
        events: List[Dict[str, Any]] = []
        had_event = False
        # keep the relative order within each file; the two files are independent
        for kind, item in batch:
            if kind == _SAMPLE:
                samples.append(item)
            else:
                events.append(item)
                had_event = True
        # the two files are independent: trouble with one does not stop the other
        if samples:
            try:
                self._write_samples(samples)
            except OSError as exc:
                self._fail(SAMPLES_FILE, exc)
            except Exception as exc:  # noqa: BLE001 - e.g. not a Sample: say so, go on
                self._fail(f"{SAMPLES_FILE} (internal error)", exc)
        if events:
            try:
                self._write_events(events)
            except OSError as exc:
                self._fail(EVENTS_FILE, exc)
        return had_event

    def _run(self) -> None:
        try:
            self._open()
        except OSError as exc:
            self._fail("the run folder", exc)
        try:
            self._loop()
        finally:
            for fd in self._fds.values():
                try:
                    self.ops.close(fd)
                except OSError:
                    pass
            self._closed.set()

    def _loop(self) -> None:
        now = self._monotonic
        last_sync = now()
        last_offset = now()
        dirty = False
        q = self._q
        while True:
            closing = self._closing
            if not self.failed and now() - last_offset >= self.offset_interval_s:
                last_offset = now()
                q.append((_EVENT, self._clock_event()))   # after what is queued: t stays in order
            batch: List[Tuple[int, Any]] = []
            while q and len(batch) < 8192:
                batch.append(q.popleft())
            if self.failed:
                self.dropped += len(batch)
                batch = []
            if self.backlogged and not self._backlog_reported and len(q) < self.queue_size // 2:
                self._backlog_reported = True
                batch.append((_EVENT, self._stamp({
                    "kind": "alarm", "what": "recorder-backlog", "message": self.reason,
                    "dropped": self.dropped})))
            if batch:
                try:
                    had_event = self._write_batch(batch)
                except Exception as exc:  # noqa: BLE001 - a bug here must show, not kill the thread
                    self._fail("a batch (internal error)", exc)
                    had_event = False
                dirty = True
                if had_event and not self.failed:
                    try:
                        self._fsync_all()
                        last_sync = now()
                        dirty = False
                    except OSError as exc:
                        self._fail("fsync", exc)
            if dirty and not self.failed and now() - last_sync >= self.fsync_interval_s:
                try:
                    self._fsync_all()
                except OSError as exc:
                    self._fail("fsync", exc)
                last_sync = now()
                dirty = False
            if q:
                continue
            if closing:
                if not self.failed:
                    try:
                        self._fsync_all()
                    except OSError as exc:
                        self._fail("fsync", exc)
                return
            self._wake.wait(self.poll_s)
            self._wake.clear()
