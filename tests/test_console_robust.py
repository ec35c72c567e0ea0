"""The console: never raises into the loop, never blocks it, dies quietly with its
terminal; shows what the run is doing.

A dead terminal is modelled by a stream whose write raises BrokenPipeError (EPIPE, what
writing to a closed pipe gives: POSIX write(2)) or OSError(EIO) (a hung-up terminal).
"""
import errno
import io
import math
import threading

import pytest

from sequencer.console import Console, RunView, event_line, fmt_duration, sparkline
from sequencer.sample import Sample

from recorder_stream import stream_event, stream_sample

GUARD = 10.0


class DeadStream:
    def __init__(self, exc, tty):
        self.exc, self.tty, self.calls = exc, tty, 0

    def isatty(self):
        return self.tty

    def write(self, text):
        self.calls += 1
        raise self.exc

    def flush(self):
        raise self.exc


class GatedStream(io.StringIO):
    """A terminal that hangs: every write waits for the gate."""

    def __init__(self):
        super().__init__()
        self.gate = threading.Event()

    def isatty(self):
        return False

    def write(self, text):
        self.gate.wait(GUARD)
        return super().write(text)


@pytest.mark.parametrize("exc", [BrokenPipeError(errno.EPIPE, "Broken pipe"),
                                 OSError(errno.EIO, "Input/output error")])
@pytest.mark.parametrize("mode", ["live", "plain", "quiet"])
def test_dead_terminal_stops_the_console_and_never_raises(exc, mode):
    stream = DeadStream(exc, tty=(mode == "live"))
    con = Console(stream=stream, plain={"live": False, "plain": True, "quiet": None}[mode],
                  quiet=(mode == "quiet"), refresh_hz=50, status_every_s=0.0)
    con.start()
    for k in range(300):              # the loop keeps feeding; nothing comes back at it
        con.update(stream_sample(k), watchdog="ok")
        con.event({"kind": "trip", "t": k * 1e-3, "action": "trip", "rule": "arc",
                   "value": 1e-3, "threshold": 1e-4, "unit": "A", "message": "arc"})
        if con.stopped.is_set():
            break
    assert con.stopped.wait(GUARD)
    assert con.dead and stream.calls >= 1
    con.update(stream_sample(0))       # after death: still no exception
    con.event({"kind": "note"})
    con.stop()


def test_a_hung_terminal_never_blocks_update_or_event():
    stream = GatedStream()
    con = Console(stream=stream, plain=True, refresh_hz=50, status_every_s=0.0)
    con.start()
    n = 20000
    for k in range(n):                 # expected: all return although the writer hangs
        con.update(stream_sample(k))
        con.event(stream_event(k))
    assert con.view.trend.maxlen < n and len(con._events) <= con._events.maxlen
    stream.gate.set()
    con.stop(timeout=GUARD)
    assert con.stopped.wait(GUARD) and not con.dead


def test_plain_lines_carry_events_in_order_and_a_status_line():
    out = io.StringIO()
    con = Console(stream=out, refresh_hz=50, status_every_s=0.0, title="KL-F12 conditioning")
    assert con.plain                   # a StringIO is not a terminal
    con.start()
    s = Sample(seq=1, t=12.5, utc=1.8e9, setpoint_v=1500.0, voltage_v=1499.5,
               gap_voltage_v=1499.0, current_a=2.0e-6, pressure_pa=3.1e-6, step_index=2,
               step_kind="hold")
    con.event({"kind": "step", "t": 10.0, "index": 2, "label": "hold at 1.5 kV"})
    con.event({"kind": "verdict", "t": 12.0, "action": "hold", "rule": "pressure-rise",
               "value": 3.1e-6, "threshold": 3e-6, "unit": "Pa", "message": "pressure rising"})
    con.event({"kind": "clock", "t": 12.2})           # not shown: bookkeeping only
    con.update(s, watchdog="hold")
    con.stop(timeout=GUARD)
    text = out.getvalue()
    step_at = text.index("[t=10.000s] step 3 hold at 1.5 kV")
    verdict_at = text.index("verdict: hold by pressure-rise: pressure rising "
                            "(seen 3.1e-06 Pa, threshold 3e-06 Pa)")
    assert step_at < verdict_at
    assert "clock" not in text
    # P = V I = 1499.5 V x 2.0e-6 A = 2.999e-3 W (Joule: power is voltage times current)
    assert "V=1499.5 V I=2e-06 A P=0.002999 W p=3.1e-06 Pa watchdog=hold" in text


