"""Engine benchmark: loop time against the sample period, and trip-to-off latency.

1. Loop time with injected instrument latencies: the simulated rig (real drivers, real
   watchdog) with a log-normal reply latency on every query of supply, ammeter and gauge
   (median 4 ms, sigma 0.6: a guess at a LAN/GPIB instrument, not a measurement), sample
   period 250 ms, on the virtual clock. Loop time = clock time from the start of a sample
   to the start of its sleep (instrument latency included), so it is the figure that must
   stay below the sample period. Also the real (CPU) time of the same work.
2. Trip latency on the virtual clock: a ramp into a 5 uA ceiling; time from the reading
   that crosses to output confirmed off, and the number of samples between them.
3. Trip latency in wall time over the loopback SCPI server (127.0.0.1, free port), the
   simulated instruments on real time: from the judging of the crossing sample to
   safe_off() returning confirmed.

Prints absolute figures, then the last line
``engine: ratio X.XX (p99 loop time / sample period)``.
"""
from __future__ import annotations

import math
import statistics
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from drivers import latch, open_instrument                          # noqa: E402
from drivers.clock import WallClock                                 # noqa: E402
from drivers.roles import hardware_limits                           # noqa: E402
from sequencer.compiler import compile_plan                         # noqa: E402
from sequencer.engine import Engine, EngineOptions, ListRecorder, Stand   # noqa: E402
from sequencer.protocol import protocol_from_text                   # noqa: E402
from sequencer.rig import rig_from_text                             # noqa: E402
from sequencer.stand import build_stand                             # noqa: E402
from sequencer.watchdog import Watchdog                             # noqa: E402

SEED = 7
PERIOD = 0.25

LATENCY = "{dist: lognormal, median_s: 0.004, sigma: 0.6}"
QUIRKS = ("  quirks: {supply: {latency: %s}, ammeter: {latency: %s}, gauge: {latency: %s}}\n"
          % (LATENCY, LATENCY, LATENCY))

LOOP_PROTOCOL = """\
name: bench-loop
sample_period: "250 ms"
limits: {current_max: "50 uA", slew_max: "50 V/s", runaway_time: "10 s"}
steps:
  - ramp: {to: "400 V", rate: "20 V/s"}
  - dwell: {duration: "60 s"}
  - return: {rate: "50 V/s"}
"""

TRIP_PROTOCOL = """\
name: bench-trip
sample_period: "%s"
limits: {current_max: "5 uA", slew_max: "200 V/s", new_max_factor: 1000, burst_backoff_count: 100,
         runaway_rate: "5 %%/s"}
steps:
  - ramp: {to: "1200 V", rate: "%s"}
  - return: {rate: "200 V/s"}
"""


def rig_text(quirks: bool) -> str:
    text = (ROOT / "protocols" / "sim-rig.yaml").read_text()
    text = text.replace("state_dir: .fieldrun-state", "state_dir: /tmp/fieldrun-bench-state")
    if quirks:
        text = text.replace("  seed: 7\n", "  seed: 7\n" + QUIRKS)
    return text


def pct(xs, q):
    xs = sorted(xs)
    if not xs:
        return math.nan
    k = min(len(xs) - 1, max(0, int(math.ceil(q / 100.0 * len(xs))) - 1))
    return xs[k]


def engine_for(plan, stand, clock, rig, **opts):
    v_ovp, i_limit = hardware_limits(plan.peak_voltage, plan.limits.current_max,
                                     rig.voltage_max, rig.current_max)
    rec = ListRecorder()
    eng = Engine(plan, stand, clock, recorder=rec, watchdog=Watchdog(plan.limits),
                 options=EngineOptions(v_ovp=v_ovp, i_limit=i_limit, measure=True, **opts))
    return eng, rec


def run_sim(protocol: str, quirks: bool):
    """One guarded run on the simulated rig; returns (result, recorder, engine)."""
    latch.forget_all()
    rig = rig_from_text(rig_text(quirks=quirks), "sim-rig.yaml")
    plan = compile_plan(protocol_from_text(protocol, "bench.yaml"), rig)
    built = build_stand(rig, seed=SEED)
    eng, rec = engine_for(plan, built.stand, built.clock, rig)
    try:
        res = eng.run()
    finally:
        built.stand.close()
    return res, rec, eng, plan


