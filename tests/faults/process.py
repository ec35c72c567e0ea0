"""Runners of the process-level rows that need more than "start, signal, observe":
kill -9 at seeded instants, power loss (files truncated to their last fsync), the wall
clock jumping, and host loss with the simulated instruments in *another* process than
``fieldrun run`` (served on 127.0.0.1 by ``sim-serve``'s ``start``), so killing the run
leaves the supply behind exactly as a dead host leaves a real one.

Every random instant comes from ``numpy.random.default_rng(SEED)`` and is printed.
"""
from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any, Dict, List

import numpy as np

from . import outcome, rigs

SEED = 20261201


def _rng(fault) -> np.random.Generator:
    import zlib
    seed = [SEED, zlib.crc32(fault.id.encode())]
    print(f"fault {fault.id}: seed {seed}", file=sys.stderr)
    return np.random.default_rng(seed)


def _dwell(e) -> bool:
    return e.get("kind") == "step" and e.get("index") == 1


def run_kill9(fault, case_dir: Path) -> outcome.Observed:
    """``kill -9`` at a seeded instant of real time after the process started (anywhere
    from start-up to mid-dwell). Expected: no end record (a killed run is incomplete,
    whatever killed it); whatever folder exists reads; sample numbers have no gaps."""
    delay = float(_rng(fault).uniform(*fault.rig_kill_window))
    print(f"fault {fault.id}: kill -9 {delay:.3f} s after {fault.kill_anchor}", file=sys.stderr)
    proc = outcome.start(case_dir, protocol=fault.protocol, args=list(fault.args),
                         rig=dict(fault.rig), inject=fault.inject)
    if fault.kill_anchor == "output-on":
        outcome.wait_for_event(case_dir, proc, lambda e: e.get("kind") == "step", "output on")
    try:
        proc.wait(timeout=delay)   # the seeded kill instant itself (injection, not a wait)
    except subprocess.TimeoutExpired:
        pass
    proc.send_signal(signal.SIGKILL)
    obs = outcome.observe(case_dir, proc)
    obs.detail["kill_after_s"] = delay
    if obs.folder is None:
        obs.readable = True     # killed before the folder existed: nothing to read is right
        obs.detail["note"] = "killed before the run folder was created"
    return obs


def _truncate_to_synced(folder: Path, sync_log: Path) -> Dict[str, int]:
    last: Dict[str, int] = {}
    if sync_log.exists():
        for line in sync_log.read_text().splitlines():
            name, off = line.rsplit(" ", 1)
            last[name] = max(last.get(name, 0), int(off))
    for name in ("samples.csv", "events.jsonl"):
        p = folder / name
        if p.exists():
            with open(p, "r+b") as fh:
                fh.truncate(last.get(name, 0))
    return last


def run_powerloss(fault, case_dir: Path) -> outcome.Observed:
    """kill -9 at a seeded instant during the dwell, then every data file truncated to
    its last fsynced length (what a power cut leaves). Expected: the folder reads; each
    truncated file ends on a complete line (the recorder fsyncs whole rows only); every
    sample up to that fsync is there, numbered 0..n-1."""
    sync_log = Path(case_dir) / "sync.log"
    inject = dict(fault.inject or {})
    inject["sync_log"] = str(sync_log)
    proc = outcome.start(case_dir, protocol=fault.protocol, args=list(fault.args), inject=inject)
    outcome.wait_for_event(case_dir, proc, _dwell, "the dwell")
    delay = float(_rng(fault).uniform(0.05, 0.6))
    print(f"fault {fault.id}: kill -9 {delay:.3f} s into the dwell", file=sys.stderr)
    try:
        proc.wait(timeout=delay)   # the seeded instant of the power cut
    except subprocess.TimeoutExpired:
        pass
    proc.send_signal(signal.SIGKILL)
    proc.communicate()
    code = proc.returncode
    folder = outcome.run_folder(case_dir)
    last = _truncate_to_synced(folder, sync_log)
    obs = outcome.read_back(case_dir, code)
    obs.detail.update({"synced_bytes": last, "kill_after_s": delay})
    for name in ("samples.csv", "events.jsonl"):
        data = (folder / name).read_bytes()
        if data and not data.endswith(b"\n"):
            obs.extra.append(f"{name} truncated to its last fsync does not end on a line")
    rows = (folder / "samples.csv").read_bytes().count(b"\n") - 1
    if obs.samples != max(rows, 0):
        obs.extra.append(f"{obs.samples} samples read, {rows} rows were fsynced")
    if obs.samples == 0:
        obs.extra.append("no sample was fsynced before the power cut")
    return obs


def run_clockjump(fault, case_dir: Path) -> outcome.Observed:
    """The host's wall clock (``time.time``) jumps by ``jump_s`` once the output is on.
    Expected: the run completes; sample times and UTC stamps keep increasing (the engine
    runs on the monotonic/virtual clock and fixes the UTC offset at start); the periodic
    ``clock`` events show the host's jump while the run's own offset stays put."""
    obs = outcome.run_cli_case(fault, case_dir)
    jump = float(fault.inject["hooks"][0]["jump_s"])
    clocks = [e for e in obs.events if e.get("kind") == "clock"]
    host = [e["host_utc"] - e["host_monotonic"] for e in clocks]
    own = [e["offset_s"] for e in clocks]
    if len(clocks) < 2:
        obs.extra.append("fewer than two clock events")
    else:
        seen = host[-1] - host[0]
        obs.detail["host_offset_change_s"] = seen
        if abs(seen - jump) > 1.0:
            obs.extra.append(f"clock events show a host jump of {seen:.1f} s, expected {jump:g}")
        if max(own) - min(own) > 1e-6:
            obs.extra.append("the run's own UTC offset moved with the host clock")
    from sequencer.runfolder import RunFolder
    cols = RunFolder(obs.folder).samples()
    for name in ("t", "utc"):
        x = np.asarray(cols[name], dtype=float)
        if not np.all(np.diff(x) > 0):
            obs.extra.append(f"sample {name} is not strictly increasing")
    return obs


