"""The engine: executes a Plan on a stand, one sample at a time, and always ends with the
output switched off.

Threading model
---------------
* **The sample loop** (the thread that calls ``Engine.run``, the main thread under the
  CLI) owns every instrument session. Only it calls the drivers, and it runs the
  watchdog on every sample, in line: nothing on the trip path waits on another thread, the
  disk or the terminal.
* **The deadman** (``sequencer.deadman``) is a separate thread on real monotonic time.
  The loop tells it, before each sample's I/O and each sleep, how long it may take. A
  call blocked beyond its own timeout makes the deadman ``abort()`` that session and run
  ``safe_off()`` through a fresh one. The loop checks every sample that the deadman is
  alive; a dead deadman ends the run at once.
* **The recorder** and **the console** (recorder helper) have their own threads; the loop
  only puts items in their bounded queues and reads their flags.
* **Signals** (``sequencer.signals``) only set flags in a ``StopFlags``; so does
  ``fieldrun ctl``, through a command file polled without blocking.

One sample
----------
1. stop requests, deadman health, recorder health and operator commands are checked;
2. the plan cursor (a runner from ``sequencer.steps``) proposes the next voltage, unless
   a hold or back-off is in force; climbing back after a back-off is limited to the
   protocol's rate;
3. the independent slew limiter bounds it; ``set_voltage`` is called only on a change;
4. ammeter, supply voltage/current/state, gauge and interlock are read into a ``Sample``
   (polarity applied: magnitudes);
5. the watchdog judges the sample; a TRIP calls ``safe_off()`` before anything is logged;
   the sample and any verdict change are then queued for the recorder;
6. the verdict is applied (continue: the cursor advances on this accepted sample; hold;
   back off; ramp down; trip), and the interlock heartbeat is toggled;
7. the loop sleeps until the next absolute deadline. A missed deadline is logged as a
   ``missed-cycle`` event and skipped, never caught up.

Whatever ends the run (the plan, a verdict, an operator, a signal, an exception, the
deadman) ``safe_off()`` is called and its confirmation recorded; ``UnsafeStateError`` makes
the outcome ``unsafe`` (exit 5).
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Dict, List, Optional

from drivers import hooks as _fault_hooks
from drivers.errors import DriverError, LatchedOff, TransportAborted, UnsafeStateError

from . import sample as S
from .deadman import Deadman, _report_dict
from .limits import PARAMS, Limits
from .plan import Plan, Segment
from .sample import Action, Sample, Verdict, CONTINUE
from .signals import StopFlags
from .slew import SlewLimiter
from .steps import Runner, approach, at, make_runner

# exit codes (DESIGN.md)
EXIT_OK, EXIT_INTERNAL, EXIT_REFUSED, EXIT_WATCHDOG, EXIT_OPERATOR, EXIT_UNSAFE = range(6)

OUTCOME_EXIT = {
    "completed": EXIT_OK,
    "error": EXIT_INTERNAL,
    "refused": EXIT_REFUSED,
    "tripped": EXIT_WATCHDOG,
    "ramped-down": EXIT_WATCHDOG,
    "stopped": EXIT_OPERATOR,
    "unsafe": EXIT_UNSAFE,
}


@dataclass
class Stand:
    """The instruments of one run, as driver role objects (see BRIEF: driver role API).

    ``open_fresh_supply()`` opens a *new* supply session (new transport) for the
    deadman. ``call_budget_s`` is the worst real time one driver call may take
    legitimately (timeout x (retries + 1)); the deadman's margin is built from it.
    """

    supply: Any
    ammeter: Any = None
    gauge: Any = None
    interlock: Any = None
    polarity: int = 1
    ammeter_sign: int = 1           # ammeter reading x sign = emission current
    series_resistance: float = 0.0
    open_fresh_supply: Optional[Callable[[], Any]] = None
    call_budget_s: float = 5.0
    simulated: bool = False
    identities: Dict[str, Any] = field(default_factory=dict)
    closers: List[Callable[[], None]] = field(default_factory=list)
    extra: Dict[str, Any] = field(default_factory=dict)

    def close(self) -> None:
        for c in reversed(self.closers):
            try:
                c()
            except Exception:   # noqa: BLE001 - closing is best effort
                pass


@dataclass
class EngineOptions:
    unguarded: bool = False         # no software watchdog (simulation only; run.py checks)
    skip_pauses: bool = False       # replays: pauses are skipped (and logged)
    v_ovp: Optional[float] = None   # arm: over-voltage limit (V); default from the plan
    i_limit: Optional[float] = None  # arm: supply current limit (A); default current_max
    comm_timeout_s: Optional[float] = None   # arm: the supply's own comm watchdog
    near_zero_v: Optional[float] = None
    control: Any = None             # object with poll() -> list of dicts, reply(cmd, dict)
    stop: Optional[StopFlags] = None
    deadman: bool = True
    deadman_margin_s: float = 1.0   # real seconds added to every deadman budget
    deadman_stuck_after: float = 10.0
    on_deadman_stuck: Optional[Callable[[Deadman], None]] = None
    hooks: Dict[str, Callable[["Engine"], None]] = field(default_factory=dict)
    sleep_chunk_s: float = 0.1      # real seconds between stop checks while sleeping
    max_samples: Optional[int] = None   # a hard cap (tests); None = none
    measure: bool = False           # keep per-sample loop times (benches)
    ammeter_range_a: Optional[float] = None   # None: auto-range
    nplc: float = 1.0
    line_hz: float = 50.0


@dataclass
class RunResult:
    outcome: str
    exit_code: int
    reason: str
    confirmed_off: bool
    samples: int = 0
    trips: int = 0
    safe_off_report: Any = None
    unsafe_error: Optional[str] = None
    tripped_on_seq: Optional[int] = None
    events: int = 0


class _NullRecorder:
    ok = True
    failed = False
    backlogged = False
    reason = None

    def put_sample(self, sample):
        return True

    def put_event(self, event):
        return True


class ListRecorder(_NullRecorder):
    """Keeps everything in memory (tests, benches)."""

    def __init__(self):
        self.samples: List[Sample] = []
        self.events: List[dict] = []

    def put_sample(self, sample):
        self.samples.append(sample)
        return True

    def put_event(self, event):
        self.events.append(dict(event))
        return True

    def kinds(self, kind):
        return [e for e in self.events if e.get("kind") == kind]


class LoopContext:
    """What the watchdog may read besides the Sample (one object, updated in place).

    ``limits`` (may be tightened live), ``segment``, ``step_kind``, ``step_index``,
    ``sample_period``, ``mode`` ("plan", "hold", "back-off", "ramp-down"),
    ``setpoint_changed`` (this sample's setpoint differs from the last),
    ``steady_since`` (clock time the setpoint last changed), ``regulating`` (a regulate
    step holds the current by moving the voltage), ``controls_voltage`` (regulate or
    condition), ``v_ceiling`` (the regulate step's ceiling or the arm OVP), ``slew_rate``.
    """

    def __init__(self, limits: Limits, v_ceiling: float, slew_rate: float):
        self.limits = limits
        self.segment: Optional[Segment] = None
        self.step_kind = ""
        self.step_index = 0
        self.sample_period = 1.0
        self.mode = "plan"
        self.setpoint_changed = False
        self.steady_since = 0.0
        self.regulating = False
        self.controls_voltage = False
        self.v_ceiling = v_ceiling
        self.slew_rate = slew_rate
        self.last_verdict: Verdict = CONTINUE


class _Stop(Exception):
    """Internal: leave the loop now (the outcome is already set)."""


def _verdict_fields(v: Verdict) -> dict:
    def num(x):
        return x if isinstance(x, (int, float)) and math.isfinite(x) else None
    return {"action": v.action.name.lower(), "rule": v.rule, "value": num(v.value),
            "threshold": num(v.threshold), "unit": v.unit, "message": v.message,
            "release": v.release}


class Engine:
    """``Engine(plan, stand, clock, recorder=None, console=None, watchdog=None,
    options=None).run() -> RunResult``. See the module docstring."""

    def __init__(self, plan: Plan, stand: Stand, clock, recorder=None, console=None,
                 watchdog=None, options: Optional[EngineOptions] = None):
        self.plan = plan
        self.stand = stand
        self.clock = clock
        self.rec = recorder if recorder is not None else _NullRecorder()
        self.console = console
        self.options = options or EngineOptions()
        self.watchdog = None if self.options.unguarded else watchdog
        self.stop = self.options.stop or StopFlags()
        self.limits: Limits = plan.limits
        self.seq = 0
        self.samples = 0
        self.trips = 0
        self.outcome: Optional[str] = None
        self.reason = ""
        self.tripped_on_seq: Optional[int] = None
        self.output_on = False
        self.latched = False            # the engine's own latch: no energising after off
        self.confirmed_off = False
        self.safe_off_report = None
        self.unsafe_error: Optional[str] = None
        self.deadman: Optional[Deadman] = None
        self.last_sent: Optional[float] = None     # last setpoint sent (magnitude)
        self._events = 0
        self._last_valid_v_t: Optional[float] = None
        self._last_pressure = None
        self._missed_flag = False
        self._verdict_key = ("continue", "")
        self._paused_by_operator = False
        self._pending_report: Optional[dict] = None
        self._wctx_key = None
        self._wctx = None
        self._runner: Optional[Runner] = None
        self._plan_time_done = 0.0          # nominal time of the segments finished (console)
        self.loop_clock: List[float] = []   # per sample: clock time from start to sleep
        self.loop_wall: List[float] = []    # per sample: real time of the same work
        self.trip_timing: Optional[dict] = None
        peak = plan.peak_voltage
        vmax = self.limits.values.get("voltage_max", peak)
        self.v_ovp = self.options.v_ovp if self.options.v_ovp is not None else \
            min(vmax, peak + max(0.05 * peak, 20.0))
        self.i_limit = self.options.i_limit if self.options.i_limit is not None else \
            self.limits.values.get("current_max", 1e-4)
        self.slew = SlewLimiter(self.limits.values.get("slew_max", 50.0), self.v_ovp)
        self.ctx = LoopContext(self.limits, self.v_ovp, self.slew.rate)

    # ------------------------------------------------------------------ events
    def event(self, kind: str, **fields) -> None:
        ev = {"kind": kind, "seq": self.seq, "t": self.clock.now(), "utc": self.clock.utc()}
        ev.update(fields)
        self._events += 1
        try:
            self.rec.put_event(ev)
        except Exception:   # noqa: BLE001 - the recorder never stops the loop
            pass
        if self.console is not None:
            try:
                self.console.event(ev)
            except Exception:   # noqa: BLE001
                pass

    def _hook(self, name: str) -> None:
        fn = self.options.hooks.get(name)
        if fn is not None:
            fn(self)
        _fault_hooks.fire("engine." + name, engine=self)   # drivers.hooks: tests only

    # ------------------------------------------------------------------ run
    def run(self) -> RunResult:
        try:
            self._start_deadman()
            self._prearm()
            self._arm()
            self._loop()
        except _Stop:
            pass
        except BaseException as exc:   # noqa: BLE001 - switch off first, then report
            self._on_exception(exc)
        finally:
            self._finish()
        code = OUTCOME_EXIT[self.outcome]
        return RunResult(self.outcome, code, self.reason, self.confirmed_off, self.samples,
                         self.trips, self.safe_off_report, self.unsafe_error,
                         self.tripped_on_seq, self._events)

    def _set_outcome(self, outcome: str, reason: str) -> None:
        """The first outcome wins, except that unsafe overrides everything."""
        if self.outcome is None or outcome == "unsafe":
            self.outcome = outcome
            self.reason = reason

    def _on_exception(self, exc: BaseException) -> None:
        if isinstance(exc, DriverError) and not self.output_on:
            # refused before the output went on (arm refused, lock held, an instrument
            # that does not answer its pre-arm checks): exit 2, safe_off still follows
            self._set_outcome("refused", str(exc))
            self.event("note", message=f"refused: {exc}")
            return
        if isinstance(exc, KeyboardInterrupt):
            self._set_outcome("stopped", "interrupted (KeyboardInterrupt)")
            return
        if isinstance(exc, UnsafeStateError):
            self.unsafe_error = str(exc)
            self._set_outcome("unsafe", str(exc))
            return
        self._set_outcome("error", f"{type(exc).__name__}: {exc}")
        # reported after safe_off (see _finish): switch off first, then report
        import traceback
        self._pending_report = {"message": f"unexpected exception, switched off: {exc!r}",
                                "traceback": traceback.format_exc(limit=8)}

    # ------------------------------------------------------------------ deadman
    def _start_deadman(self) -> None:
        if not self.options.deadman:
            return
        self.deadman = Deadman(self.stand.supply, self.stand.open_fresh_supply,
                               on_event=lambda ev: self.event(ev.pop("kind"), **ev),
                               on_stuck=self.options.on_deadman_stuck,
                               stuck_after=self.options.deadman_stuck_after,
                               off_timeout=self._io_budget(30)).start()

    def _io_budget(self, calls: int) -> float:
        return calls * self.stand.call_budget_s + self.options.deadman_margin_s

    def _expect(self, seconds: float, what: str) -> None:
        if self.deadman is not None:
            self.deadman.expect(seconds, what)

    def _check_deadman(self) -> None:
        d = self.deadman
        if d is None:
            return
        if d.fired:
            raise _DeadmanFired()
        if not d.alive:
            self._trip_now("deadman", f"the deadman thread died ({d.error!r}); switching off",
                           outcome="error")

    # ------------------------------------------------------------------ arming
    def _prearm(self) -> None:
        """Refuse (exit 2) before the output goes on: interlock open, no valid fresh
        pressure below the arm ceiling."""
        self._expect(self._io_budget(3), "pre-arm checks")
        lim = self.limits.values
        il = self.stand.interlock
        if il is not None and not il.chain_closed():
            self._refuse("the interlock chain is open")
        g = self.stand.gauge
        if g is not None:
            r = g.read()
            arm_max = lim.get("pressure_arm_max", math.inf)
            if r.state not in ("ok", "under-range") or not math.isfinite(r.pa):
                self._refuse(f"the gauge gives no valid pressure ({r.state}); arming needs "
                             f"a fresh valid reading below {arm_max:.3g} Pa")
            if r.pa >= arm_max:
                self._refuse(f"pressure {r.pa:.3g} Pa is not below the arm ceiling "
                             f"{arm_max:.3g} Pa")
            self._last_pressure = r
            self.event("note", message=f"pre-arm pressure {r.pa:.3g} Pa ({r.state})")

    def _refuse(self, why: str) -> None:
        self._set_outcome("refused", why)
        self.event("note", message=f"refused: {why}")
        raise _Stop()

    def _settle_ammeter(self, am, reads: int = 12) -> None:
        """Before the output goes on: read until auto-range has settled (the same range
        and a valid value twice running), so the first sample of the plan is not a range
        transient. Bounded; the readings are noted, not recorded as samples."""
        last = None
        for _ in range(reads):
            r = am.read()
            key = (r.range_a, r.flag)
            if key == last and r.flag is None:
                self.event("note", message=f"ammeter settled at {r.value:.3g} A on the "
                                           f"{r.range_a:.3g} A range (output off)")
                return
            last = key
        self.event("note", message="ammeter range did not settle before arming")

    def _arm(self) -> None:
        sup = self.stand.supply
        self._expect(self._io_budget(8), "arm")
        self._hook("arm")
        am = self.stand.ammeter
        if am is not None and hasattr(am, "configure"):
            am.configure(range_a=self.options.ammeter_range_a, nplc=self.options.nplc,
                         line_hz=self.options.line_hz)
            cfg = am.verify_config() if hasattr(am, "verify_config") else {}
            self.event("note", message="ammeter configured", ammeter=_plain(cfg))
            self._settle_ammeter(am)
        armed = sup.arm(self.v_ovp, self.i_limit, comm_timeout_s=self.options.comm_timeout_s,
                        near_zero_v=self.options.near_zero_v)
        self.event("arm", v_ovp=self.v_ovp, i_limit=self.i_limit,
                   unguarded=self.options.unguarded,
                   comm_timeout_s=self.options.comm_timeout_s, readback=_report_dict(armed))
        if self.options.unguarded:
            self.event("note", message="UNGUARDED: the software watchdog is off (simulation only)")
        self._set_voltage(0.0)
        sup.output(True)
        self.output_on = True
        self.event("note", message="output on at 0 V")
        self._hook("after-output-on")

    # ------------------------------------------------------------------ the loop
    def _loop(self) -> None:
        segs = self.plan.segments
        self._last_deadline = self._anchor = self.clock.now()
        self._k, self._period = 0, None
        v_applied = 0.0
        hold_v: Optional[float] = None      # a hold or back-off in force: keep this voltage
        hold_until = -math.inf              # clock time a back-off hold lasts until
        rejoin_ceiling = -math.inf          # climb at the protocol's rate below this
        ramping_down = False
        prev_action = Action.CONTINUE
        idx = -1
        runner: Optional[Runner] = None
        try:
            while True:
                # ---- 1. requests and health
                self._check_deadman()
                if self.stop.hard:
                    self._trip_now("operator", self.stop.reason or "switch off at once",
                                   outcome="stopped")
                if self.stop.soft and not ramping_down:
                    ramping_down = True
                    self._set_outcome("stopped", self.stop.reason or "operator stop")
                    hint = (" (ramping down now; a second Ctrl-C switches off at once)"
                            if "SIGINT" in self.reason else " (ramping down now)")
                    self.event("operator", action="stop", message=self.reason + hint)
                if not ramping_down and (getattr(self.rec, "failed", False)
                                         or getattr(self.rec, "backlogged", False)):
                    ramping_down = True
                    self._set_outcome("ramped-down", f"recorder: {getattr(self.rec, 'reason', '')}")
                    self.event("note", message=f"ramping down: {self.reason}")
                runner = self._poll_control(runner)
                if self.options.max_samples is not None and self.samples >= self.options.max_samples:
                    ramping_down = True
                    self._set_outcome("error", "sample cap reached")

                # ---- 2. the plan cursor
                if not ramping_down:
                    while runner is None or runner.done:
                        if runner is not None:
                            self._runner_notes(runner)
                            if runner.end_reason:
                                ramping_down = True
                                self._set_outcome("ramped-down", runner.end_reason)
                                self.event("note", message=f"ramping down: {runner.end_reason}")
                                break
                        idx += 1
                        if idx >= len(segs):
                            runner = None
                            break
                        runner = make_runner(segs[idx], self.limits, self.options.skip_pauses)
                        runner.begin(v_applied, self.clock.now())
                        self._enter_segment(segs[idx], runner)
                        if segs[idx].kind == "pause" and not runner.done:
                            self.event("operator", action="pause-wait",
                                       message=runner.message + " (resume with: fieldrun ctl RUN resume)")
                    if runner is None and not ramping_down:
                        if at(v_applied, 0.0):
                            self._set_outcome("completed", "plan finished")
                            return
                        ramping_down = True   # the plan ended above 0 V: come down under control
                        self._set_outcome("completed", "plan finished")
                        self.event("note", message="plan ended above 0 V: ramping down")
                seg = segs[idx] if 0 <= idx < len(segs) else segs[-1]
                dt = seg.sample_period if seg.sample_period > 0 else self.plan.sample_period

                # ---- 3. the next voltage
                if ramping_down:
                    if self.ctx.mode != "ramp-down":
                        self.ctx.mode = "ramp-down"
                    target = approach(v_applied, 0.0, self.slew.rate * dt)
                elif hold_v is not None:
                    target = hold_v
                elif self._paused_by_operator:
                    target = v_applied          # ``ctl pause``: the cursor stays put
                else:
                    target = runner.target(v_applied, dt)
                    if v_applied >= rejoin_ceiling:
                        rejoin_ceiling = -math.inf
                    if target > v_applied and v_applied < rejoin_ceiling:
                        rate = runner.rejoin_rate or self.slew.rate
                        target = min(target, v_applied + rate * dt, rejoin_ceiling)
                setpoint = self.slew.limit(target, dt)
                self.ctx.setpoint_changed = not at(setpoint, v_applied)
                if self.ctx.setpoint_changed:
                    self.ctx.steady_since = self.clock.now()
                t_sample = self.clock.now()
                w_sample = time.perf_counter()
                self._expect(self._io_budget(7), f"sample {self.seq} I/O")
                self._set_voltage(setpoint)
                v_applied = setpoint

                # ---- 4. read
                sample = self._read(t_sample, setpoint, seg,
                                    "ramp-down" if ramping_down else seg.kind)

                # ---- 5. judge (a trip acts before anything is logged)
                verdict = self._judge(sample)
                if verdict.action is Action.TRIP:
                    w_judged, c_judged = time.perf_counter(), self.clock.now()
                    self._safe_off_now(f"trip by {verdict.rule}")
                    self.trip_timing = {"sample_t": sample.t, "t_i": sample.t_i,
                                        "judged_t": c_judged, "off_t": self.clock.now(),
                                        "off_wall_s": time.perf_counter() - w_judged,
                                        "confirmed": self.confirmed_off}
                    self.tripped_on_seq = sample.seq
                    self.trips += 1
                self._record(sample, verdict)
                if verdict.action is Action.TRIP:
                    self._set_outcome("tripped", str(verdict))
                    self.event("trip", **_verdict_fields(verdict))
                    raise _Stop()

                # ---- 6. apply the verdict
                if ramping_down:
                    if verdict.action is Action.RAMP_DOWN and self.outcome == "completed":
                        self.outcome = None
                        self._set_outcome("ramped-down", str(verdict))
                    if at(v_applied, 0.0):
                        return
                elif verdict.action is Action.RAMP_DOWN:
                    ramping_down = True
                    self._set_outcome("ramped-down", str(verdict))
                else:
                    if runner.controls_voltage and not self._paused_by_operator \
                            and hold_v is None:
                        runner.step(sample, verdict, dt)   # sees every verdict
                    backoff = verdict.action is Action.BACK_OFF and not runner.handles_backoff
                    if backoff and prev_action is not Action.BACK_OFF:
                        frac = self.limits.values.get("backoff_fraction", 0.05)
                        rejoin_ceiling = max(v_applied, rejoin_ceiling)
                        hold_v = max(0.0, v_applied * (1.0 - frac))
                        hold_until = sample.t + self.limits.values.get("backoff_hold", 30.0)
                        if hasattr(runner, "rebase"):
                            runner.rebase(hold_v)
                        self.ctx.mode = "back-off"
                        self._hook("back-off")
                        self.event("note", message=f"backing off from {v_applied:.6g} V to "
                                                   f"{hold_v:.6g} V, holding "
                                                   f"{hold_until - sample.t:.3g} s")
                    elif verdict.action is Action.HOLD and not runner.controls_voltage:
                        if hold_v is None:
                            hold_v = v_applied
                        self.ctx.mode = "hold"
                    elif verdict.action is Action.CONTINUE:
                        if hold_v is not None and sample.t >= hold_until and at(v_applied, hold_v):
                            hold_v = None
                            self.ctx.mode = "plan"
                        if hold_v is None and not runner.controls_voltage \
                                and not self._paused_by_operator:
                            runner.advance(sample, dt)
                prev_action = verdict.action

                # ---- 7. heartbeat, then sleep to the next absolute deadline
                self._heartbeat()
                if self.options.measure:
                    self.loop_clock.append(self.clock.now() - t_sample)
                    self.loop_wall.append(time.perf_counter() - w_sample)
                self._sleep_to_next(dt)
        except _DeadmanFired:
            self._deadman_outcome()
        finally:
            if self.deadman is not None:
                self.deadman.clear()

    def _enter_segment(self, seg: Segment, runner: Runner) -> None:
        if self.ctx.segment is not None:
            self._plan_time_done += self.ctx.segment.nominal_duration
        self._runner = runner
        self.ctx.segment = seg
        self.ctx.step_kind = seg.kind
        self.ctx.step_index = seg.index
        self.ctx.sample_period = seg.sample_period
        self.ctx.regulating = seg.kind == "regulate"
        self.ctx.controls_voltage = seg.kind in ("regulate", "condition")
        self.ctx.v_ceiling = float(seg.params.get("v_ceiling") or self.v_ovp) \
            if seg.kind == "regulate" else self.v_ovp
        self.event("step", index=seg.index, step_kind=seg.kind, label=seg.label,
                   line=seg.source_line, duration_s=seg.nominal_duration)

    def _runner_notes(self, runner: Runner) -> None:
        for n in runner.notes:
            self.event("note", step=runner.seg.index, **n)
        runner.notes.clear()

    # ------------------------------------------------------------------ I/O
    def _set_voltage(self, v: float) -> None:
        """Only on change; never after the engine latched off."""
        if self.last_sent is not None and at(v, self.last_sent):
            return
        if self.latched or (self.deadman is not None and self.deadman.fired):
            raise LatchedOff("engine", "set_voltage refused: the output was switched off")
        try:
            self.stand.supply.set_voltage(self.stand.polarity * v)
        except TransportAborted:
            if self.deadman is not None and self.deadman.fired:
                raise _DeadmanFired()
            self.event("driver-error", where="supply.set_voltage", message="call aborted")
            return
        except LatchedOff:
            if self.deadman is not None and self.deadman.fired:
                # a late-returning call found the latch: it undid itself; leave the loop
                self.event("driver-error", where="supply.set_voltage",
                           message="late set_voltage refused by the latch after the deadman")
                raise _DeadmanFired()
            raise
        except UnsafeStateError:
            raise
        except DriverError as exc:
            # not sent: tried again next sample; the watchdog's setpoint rule and the
            # engine's readback check stop the run if the supply stays out of reach
            self.event("driver-error", where="supply.set_voltage", message=str(exc))
            return
        self.last_sent = v

    def _call(self, what: str, fn, *args):
        """One instrument read; a DriverError becomes a driver-error event and None."""
        try:
            return fn(*args)
        except TransportAborted:
            if self.deadman is not None and self.deadman.fired:
                raise _DeadmanFired()
            self.event("driver-error", where=what, message="call aborted")
            return None
        except (LatchedOff, UnsafeStateError):
            if self.deadman is not None and self.deadman.fired:
                raise _DeadmanFired()
            raise
        except DriverError as exc:
            self.event("driver-error", where=what, message=str(exc))
            return None

    def _read(self, t: float, setpoint: float, seg: Segment, kind: str) -> Sample:
        st = self.stand
        pol = st.polarity
        flags: List[str] = []
        if self._missed_flag:
            flags.append(S.FLAG_MISSED)
            self._missed_flag = False
        clock = self.clock

        # current (ammeter; the supply's monitor when there is no ammeter)
        current = math.nan
        range_a = math.nan
        t_i = math.nan
        if st.ammeter is not None:
            r = self._call("ammeter.read", st.ammeter.read)
            if r is None:
                flags.append(S.FLAG_INVALID)
            else:
                t_i = r.t if math.isfinite(getattr(r, "t", math.nan)) else clock.now()
                range_a = r.range_a
                if r.flag in ("overflow", "overflow-negative"):
                    flags.append(S.FLAG_OVERFLOW)
                elif r.flag == "invalid" or not math.isfinite(r.value):
                    flags.append(S.FLAG_INVALID)
                else:
                    current = st.ammeter_sign * r.value
        v = self._call("supply.measure_voltage", st.supply.measure_voltage)
        t_v = clock.now()
        voltage = pol * v if v is not None and math.isfinite(v) else math.nan
        if math.isfinite(voltage):
            self._last_valid_v_t = t_v
        else:
            t_v = math.nan
        si = self._call("supply.measure_current", st.supply.measure_current)
        supply_current = pol * si if si is not None and math.isfinite(si) else math.nan
        if st.ammeter is None:
            t_i = clock.now() if math.isfinite(supply_current) else math.nan
            current = supply_current
            if not math.isfinite(current):
                flags.append(S.FLAG_INVALID)
        state = self._call("supply.state", st.supply.state)
        interlock_ok = None
        if state is not None:
            if state.cc:
                flags.append(S.FLAG_CC)
            if state.tripped:
                flags.append(S.FLAG_SUPPLY_TRIP)
            if state.interlock_open:
                flags.append(S.FLAG_INTERLOCK_OPEN)
                interlock_ok = False
        # pressure
        pressure = math.nan
        t_p = math.nan
        age = math.inf
        if st.gauge is not None:
            r = self._call("gauge.read", st.gauge.read)
            if r is not None:
                if r.state == "under-range":
                    flags.append(S.FLAG_GAUGE_UNDER)
                elif r.state != "ok":
                    flags.append(S.FLAG_GAUGE_UNKNOWN)
                if r.state in ("ok", "under-range") and math.isfinite(r.pa):
                    self._last_pressure = r
            last = self._last_pressure
            if last is not None:
                pressure = last.pa
                t_p = last.t
                age = max(0.0, t - last.t)
                if r is None or last is not r:
                    flags.append(S.FLAG_STALE)
            else:
                flags.append(S.FLAG_GAUGE_UNKNOWN)
        else:
            age = 0.0
        if st.interlock is not None:
            closed = self._call("interlock.chain_closed", st.interlock.chain_closed)
            if closed is None:
                interlock_ok = False if interlock_ok is False else None
            else:
                interlock_ok = bool(closed) and interlock_ok is not False
            if interlock_ok is False and S.FLAG_INTERLOCK_OPEN not in flags:
                flags.append(S.FLAG_INTERLOCK_OPEN)
        gap = voltage - (current if math.isfinite(current) else 0.0) * st.series_resistance \
            if math.isfinite(voltage) else math.nan
        sample = Sample(
            seq=self.seq, t=t, utc=clock.utc() - (clock.now() - t), setpoint_v=setpoint,
            voltage_v=voltage, gap_voltage_v=gap, current_a=current,
            supply_current_a=supply_current, range_a=range_a, pressure_pa=pressure,
            pressure_age_s=age, t_v=t_v, t_i=t_i, t_p=t_p, step_index=seg.index,
            step_kind=kind, interlock_ok=interlock_ok, flags=tuple(flags))
        self.seq += 1
        self.samples += 1
        return sample

    def _watchdog_context(self):
        """The watchdog's ``rules.Context`` for this segment and mode (cached); the
        engine's own LoopContext when the rules module is not there (tests with fakes)."""
        seg = self.ctx.segment
        key = (seg.index if seg is not None else -1, self.ctx.mode)
        if key == self._wctx_key:
            return self._wctx
        try:
            from .rules import Context
        except ImportError:
            self._wctx_key, self._wctx = key, self.ctx
            return self.ctx
        import dataclasses
        kind = seg.kind if seg is not None else ""
        c = Context.for_step(kind, dict(seg.params) if seg is not None else {},
                             slew_v_per_s=self.stand.extra.get("supply_slew_v_per_s", math.inf),
                             has_gauge=self.stand.gauge is not None)
        if self.ctx.mode in ("hold", "back-off"):
            c = dataclasses.replace(c, intent="constant")
        elif self.ctx.mode == "ramp-down":
            c = dataclasses.replace(c, intent="ramping")
        self._wctx_key, self._wctx = key, c
        return c

    def _judge(self, sample: Sample) -> Verdict:
        verdict = CONTINUE
        if self.watchdog is not None:
            verdict = self.watchdog.judge(sample, self._watchdog_context())
        # the engine's own last line, independent of the watchdog (also unguarded):
        # no valid voltage readback for stale_time means the supply is out of reach.
        stale = self.limits.values.get("stale_time", 2.0)
        last = self._last_valid_v_t
        since = sample.t - (last if last is not None else sample.t)
        if last is None and self.samples > 1:
            since = math.inf
        if since > stale and verdict.action < Action.TRIP:
            verdict = Verdict(Action.TRIP, "engine-comm", since, stale, "s",
                              "no valid voltage readback from the supply")
        if sample.interlock_ok is False and verdict.action < Action.TRIP:
            verdict = Verdict(Action.TRIP, "engine-interlock", 0.0, 1.0, "",
                              "the interlock chain is open")
        self.ctx.last_verdict = verdict
        return verdict

    def _record(self, sample: Sample, verdict: Verdict) -> None:
        try:
            self.rec.put_sample(sample)
        except Exception:   # noqa: BLE001
            pass
        key = (verdict.action.name.lower(), verdict.rule)
        if key != self._verdict_key:
            self._verdict_key = key
            self.event("verdict", **_verdict_fields(verdict))
        if self.console is not None:
            try:
                seg = self.ctx.segment
                r = self._runner
                step_elapsed = r.elapsed if r is not None else 0.0
                self.console.update(sample, step_label=seg.label if seg else "",
                                    step_count=len(self.plan.segments),
                                    step_elapsed_s=step_elapsed,
                                    step_duration_s=seg.nominal_duration if seg else 0.0,
                                    run_elapsed_s=self._plan_time_done + step_elapsed,
                                    run_duration_s=self.plan.total_duration,
                                    watchdog="ok" if self.ctx.mode == "plan" else self.ctx.mode,
                                    verdict=verdict)
            except Exception:   # noqa: BLE001
                pass

    def _heartbeat(self) -> None:
        il = self.stand.interlock
        if il is not None:
            self._call("interlock.heartbeat", il.heartbeat)

    def _sleep_to_next(self, dt: float) -> None:
        """Absolute deadlines ``anchor + k * dt`` (no drift from summing); a missed one
        is logged and skipped, never caught up. A new sample period re-anchors."""
        if self._period != dt:
            self._anchor, self._k, self._period = self._last_deadline, 0, dt
        self._k += 1
        t_next = self._anchor + self._k * dt
        now = self.clock.now()
        if now > t_next + 1e-12 * max(1.0, abs(t_next)):
            missed = int(math.floor((now - t_next) / dt)) + 1
            self.event("missed-cycle", missed=missed, late_s=now - t_next,
                       message=f"{missed} sample deadline(s) missed; skipped, not caught up")
            self._k += missed
            t_next = self._anchor + self._k * dt
            self._missed_flag = True
        self._last_deadline = t_next
        self._sleep_until(t_next)

    def _sleep_until(self, t: float) -> None:
        clock = self.clock
        speed = getattr(clock, "speed", None) if getattr(clock, "simulated", False) else 1.0
        chunk = math.inf if (clock.simulated and not speed) else self.options.sleep_chunk_s * (speed or 1.0)
        while True:
            now = clock.now()
            if now >= t or self.stop.hard or (self.stop.soft and self.ctx.mode != "ramp-down"):
                return
            step = min(t, now + chunk)
            real = (step - now) / (speed or 1.0) if clock.simulated and speed else \
                (0.0 if clock.simulated else step - now)
            self._expect(real + self.options.deadman_margin_s + 1.0, "sleep")
            clock.sleep_until(step)

    # ------------------------------------------------------------------ control
    def _poll_control(self, runner: Optional[Runner]) -> Optional[Runner]:
        ctl = self.options.control
        if ctl is None:
            return runner
        try:
            commands = ctl.poll()
        except Exception as exc:   # noqa: BLE001 - a broken control channel never stops a run
            self.event("note", message=f"control channel: {exc!r}")
            return runner
        for cmd in commands:
            self._apply_command(cmd, runner)
        return runner

    def _apply_command(self, cmd: dict, runner: Optional[Runner]) -> None:
        what = cmd.get("command")
        result = {"ok": True, "message": ""}
        if what == "stop":
            self.stop.request_soft("ctl stop: ramping down")
            result["message"] = "ramping down"
        elif what == "pause":
            if runner is not None and not runner.done:
                result["message"] = "holding until resume"
                self._paused_by_operator = True
                self.ctx.mode = "hold"
            else:
                result = {"ok": False, "message": "nothing to pause"}
        elif what == "resume":
            if runner is not None and runner.seg.kind == "pause" and not runner.done:
                runner.on_resume()
                result["message"] = "pause ended"
            elif self._paused_by_operator:
                self._paused_by_operator = False
                self.ctx.mode = "plan"
                result["message"] = "resumed"
            else:
                result = {"ok": False, "message": "not paused"}
        elif what == "tighten":
            result = self._tighten(cmd.get("param", ""), cmd.get("value"), cmd.get("rule"))
        else:
            result = {"ok": False, "message": f"unknown command {what!r}"}
        self.event("operator", action=what, accepted=result["ok"], message=result["message"],
                   **{k: cmd[k] for k in ("rule", "param", "value", "id") if k in cmd})
        try:
            self.options.control.reply(cmd, result)
        except Exception:   # noqa: BLE001
            pass

    def _tighten(self, param: str, value, rule: Optional[str] = None) -> dict:
        if param not in PARAMS:
            return {"ok": False, "message": f"no watchdog parameter {param!r}"}
        try:
            value = float(value)
        except (TypeError, ValueError):
            return {"ok": False, "message": f"not a number: {value!r}"}
        if not self.limits.is_tighter(param, value):
            return {"ok": False, "message": f"refused: {param} {value:g} would loosen the "
                                            f"present {self.limits.values[param]:g} "
                                            f"({PARAMS[param].tighter} is tighter)"}
        wd = self.watchdog
        if wd is not None:      # the watchdog first: if it refuses, nothing changes
            if hasattr(wd, "tighten"):
                try:
                    wd.tighten(param, value, rule)
                except Exception as exc:   # noqa: BLE001 - RefusedError: report, do not stop
                    return {"ok": False, "message": f"watchdog refused: {exc}"}
            elif hasattr(wd, "set_limits"):
                wd.set_limits(self.limits.replace(**{param: value}))
        self.limits = self.limits.replace(**{param: value})
        self.ctx.limits = self.limits
        if param == "slew_max":
            self.slew.tighten(value)
            self.ctx.slew_rate = self.slew.rate
        return {"ok": True, "message": f"{param} tightened to {value:g} {PARAMS[param].unit}"}

    # ------------------------------------------------------------------ switching off
    def _trip_now(self, rule: str, why: str, outcome: str = "tripped") -> None:
        self._safe_off_now(why)
        self._set_outcome(outcome, why)
        self.event("trip" if outcome == "tripped" else "note", rule=rule, message=why)
        raise _Stop()

    def _safe_off_now(self, why: str) -> None:
        """safe_off() on the loop's session; on a driver failure, through a fresh one.
        Sets ``confirmed_off`` or the unsafe outcome. Never raises."""
        self.latched = True
        self._expect(self._io_budget(30), "safe_off")
        try:
            self._hook("before-safe-off")
            self.safe_off_report = _confirmed(self.stand.supply.safe_off())
            self.confirmed_off = True
            self.event("safe-off", confirmed=True, message=f"output confirmed off ({why})",
                       report=_report_dict(self.safe_off_report))
            return
        except UnsafeStateError as exc:
            first = exc
        except BaseException as exc:   # noqa: BLE001 - try a fresh session before giving up
            first = exc
        self.event("safe-off", confirmed=False, message=f"safe_off on the loop's session failed: {first}")
        if self.deadman is not None and self.deadman.fired:
            return self._deadman_outcome()
        try:
            if self.stand.open_fresh_supply is None:
                raise first
            fresh = self.stand.open_fresh_supply()
            self.safe_off_report = _confirmed(fresh.safe_off())
            self.confirmed_off = True
            self.event("safe-off", confirmed=True, source="fresh-session",
                       message="output confirmed off through a fresh session",
                       report=_report_dict(self.safe_off_report))
        except BaseException as exc:   # noqa: BLE001
            self.unsafe_error = str(exc)
            self.confirmed_off = False
            self._set_outcome("unsafe", f"output-off could not be confirmed: {exc}")
            self.event("alarm", message=f"UNSAFE: output-off could not be confirmed: {exc}")
        finally:
            if self.deadman is not None:
                self.deadman.clear()

    def _deadman_outcome(self) -> None:
        d = self.deadman
        self.latched = True
        d.wait_done(max(10.0, self._io_budget(12)))
        self.trips += 1
        if d.confirmed_off:
            self.confirmed_off = True
            self.safe_off_report = d.report
            self._set_outcome("tripped", f"deadman: blocked in {d.fired_what}; output "
                                         f"confirmed off through a fresh session")
        else:
            self.unsafe_error = str(d.unsafe)
            self._set_outcome("unsafe", f"deadman fired (blocked in {d.fired_what}) and "
                                        f"output-off could not be confirmed: {d.unsafe}")
        d.clear()

    def _finish(self) -> None:
        """Every way out passes here: safe_off() unless already confirmed."""
        if self.outcome is None:
            self._set_outcome("error", "the loop ended without an outcome")
        if self.deadman is not None and self.deadman.fired and not self.confirmed_off:
            self._deadman_outcome()
        if not self.confirmed_off and self.outcome != "unsafe":
            self._safe_off_now(f"end of run: {self.outcome}")
        if self.deadman is not None:
            self.deadman.stop()
        if self.outcome == "unsafe":
            self.confirmed_off = False
        if self._pending_report is not None:
            self.event("note", **self._pending_report)
        self.event("note", message=f"run ended: {self.outcome} ({self.reason})",
                   outcome=self.outcome, exit_code=OUTCOME_EXIT[self.outcome])


def _plain(d) -> dict:
    try:
        return {str(k): (v if isinstance(v, (int, float, str, bool, type(None))) else str(v))
                for k, v in dict(d or {}).items()}
    except (TypeError, ValueError):
        return {"raw": str(d)}


def _confirmed(report):
    """A SafeOffReport saying ``confirmed=False`` is as bad as UnsafeStateError."""
    if report is not None and getattr(report, "confirmed", True) is False:
        raise UnsafeStateError(getattr(report, "instrument", "supply"),
                               f"safe_off reported output-off unconfirmed: {report}")
    return report


class _DeadmanFired(Exception):
    """Internal: the deadman switched the output off; leave the loop."""
