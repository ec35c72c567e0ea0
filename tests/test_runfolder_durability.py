"""Power loss and kill -9 leave run folders that read.

Model of a power cut (common practice, no source): what was fsync()ed survives, what was
only written may be lost from any point on, so each file is cut at its last fsynced
offset, and also part-way into the next line. Model of kill -9: the process dies at an
arbitrary instant but the kernel keeps every byte already passed to write(2) (POSIX:
data written is visible to readers once write returns), so at most one torn line per file.
In both cases every row before the cut must be exactly what was meant to be written.
"""
import os
import random
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest

from sequencer import runfolder
from sequencer.recorder import Recorder
from drivers.clock import VirtualClock

from recorder_stream import same_sample, stream_event, stream_sample

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent


def _wait(cond, what, limit=10.0):
    end = time.monotonic() + limit      # a guard against a hang, not a timing check
    while not cond():
        assert time.monotonic() < end, f"gave up waiting for {what}"
        time.sleep(0.001)


def _record(folder, n=4000, every=250, wait_sync=False, **kw):
    rec = Recorder(folder, VirtualClock(), keep_sync_log=True, **kw)
    mid = None
    for k in range(n):
        assert rec.put_sample(stream_sample(k))
        if k % every == every - 1:
            before = len(rec.sync_log)
            assert rec.put_event(stream_event(k))
            if wait_sync:               # an event is fsynced: wait for it to happen
                _wait(lambda: len(rec.sync_log) > before, "the fsync after an event")
        if k == n // 2:
            mid = dict(rec.synced_offsets)     # noted while the run is going
    return rec, mid


def _check_prefix(folder, n_expected_max, deep=True):
    """The folder reads; its rows are samples 0..n-1 of the stream, exactly."""
    rf = runfolder.RunFolder(folder)
    if deep:        # parsed back into Samples, compared field by field
        back = list(rf.iter_samples())
        assert [s.seq for s in back] == list(range(len(back)))
        assert all(same_sample(s, stream_sample(s.seq)) for s in back)
    else:           # parsed (must read), and the bytes of each row are what was meant
        cols = rf.samples()
        back = cols["seq"].tolist()
        assert back == list(range(len(back)))
        path = Path(folder) / runfolder.SAMPLES_FILE
        raw = runfolder.complete_lines(path.read_bytes() if path.exists() else b"")
        lines = raw.split(b"\n")[1:-1]
        assert len(lines) == len(back)
        assert all(line.decode() + "\n" == runfolder.format_row(stream_sample(k))
                   for k, line in enumerate(lines))
    assert len(back) <= n_expected_max
    evs = rf.events()
    assert [e["n"] for e in evs] == list(range(len(evs)))
    for e in evs:
        if e["kind"] == "verdict":
            assert e == {**stream_event(e["seq"]), "n": e["n"]}
    return rf, back, evs


def test_close_makes_everything_durable(tmp_path):
    folder = runfolder.create_run_folder(tmp_path, "KL-F12 power")
    runfolder.write_manifest(folder, {"protocol": {"name": "power"}, "seed": 7})
    rec, _ = _record(folder)
    assert rec.end("completed", 0, "plan finished", True)
    for name in (runfolder.SAMPLES_FILE, runfolder.EVENTS_FILE):
        assert rec.synced_offsets[name] == (folder / name).stat().st_size


def test_power_loss_at_fsynced_offsets_keeps_every_earlier_row(tmp_path):
    seed = 20261201
    print(f"seed {seed}")
    rnd = random.Random(seed)
    folder = runfolder.create_run_folder(tmp_path / "runs", "KL-F12 power")
    runfolder.write_manifest(folder, {"protocol": {"name": "power"}, "seed": seed})
    rec, mid = _record(folder, n=2000, every=100, fsync_interval_s=3600.0, wait_sync=True)
    assert rec.end("completed", 0, "plan finished", True)
    log = rec.sync_log
    assert len(log) >= 20            # one per event at least (20 events, one per 100 samples)
    points = [mid, log[-1]] + rnd.sample(log, 6)
    for i, point in enumerate(points):
        for torn in (False, True):
            cut = tmp_path / f"cut{i}{'t' if torn else ''}"
            shutil.copytree(folder, cut)
            (cut / runfolder.END_FILE).unlink()        # the power went before the end
            for name, off in point.items():
                data = (folder / name).read_bytes()
                assert off <= len(data)
                assert off == 0 or data[off - 1:off] == b"\n"   # synced at line ends
                keep = data[:off]
                if torn and off < len(data):
                    nxt = data.index(b"\n", off) if b"\n" in data[off:] else len(data)
                    keep += data[off:off + rnd.randint(1, max(1, nxt - off - 1))]
                (cut / name).write_bytes(keep)
            rf, back, evs = _check_prefix(cut, 2000, deep=(i < 2))
            synced = (folder / runfolder.SAMPLES_FILE).read_bytes()[:point[runfolder.SAMPLES_FILE]]
            n_rows = max(0, synced.count(b"\n") - 1)        # complete rows, minus the header
            assert len(back) == max(0, n_rows)          # torn tail ignored, nothing else lost
            assert rf.manifest["seed"] == seed and not rf.complete and rf.outcome == "incomplete"


