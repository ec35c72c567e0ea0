"""Every fault the suite tries: its id, the issue item it answers (9.1 instrument faults,
9.2 fault hooks at named points, 9.3 process-level faults), how it is injected, and the
outcome expected of fieldrun, written down before the test runs.

This list is the one source of docs/fault-table.md: ``tools/fault_table.py`` joins it with
the results the tests record; a test checks the committed table matches it.

What "expected" means (issue 9, item 4, and DESIGN.md exit codes):

* ``exit``: the exit code of ``fieldrun run``;
* ``off``: True: ``end.json`` says ``confirmed_off: true`` and a confirmed ``safe-off``
  event is in the log (and, for exit 3, the on_trip alarm ran); False: exit 5, the rig is
  marked unconfirmed and the alarm ran;
  None: the process is gone with no end record (kill -9), and what the *supply* does is
  the point of the row;
* ``names``: event patterns, at least one event must match each (the event log names the
  fault): every key of the pattern must be in the event, strings as case-insensitive
  substrings;
* ``order``: event patterns that must occur in this order (e.g. a trip switches off
  before it is logged; the first Ctrl-C's stop comes before the safe-off);
* every row also needs the run folder to read with ``sequencer.runfolder.RunFolder``.

Why each expected outcome is the right one is in ``why``; where a judgement is ours
(common practice, no source) it says so.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Tuple


@dataclass(frozen=True)
class Fault:
    id: str
    item: str                 # "9.1" | "9.2" | "9.3"
    injected: str             # how, in words (the table shows it)
    exit: Optional[int]       # expected exit code (None: killed, no exit code of its own)
    off: Optional[bool]       # expected: confirmed off / unsafe (marked+alarm) / n.a.
    why: str
    names: Tuple[Dict[str, Any], ...] = ()
    outcome_note: str = ""     # for rows without an end record: what else is expected
    quirks: Optional[Dict[str, Any]] = None       # simulation.quirks of the rig
    rig: Dict[str, Any] = field(default_factory=dict)   # other rig_dict() settings
    inject: Optional[Dict[str, Any]] = None       # tests.faults.launch settings
    dwell: str = "60 s"
    signals: Tuple[str, ...] = ()                 # sent once the dwell has begun
    runner: str = "cli"                           # cli | hostloss | kill9 | powerloss | clockjump
    status: Optional[str] = None                  # a flag some sample's status must carry
    protocol: Optional[str] = None                # protocol text (default: rigs.DWELL)
    known_gap: Optional[str] = None               # expected outcome not met yet: xfail(strict)
    args: Tuple[str, ...] = ()                    # extra arguments of fieldrun run
    end_record: bool = True                       # False: the disk itself failed
    names_in_output: Tuple[str, ...] = ()         # named on stdout/stderr instead
    cost: int = 1                                 # rough real time, to start slow rows first
    order: Tuple[Dict[str, Any], ...] = ()        # event patterns that must occur in this order
    rig_kill_window: Tuple[float, float] = (0.0, 1.5)   # kill9: seeded instant in this window (s)
    kill_anchor: str = "output-on"                # kill9: the window counts from start | output-on
    hostloss: Optional[Tuple[str, Optional[str]]] = None  # hostloss: (host_loss, timeout)

    @property
    def expected_text(self) -> str:
        if self.off is None:
            return "killed, no end record; " + self.outcome_note
        if self.off:
            return f"exit {self.exit}, output confirmed off" + (", trip alarm run" if self.exit == 3 else "")
        return "exit 5, rig marked unconfirmed, alarm run"


def _hook(point, action, **kw):
    return {"hooks": [{"point": point, "action": action, **kw}]}


PACED = ("--speed", "100")

#: three single overflow readings 5 s apart: three arcs in 60 s, the bursts rule backs off
THREE_ARCS = {"ammeter": {"faults": [
    {"kind": "special-value", "match": "READ", "from_s": t, "until_s": t + 0.5,
     "value": "+9.9E37"} for t in (20.0, 25.0, 30.0)]}}   # signals need a run that lasts some real time

#: slow enough that a controlled ramp-down lasts ~0.5 s of real time at --speed 100
SIGNALS = """\
name: fault-signals
sample_period: "0.5 s"
limits:
  current_max: "80 uA"
  slew_max: "2 V/s"
