"""The recorder under trouble: a full queue, a full disk, a failing write; and when it
fsyncs. Every wait here is on an event (a condition the writer thread makes true), with
a generous guard against a hang; nothing asserts on wall-clock durations.

Expectations come from the recorder's contract (BRIEF.md, issue 6): the loop is never
blocked; a full queue or a full disk sets a flag with a reason, which the engine turns
into a ramp-down; fsync at every event and at an interval of real (host monotonic) time,
whatever the run's clock does.
"""
import errno
from pathlib import Path
import threading

import pytest

from sequencer import runfolder
from sequencer.recorder import Recorder
from drivers.clock import VirtualClock

from recorder_stream import stream_event, stream_sample

GUARD = 10.0   # seconds; only against a hang


class SpyOps(runfolder.FileOps):
    """os-backed file ops that count fsyncs per file, can block writes, and can fail
    with ENOSPC (full disk) for chosen files once ``budget`` bytes were written there."""

    def __init__(self, fail=(), budget=0, errno_=errno.ENOSPC):
        self.names = {}
        self.fsyncs = {}
        self.written = {}
        self.fail, self.budget, self.errno = set(fail), budget, errno_
        self.cond = threading.Condition()
        self.gate = threading.Event()
        self.gate.set()

    def open(self, path):
        fd = super().open(path)
        self.names[fd] = path.name
        return fd

    def write(self, fd, data):
        self.gate.wait(GUARD)
        name = self.names.get(fd, "?")
        if name in self.fail and self.written.get(name, 0) + len(data) > self.budget:
            raise OSError(self.errno, "No space left on device")
        n = super().write(fd, data)
        with self.cond:
            self.written[name] = self.written.get(name, 0) + n
            self.cond.notify_all()
        return n

    def fsync(self, fd):
        super().fsync(fd)
        with self.cond:
            name = self.names.get(fd, "?")
            self.fsyncs[name] = self.fsyncs.get(name, 0) + 1
            self.cond.notify_all()

    def wait(self, pred, what):
        with self.cond:
            assert self.cond.wait_for(pred, GUARD), f"gave up waiting for {what}"


def _folder(tmp_path, name="KL-F12 faults"):
    return runfolder.create_run_folder(tmp_path, name)


def test_full_queue_returns_false_sets_backlogged_and_records_why(tmp_path):
    # set: a queue of 16 and a disk that does not take anything yet (writes gated)
    ops = SpyOps()
    ops.gate.clear()
    problems = []
    rec = Recorder(_folder(tmp_path), VirtualClock(), queue_size=16, fileops=ops,
                   on_problem=problems.append)
    accepted = 0
    for k in range(100):                       # the loop goes on; nothing blocks it
        if rec.put_sample(stream_sample(k)):
            accepted += 1
    assert accepted <= 16 and accepted >= 1
    assert rec.backlogged and not rec.ok and not rec.failed
    assert "queue full" in rec.reason and problems == [rec.reason]
    assert rec.dropped >= 100 - accepted
    ops.gate.set()                            # the disk catches up
    assert rec.end("ramped-down", 3, rec.reason, True)
    rf = runfolder.RunFolder(rec.folder)
    (alarm,) = [e for e in rf.events("alarm") if e.get("what") == "recorder-backlog"]
    assert "queue full" in alarm["message"]
    assert rf.end["summary"]["dropped"] == rec.dropped
    assert rf.end["summary"]["recorder_failure"] == rec.reason


def test_full_disk_on_samples_sets_failed_and_the_reason_reaches_events(tmp_path):
    # set: samples.csv takes 5000 bytes, then ENOSPC; events.jsonl still writes
    ops = SpyOps(fail={"samples.csv"}, budget=5000)
    seen = threading.Event()
    rec = Recorder(_folder(tmp_path), VirtualClock(), fileops=ops, on_problem=lambda r: seen.set())
    k = 0
    while not seen.is_set() and k < 100000:
        rec.put_sample(stream_sample(k))
        k += 1
        if k % 50 == 0:
            seen.wait(0.001)       # let the writer reach the disk
    assert seen.wait(GUARD)
    assert rec.failed and not rec.ok
    assert "samples.csv" in rec.reason and "No space left on device" in rec.reason
    assert rec.put_sample(stream_sample(k)) is False        # refused now, still no block
    assert rec.put_event({"kind": "note", "message": "after"}) is False
    assert rec.end("ramped-down", 3, rec.reason, True)       # end.json still written
    rf = runfolder.RunFolder(rec.folder)
    (alarm,) = rf.events("alarm")
    assert alarm["what"] == "recorder-failed" and "No space left" in alarm["message"]
    assert rf.end["summary"]["recorder_failure"] == rec.reason
    assert rf.outcome == "ramped-down"
    # what did reach the file is intact: rows 0..n-1 in order
    cols = rf.samples()
    assert cols["seq"].tolist() == list(range(len(cols["seq"])))


def test_failing_disk_everywhere_never_raises_and_keeps_the_first_reason(tmp_path):
    # set: every file fails after its first 100 bytes (EIO), end.json too
    ops = SpyOps(fail={"samples.csv", "events.jsonl"}, budget=100, errno_=errno.EIO)
    seen = threading.Event()
    rec = Recorder(_folder(tmp_path), VirtualClock(), fileops=ops, on_problem=lambda r: seen.set())
    for k in range(200):
        rec.put_sample(stream_sample(k))
    rec.put_event(stream_event(199))
    assert seen.wait(GUARD)
    first = rec.reason
    assert rec.failed and first.startswith("recorder could not write")

    class Broken(runfolder.FileOps):
        def write(self, fd, data):
            raise OSError(errno.ENOSPC, "No space left on device")

    rec.ops = Broken()
    assert rec.end("ramped-down", 3, first, True) is False   # reported, not raised
    assert rec.reason == first
    assert not (rec.folder / runfolder.END_FILE).exists()
    assert runfolder.RunFolder(rec.folder).outcome == "incomplete"


