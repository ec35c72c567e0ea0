#!/usr/bin/env python3
"""How long checking and compiling a protocol takes, against plain ``yaml.safe_load`` of the
same file (the floor: reading YAML at all). Measured in this one run.

Prints the absolute figures, then
``protocol_check: ratio <x> (load+check+compile / yaml.safe_load)``.
"""
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

import yaml  # noqa: E402

from sequencer.compiler import compile_plan  # noqa: E402
from sequencer.protocol import protocol_from_text  # noqa: E402
from sequencer.rig import load_rig  # noqa: E402


def best_of(fn, n=30):
    best = float("inf")
    for _ in range(n):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main():
    text = (ROOT / "protocols" / "lifetime-10uA.yaml").read_text()
    rig = load_rig(ROOT / "protocols" / "sim-rig.yaml")
    compile_plan(protocol_from_text(text, "lifetime-10uA.yaml"), rig)   # warm pint
    t_yaml = best_of(lambda: yaml.safe_load(text))
    t_ours = best_of(lambda: compile_plan(protocol_from_text(text, "lifetime-10uA.yaml"), rig))
    print(f"yaml.safe_load of lifetime-10uA.yaml: {t_yaml * 1e3:.2f} ms (best of 30)")
    print(f"load + check + compile:               {t_ours * 1e3:.2f} ms (best of 30)")
    print(f"protocol_check: ratio {t_ours / t_yaml:.2f} (load+check+compile / yaml.safe_load)")


if __name__ == "__main__":
    main()