def _tcp_rig(case_dir: Path, serving, host_loss: str, timeout: str) -> Path:
    import yaml
    rig = rigs.rig_dict(case_dir, host_loss=host_loss, host_loss_timeout=timeout,
                        timeout_s=0.5)
    rig.pop("simulation", None)           # a "real" rig: instruments at network addresses
    res = serving.resources()
    rig["instruments"]["hv"]["address"] = res["supply"]
    rig["instruments"]["pico"]["address"] = res["ammeter"]
    rig["instruments"]["gauge"]["address"] = f"socket://127.0.0.1:{serving.servers['gauge'].port}"
    for name, role in (("hv", "supply"), ("pico", "ammeter")):
        idn = serving.stand.interpreter(role).handle("*IDN?").split(",")
        rig["instruments"][name]["identity"] = {"model": idn[1], "serial": idn[2]}
    gauge = serving.stand.interpreter("gauge")
    rig["instruments"]["gauge"]["identity"] = {"model": getattr(gauge, "MODEL", "SIM-GAUGE"),
                                               "serial": str(getattr(gauge, "serial", "") or "SIM")}
    p = Path(case_dir) / "rig.yaml"
    p.write_text(yaml.safe_dump(rig, sort_keys=False), encoding="utf-8")
    return p


HOSTLOSS_PROTOCOL = """\
name: fault-host-loss
sample_period: "0.5 s"
limits:
  current_max: "80 uA"
  slew_max: "200 V/s"
steps:
  - ramp: {to: "200 V", rate: "200 V/s"}
  - dwell: {duration: "2 h"}
  - return: {rate: "200 V/s"}
"""


def run_hostloss(fault, case_dir: Path) -> outcome.Observed:
    """The simulated instruments are served on 127.0.0.1 from this (the test's) process;
    ``fieldrun run`` drives them over TCP from its own process, which is killed -9 during
    the dwell. What the supply does then is the point: with no comm timeout armed it keeps
    its output at the dwell voltage (what host loss really does); with one armed it
    switches itself off when the host has been silent for that long."""
    from sequencer.commands import sim_serve
    case_dir = Path(case_dir)
    case_dir.mkdir(parents=True, exist_ok=True)
    sim = dict(rigs.base_rig()["simulation"])
    sim["supply"] = {"host_loss": "keep"}
    serving = sim_serve.start(sim, speed=1.0, seed=int(sim.get("seed", 7)))
    try:
        host_loss, timeout = fault.hostloss
        rig_path = _tcp_rig(case_dir, serving, host_loss, timeout)
        proto = case_dir / "fault-host-loss.yaml"
        proto.write_text(HOSTLOSS_PROTOCOL, encoding="utf-8")
        cmd = [sys.executable, "-m", "sequencer.cli", "run", str(proto), "--rig", str(rig_path),
               "--quiet", "--no-report", "--runs-dir", str(case_dir / "runs")]
        proc = outcome.popen(cmd)
        outcome.wait_for_event(case_dir, proc, _dwell, "the dwell")
        stand = serving.stand
        before = stand.advance()
        proc.send_signal(signal.SIGKILL)
        proc.communicate()
        t_kill = stand.clock.now()
        obs = outcome.read_back(case_dir, proc.returncode)
        obs.detail["at_kill"] = {"output_on": bool(before.output_on), "voltage_v": before.voltage_v}
        if not (before.output_on and before.voltage_v > 100.0):
            obs.extra.append(f"the output was not on at the dwell voltage when killed: {before}")
        if host_loss == "none":
            # wait on the simulated clock until well past any timeout, then look
            bound = time.monotonic() + outcome.BOUND_S
            while stand.clock.now() < t_kill + 3.0 and time.monotonic() < bound:
                time.sleep(0.02)   # polling the instrument clock for its time, not a timed assert
            after = stand.advance()
            obs.detail["after_3s"] = {"output_on": bool(after.output_on), "voltage_v": after.voltage_v}
            if not (after.output_on and after.voltage_v > 100.0):
                obs.extra.append(f"expected the supply to keep its output after host loss: {after}")
            obs.detail["supply"] = f"output still ON at {after.voltage_v:.0f} V 3 s after the host died"
        else:
            bound = time.monotonic() + outcome.BOUND_S
            after = stand.advance()
            while after.output_on and time.monotonic() < bound:
                time.sleep(0.02)   # waiting for the supply's own comm-timeout off (an event)
                after = stand.advance()
            ques = int(float(stand.interpreter("supply").handle("STAT:QUES:EVEN?") or 0))
            obs.detail["after"] = {"output_on": bool(after.output_on), "t_off_after_kill_s":
                                   after.t - t_kill, "ques": ques}
            if after.output_on:
                obs.extra.append("the supply's comm timeout did not switch the output off")
            if not ques & 2048:
                obs.extra.append(f"STAT:QUES does not show the comm-timeout trip (bit 11): {ques}")
            obs.detail["supply"] = "output OFF by the supply's own comm timeout"
        return obs
    finally:
        serving.stop()
