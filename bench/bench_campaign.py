"""Campaign throughput: 64 simulated fibres (each run guarded and unguarded) on a local
pool of 2 worker processes against a pool of 1, in the same run.

Both use the same 'spawn' process pool, so start-up costs are on both sides. To cancel a
load that drifts while the bench runs, the fibres are split in two halves and timed in the
order 1 worker, 2 workers, 2 workers, 1 worker (each arm runs every fibre once). The goal
is a ratio of at most 0.65 (two cores nearly doubling throughput); on a machine whose
cores are busy with other work the ratio says so (the load average is printed). The two
arms must give identical results (checked, printed). Absolute figures first, the ratio
line last.

    /work/venv/bin/python bench/bench_campaign.py [--fibres 64]
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from sequencer import campaign as C  # noqa: E402

SEED = 2026


def _spin(n: int) -> float:
    t = time.perf_counter()
    x = 0
    for i in range(n):
        x += i * i
    return time.perf_counter() - t


def machine_check(n: int = 5_000_000) -> float:
    """What this machine gives two processes right now: the wall time of two equal
    pure-Python jobs on a pool of 2 over twice the time of one on a pool of 1 (0.5 on
    two free cores; 1.0 when the cores are saturated by other work)."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor
    ctx = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(1, mp_context=ctx) as p1, ProcessPoolExecutor(2, mp_context=ctx) as p2:
        list(p1.map(_spin, [1000]))
        list(p2.map(_spin, [1000, 1000]))
        t0 = time.perf_counter()
        list(p1.map(_spin, [n]))
        one = time.perf_counter() - t0
        t0 = time.perf_counter()
        list(p2.map(_spin, [n, n]))
        two = time.perf_counter() - t0
    return two / (2 * one)


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--fibres", type=int, default=64)
    a = ap.parse_args()
    from tests.replay_support import HARSH, harsh_cathode, sim_rig, write
    with tempfile.TemporaryDirectory() as tmp:
        proto = write(tmp, "bench-campaign.yaml", HARSH.format(to="1300 V", dwell="10 s"))
        rig = sim_rig(tmp, harsh_cathode(300))
        print(f"campaign bench: {a.fibres} fibres x 2 runs, seed {SEED}, cpu_count {os.cpu_count()}, "
              f"load average {os.getloadavg()[0]:.2f}")
        jobs = C.make_jobs(proto, rig, a.fibres, SEED)
        halves = (jobs[: a.fibres // 2], jobs[a.fibres // 2:])
        wall = {1: 0.0, 2: 0.0}
        results = {1: [], 2: []}
        for workers, half in ((1, 0), (2, 0), (2, 1), (1, 1)):
            t0 = time.perf_counter()
            res = C.execute(halves[half], workers=workers, pool_for_one=True)
            dt = time.perf_counter() - t0
            wall[workers] += dt
            results[workers] += res
            print(f"  half {half + 1} on {workers} worker(s): {dt:.2f} s wall "
                  f"(load average {os.getloadavg()[0]:.2f})")
        for w in (1, 2):
            print(f"{w} worker(s): {wall[w]:.2f} s wall for {a.fibres} fibres "
                  f"({wall[w] / a.fibres * 1000:.0f} ms per fibre)")
        print(f"machine check (pure-Python spin, same pools): 2 workers take "
              f"{machine_check():.2f} of the time 1 worker takes for the same work "
              f"(0.50 on two free cores)")
        key = lambda r: r["fibre"]   # noqa: E731
        same = sorted(results[1], key=key) == sorted(results[2], key=key)
        s = C.summarise(sorted(results[1], key=key))
        print(f"identical results: {same}; unguarded lost {s['unguarded']['fibres_lost']}, "
              f"guarded lost {s['guarded']['fibres_lost']}")
        print(f"campaign: ratio {wall[2] / wall[1]:.2f} (wall time on 2 workers / on 1 worker)")
        return 0 if same else 1


if __name__ == "__main__":
    sys.exit(main())
