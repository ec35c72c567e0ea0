"""Start a run with a fault, and read what it left behind.

``start(case_dir, rig=..., inject=..., protocol=...)`` starts ``fieldrun run`` on the
simulated rig in a subprocess through ``tests.faults.launch`` (so in-process faults can be
installed) and returns the ``Popen``. ``observe(case_dir, proc)`` waits for it and
gathers the evidence the expected outcome is checked against: exit code, ``end.json``,
the events (read with ``sequencer.runfolder.RunFolder``, so "the folder reads" is part of
it), the samples, the unconfirmed mark and the alarm file.
"""
from __future__ import annotations

import errno
import json
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Dict, List, Optional

from . import rigs

BOUND_S = 90.0   # only so a broken run fails instead of hanging; never a timing assert


def start(case_dir: Path, *, rig: Optional[Dict[str, Any]] = None,
          inject: Optional[Dict[str, Any]] = None, protocol: Optional[str] = None,
          dwell: str = "60 s", args: Optional[List[str]] = None) -> subprocess.Popen:
    case_dir = Path(case_dir)
    case_dir.mkdir(parents=True, exist_ok=True)
    rig_path = rigs.write_rig(case_dir, **(rig or {}))
    proto_path = rigs.write_protocol(case_dir, protocol, dwell=dwell)
    cmd = [sys.executable, "-m", "tests.faults.launch", json.dumps(inject or {}), "--",
           "run", str(proto_path), "--rig", str(rig_path), "--quiet", "--no-report",
           "--runs-dir", str(case_dir / "runs"), *(args or [])]
    return popen(cmd)


def popen(cmd: List[str]) -> subprocess.Popen:
    """Start ``cmd``; a failure of the host to spawn it (EAGAIN/EFAULT/ENOMEM under a
    loaded CI machine) is retried twice: it is not the fault under test."""
    for attempt in range(3):
        try:
            return subprocess.Popen(cmd, cwd=rigs.ROOT, stdout=subprocess.PIPE,
                                    stderr=subprocess.PIPE)
        except OSError as exc:
            if attempt == 2 or exc.errno not in (errno.EAGAIN, errno.EFAULT, errno.ENOMEM):
                raise
            print(f"spawn failed ({exc}); retrying", file=sys.stderr)


def run_folder(case_dir: Path) -> Optional[Path]:
    runs = Path(case_dir) / "runs"
    found = sorted(runs.iterdir()) if runs.exists() else []
    return found[0] if found else None


def events_now(case_dir: Path) -> List[Dict[str, Any]]:
    """The events written so far (a half-written last line is skipped)."""
    folder = run_folder(case_dir)
    if folder is None or not (folder / "events.jsonl").exists():
        return []
    out = []
    for line in (folder / "events.jsonl").read_text(encoding="utf-8").splitlines():
        try:
            out.append(json.loads(line))
        except ValueError:
            pass
    return out


def wait_for_event(case_dir: Path, proc: subprocess.Popen, pred, what: str) -> List[dict]:
    """Poll the run folder until an event satisfies ``pred`` (bounded, never a timing
    assert); fails if the run ends first."""
    t_end = time.monotonic() + BOUND_S
    while time.monotonic() < t_end:
        evs = events_now(case_dir)
        if any(pred(e) for e in evs):
            return evs
        if proc.poll() is not None:
            _, err = proc.communicate()
            raise AssertionError(f"run ended (exit {proc.returncode}) before {what}: "
                                 f"{err.decode(errors='replace')[-1500:]}")
        time.sleep(0.01)   # polling for the event, not a timed wait
    proc.kill()
    raise AssertionError(f"no {what} within the bound")


@dataclass
class Observed:
    exit_code: Optional[int]
    stdout: str
    stderr: str
    folder: Optional[Path]
    end: Optional[Dict[str, Any]]
    events: List[Dict[str, Any]] = field(default_factory=list)
    samples: int = 0
    mark: Optional[Dict[str, Any]] = None
    alarms: List[str] = field(default_factory=list)
    readable: bool = False
    read_error: str = ""
    statuses: set = field(default_factory=set)      # flags and step kinds seen in samples
    seqs: List[int] = field(default_factory=list)
    extra: List[str] = field(default_factory=list)    # problems a special runner found
    detail: Dict[str, Any] = field(default_factory=dict)

    def kinds(self, kind: str) -> List[Dict[str, Any]]:
        return [e for e in self.events if e.get("kind") == kind]

    def summary(self) -> str:
        if self.end is None:
            s = f"exit {self.exit_code}, no end record"
            if self.exit_code == -9:
                s = "killed (-9), no end record"
            if "supply" in self.detail:
                s += "; " + self.detail["supply"]
            elif "output confirmed off" in self.stdout:
                s += ", outcome line: output confirmed off"
            if self.readable:
                s += f", folder reads ({self.samples} samples)"
            return s
        off = "output confirmed off" if self.end.get("confirmed_off") else "output NOT confirmed off"
        s = f"exit {self.exit_code}, {off}"
        trips = [e for e in self.events if e.get("kind") == "trip" and e.get("rule")]
        if trips:
            s += f" (trip by {trips[0]['rule']})"
        elif self.end.get("outcome") in ("ramped-down", "refused", "error", "stopped"):
            s += f" ({self.end.get('outcome')})"
        if self.mark is not None:
            s += ", rig marked"
        if self.alarms:
            s += ", alarm ran"
        return s


