"""Recorder cost to the sample loop: 1 kHz sampling on the virtual clock.

A synthetic loop (sleep to the next absolute deadline on a VirtualClock, build a Sample,
a little rolling-window arithmetic standing in for the watchdog, hand the Sample on) runs
in alternating blocks with the recorder off and on, in the same process and run. The
figure is the 99th percentile of the loop's iteration time (host perf_counter), with the
recorder writing samples.csv/events.jsonl (fsync every 1 s of real time and at every
event) versus without it.

    /work/venv/bin/python bench/bench_recorder.py [--samples N] [--blocks B]
"""
from __future__ import annotations

import argparse
import collections
import math
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from drivers.clock import VirtualClock            # noqa: E402
from sequencer import runfolder                    # noqa: E402
from sequencer.recorder import Recorder            # noqa: E402
from sequencer.sample import FLAG_CC, Sample       # noqa: E402


def loop(n: int, rec, clock: VirtualClock, seq0: int):
    """Run ``n`` iterations at 1 kHz of virtual time; return per-iteration seconds."""
    window = collections.deque(maxlen=200)
    times = []
    dt = 1e-3
    t0 = clock.now()
    perf = time.perf_counter
    for k in range(n):
        start = perf()
        clock.sleep_until(t0 + (k + 1) * dt)
        t = clock.now()
        v = 1000.0 + 0.5 * math.sin(k * 1e-3)
        i = 1e-9 * math.exp(v / 200.0) * (1.0 + 1e-3 * math.sin(k))
        s = Sample(seq=seq0 + k, t=t, utc=clock.utc(), setpoint_v=1000.0, voltage_v=v,
                   gap_voltage_v=v - i * 1e6, current_a=i, supply_current_a=i * 1.01,
                   range_a=1e-6, pressure_pa=2e-6, pressure_age_s=0.1, t_v=t, t_i=t + 1e-4,
                   t_p=t - 0.1, step_index=k // 5000, step_kind="hold", interlock_ok=True,
                   flags=(FLAG_CC,) if k % 500 == 0 else ())
        window.append(i)
        mean = sum(window) / len(window)            # the watchdog's rolling window stand-in
        if rec is not None:
            rec.put_sample(s)
            if k % 1000 == 999:
                rec.put_event({"kind": "verdict", "action": "hold", "rule": "bench",
                               "value": mean, "threshold": 1.0, "unit": "A", "message": "bench"})
        times.append(perf() - start)
    return times


def pct(xs, q):
    xs = sorted(xs)
    return xs[min(len(xs) - 1, int(q * len(xs)))]


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--samples", type=int, default=20000, help="iterations per block")
    ap.add_argument("--blocks", type=int, default=3, help="off/on block pairs")
    args = ap.parse_args()
    off, on = [], []
    written = 0
    dropped = 0
    with tempfile.TemporaryDirectory() as d:
        clock = VirtualClock()
        seq = 0
        for b in range(args.blocks):
            off += loop(args.samples, None, clock, seq)
            seq += args.samples
            folder = runfolder.create_run_folder(d, f"bench block {b}")
            rec = Recorder(folder, clock)
            on += loop(args.samples, rec, clock, seq)
            seq += args.samples
            rec.end("completed", 0, "bench", True)
            written += rec.summary["samples"]
            dropped += rec.dropped
            if rec.reason:
                print(f"recorder problem: {rec.reason}")
    us = 1e6
    print(f"loop at 1 kHz on the virtual clock, {args.blocks} x {args.samples} iterations each way")
    print(f"recorder off: p50 {pct(off, .5) * us:7.2f} us  p99 {pct(off, .99) * us:7.2f} us  "
          f"max {max(off) * us:8.1f} us")
    print(f"recorder on : p50 {pct(on, .5) * us:7.2f} us  p99 {pct(on, .99) * us:7.2f} us  "
          f"max {max(on) * us:8.1f} us  ({written} rows written, {dropped} dropped)")
    print(f"recorder: ratio {pct(on, .99) / pct(off, .99):.2f} (p99 loop time with recorder / without)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