def bench_loop():
    res, rec, eng, _ = run_sim(LOOP_PROTOCOL, quirks=True)
    lc, lw = eng.loop_clock, eng.loop_wall
    missed = len(rec.kinds("missed-cycle"))
    print(f"loop (virtual clock, injected latency {LATENCY}, seed {SEED}): {len(lc)} samples, "
          f"outcome {res.outcome}")
    print(f"  loop time incl. instrument latency: median {statistics.median(lc) * 1e3:.2f} ms, "
          f"p99 {pct(lc, 99) * 1e3:.2f} ms, worst {max(lc) * 1e3:.2f} ms; "
          f"sample period {PERIOD * 1e3:.0f} ms; missed cycles {missed}")
    print(f"  real (CPU) time of the same work: median {statistics.median(lw) * 1e3:.2f} ms, "
          f"p99 {pct(lw, 99) * 1e3:.2f} ms, worst {max(lw) * 1e3:.2f} ms")
    return pct(lc, 99)


def bench_trip_virtual():
    res, rec, eng, plan = run_sim(TRIP_PROTOCOL % ("100 ms", "50 V/s"), quirks=False)
    ceiling = plan.limits.current_max
    # the crossing: a valid current above the ceiling, or an overflow on a range at or
    # above it (the current is then at least that range)
    crossing = next((s for s in rec.samples if (s.valid_current and s.current_a > ceiling)
                     or (s.overflow and s.range_a >= ceiling)), None)
    tt = eng.trip_timing or {}
    if crossing is None or not tt:
        print(f"trip (virtual clock): no trip ({res.outcome}: {res.reason})")
        return
    extra = (eng.tripped_on_seq - crossing.seq) if eng.tripped_on_seq is not None else math.nan
    print(f"trip (virtual clock, seed {SEED}): crossing read at t={crossing.t_i:.4f} s "
          f"(sample {crossing.seq}), output confirmed off at t={tt['off_t']:.4f} s: "
          f"{(tt['off_t'] - crossing.t_i) * 1e3:.1f} ms of instrument time, "
          f"{extra} samples after the crossing one; {res.reason.split(':')[0]}; the confirmation "
          f"waits for the supply's bleed-down below the dialect's off threshold")


def bench_trip_loopback():
    try:
        from simulators.loopback import LoopbackServer
        from simulators.stand import SimulatedStand
    except ImportError as exc:
        print(f"trip (wall, loopback): skipped ({exc})")
        return
    latch.forget_all()
    rig = rig_from_text(rig_text(quirks=False), "sim-rig.yaml")
    plan = compile_plan(protocol_from_text(TRIP_PROTOCOL % ("50 ms", "200 V/s"), "bench-trip.yaml"), rig)
    clock = WallClock()
    sim = SimulatedStand(dict(rig.simulation or {}), clock, seed=SEED)
    servers, drivers = [], {}
    try:
        for role, drv in (("supply", "scpi-supply"), ("ammeter", "scpi-ammeter"),
                          ("gauge", "ascii-gauge")):
            srv = LoopbackServer(sim.interpreter(role)).start()
            servers.append(srv)
            drivers[role] = open_instrument(role, drv, srv.resource, clock=clock,
                                            options={"lock": False, "name": role,
                                                     "rig_max_v": rig.voltage_max,
                                                     "rig_max_a": rig.current_max})

        def fresh():
            return open_instrument("supply", "scpi-supply", servers[0].resource, clock=clock,
                                   options={"lock": False, "name": "supply (fresh)"})
        stand = Stand(supply=drivers["supply"], ammeter=drivers["ammeter"], gauge=drivers["gauge"],
                      series_resistance=rig.series_resistance_ohm, open_fresh_supply=fresh,
                      call_budget_s=3.0, simulated=True,
                      closers=[d.close for d in drivers.values()])
        eng, rec = engine_for(plan, stand, clock, rig)
        res = eng.run()
        stand.close()
    finally:
        for srv in servers:
            srv.stop()
    tt = eng.trip_timing or {}
    lw = eng.loop_wall
    if not tt:
        print(f"trip (wall, loopback): no trip ({res.outcome}: {res.reason})")
        return
    print(f"trip (wall time over the loopback SCPI server, 50 ms samples): judged to output "
          f"confirmed off in {tt['off_wall_s'] * 1e3:.1f} ms; loop wall time p99 "
          f"{pct(lw, 99) * 1e3:.2f} ms over {len(lw)} samples")


def main():
    p99 = bench_loop()
    bench_trip_virtual()
    bench_trip_loopback()
    print(f"engine: ratio {p99 / PERIOD:.2f} (p99 loop time / sample period)")


if __name__ == "__main__":
    main()