def observe(case_dir: Path, proc: Optional[subprocess.Popen]) -> Observed:
    out = err = ""
    code = None
    if proc is not None:
        try:
            o, e = proc.communicate(timeout=BOUND_S)
        except subprocess.TimeoutExpired:
            proc.kill()
            o, e = proc.communicate()
        out, err, code = o.decode(errors="replace"), e.decode(errors="replace"), proc.returncode
    return read_back(case_dir, code, out, err)


def read_back(case_dir: Path, code, out="", err="") -> Observed:
    from sequencer import statefile
    from sequencer.runfolder import RunFolder
    case_dir = Path(case_dir)
    folder = run_folder(case_dir)
    obs = Observed(code, out, err, folder, None)
    if folder is not None:
        try:
            rf = RunFolder(folder)
            obs.end = rf.end
            obs.events = rf.events()
            cols = rf.samples()
            obs.seqs = [int(x) for x in cols.get("seq", [])]
            obs.samples = len(obs.seqs)
            for st in cols.get("status", []):
                obs.statuses.update(x for x in str(st).split("|") if x)
            obs.statuses.update(str(k) for k in cols.get("step_kind", []))
            _ = rf.manifest
            obs.readable = True
        except Exception as exc:   # noqa: BLE001 - reported as "folder does not read"
            obs.read_error = f"{type(exc).__name__}: {exc}"
    state = case_dir / "state"
    if state.exists():
        for sub in [state, *[p for p in state.iterdir() if p.is_dir()]]:
            m = statefile.read_mark(sub)
            if m is not None:
                obs.mark = m
    alarm_file = case_dir / "alarms.txt"
    if alarm_file.exists():
        obs.alarms = alarm_file.read_text(encoding="utf-8").splitlines()
    return obs


def _dwell_started(e) -> bool:
    return e.get("kind") == "step" and e.get("index") == 1


def run_cli_case(fault, case_dir: Path) -> Observed:
    """One catalogue row of runner ``cli``: start, send its signals once the dwell has
    begun (a second signal once the first has been acted on), and observe."""
    import signal as _signal
    proc = start(case_dir, rig={"quirks": fault.quirks, **fault.rig}, inject=fault.inject,
                 protocol=fault.protocol, dwell=fault.dwell, args=list(fault.args))
    for k, name in enumerate(fault.signals):
        if k == 0:
            wait_for_event(case_dir, proc, _dwell_started, "the dwell")
        else:
            wait_for_event(case_dir, proc, lambda e: e.get("kind") == "operator"
                           and e.get("action") == "stop", "the first stop")
        proc.send_signal(getattr(_signal, name))
    return observe(case_dir, proc)


def _matches(pattern: Dict[str, Any], ev: Dict[str, Any]) -> bool:
    for k, want in pattern.items():
        if k not in ev:
            return False
        got = ev[k]
        if isinstance(want, str):
            if want.lower() not in str(got).lower():
                return False
        elif got != want:
            return False
    return True


def check(fault, obs: Observed) -> List[str]:
    """What is wrong with ``obs`` against the row's expected outcome (empty: all met)."""
    bad: List[str] = list(obs.extra)
    if fault.exit is None:
        if obs.exit_code != -9:
            bad.append(f"exit {obs.exit_code}, expected killed by SIGKILL (-9)")
        if obs.end is not None:
            bad.append("a killed run has an end record")
    elif obs.exit_code != fault.exit:
        bad.append(f"exit {obs.exit_code}, expected {fault.exit}")
    if not obs.readable:
        bad.append(f"the run folder does not read: {obs.read_error or 'no folder'}")
    if fault.off is True:
        if fault.end_record:
            if obs.end is None:
                bad.append("no end record")
            elif obs.end.get("confirmed_off") is not True:
                bad.append("end record does not say confirmed_off")
            if not any(e.get("kind") == "safe-off" and e.get("confirmed") is True for e in obs.events):
                bad.append("no confirmed safe-off event")
        elif "output confirmed off" not in obs.stdout:
            bad.append("the outcome line does not say 'output confirmed off'")
        if obs.mark is not None:
            bad.append("the rig was marked unconfirmed")
        if fault.exit == 3 and not obs.alarms:
            bad.append("stopped by the watchdog but the on_trip alarm did not run")
    elif fault.off is False:
        if obs.end is None or obs.end.get("confirmed_off") is not False:
            bad.append("end record does not say confirmed_off: false")
        if obs.mark is None:
            bad.append("the rig is not marked unconfirmed")
        if not any("unsafe" in a for a in obs.alarms):
            bad.append("the unsafe alarm did not run")
    for pat in fault.names:
        if not any(_matches(pat, e) for e in obs.events):
            bad.append(f"no event matching {pat}")
    k = 0
    for pat in fault.order:
        while k < len(obs.events) and not _matches(pat, obs.events[k]):
            k += 1
        if k == len(obs.events):
            bad.append(f"events not in the expected order: none matching {pat} after the previous")
            break
        k += 1
    for text in fault.names_in_output:
        if text.lower() not in (obs.stdout + obs.stderr).lower():
            bad.append(f"the output does not name {text!r}")
    if fault.status and fault.status not in obs.statuses:
        bad.append(f"no sample carries {fault.status!r}")
    if obs.seqs and obs.seqs != list(range(len(obs.seqs))):
        bad.append("sample sequence numbers are not 0..n-1 without gaps")
    return bad
