"""Speed of the analysis of one run folder, measured in one run.

A synthetic run folder (Kestrel Lane demo: KL-F12 on stand-B, Murphy–Good emission from
sequencer.physics, 1 % noise, seed 5) with a continuous ramp and a dwell, N samples in all
(default 36 000: one hour at 10 Hz). Times the whole analysis without figures, with figures,
and, as the reference, reading samples.csv with the standard csv module alone.

    /work/venv/bin/python bench/bench_analysis.py [--samples 36000] [--seed 5]

Absolute figures first, then one ratio line: analysis time / bare csv read time.
"""
from __future__ import annotations

import argparse
import csv
import json
import os
import sys
import tempfile
import time

import numpy as np

sys.path.insert(0, os.path.dirname(os.path.dirname(os.path.abspath(__file__))))

from sequencer import physics  # noqa: E402
from sequencer.analysis import run as arun  # noqa: E402

HEADER = ("seq[],utc[s],t[s],t_v[s],t_i[s],t_p[s],setpoint[V],voltage[V],gap_voltage[V],current[A],"
          "supply_current[A],range[A],pressure[Pa],pressure_age[s],step[],step_kind[],cc[],overflow[],"
          "interlock[],status[]")


def write_folder(root: str, n: int, seed: int) -> str:
    rng = np.random.default_rng(seed)
    folder = os.path.join(root, "20261201T100000Z-kl-f12-bench-000000")
    os.makedirs(folder)
    half = n // 2
    sp = np.concatenate([np.linspace(300, 1300, half), np.full(n - half, 1000.0)])
    kind = ["ramp"] * half + ["hold"] * (n - half)
    step = [0] * half + [1] * (n - half)
    I = 1e-13 * physics.murphy_good_j(sp * 2000 / 500e-6, 4.5) * (1 + 0.01 * rng.standard_normal(n))
    I = I + 2e-12 * rng.standard_normal(n)
    t = (np.arange(n) * 0.1).tolist()
    sp, I = sp.tolist(), I.tolist()           # plain floats, so repr() is the number
    with open(os.path.join(folder, "samples.csv"), "w") as fh:
        fh.write(HEADER + "\n")
        for k in range(n):
            fh.write(f"{k},{1.8e9 + t[k]!r},{t[k]!r},{t[k]!r},{t[k]!r},{t[k]!r},{sp[k]!r},{sp[k]!r},{sp[k]!r},"
                     f"{I[k]!r},nan,2e-05,1e-06,0.1,{step[k]},{kind[k]},0,0,1,\n")
    with open(os.path.join(folder, "manifest.json"), "w") as fh:
        json.dump({"sample": {"id": "KL-F12"}, "gap": "500 um", "work_function": "4.5 eV"}, fh)
    open(os.path.join(folder, "events.jsonl"), "w").close()
    return folder


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--samples", type=int, default=36000)
    ap.add_argument("--seed", type=int, default=5)
    a = ap.parse_args()
    with tempfile.TemporaryDirectory() as root:
        folder = write_folder(root, a.samples, a.seed)
        t0 = time.perf_counter()
        with open(os.path.join(folder, "samples.csv"), newline="") as fh:
            rows = sum(1 for _ in csv.reader(fh))
        t_csv = time.perf_counter() - t0
        t0 = time.perf_counter()
        res = arun.analyze(folder, arun.Options(), figures=False)
        t_an = time.perf_counter() - t0
        t0 = time.perf_counter()
        arun.analyze(folder, arun.Options(), figures=True)
        t_fig = time.perf_counter() - t0
    beta = res["branches"]["up"]["segments"][0]["forms"]["FN"]["beta"]
    print(f"samples: {a.samples} (seed {a.seed}), csv rows {rows}")
    print(f"bare csv read: {t_csv:.3f} s")
    print(f"analysis without figures: {t_an:.3f} s (beta {beta:.0f}, set 2000)")
    print(f"analysis with figures: {t_fig:.3f} s")
    print(f"analysis: ratio {t_an / t_csv:.2f} (analysis without figures / bare csv read of the same file)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