CHILD = textwrap.dedent("""
    import sys, time
    sys.path[:0] = [{root!r}, {here!r}]
    from sequencer import runfolder
    from sequencer.recorder import Recorder
    from drivers.clock import VirtualClock
    from recorder_stream import stream_sample, stream_event
    runs, seed = sys.argv[1], int(sys.argv[2])
    folder = runfolder.create_run_folder(runs, "KL-F12 kill test")
    proto = folder.parent.parent / "protocol.yaml"
    copies = runfolder.copy_inputs(folder, protocol=proto)
    # versions given, so the child does not spend its time importing pyvisa for them
    runfolder.write_manifest(folder, {{"protocol": {{"name": "kill test"}}, "seed": seed,
                                      "inputs": copies, "versions": {{"python": sys.version}}}})
    rec = Recorder(folder, VirtualClock(), fsync_interval_s=0.05)
    for k in range(40000):
        while len(rec._q) > 2000:      # pace the producer: this test is about kills, not backlog
            time.sleep(0.0005)
        rec.put_sample(stream_sample(k))
        if k % 500 == 499:
            rec.put_event(stream_event(k))
    rec.end("completed", 0, "plan finished", True)
""")


def test_kill_9_at_random_instants_leaves_readable_folders(tmp_path):
    seed = int(os.environ.get("FIELDRUN_KILL_SEED", "424242"))
    print(f"seed {seed} (set FIELDRUN_KILL_SEED to replay)")
    rnd = random.Random(seed)
    (tmp_path / "protocol.yaml").write_text("name: kill test\nsample: KL-F12\n")
    script = tmp_path / "child.py"
    script.write_text(CHILD.format(root=str(ROOT), here=str(HERE)))
    n = 22
    # each child is killed when its samples.csv reaches a random size (0 = as soon as
    # the folder exists, maybe before the manifest); waiting on the file, not on a timer
    targets = [0, 0] + [rnd.randint(1, 300_000) for _ in range(n - 2)]
    procs = []
    for i in range(n):
        runs = tmp_path / f"w{i}" / "runs"
        runs.mkdir(parents=True)
        (tmp_path / f"w{i}" / "protocol.yaml").write_bytes((tmp_path / "protocol.yaml").read_bytes())
        p = subprocess.Popen([sys.executable, str(script), str(runs), str(seed + i)],
                             stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        procs.append((p, runs, targets[i]))
    pending = set(range(n))
    deadline = time.monotonic() + 60          # a guard against a hung child, not a timing check
    killed_mid = 0
    while pending and time.monotonic() < deadline:
        for i in list(pending):
            p, runs, target = procs[i]
            folders = list(runs.iterdir())
            size = 0
            if folders and (folders[0] / runfolder.SAMPLES_FILE).exists():
                size = (folders[0] / runfolder.SAMPLES_FILE).stat().st_size
            if (folders and size >= target) or p.poll() is not None:
                if p.poll() is None:
                    p.send_signal(signal.SIGKILL)
                    killed_mid += 1
                pending.discard(i)
        time.sleep(0.005)
    for p, _, _ in procs:
        if p.poll() is None:
            p.kill()
        p.wait(10)
        err = p.stderr.read().decode()
        assert "Traceback" not in err, err
    assert not pending
    assert killed_mid >= 20
    readable = 0
    for i, (p, runs, target) in enumerate(procs):
        folders = list(runs.iterdir())
        assert len(folders) == 1
        rf, back, evs = _check_prefix(folders[0], 40000, deep=False)
        m = rf.manifest
        assert m == {} or m["seed"] == seed + i          # all or nothing (atomic rename)
        if m:
            assert m["inputs"]["protocol.yaml"]["sha256"] == runfolder.sha256_file(
                folders[0] / "protocol.yaml")
        assert rf.complete == (rf.end is not None)
        if not rf.complete:
            assert rf.outcome == "incomplete"
        readable += 1
    assert readable == n
