#!/usr/bin/env python3
"""Run every benchmark in bench/ (``bench_*.py``), each in its own process, and print the
ratio line each one ends with (``<name>: ratio <x.xx> (<what> / <reference>)``).

Benchmarks report; they never fail a build: this runner always exits 0. A benchmark that
crashes, prints no ratio line or overruns its time allowance is listed as such.

    python bench/run_all.py [--timeout SECONDS] [--verbose] [PATTERN ...]
"""
from __future__ import annotations

import argparse
import re
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
RATIO_RE = re.compile(r"^\S+: ratio [-+0-9.eEinfa]+ \(.+\)\s*$")


def find(patterns) -> list:
    found = sorted(HERE.glob("bench_*.py"))
    if patterns:
        found = [p for p in found if any(pat in p.name for pat in patterns)]
    return found


def run_one(path: Path, timeout: float, verbose: bool) -> tuple:
    """(status, ratio lines, seconds) of one benchmark."""
    start = time.monotonic()
    try:
        proc = subprocess.run([sys.executable, str(path)], cwd=str(HERE.parent),
                              capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        return "timed out", [], time.monotonic() - start
    took = time.monotonic() - start
    if verbose:
        sys.stdout.write(proc.stdout)
        sys.stderr.write(proc.stderr)
    ratios = [ln.strip() for ln in proc.stdout.splitlines() if RATIO_RE.match(ln.strip())]
    if proc.returncode != 0:
        return f"exit {proc.returncode}", ratios, took
    if not ratios:
        return "no ratio line", ratios, took
    return "ok", ratios, took


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("patterns", nargs="*", help="run only benchmarks whose name contains one")
    ap.add_argument("--timeout", type=float, default=600.0, help="seconds per benchmark")
    ap.add_argument("--verbose", action="store_true", help="show each benchmark's output")
    args = ap.parse_args(argv)
    benches = find(args.patterns)
    if not benches:
        print("no benchmarks found (bench/bench_*.py)")
        return 0
    summary = []
    for path in benches:
        status, ratios, took = run_one(path, args.timeout, args.verbose)
        summary.append((path.name, status, ratios, took))
        for line in ratios:
            print(line)
        if status != "ok":
            print(f"{path.stem}: {status} after {took:.1f} s (no ratio)")
    bad = [s for s in summary if s[1] != "ok"]
    print(f"-- {len(summary)} benchmarks, {len(summary) - len(bad)} reported a ratio")
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except KeyboardInterrupt:
        sys.exit(0)
