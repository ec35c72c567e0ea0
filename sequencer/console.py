"""The live console: where the run is and whether it is healthy, at a glance.

The sample loop feeds it through ``Console.update(sample, **info)`` (one slot assignment
and a deque append) and ``Console.event(ev)`` (a bounded deque append). Everything else
(formatting, rich rendering, writing to the terminal) happens on the console's own
thread, so a slow or dead terminal can never slow or stop the loop. A broken pipe or any
OSError on write simply ends the console (``dead`` becomes True); nothing is raised to
the caller.

``RunView`` is the state and its rendering, shared with ``fieldrun watch`` (which feeds
it from a run folder's files instead of from the loop).
"""
from __future__ import annotations

import collections
import math
import sys
import threading
import time
from typing import Any, Deque, Dict, List, Optional, Sequence, Tuple

BLOCKS = "▁▂▃▄▅▆▇█"
NOTABLE = ("step", "verdict", "trip", "operator", "driver-error", "missed-cycle", "arm",
           "safe-off", "note", "alarm")
QUIET_KINDS = ("trip", "alarm", "safe-off", "driver-error")


# --------------------------------------------------------------------------- helpers
def sparkline(values: Sequence[float], width: int = 40) -> str:
    """A text sparkline of ``values`` in ``width`` columns (mean per column), scaled from
    the smallest to the largest finite value; non-finite values leave a blank."""
    vals = list(values)
    if not vals or width <= 0:
        return ""
    n = len(vals)
    cols: List[float] = []
    if n <= width:
        cols = [float(v) for v in vals]
    else:
        for c in range(width):
            a, b = c * n // width, (c + 1) * n // width
            chunk = [v for v in vals[a:b] if v == v and math.isfinite(v)]
            cols.append(sum(chunk) / len(chunk) if chunk else math.nan)
    finite = [v for v in cols if math.isfinite(v)]
    if not finite:
        return " " * len(cols)
    lo, hi = min(finite), max(finite)
    span = hi - lo
    out = []
    for v in cols:
        if not math.isfinite(v):
            out.append(" ")
        elif span <= 0:
            out.append(BLOCKS[len(BLOCKS) // 2])
        else:
            k = int((v - lo) / span * (len(BLOCKS) - 1) + 0.5)
            out.append(BLOCKS[max(0, min(len(BLOCKS) - 1, k))])
    return "".join(out)


def fmt_duration(s: Optional[float]) -> str:
    if s is None or not math.isfinite(s) or s < 0:
        return "--"
    s = int(round(s))
    h, rem = divmod(s, 3600)
    m, sec = divmod(rem, 60)
    if h:
        return f"{h}h{m:02d}m{sec:02d}s"
    if m:
        return f"{m}m{sec:02d}s"
    return f"{sec}s"


def fmt_si(x: Optional[float], unit: str, digits: int = 4) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return f"-- {unit}"
    return f"{x:.{digits}g} {unit}"


def event_line(ev: Dict[str, Any]) -> str:
    """One plain line for an event."""
    kind = ev.get("kind", "?")
    t = ev.get("t")
    ts = f"t={t:.3f}s" if isinstance(t, (int, float)) else "t=?"
    if kind in ("verdict", "trip") and ev.get("rule"):
        action = str(ev.get("action", kind)).replace("_", " ")     # "back off", as read aloud
        value, thr, unit = ev.get("value"), ev.get("threshold"), ev.get("unit", "")
        seen = f"seen {value:.4g} {unit}".rstrip() if isinstance(value, (int, float)) else "seen --"
        lim = f"threshold {thr:.4g} {unit}".rstrip() if isinstance(thr, (int, float)) else "threshold --"
        msg = ev.get("message") or ""
        return f"[{ts}] {kind}: {action} by {ev['rule']}: {msg} ({seen}, {lim})"
    if kind == "verdict":                     # back to continue: no rule to name
        return f"[{ts}] verdict: {ev.get('action', '?')}"
    if kind == "step":
        label = str(ev.get("label") or ev.get("step_kind") or ev.get("step_label") or "")
        index = ev.get("index", ev.get("step"))
        num = index + 1 if isinstance(index, int) else "?"
        return f"[{ts}] step {num} {_strip_number(label, num)}".rstrip()
    detail = ev.get("message") or ev.get("reason") or ev.get("detail") or ev.get("what") or ""
    return f"[{ts}] {kind}: {detail}".rstrip(": ").rstrip()


def _strip_number(label: str, num: Any) -> str:
    """'3 ramp' -> 'ramp' when 3 is the step's number already shown."""
    head, _, rest = label.partition(" ")
    return rest if rest and head == str(num) else label


# --------------------------------------------------------------------------- state
class RunView:
    """What the console shows: latest sample, progress, watchdog state, recent events and
    an ln I trend. Fed by the console thread (live) or by ``watch`` (from files)."""

    def __init__(self, title: str = "", plan: Optional[Dict[str, Any]] = None,
                 trend_window_s: float = 60.0, trend_width: int = 32, recent: int = 6,
                 host_clock=time.monotonic):
        self.title = title
        self.host_clock = host_clock    # real time, for the ETA (injectable in tests)
        self.plan = plan or {}
        self.trend_window_s = trend_window_s
        self.trend_width = trend_width
        self.sample = None
        self.info: Dict[str, Any] = {}
        self.events: Deque[Dict[str, Any]] = collections.deque(maxlen=recent)
        self.trend: Deque[Tuple[float, float]] = collections.deque(maxlen=8192)
        self.watchdog = "ok"
        self.n_samples = 0
        self.first_t: Optional[float] = None
        self.ended: Optional[Dict[str, Any]] = None
        self._step_start: Dict[int, float] = {}
        self._steps_seen: Dict[int, Dict[str, Any]] = {}
        self._rate_ref: Optional[Tuple[float, float]] = None   # (host monotonic, plan elapsed)
        self._rate_now: Optional[Tuple[float, float]] = None

    # feeding -----------------------------------------------------------------
    def feed_sample(self, s, info: Optional[Dict[str, Any]] = None, trend: bool = True) -> None:
        self.sample = s
        self.n_samples += 1
        if info:
            self.info = dict(info)
            if info.get("watchdog"):
                self.watchdog = str(info["watchdog"])
        if self.first_t is None:
            self.first_t = s.t
        self._step_start.setdefault(s.step_index, s.t)
        if trend:
            self.trend.append((s.t, s.current_a))
        elapsed = self.run_elapsed()
        if elapsed is not None:
            host = self.host_clock()
            if self._rate_ref is None:
                self._rate_ref = (host, elapsed)
            self._rate_now = (host, elapsed)

    def feed_event(self, ev: Dict[str, Any]) -> None:
        kind = ev.get("kind")
        if kind == "verdict":
            action = str(ev.get("action", ""))
            self.watchdog = "ok" if action == "continue" else action.replace("_", "-")
        elif kind == "trip":
            self.watchdog = "tripped"
        elif kind == "step" and isinstance(ev.get("index"), int):
            # the engine's step events carry the step's nominal length and label: enough
            # for a per-step progress bar when no plan was handed to the console
            self._steps_seen[ev["index"]] = ev
            if isinstance(ev.get("t"), (int, float)):
                self._step_start[ev["index"]] = float(ev["t"])
        if kind in NOTABLE:
            self.events.append(ev)

    # progress ------------------------------------------------------------------
    def run_elapsed(self) -> Optional[float]:
        """Position in the plan: the engine's figure when it gives one, else (``watch``,
        reading files) the same sum made from the steps' nominal lengths (plan or step
        events) and the time into the current step; the run time when neither is known."""
        if "run_elapsed_s" in self.info:
            return float(self.info["run_elapsed_s"])
        s = self.sample
        if s is None or self.first_t is None:
            return None
        before = []
        for k in range(s.step_index):
            d = self._plan_step(k).get("duration_s")
            if not isinstance(d, (int, float)):
                break
            before.append(float(d))
        if len(before) == s.step_index and s.step_index in self._step_start:
            return sum(before) + max(0.0, s.t - self._step_start[s.step_index])
        return s.t - self.first_t

    def run_time(self) -> Optional[float]:
        """Time the run has actually taken so far (sample time since the first sample).
        ``run_elapsed`` is the position in the plan instead: finished steps count at their
        nominal length (a wait that ended early counts its whole timeout)."""
        if self.sample is not None and self.first_t is not None:
            return self.sample.t - self.first_t
        return None

    def run_duration(self) -> Optional[float]:
        if "run_duration_s" in self.info:
            return float(self.info["run_duration_s"])
        d = self.plan.get("duration_s")
        return float(d) if isinstance(d, (int, float)) else None

    def _plan_step(self, index: int) -> Dict[str, Any]:
        for st in self.plan.get("steps") or ():
            if isinstance(st, dict) and st.get("index") == index:
                return st
        return self._steps_seen.get(index, {})

    def step(self) -> Tuple[str, Optional[float], Optional[float], Optional[int], Optional[int]]:
        """(label, elapsed, duration, number (1-based), count)."""
        s = self.sample
        if s is None:
            return ("", None, None, None, None)
        ps = self._plan_step(s.step_index)
        label = str(self.info.get("step_label") or ps.get("label") or s.step_kind or "")
        label = _strip_number(label, s.step_index + 1)
        elapsed = self.info.get("step_elapsed_s")
        if elapsed is None:
            elapsed = s.t - self._step_start.get(s.step_index, s.t)
        duration = self.info.get("step_duration_s", ps.get("duration_s"))
        count = self.info.get("step_count")
        if count is None and self.plan.get("steps"):
            count = len(self.plan["steps"])
        return (label, elapsed, duration, s.step_index + 1, count)

    def eta_s(self) -> Optional[float]:
        """Remaining real seconds, from how fast plan time advanced in real time."""
        total, elapsed = self.run_duration(), self.run_elapsed()
        if self.ended is not None or total is None or elapsed is None or self._rate_ref is None or self._rate_now is None:
            return None
        dh = self._rate_now[0] - self._rate_ref[0]
        de = self._rate_now[1] - self._rate_ref[1]
        if dh <= 0 or de <= 0:
            return None
        return max(0.0, total - elapsed) * dh / de

    def ln_i_trend(self) -> str:
        pts = self.trend.copy()
        if not pts:
            return ""
        t_end = pts[-1][0]
        vals = [math.log(i) if (i == i and i > 0) else math.nan
                for t, i in pts if t >= t_end - self.trend_window_s]
        return sparkline(vals, self.trend_width)

    # rendering -------------------------------------------------------------------
    def readings(self) -> Dict[str, str]:
        s = self.sample
        if s is None:
            return {}
        v, i = s.voltage_v, s.current_a
        p = v * i if (math.isfinite(v) and math.isfinite(i)) else math.nan
        return {
            "V": fmt_si(v, "V", 5), "set": fmt_si(s.setpoint_v, "V", 5),
            "I": fmt_si(i, "A"), "P": fmt_si(p, "W"),
            "p": fmt_si(s.pressure_pa, "Pa", 3), "age": fmt_si(s.pressure_age_s, "s", 2),
            "flags": "|".join(s.flags),
        }

    def plain_status(self, final: bool = False) -> str:
        s = self.sample
        if s is None:
            return f"{self.title or 'run'}: no samples yet"
        r = self.readings()
        label, st_el, st_dur, num, count = self.step()
        total, el = self.run_duration(), self.run_elapsed()
        if self.ended is not None or final:
            where = ""                      # the end record / summary line says how it ended
        else:
            where = (f" plan {min(100.0, 100 * el / total):.0f}%" if total and el is not None else "")
            where += f" ETA {fmt_duration(self.eta_s())}"
        step = f"step {num}/{count or '?'} {label}".rstrip()
        flags = f" [{r['flags']}]" if r["flags"] else ""
        return (f"t={s.t:.3f}s {step} V={r['V']} I={r['I']} P={r['P']} p={r['p']} "
                f"watchdog={self.watchdog}{where}{flags}")

    def plain_snapshot(self) -> str:
        lines = [f"run: {self.title}" if self.title else "run"]
        lines.append(self.plain_status())
        tr = self.ln_i_trend()
        if tr:
            lines.append(f"ln I: {tr}")
        for ev in self.events:
            lines.append("  " + event_line(ev))
        if self.ended is not None:
            lines.append(f"ended: {self.ended.get('outcome')} (exit {self.ended.get('exit_code')}): "
                         f"{self.ended.get('reason', '')}")
        else:
            lines.append("in progress (no end record yet)")
        return "\n".join(lines)

    def renderable(self):
        from rich.console import Group
        from rich.progress_bar import ProgressBar
        from rich.table import Table
        from rich.text import Text

        wd_style = {"ok": "green", "hold": "yellow", "back-off": "yellow"}.get(self.watchdog, "bold red")
        head = Text.assemble(("fieldrun ", "bold"), (self.title or "", "cyan"), "  watchdog: ",
                             (self.watchdog, wd_style))
        grid = Table.grid(padding=(0, 1))
        grid.add_column(justify="right", style="bold")
        grid.add_column()
        grid.add_column()
        total, el = self.run_duration(), self.run_elapsed()
        ran = self.run_time()
        # the bar is the position in the plan (finished steps at their nominal length, a
        # wait or condition step's timeout included); the time beside it is what the run
        # has really taken, which is shorter when steps end early
        if total:
            done = min(el or 0.0, total)
            grid.add_row("run", ProgressBar(total=total, completed=done, width=30),
                         f"{100 * done / total:3.0f}% of plan  {fmt_duration(ran)} run "
                         f"(plan {fmt_duration(total)} nominal)  ETA {fmt_duration(self.eta_s())}")
        elif ran is not None:
            grid.add_row("run", "", f"{fmt_duration(ran)} run")
        label, st_el, st_dur, num, count = self.step()
        if num is not None:
            if st_dur:
                grid.add_row(f"step {num}/{count or '?'}",
                             ProgressBar(total=st_dur, completed=min(st_el or 0.0, st_dur), width=30),
                             f"{label}  {fmt_duration(st_el)} / {fmt_duration(st_dur)}")
            else:
                grid.add_row(f"step {num}/{count or '?'}", "", f"{label}  {fmt_duration(st_el)}")
        r = self.readings()
        if r:
            grid.add_row("V", "", f"{r['V']}  (set {r['set']})")
            grid.add_row("I", "", f"{r['I']}   P {r['P']}")
            grid.add_row("p", "", f"{r['p']}  (age {r['age']})")
            if r["flags"]:
                grid.add_row("flags", "", Text(r["flags"], style="yellow"))
            grid.add_row("ln I", "", Text(self.ln_i_trend(), style="magenta"))
        evs = Text()
        for ev in self.events:
            style = "bold red" if ev.get("kind") in ("trip", "alarm", "driver-error") else (
                "yellow" if ev.get("kind") == "verdict" else "")
            evs.append(event_line(ev) + "\n", style=style)
        parts = [head, grid]
        if evs:
            parts.append(evs)
        if self.ended is not None:
            parts.append(Text(f"ended: {self.ended.get('outcome')} (exit {self.ended.get('exit_code')})",
                              style="bold"))
        return Group(*parts)


# --------------------------------------------------------------------------- console
def rich_console(stream, force_terminal: Optional[bool] = True, width: Optional[int] = None,
                 highlight: bool = True):
    """A rich Console on ``stream`` that reports a broken pipe as BrokenPipeError.

    rich's own ``on_broken_pipe`` points the process's stdout at /dev/null and raises
    SystemExit; inside a run that would silence every later message of the process and
    could end it, so this one only raises and the console thread stops.
    """
    from rich.console import Console as RichConsole

    class _Quiet(RichConsole):
        def on_broken_pipe(self) -> None:
            self.quiet = True
            raise BrokenPipeError("console stream closed")

    return _Quiet(file=stream, force_terminal=force_terminal, width=width, highlight=highlight)


class Console:
    """Live console on its own thread. ``update`` and ``event`` never block or raise."""

    def __init__(self, *, quiet: bool = False, stream=None, refresh_hz: float = 4.0,
                 plain: Optional[bool] = None, title: str = "",
                 plan: Optional[Dict[str, Any]] = None, status_every_s: float = 5.0):
        self.quiet = quiet
        self.stream = stream if stream is not None else sys.stdout
        self.refresh_s = 1.0 / max(0.1, float(refresh_hz))
        if plain is None:
            try:
                plain = not self.stream.isatty()
            except Exception:  # noqa: BLE001 - a stream without isatty is not a terminal
                plain = True
        self.plain = plain
        self.status_every_s = status_every_s
        self.view = RunView(title=title, plan=plan)
        self._slot: Optional[Tuple[Any, Dict[str, Any]]] = None
        self._events: Deque[Dict[str, Any]] = collections.deque(maxlen=256)
        self._stop = threading.Event()
        self.stopped = threading.Event()
        self.dead = False
        self._thread: Optional[threading.Thread] = None

    # loop side -------------------------------------------------------------------
    def update(self, sample, **info: Any) -> None:
        try:
            self._slot = (sample, info)
            view = self.view
            view.trend.append((sample.t, sample.current_a))
            if view.first_t is None:
                view.first_t = sample.t
            if sample.step_index not in view._step_start:
                view._step_start[sample.step_index] = sample.t
        except Exception:  # noqa: BLE001 - the console never breaks the loop
            pass

    def event(self, ev: Dict[str, Any]) -> None:
        try:
            self._events.append(ev)
        except Exception:  # noqa: BLE001
            pass

    # lifecycle -------------------------------------------------------------------
    def start(self) -> "Console":
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="console", daemon=True)
            self._thread.start()
        return self

    def stop(self, timeout: float = 1.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)

    def __enter__(self) -> "Console":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()

    # console thread ----------------------------------------------------------------
    def _take(self) -> List[Dict[str, Any]]:
        slot, self._slot = self._slot, None
        if slot is not None:
            self.view.feed_sample(slot[0], slot[1], trend=False)
        evs = []
        while self._events:
            ev = self._events.popleft()
            self.view.feed_event(ev)
            evs.append(ev)
        return evs

    def _write(self, text: str) -> None:
        self.stream.write(text + "\n")
        self.stream.flush()

    def _run(self) -> None:
        try:
            if self.quiet:
                self._run_plain(status=False, kinds=QUIET_KINDS)
            elif self.plain:
                self._run_plain(status=True, kinds=NOTABLE)
            else:
                self._run_live()
        except BaseException:  # noqa: BLE001 - BrokenPipe, OSError, anything: the console stops
            self.dead = True
        finally:
            self.stopped.set()

    def _run_plain(self, status: bool, kinds: Sequence[str]) -> None:
        last_status = -float("inf")
        shown = -1
        while True:
            stopping = self._stop.is_set()
            for ev in self._take():
                if ev.get("kind") in kinds:
                    self._write(event_line(ev))
            fresh = self.view.n_samples != shown
            if status and self.view.sample is not None and fresh and (
                    stopping or time.monotonic() - last_status >= self.status_every_s):
                last_status = time.monotonic()
                shown = self.view.n_samples
                # the closing status comes after the run's last events but shows its last
                # sample (earlier t): say so, so it does not read as out of order
                self._write(("last sample: " if stopping else "") + self.view.plain_status(final=stopping))
            if stopping:
                return
            self._stop.wait(self.refresh_s)

    def _run_live(self) -> None:
        from rich.live import Live
        rc = rich_console(self.stream)
        live = Live(console=rc, auto_refresh=False, redirect_stdout=False,
                    redirect_stderr=False, transient=False)
        live.start()
        try:
            while True:
                stopping = self._stop.is_set()
                self._take()
                live.update(self.view.renderable(), refresh=True)
                if stopping:
                    return
                self._stop.wait(self.refresh_s)
        finally:
            try:
                live.stop()
            except Exception:  # noqa: BLE001 - the terminal may already be gone
                self.dead = True