def test_quiet_shows_only_what_needs_a_person():
    out = io.StringIO()
    con = Console(stream=out, quiet=True, refresh_hz=50)
    con.start()
    con.update(stream_sample(3))
    con.event({"kind": "verdict", "t": 1.0, "action": "hold", "rule": "r", "message": "m"})
    con.event({"kind": "trip", "t": 2.0, "action": "trip", "rule": "arc", "value": 1e-3,
               "threshold": 1e-4, "unit": "A", "message": "arc detected"})
    con.stop(timeout=GUARD)
    lines = out.getvalue().splitlines()
    assert len(lines) == 1 and lines[0].startswith("[t=2.000s] trip: trip by arc: arc detected")


def test_live_view_renders_progress_and_trend_on_a_terminal():
    from rich.console import Console as RichConsole
    view = RunView(title="KL-F12", plan={"duration_s": 100.0, "steps": [
        {"index": 0, "kind": "ramp", "label": "ramp to 2 kV", "duration_s": 40.0},
        {"index": 1, "kind": "hold", "label": "hold", "duration_s": 60.0}]})
    for k in range(50):
        view.feed_sample(Sample(seq=k, t=float(k), utc=1.8e9 + k, setpoint_v=50.0 * k,
                                voltage_v=50.0 * k, gap_voltage_v=50.0 * k,
                                current_a=1e-12 * math.exp(k / 5), step_index=k // 40,
                                step_kind="ramp" if k < 40 else "hold"))
    buf = io.StringIO()
    RichConsole(file=buf, width=100, force_terminal=False).print(view.renderable())
    text = buf.getvalue()
    assert "step 2/2" in text and " 49% of plan" in text and "49s run (plan 1m40s nominal)" in text
    assert view.ln_i_trend()[-1] == "█" and view.ln_i_trend()[0] == "▁"   # ln I rises


def test_run_time_is_shown_apart_from_the_plan_position():
    # set: a 300 s wait (timeout) that ended after 10 s, then 20 s into a 100 s ramp; the
    # engine reports the plan position 300 + 20 = 320 s of 400 s nominal (finished steps
    # count whole), the samples say 30 s have run. Expected: the bar at 80 % of the plan,
    # the time shown is the 30 s that really ran, not 5m20s.
    from rich.console import Console as RichConsole
    view = RunView(plan={"duration_s": 400.0})
    for t in (0.0, 30.0):
        view.feed_sample(Sample(seq=int(t), t=t, utc=0.0, setpoint_v=100.0, voltage_v=100.0,
                                gap_voltage_v=100.0, current_a=1e-9, step_index=1, step_kind="ramp"),
                         {"run_elapsed_s": 320.0 if t else 0.0, "run_duration_s": 400.0})
    buf = io.StringIO()
    RichConsole(file=buf, width=120, force_terminal=False).print(view.renderable())
    text = buf.getvalue()
    assert " 80% of plan  30s run (plan 6m40s nominal)" in text
    assert "5m20s" not in text
    assert "plan 80% ETA" in view.plain_status()
    assert "plan 80%" not in view.plain_status(final=True)     # the closing line of a run
    view.ended = {"outcome": "completed", "exit_code": 0}
    assert "plan 80%" not in view.plain_status() and "ETA" not in view.plain_status()


