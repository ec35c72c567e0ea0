"""What an unused fault hook costs: ``drivers.hooks.fire`` with nothing installed, against
a call of an empty function with the same arguments, measured in one run.

    python bench/bench_fault_hooks.py [--calls N]

Prints both per-call times and ends with
``fault_hooks: ratio <x.xx> (fire with no hook / empty function call)``.
"""
import argparse
import sys
import timeit
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from drivers import hooks   # noqa: E402


def empty(point, **ctx):
    return None


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--calls", type=int, default=1_000_000)
    n = ap.parse_args().calls
    hooks.clear()
    t_fire = min(timeit.repeat(lambda: hooks.fire("engine.back-off", engine=None), number=n, repeat=5))
    t_empty = min(timeit.repeat(lambda: empty("engine.back-off", engine=None), number=n, repeat=5))
    print(f"hooks.fire, nothing installed: {t_fire / n * 1e9:.1f} ns per call (best of 5 x {n})")
    print(f"empty function call:           {t_empty / n * 1e9:.1f} ns per call (best of 5 x {n})")
    print(f"fault_hooks: ratio {t_fire / t_empty:.2f} (fire with no hook / empty function call)")


if __name__ == "__main__":
    main()