def test_fsync_follows_real_time_and_events_not_the_run_clock(tmp_path):
    # set: a virtual clock and a fake host monotonic clock the test moves by hand;
    # fsync interval 1 s of host time
    host = [1000.0]
    clock = VirtualClock()
    ops = SpyOps()
    rec = Recorder(_folder(tmp_path), clock, fileops=ops, fsync_interval_s=1.0,
                   offset_interval_s=60.0, monotonic=lambda: host[0])
    # the start: files opened and fsynced, the first clock event written and fsynced
    ops.wait(lambda: rec.synced_offsets["events.jsonl"] > 0, "the start clock event fsynced")
    base = dict(ops.fsyncs)
    # 1) an hour of run time passes on the virtual clock, samples flow, host time stands
    for k in range(500):
        clock.sleep(7.2)
        rec.put_sample(stream_sample(k))
    ops.wait(lambda: ops.written.get("samples.csv", 0) >= rec._written["samples.csv"] > 0
             and rec.summary["samples"] == 500, "500 rows written")
    assert ops.fsyncs == base                 # expected: no fsync (host time did not move)
    # 2) an event: fsync of both files at once
    rec.put_event(stream_event(499))
    ops.wait(lambda: ops.fsyncs.get("events.jsonl", 0) > base["events.jsonl"], "fsync at event")
    assert ops.fsyncs["samples.csv"] > base["samples.csv"]
    assert rec.synced_offsets["samples.csv"] == (rec.folder / "samples.csv").stat().st_size
    after_event = dict(ops.fsyncs)
    # 3) one more row, then 1.5 s of host time: the interval fsync
    rec.put_sample(stream_sample(500))
    ops.wait(lambda: rec.summary["samples"] == 501, "row 501 written")
    host[0] += 1.5
    ops.wait(lambda: ops.fsyncs["samples.csv"] > after_event["samples.csv"], "interval fsync")
    # 4) 61 s of host time: a clock (offset) event besides the one at start
    host[0] += 61.0
    ops.wait(lambda: rec._n_events >= 3, "the periodic clock event")
    assert rec.end("completed", 0, "done", True)
    clocks = runfolder.RunFolder(rec.folder).events("clock")
    assert len(clocks) >= 2
    assert clocks[0]["t"] == 0.0 and clocks[0]["simulated"] is True
    assert clocks[-1]["t"] == pytest.approx(3600.0)          # 500 x 7.2 s of virtual time
    assert all(c["offset_s"] == c["utc"] - c["t"] for c in clocks)


def test_put_never_blocks_even_when_the_disk_hangs(tmp_path):
    # set: the disk hangs (every write waits on a gate); the loop puts 5000 items
    ops = SpyOps()
    ops.gate.clear()
    rec = Recorder(_folder(tmp_path), VirtualClock(), fileops=ops, queue_size=1000)
    results = [rec.put_sample(stream_sample(k)) for k in range(5000)]
    assert results.count(True) <= 1000 and results[-1] is False and rec.backlogged
    # expected: close() gives up after its bounded wait instead of hanging the caller
    assert rec.close(timeout=0.2) is False
    ops.gate.set()
    assert rec.close(timeout=GUARD) is True


def test_directory_entries_are_fsynced_after_files_are_created(tmp_path):
    # set: a spy on fsync_dir; expected (POSIX: a new directory entry is durable only
    # once the directory itself is fsynced): the runs dir after the folder is made, the
    # folder after samples/events are created and after each atomic rename
    dirs = []

    class DirSpy(runfolder.FileOps):
        def fsync_dir(self, path):
            dirs.append(Path(path))
            super().fsync_dir(path)

    ops = DirSpy()
    runs = tmp_path / "runs"
    folder = runfolder.create_run_folder(runs, "KL-F12 dirs", ops=ops)
    assert dirs == [runs]
    runfolder.write_manifest(folder, {"protocol": {"name": "dirs"}}, ops=ops)
    assert dirs[-1] == folder
    rec = Recorder(folder, VirtualClock(), fileops=ops)
    rec.put_sample(stream_sample(0))
    assert rec.end("completed", 0, "done", True)
    assert dirs.count(folder) >= 3          # manifest rename, file creation, end.json rename
    assert not [p for p in folder.iterdir() if p.name.endswith(".tmp")]   # no temp left


def test_an_unwritable_event_becomes_a_note_and_a_bad_sample_a_failure(tmp_path):
    # set: an event holding a reference cycle (cannot be JSON), then an object that is
    # not a Sample; expected: the first is recorded as a note saying so, the second sets
    # failed with a reason (the writer thread does not die silently)
    rec = Recorder(_folder(tmp_path), VirtualClock())
    cyc = {"kind": "note"}
    cyc["self"] = cyc
    assert rec.put_event(cyc)
    rec.put_sample(stream_sample(0))
    seen = threading.Event()
    rec.on_problem = lambda r: seen.set()
    rec.put_sample(object())
    assert seen.wait(GUARD)
    assert rec.failed and "internal error" in rec.reason
    rec.end("ramped-down", 3, rec.reason, True)
    notes = [e for e in runfolder.RunFolder(rec.folder).events("note")
             if "could not be written as JSON" in e.get("message", "")]
    assert len(notes) == 1
