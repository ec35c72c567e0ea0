"""Speed of the simulated fibre cathode, measured in one run.

(a) cathode-replay: a one-hour dwell sampled at 10 Hz with 10^4 emitters on simulated time
    (chamber included), against real time: simulated seconds / wall seconds (goal >= 300).
(b) cathode-throughput: the full model (heating, adsorbates, space charge, noise) over a
    ramp up, dwell and ramp down, in ensemble emitters per wall second (skipped emitters
    count), against bare numpy exp elements per second on this machine (goal >= 0.05).

    /work/venv/bin/python bench/bench_cathode.py [--seed 12] [--emitters 10000] [--volts 450]

Absolute figures first, then one ratio line per measurement.
"""
from __future__ import annotations

import argparse
import os
import sys
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from simulators.cathode import Cathode, CathodeParams  # noqa: E402
from simulators.chamber import Chamber  # noqa: E402

DT = 0.1


def _drive(cath, ch, volts, t, I):
    for v in volts:
        t += DT
        p = ch.advance(t, I, v)
        I = cath.emit(v, t, p)
    return t, I


def replay(seed, emitters, volts, hours=1.0):
    cath = Cathode(CathodeParams.from_dict({"emitters": emitters}), np.random.default_rng(seed))
    ch = Chamber({})
    t, I = _drive(cath, ch, np.linspace(0.0, volts, 300), 0.0, 0.0)     # 30 s ramp, not timed
    n = int(round(hours * 3600 / DT))
    dwell = np.full(n, float(volts))
    w0, c0 = time.perf_counter(), time.process_time()
    t, I = _drive(cath, ch, dwell, t, I)
    wall, cpu = time.perf_counter() - w0, time.process_time() - c0
    return n * DT, wall, cpu, I, cath


def throughput(seed, emitters, volts):
    cath = Cathode(CathodeParams.from_dict({"emitters": emitters}), np.random.default_rng(seed))
    ch = Chamber({})
    prog = np.concatenate([np.linspace(0.0, volts * 1.2, 600), np.full(4800, volts * 1.2),
                           np.linspace(volts * 1.2, 0.0, 600)])
    w0 = time.perf_counter()
    _drive(cath, ch, prog, 0.0, 0.0)
    wall = time.perf_counter() - w0
    return emitters * prog.size / wall, prog.size, wall, cath


def numpy_exp_rate(n=1_000_000, repeats=20):
    x = np.linspace(-50.0, 0.0, n)
    out = np.empty_like(x)
    np.exp(x, out=out)
    w0 = time.perf_counter()
    for _ in range(repeats):
        np.exp(x, out=out)
    return n * repeats / (time.perf_counter() - w0)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description="speed of the simulated cathode")
    ap.add_argument("--seed", type=int, default=12)
    ap.add_argument("--emitters", type=int, default=10000)
    ap.add_argument("--volts", type=float, default=450.0, help="dwell voltage (default 450 V, about 1 uA)")
    ap.add_argument("--hours", type=float, default=1.0)
    a = ap.parse_args(argv)
    print(f"seed {a.seed}, {a.emitters} emitters, dwell at {a.volts:.0f} V, 10 Hz")

    sim_s, wall, cpu, I, cath = replay(a.seed, a.emitters, a.volts, a.hours)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"replay: {sim_s:.0f} s simulated in {wall:.2f} s wall, {cpu:.2f} s CPU of this process "
          f"({wall / (sim_s / DT) * 1e6:.0f} us wall per sample; load average {load:.1f}); "
          f"final current {I:.3e} A, {cath.active_count} active emitters, "
          f"{sum(e[1] == 'burn' for e in cath.events)} burns, {sum(e[1] == 'ion-hit' for e in cath.events)} ion hits")

    rate, n, wall_t, cath_t = throughput(a.seed, a.emitters, a.volts)
    exp_rate = numpy_exp_rate()
    print(f"throughput: {n} samples x {a.emitters} emitters in {wall_t:.2f} s = {rate:.3e} emitters/s "
          f"(ramp to {1.2 * a.volts:.0f} V, 8 min dwell, ramp down; {sum(e[1] == 'burn' for e in cath_t.events)} burns)")
    print(f"numpy exp: {exp_rate:.3e} elements/s (1e6-element arrays)")
    print(f"cathode-replay: ratio {sim_s / wall:.2f} (simulated time / wall time)")
    print(f"cathode-throughput: ratio {rate / exp_rate:.2f} (emitters/s / numpy exp elements/s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