def test_watch_counts_the_plan_position_as_the_engine_does():
    # set (what `watch` has: files, no engine info): step events say step 1 (wait, 300 s
    # nominal) began at t=0 and step 2 (ramp, 100 s) at t=10 s; a sample at t=30 s.
    # Expected: plan position 300 + 20 = 320 s, as the engine reports it (finished steps
    # count at their nominal length), not the 30 s that ran.
    view = RunView()
    view.feed_event({"kind": "step", "t": 0.0, "index": 0, "label": "1 wait", "duration_s": 300.0})
    view.feed_event({"kind": "step", "t": 10.0, "index": 1, "label": "2 ramp", "duration_s": 100.0})
    for t, k in ((0.0, 0), (30.0, 1)):
        view.feed_sample(Sample(seq=int(t), t=t, utc=0.0, setpoint_v=0.0, voltage_v=0.0,
                                gap_voltage_v=0.0, current_a=1e-9, step_index=k, step_kind="ramp"))
    assert view.run_elapsed() == pytest.approx(320.0)
    assert view.run_time() == pytest.approx(30.0)


def test_step_progress_from_the_engines_step_events_without_a_plan():
    # set: no plan given; a step event (index 1, nominal 60 s, label "2 ramp") at t=40 s,
    # then a sample at t=55 s; expected: step 2, 15 s of 60 s, label without the number
    view = RunView()
    view.feed_event({"kind": "step", "t": 40.0, "index": 1, "step_kind": "ramp",
                     "label": "2 ramp", "duration_s": 60.0})
    view.feed_sample(Sample(seq=9, t=55.0, utc=0.0, setpoint_v=100.0, voltage_v=100.0,
                            gap_voltage_v=100.0, current_a=1e-9, step_index=1, step_kind="ramp"))
    assert view.step() == ("ramp", 15.0, 60.0, 2, None)


def test_eta_follows_how_fast_plan_time_runs_in_real_time():
    # set: plan time advances 10 s per host second (as with --speed 10); 100 s of 300 s
    # done; expected ETA = 200 s of plan / 10 = 20 s of real time
    host = [0.0]
    view = RunView(plan={"duration_s": 300.0}, host_clock=lambda: host[0])
    for k in range(11):
        host[0] = k * 1.0
        view.feed_sample(Sample(seq=k, t=10.0 * k, utc=0.0, setpoint_v=0.0, voltage_v=0.0,
                                gap_voltage_v=0.0, current_a=1e-9))
    assert view.eta_s() == pytest.approx(20.0)
    assert fmt_duration(view.eta_s()) == "20s" and fmt_duration(3725) == "1h02m05s"


def test_sparkline_levels():
    assert sparkline(list(range(8))) == "▁▂▃▄▅▆▇█"          # one column per value
    assert sparkline([5.0, 5.0, 5.0]) == "▅▅▅"             # flat: the middle block
    assert sparkline([0.0, math.nan, 1.0]) == "▁ █"         # unknown stays blank
    assert sparkline([]) == "" and len(sparkline(list(range(1000)), 40)) == 40


def test_event_line_without_numbers_still_reads():
    assert event_line({"kind": "verdict", "t": 1.0, "action": "hold", "rule": "slope",
                       "value": None, "threshold": None, "message": "m"}) == \
        "[t=1.000s] verdict: hold by slope: m (seen --, threshold --)"
    assert event_line({"kind": "verdict", "t": 3.0, "action": "continue", "rule": ""}) == \
        "[t=3.000s] verdict: continue"
    assert event_line({"kind": "operator", "t": 2.0, "message": "ctl stop"}) == \
        "[t=2.000s] operator: ctl stop"


def test_an_action_reads_as_words_in_event_lines():
    # the watchdog's action names are identifiers (back_off, ramp_down); a log line says
    # them as words, as the live view's "watchdog: back-off" does
    line = event_line({"kind": "verdict", "t": 1793.245, "action": "back_off", "rule": "bursts",
                       "value": 3, "threshold": 3, "unit": "", "message": "3 spikes within 60 s"})
    assert line == "[t=1793.245s] verdict: back off by bursts: 3 spikes within 60 s (seen 3, threshold 3)"
