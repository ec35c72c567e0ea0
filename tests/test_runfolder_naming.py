"""Run folder names: unique under concurrency, and no protocol name can escape runs_dir.

Expectations are by construction of the format in BRIEF.md ("Run folder format"):
``<YYYYmmddTHHMMSSZ>-<sanitised name>-<6 hex>``; the suffix is drawn again on a clash
(os.mkdir is exclusive: POSIX mkdir(2) fails with EEXIST if the path exists).
"""
import multiprocessing
import os
import re
import threading
from pathlib import Path

import pytest
from hypothesis import given, settings, strategies as st

from sequencer import runfolder

NAME = re.compile(r"^\d{8}T\d{6}Z-[A-Za-z0-9_-]{1,40}-[0-9a-f]{6}$")
SAME_SECOND = 1_800_000_000.25   # 2027-01-15T08:00:00Z (checked with time.gmtime below)

HOSTILE = ["../../etc/passwd", "/abs/path", "..", ".", "...", "", " ", "a\x00b",
           "con\\x", "ramp\nhold", "名前", "x" * 500, "-rf", "~root", "$(rm -rf /)",
           ".hidden", "KL-F12/../../..", "\u2024\u2024", "a/./b", "--", "\t"]


def test_time_stamp_of_the_name_is_utc():
    name = runfolder.folder_name(SAME_SECOND, "ramp", "abcdef")
    assert name == "20270115T080000Z-ramp-abcdef"


@pytest.mark.parametrize("hostile", HOSTILE)
def test_hostile_protocol_names_stay_inside_runs_dir(tmp_path, hostile):
    runs = tmp_path / "runs"
    folder = runfolder.create_run_folder(runs, hostile, utc=SAME_SECOND)
    assert folder.parent.resolve() == runs.resolve()
    assert folder.is_dir()
    assert NAME.match(folder.name), folder.name
    assert list(runs.iterdir()) == [folder]          # nothing else was created
    assert not any(tmp_path.glob("etc*"))


@settings(max_examples=300, deadline=None)
@given(st.text())
def test_sanitised_name_is_always_one_safe_component(text):
    s = runfolder.sanitise_name(text)
    assert re.fullmatch(r"[A-Za-z0-9_-]{1,40}", s)
    assert s not in (".", "..") and os.sep not in s


def test_a_taken_suffix_is_drawn_again(tmp_path):
    draws = iter(["aaaaaa", "aaaaaa", "aaaaaa", "bbbbbb"])
    a = runfolder.create_run_folder(tmp_path, "ramp", utc=SAME_SECOND, suffix=lambda: next(draws))
    b = runfolder.create_run_folder(tmp_path, "ramp", utc=SAME_SECOND, suffix=lambda: next(draws))
    assert a.name.endswith("-aaaaaa") and b.name.endswith("-bbbbbb")
    with pytest.raises(FileExistsError):
        runfolder.create_run_folder(tmp_path, "ramp", utc=SAME_SECOND, suffix=lambda: "aaaaaa",
                                    attempts=3)


def test_threads_starting_in_the_same_second_get_distinct_folders(tmp_path):
    n = 48
    barrier = threading.Barrier(n)
    out = []

    def worker():
        barrier.wait()
        out.append(runfolder.create_run_folder(tmp_path, "campaign KL-Y07", utc=SAME_SECOND))

    threads = [threading.Thread(target=worker) for _ in range(n)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(10)
    assert len(out) == n and len(set(out)) == n
    assert len(list(tmp_path.iterdir())) == n


def _proc_worker(args):
    runs, k = args
    draws = iter(["c1a5h0"])          # every worker tries the same name first

    def suffix():
        return next(draws, None) or os.urandom(3).hex()

    return str(runfolder.create_run_folder(runs, "campaign KL-Y07", utc=SAME_SECOND, suffix=suffix))


def test_processes_starting_in_the_same_second_get_distinct_folders(tmp_path):
    # set: 6 worker processes, same second, all trying the same first name;
    # expected: one wins it, the others redraw; 6 distinct folders
    ctx = multiprocessing.get_context("fork")
    with ctx.Pool(3) as pool:
        paths = pool.map(_proc_worker, [(str(tmp_path), k) for k in range(6)])
    assert len(set(paths)) == 6
    assert all(Path(p).parent == tmp_path for p in paths)
    assert sum(p.endswith("-c1a5h0") for p in paths) == 1
