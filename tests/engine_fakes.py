"""Minimal in-test instruments behind the driver role API (engine tests only).

``FakeHV`` is the physical box (output, programmed voltage); ``FakeSupply`` is one session
to it, so a test can open a fresh session the way the deadman does. The emitter is a plain
Fowler–Nordheim-shaped I(V) = a V^2 exp(-b / V) (Fowler & Nordheim, Proc. R. Soc. A 119,
173 (1928), the functional form only; a and b are invented for these tests).
"""
from __future__ import annotations

import math
import threading

from drivers.errors import LatchedOff, TransportAborted, UnsafeStateError


from drivers.roles import CurrentReading as Reading, PressureReading as Pressure, \
    SafeOffReport, SupplyState as State


def OffReport(instrument, confirmed, voltage_v):
    return SafeOffReport(instrument, confirmed, voltage_v, False, (), False, 0.0)


class FakeHV:
    def __init__(self, clock, a=1e-9, b=3000.0, i_limit=math.inf):
        self.clock = clock
        self.output_on = False
        self.v = 0.0
        self.a, self.b = a, b
        self.i_limit = i_limit
        self.ignore_off = False
        self.latched = False        # like the drivers' latch: per box, across sessions
        self.log = []               # (t, what, value) every command reaching the box
        self.extra_current = None   # callable(t, v) -> A added to the emitter (tests)

    def emitted(self):
        if not self.output_on or self.v <= 0:
            return 0.0
        i = self.a * self.v ** 2 * math.exp(-self.b / self.v)
        if self.extra_current:
            i += self.extra_current(self.clock.now(), self.v)
        return i


class FakeSupply:
    simulated = True

    def __init__(self, box: FakeHV, name="supply"):
        self.box = box
        self.name = name
        self.latched = False
        self.block = None           # a threading.Event: calls wait on it (a hung wire)
        self.block_what = "measure_voltage"
        self._abort = threading.Event()
        self.fail = {}              # method name -> exception to raise
        self.calls = []

    #: False: abort() does not wake a blocked call (a transport that ignores it)
    abort_wakes = True

    def _enter(self, what):
        self.calls.append(what)
        if what in self.fail:
            raise self.fail[what]
        if self.block is not None and what == self.block_what:
            self.blocked = threading.Event() if not hasattr(self, "blocked") else self.blocked
            self.blocked.set()
            while not self.block.is_set():
                if self._abort.wait(0.01) and self.abort_wakes:
                    self._abort.clear()
                    raise TransportAborted(self.name, f"{what} aborted")

    def abort(self):
        self._abort.set()

    def arm(self, v_ovp, i_limit, comm_timeout_s=None, near_zero_v=None):
        self._enter("arm")
        self.latched = False
        self.box.latched = False
        self.box.i_limit = i_limit
        self.box.log.append((self.box.clock.now(), "arm", i_limit))

    def set_voltage(self, v):
        self._enter("set_voltage")
        if self.latched or self.box.latched:
            self.box.log.append((self.box.clock.now(), "refused", float(v)))
            raise LatchedOff(self.name, "latched")
        self.box.v = float(v)
        self.box.log.append((self.box.clock.now(), "volt", float(v)))

    def output(self, on):
        self._enter("output")
        if on and (self.latched or self.box.latched):
            self.box.log.append((self.box.clock.now(), "refused", "output on"))
            raise LatchedOff(self.name, "latched")
        self.box.output_on = bool(on)
        self.box.log.append((self.box.clock.now(), "output", bool(on)))

    def measure_voltage(self):
        self._enter("measure_voltage")
        return self.box.v if self.box.output_on else 0.0

    def measure_current(self):
        self._enter("measure_current")
        return min(self.box.emitted(), self.box.i_limit)

    def state(self):
        self._enter("state")
        return State(self.box.output_on, self.box.emitted() >= self.box.i_limit, False, None, {})

    def safe_off(self):
        self._enter("safe_off")
        self.latched = True
        self.box.latched = True
        if not self.box.ignore_off:
            self.box.output_on = False
            self.box.v = 0.0
        self.box.log.append((self.box.clock.now(), "safe_off", self.name))
        if self.box.output_on:
            raise UnsafeStateError(self.name, "output still on after every escalation")
        return OffReport(self.name, True, 0.0)

    def close(self):
        pass