steps:
  - ramp: {to: "100 V", rate: "2 V/s"}
  - dwell: {duration: "2 h"}
  - return: {rate: "2 V/s"}
"""


def _sup(*faults, **extra):
    return {"supply": {"faults": list(faults), **extra}}


def _am(*faults):
    return {"ammeter": {"faults": list(faults)}}


def _gauge(*faults):
    return {"gauge": {"faults": list(faults)}}


HIGH = """\
name: fault-high
sample_period: "0.5 s"
limits:
  current_max: "80 uA"
  slew_max: "50 V/s"
  hold_max_time: "20 s"
steps:
  - ramp: {to: "1000 V", rate: "50 V/s"}
  - dwell: {duration: "20 s"}
  - return: {rate: "50 V/s"}
"""

MID = 20.0   # simulated seconds from the stand's start: inside the dwell (ramp ends ~6 s)

FAULTS: List[Fault] = [
    # ------------------------------------------------------------- 9.1 instrument faults
    Fault("supply-reply-timeout", "9.1",
          "supply: replies 1 s late (timeout 0.25 s) for 1 s mid-dwell (quirk late-reply)",
          0, True, "a timeout makes the session untrusted; it is resynchronised and the run "
          "goes on; the late reply is never read as the next answer",
          names=({"kind": "driver-error", "where": "supply"},),
          quirks=_sup({"kind": "late-reply", "from_s": MID, "until_s": MID + 1, "delay_s": 1.0})),
    Fault("supply-never-answers", "9.1",
          "supply: from mid-dwell commands are carried out but no reply ever comes (never-answer)",
          5, False, "without a readback the output cannot be confirmed off, whatever was "
          "written: exit 5 is the honest answer",
          names=({"kind": "driver-error", "where": "supply"}, {"kind": "safe-off", "confirmed": False},
                 {"kind": "alarm"}),
          cost=5, rig={"timeout_s": 0.1}, quirks=_sup({"kind": "never-answer", "from_s": MID}),
          order=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"})),
    Fault("supply-hangs", "9.1",
          "supply: wedged firmware from mid-dwell, nothing carried out, nothing answered (hang)",
          5, False, "the output stays on and nothing can confirm it off: exit 5, mark, alarm",
          names=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"}),
          cost=5, rig={"timeout_s": 0.1}, quirks=_sup({"kind": "hang", "from_s": MID}),
          order=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"})),
    Fault("supply-drops-connection", "9.1",
          "supply: drops the connection on every command for 3 s mid-dwell (drop-connection)",
          3, True, "no voltage readback for longer than stale_time trips; safe_off reopens "
          "the session once the supply is back",
          names=({"kind": "driver-error", "where": "supply"},),
          quirks=_sup({"kind": "drop-connection", "from_s": MID, "until_s": MID + 3}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("ammeter-drops-connection", "9.1",
          "ammeter: drops the connection from mid-dwell on (drop-connection)",
          3, True, "no valid current for longer than stale_time trips (common practice, no source)",
          names=({"kind": "driver-error", "where": "ammeter"}, {"kind": "trip"}),
          quirks=_am({"kind": "drop-connection", "from_s": MID}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("ammeter-late-replies", "9.1",
          "ammeter: a third of its replies 1 s late for 3 s mid-dwell (late-reply, probability 0.33)",
          0, True, "each late reply is a timeout and an invalid sample; the session is "
          "resynchronised, and a few invalid samples under stale_time do not stop the run",
          names=({"kind": "driver-error", "where": "ammeter"},),
          quirks=_am({"kind": "late-reply", "from_s": MID, "until_s": MID + 3,
                      "probability": 0.33, "delay_s": 1.0})),
    Fault("ammeter-garbage", "9.1",
          "ammeter: its readings replaced by seeded junk for 1.2 s mid-dwell (garbage)",
          0, True, "junk is a driver error and an invalid sample, never a number",
          names=({"kind": "driver-error", "where": "ammeter"},),
          quirks=_am({"kind": "garbage", "match": "READ", "from_s": MID, "until_s": MID + 1.2})),
    Fault("ammeter-truncated", "9.1",
          "ammeter: readings cut short for 1.2 s mid-dwell (truncated)",
          0, True, "a reply cut before its exponent (5.17E-09 -> 5.17) is a number the "
          "instrument cannot have measured on its range (it would answer +9.9E37): the driver "
          "flags it invalid, never a current; 1.2 s of them is shorter than stale_time (2 s), "
          "so the run goes on",
          status="invalid",
          quirks=_am({"kind": "truncated", "match": "READ", "from_s": MID, "until_s": MID + 1.2})),
    Fault("ammeter-overflow-value", "9.1",
          "ammeter: one reading +9.9E37 mid-dwell (special-value; SCPI-99 vol. 1, 7.2.1.5)",
          0, True, "an overflow is flagged, never a number; one counts as one arc (a spike) "
          "and a single spike does not stop a run",
          status="overflow",
          quirks=_am({"kind": "special-value", "match": "READ", "from_s": MID,
                      "until_s": MID + 0.5, "value": "+9.9E37"})),
    Fault("ammeter-negative-overflow", "9.1",
          "ammeter: one reading -9.9E37 mid-dwell (special-value)",
          0, True, "flagged as a negative overflow, never read as -9.9E37 A",
          status="overflow",
          quirks=_am({"kind": "special-value", "match": "READ", "from_s": MID,
                      "until_s": MID + 0.5, "value": "-9.9E37"})),
    Fault("ammeter-stuck-overflow", "9.1",
          "ammeter: every reading +9.9E37 from mid-dwell on, on the 20 nA range (special-value)",
          3, True, "no valid ammeter current for longer than stale_time should trip "
          "(issue 5: stale or invalid readings beyond a set time)",
          names=({"kind": "trip", "rule": "staleness", "message": "over range"},),
          quirks=_am({"kind": "special-value", "match": "READ", "from_s": MID, "value": "+9.9E37"}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("ammeter-nan-value", "9.1",
          "ammeter: readings 9.91E37 (not a number) for 3 s mid-dwell (special-value)",
          3, True, "NaN readings are invalid; beyond stale_time they trip",
          names=({"kind": "trip"},),
          quirks=_am({"kind": "special-value", "match": "READ", "from_s": MID,
                      "until_s": MID + 3, "value": "9.91E37"}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("supply-ignores-output-off", "9.1",
          "supply: accepts OUTP OFF and keeps its output on (ignore-output-off)",
          5, False, "safe_off escalates (device clear, reopen, re-identify) and cannot confirm: "
          "exit 5, mark, alarm",
          names=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"}),
          quirks=_sup({"kind": "ignore-output-off"}),
          order=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"})),
    Fault("supply-lies-about-output", "9.1",
          "supply: keeps its output on after OUTP OFF and answers OUTP? with 0 (ignore-output-off, "
          "lie); SIGTERM mid-dwell at 300 V",
          4, True, "the 0 V that safe_off also writes takes the output down and the measured "
          "voltage, read back below the dialect's threshold, is what confirms it, not the flag",
          names=({"kind": "safe-off", "confirmed": True},),
          signals=("SIGTERM",),
          quirks=_sup({"kind": "ignore-output-off", "lie": True})),
    Fault("supply-drifts", "9.1",
          "supply: output drifts off its setpoint at 5 V/s from mid-dwell (drift)",
          3, True, "the drift raises the current at a constant setpoint: the first rule to see "
          "it (runaway, or the supply not following its setpoint; issue 5, item 3) trips",
          names=({"kind": "trip"},),
          quirks=_sup({"kind": "drift", "from_s": MID, "rate_v_per_s": 5.0, "max_v": 80.0}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("slow-instrument-misses-deadline", "9.1",
          "supply: every reply 0.2 s late (slow), so one sample's I/O outlasts the 0.5 s period",
          0, True, "a missed deadline is logged and skipped, never caught up in a burst",
          names=({"kind": "missed-cycle"},),
          quirks=_sup({"kind": "slow", "from_s": MID, "until_s": MID + 4, "delay_s": 0.2})),
    Fault("gauge-stops-answering", "9.1",
          "gauge: no reply from mid-dwell on (never-answer)",
          3, True, "a pressure older than stale_time is unknown, and unknown pressure trips",
          names=({"kind": "trip", "rule": "gauge_unknown"},),
          quirks=_gauge({"kind": "never-answer", "from_s": MID}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("gauge-filament-off", "9.1",
          "gauge: filament goes out mid-dwell (filament-off)",
          3, True, "a gauge reporting an unknown pressure trips (issue 5, item 3)",
          names=({"kind": "trip"},),
          quirks=_gauge({"kind": "filament-off", "from_s": MID}),
          order=({"kind": "safe-off", "confirmed": True}, {"kind": "trip"})),
    Fault("gauge-filament-off-at-arm", "9.1",
          "gauge: filament off from the start (filament-off)",
          2, True, "arming needs a fresh valid reading below the arm ceiling: refused before "
          "the output went on",
          names=({"kind": "note", "message": "refused"},),
          quirks=_gauge({"kind": "filament-off"})),
    Fault("ammeter-left-shorted", "9.1",
          "ammeter: input short cannot be lifted (left-shorted)",
          2, True, "the configuration read back at arm shows the input shorted: refused",
          names=({"kind": "note", "message": "short"},),
          quirks=_am({"kind": "left-shorted"})),
    Fault("ammeter-left-shorted-lying", "9.1",
          "ammeter: input shorted and SYST:ZCH? answers 0 (left-shorted, lie); ramp to 1 kV",
          3, True, "it reads no current where the fibre emits microamps: the plausibility rule "
          "(voltage raised with no current response) holds, the ammeter and the supply's "
          "monitor disagree; the run must end off",
          names=({"kind": "verdict", "rule": "monitor_disagree"},),
          protocol=HIGH,
          quirks=_am({"kind": "left-shorted", "lie": True})),
    Fault("supply-error-queue-never-empties", "9.1",
          "supply: SYST:ERR? never answers 0,\"No error\" (never-empty-errors)",
          2, True, "the error-queue drain is bounded and a queue that never empties refuses arm",
          names=({"kind": "note", "message": "refused"},),
          quirks=_sup({"kind": "never-empty-errors"})),
]

FAULTS += [
    # ------------------------------------------------------------- 9.2 named fault hooks
    Fault("hook-safe-off-raises-once", "9.2",
          "drivers.hooks: an exception inside safe_off() between OUTP OFF and 0 V, once",
          0, True, "the engine retries safe_off() through a fresh session, which confirms; "
          "the run's own outcome (completed) stands",
          names=({"kind": "safe-off", "confirmed": False}, {"kind": "safe-off", "source": "fresh"}),
          inject=_hook("supply.safe_off.after-output-off", "raise-runtime", times=1), dwell="10 s",
          order=({"kind": "safe-off", "confirmed": False}, {"kind": "safe-off", "confirmed": True, "source": "fresh"})),
    Fault("hook-safe-off-always-raises", "9.2",
          "drivers.hooks: an exception before every readback of safe_off(), every session",
          5, False, "nothing can confirm the output off: exit 5, rig marked, alarm",
          names=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"}),
          inject=_hook("supply.safe_off.before-confirm", "raise-runtime", times=0), dwell="10 s",
          order=({"kind": "safe-off", "confirmed": False}, {"kind": "alarm"})),
    Fault("hook-ctrl-c-twice-inside-safe-off", "9.2",
          "drivers.hooks: SIGINT twice inside safe_off(), after 0 V is written",
          0, True, "signal handlers only set flags: a safe-off already running is never "
          "aborted (issue 5, item 5)",
          names=({"kind": "safe-off", "confirmed": True},),
          inject=_hook("supply.safe_off.after-zero-volts", "signal", signal="SIGINT", repeat=2),
          dwell="10 s"),
    Fault("hook-exception-after-output-on", "9.2",
          "drivers.hooks: an exception between output-on and the first sample",
          1, True, "an unexpected exception switches off first, then is reported",
          names=({"kind": "note", "message": "unexpected exception"},),
          inject=_hook("engine.after-output-on", "raise-runtime"),
          order=({"message": "output on"}, {"kind": "safe-off", "confirmed": True}, {"message": "unexpected exception"})),
    Fault("hook-driver-error-during-arm", "9.2",
          "drivers.hooks: a DriverError as arming begins",
          2, True, "refused before the output went on (DESIGN.md exit 2); safe_off() still "
          "runs and confirms",
          names=({"kind": "note", "message": "injected driver fault"},),
          inject=_hook("engine.arm", "raise-driver-error")),
    Fault("hook-sigterm-during-arm", "9.2",
          "drivers.hooks: SIGTERM as arming begins",
          4, True, "the flag is seen at the first sample: off at once, exit 4",
          names=({"kind": "note", "message": "SIGTERM"},),
          inject=_hook("engine.arm", "signal", signal="SIGTERM")),
    Fault("hook-exception-during-back-off", "9.2",
          "drivers.hooks: an exception as a back-off is applied (three arcs in 10 s: "
          "ammeter +9.9E37 at 20, 25 and 30 s)",
          1, True, "switched off first, reported after",
          names=({"kind": "verdict", "action": "back_off"}, {"kind": "note", "message": "unexpected exception"}),
          quirks=THREE_ARCS, inject=_hook("engine.back-off", "raise-runtime"),
          order=({"kind": "verdict", "action": "back_off"}, {"kind": "safe-off", "confirmed": True}, {"message": "unexpected exception"})),
    Fault("hook-ctrl-c-during-back-off", "9.2",
          "drivers.hooks: SIGINT as a back-off is applied (the same three arcs)",
          4, True, "the first Ctrl-C ramps down under control, then off",
          names=({"kind": "verdict", "action": "back_off"}, {"kind": "operator", "action": "stop"}),
          status="ramp-down",
          quirks=THREE_ARCS, inject=_hook("engine.back-off", "signal", signal="SIGINT"),
          order=({"kind": "verdict", "action": "back_off"}, {"kind": "operator", "action": "stop"}, {"kind": "safe-off", "confirmed": True})),
    # ------------------------------------------------------------- 9.3 process-level faults
    Fault("sigint-once", "9.3", "SIGINT once mid-dwell (--speed 100)",
          4, True, "the first Ctrl-C ramps down under control, then switches off",
          names=({"kind": "operator", "action": "stop"},), status="ramp-down",
          signals=("SIGINT",), protocol=SIGNALS, args=PACED,
          order=({"kind": "operator", "action": "stop"}, {"kind": "safe-off", "confirmed": True})),
    Fault("sigint-twice", "9.3", "SIGINT, and again once the ramp-down has begun",
          4, True, "the second Ctrl-C switches off at once, before the ramp-down ends",
          names=({"kind": "operator", "action": "stop"}, {"message": "second Ctrl-C"}),
          signals=("SIGINT", "SIGINT"), protocol=SIGNALS, args=PACED,
          order=({"kind": "operator", "action": "stop"}, {"kind": "safe-off", "confirmed": True}, {"message": "second Ctrl-C"})),
    Fault("sigterm", "9.3", "SIGTERM mid-dwell",
          4, True, "off at once", names=({"message": "SIGTERM"},),
          signals=("SIGTERM",), protocol=SIGNALS, args=PACED),
    Fault("sighup", "9.3", "SIGHUP mid-dwell (the terminal went away)",
          4, True, "off at once", names=({"message": "SIGHUP"},),
          signals=("SIGHUP",), protocol=SIGNALS, args=PACED),
    Fault("driver-exception-ammeter", "9.3",
          "a RuntimeError raised inside ScpiAmmeter.read from its 60th call",
          1, True, "an unexpected exception switches off first, then is reported",
          names=({"kind": "note", "message": "RuntimeError"},),
          inject={"raise_in": {"target": "drivers.ammeter:ScpiAmmeter.read", "after_calls": 60}},
          order=({"kind": "safe-off", "confirmed": True}, {"message": "unexpected exception"})),
    Fault("driver-exception-supply", "9.3",
          "a ZeroDivisionError raised inside ScpiSupply.measure_current from its 40th call",
          1, True, "safe_off() does not depend on the broken method: confirmed off",
          names=({"kind": "note", "message": "ZeroDivisionError"},),
          inject={"raise_in": {"target": "drivers.supply:ScpiSupply.measure_current",
                               "after_calls": 40, "error": "ZeroDivisionError"}}),
    Fault("disk-full", "9.3",
          "the recorder's writes fail with ENOSPC after 15 kB (injected FileOps)",
          3, True, "a full disk ramps the run down and says why (issue 6, item 1); the end "
          "record cannot be written on a full disk, so the outcome line says it; samples "
          "written before it stay readable",
          names_in_output=("recorder", "No space left"), end_record=False,
          inject={"disk": {"kind": "enospc", "after_bytes": 15000, "op": "write"}}),
    Fault("disk-fsync-fails", "9.3",
          "every fsync of the run folder fails with EIO after 20 kB (a dying disk)",
          3, True, "the recorder reports the failure and the run ramps down; the outcome line "
          "says the output was confirmed off",
          names=({"kind": "alarm", "what": "recorder-failed"},),
          names_in_output=("recorder",), end_record=False,
          inject={"disk": {"kind": "eio", "after_bytes": 20000, "op": "fsync"}}),
]

FAULTS += [
    Fault(f"kill-9-instant-{k}", "9.3",
          f"kill -9 of the whole fieldrun run process at a seeded instant ({k} of 6): "
          + ("0-1.5 s after it started (start-up, arming)" if k <= 2 else
             "0-1.5 s after the output went on (ramp, dwell; --speed 100)"),
          None, None, "a folder without end.json is incomplete, whatever killed it (issue 6)",
          outcome_note="whatever folder exists reads, samples numbered without gaps",
          runner="kill9", protocol=SIGNALS, args=PACED,
          kill_anchor="start" if k <= 2 else "output-on")
    for k in range(1, 7)
] + [
    Fault("power-loss", "9.3",
          "kill -9 mid-dwell, then samples.csv and events.jsonl truncated to their last "
          "fsync (a power cut)",
          None, None, "everything fsynced survives",
          outcome_note="the folder reads, each file ends on a whole line, every sample up "
                       "to the last fsync is there",
          runner="powerloss", protocol=SIGNALS, args=PACED,
          inject={"recorder": {"fsync_interval_s": 0.05}}),
    Fault("wall-clock-jumps-forward", "9.3",
          "the host's wall clock jumps +1 h once the output is on (time.time patched)",
          0, True, "the run's times come from the monotonic (here virtual) clock, its UTC "
          "offset fixed at start; the periodic clock events show the host's jump",
          names=({"kind": "clock"},), runner="clockjump", dwell="20 s", args=("--speed", "100"),
          inject={"hooks": [{"point": "engine.after-output-on", "action": "clock-jump",
                             "jump_s": 3600.0}],
                  "recorder": {"offset_interval_s": 0.05}}),
    Fault("wall-clock-jumps-back", "9.3",
          "the host's wall clock jumps -1 h once the output is on",
          0, True, "as forward: sample times and UTC stamps never run backwards",
          names=({"kind": "clock"},), runner="clockjump", dwell="20 s", args=("--speed", "100"),
          inject={"hooks": [{"point": "engine.after-output-on", "action": "clock-jump",
                             "jump_s": -3600.0}],
                  "recorder": {"offset_interval_s": 0.05}}),
    Fault("host-loss-no-comm-timeout", "9.1",
          "instruments served on 127.0.0.1 by another process; the run (host_loss: none) "
          "killed -9 mid-dwell at 200 V",
          None, None, "what host loss really does",
          outcome_note="the supply KEEPS ITS OUTPUT at the dwell voltage: only hardware "
                       "(interlock, comm timeout, heartbeat relay) can save this case",
          runner="hostloss", hostloss=("none", None), cost=3),
    Fault("host-loss-comm-timeout-armed", "9.1",
          "as above, with host_loss: supply-timeout (1 s) armed by fieldrun at arm",
          None, None, "the supply's own comm timeout switches it off",
          outcome_note="the supply switches its output off by itself after 1 s of silence "
                       "(STAT:QUES bit 11)",
          runner="hostloss", hostloss=("supply-timeout", "1 s"), cost=3),
]