class FakeAmmeter:
    def __init__(self, box: FakeHV):
        self.box = box
        self.fail = None
        self.overflow_at = set()    # sample numbers (call count) that read overflow
        self.n = 0

    def read(self):
        self.n += 1
        if self.fail is not None:
            raise self.fail
        t = self.box.clock.now()
        if self.n in self.overflow_at:
            return Reading(math.nan, 2e-4, "overflow", t)
        return Reading(min(self.box.emitted(), self.box.i_limit), 2e-4, None, t)


class FakeGauge:
    def __init__(self, clock, pa=1e-6):
        self.clock, self.pa, self.state = clock, pa, "ok"

    def read(self):
        return Pressure(self.pa if self.state == "ok" else math.nan, self.state, self.clock.now())


class CeilingWatchdog:
    """The smallest watchdog: trip when the current crosses ``current_max``."""

    def __init__(self, limits):
        self.limits = limits
        self.judged = []

    def set_limits(self, limits):
        self.limits = limits

    def judge(self, sample, ctx):
        from sequencer.sample import Action, Verdict, CONTINUE
        self.judged.append(sample.seq)
        lim = self.limits.current_max
        if sample.valid_current and sample.current_a > lim:
            return Verdict(Action.TRIP, "current_ceiling", sample.current_a, lim, "A",
                           "current above the ceiling")
        return CONTINUE


def make_stand(clock, **box_kw):
    from sequencer.engine import Stand
    box = FakeHV(clock, **box_kw)
    sup = FakeSupply(box)
    stand = Stand(supply=sup, ammeter=FakeAmmeter(box), gauge=FakeGauge(clock),
                  open_fresh_supply=lambda: FakeSupply(box, "fresh-session"),
                  call_budget_s=0.2, simulated=True)
    return stand, box


def seg(index, kind, period=0.1, duration=1.0, v0=0.0, v1=0.0, **params):
    v_start, v_end = v0, v1
    from sequencer.plan import Segment
    peak = max([v_start, v_end, params.get("v_to") or 0.0, params.get("v") or 0.0,
                params.get("v_ceiling") or 0.0, params.get("v_target") or 0.0,
                *params.get("points", ())])
    return Segment(index, kind, f"{index} {kind}", index + 1, period, duration, v_start,
                   v_end, peak, params)


def plan_of(*segments, **limits):
    from sequencer.limits import Limits
    from sequencer.plan import Plan
    lim = Limits.defaults().replace(**limits) if limits else Limits.defaults()
    return Plan("engine-test", tuple(segments), lim, segments[0].sample_period, "KL-F12")


def sim_rig_text(tmp, cathode=None, interlock=False) -> str:
    """protocols/sim-rig.yaml with its state folder under ``tmp``, optionally its cathode
    block replaced and (by default) without the interlock line, so a case depends on
    supply, ammeter and gauge only."""
    from pathlib import Path
    root = Path(__file__).resolve().parents[1]
    text = (root / "protocols" / "sim-rig.yaml").read_text()
    if cathode is not None:
        start = text.index("  cathode:")
        end = text.index("\n", start)
        text = text[:start] + "  cathode: " + cathode + text[end:]
    if not interlock:
        out, skip = [], False
        for ln in text.splitlines():
            if ln.startswith("  chain:"):
                skip = True
                continue
            if skip and ln.startswith("    "):
                continue
            skip = False
            out.append(ln)
        text = "\n".join(out) + "\n"
    return text.replace("state_dir: .fieldrun-state", f"state_dir: {Path(tmp) / 'state'}")


class FakeInterlock:
    """Chain closed until ``open_at`` chain reads; counts heartbeats."""

    def __init__(self, open_at=None):
        self.open_at = open_at
        self.reads = 0
        self.beats = 0

    def chain_closed(self):
        self.reads += 1
        return self.open_at is None or self.reads < self.open_at

    def heartbeat(self):
        self.beats += 1

    def inhibit(self, on):
        pass
