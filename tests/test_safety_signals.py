"""Signals against a live run of the CLI on the simulated rig (a subprocess).

What is set: ``fieldrun run`` of a short protocol (ramp to 300 V, a long dwell) on the
simulated rig at ``--speed 50``; the test waits until the dwell has started (its ``step``
event in the run folder's events.jsonl) and then sends the signal. What is expected
(issue 5, deliverable 5; DESIGN.md exit codes): exit 4 and, every time, an ``end.json``
saying ``confirmed_off: true`` with a confirmed ``safe-off`` event. The first SIGINT ramps
down under control (ramp-down samples come before the safe-off); a second switches off at
once; SIGTERM and SIGHUP switch off at once. Waiting is on events in the run folder (with
a generous bound so a broken run fails instead of hanging), never on fixed sleeps.
"""
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

pytest.importorskip("sequencer.recorder")
pytest.importorskip("sequencer.rig")
pytest.importorskip("simulators.stand")
pytest.importorskip("drivers.factory")

ROOT = Path(__file__).resolve().parents[1]
BOUND_S = 60.0   # only so a broken run fails instead of hanging; never a timing assert

PROTOCOL = """\
name: signal-test
sample_period: "1 s"
limits:
  current_max: "80 uA"
  slew_max: "{slew} V/s"
steps:
  - ramp: {{to: "300 V", rate: "{slew} V/s"}}
  - dwell: {{duration: "2 h"}}
  - return: {{rate: "{slew} V/s"}}
"""


def _rig(tmp: Path) -> Path:
    from tests.engine_fakes import sim_rig_text
    text = sim_rig_text(tmp)
    p = tmp / "rig.yaml"
    p.write_text(text)
    return p


def _start(tmp: Path, slew=20.0):
    proto = tmp / "signal-test.yaml"
    proto.write_text(PROTOCOL.format(slew=slew))
    runs = tmp / "runs"
    cmd = [sys.executable, "-m", "sequencer.cli", "run", str(proto), "--rig", str(_rig(tmp)),
           "--speed", "50", "--quiet", "--no-report", "--runs-dir", str(runs)]
    proc = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    return proc, runs


def _events(runs: Path):
    folders = list(runs.glob("*/events.jsonl")) if runs.exists() else []
    if not folders:
        return None, []
    out = []
    for line in folders[0].read_text().splitlines():
        try:
            out.append(json.loads(line))
        except ValueError:
            pass   # a line being written
    return folders[0].parent, out


def _wait_for(proc, runs, pred, what):
    t_end = time.monotonic() + BOUND_S
    while time.monotonic() < t_end:
        folder, evs = _events(runs)
        if any(pred(e) for e in evs):
            return folder, evs
        if proc.poll() is not None:
            out, err = proc.communicate()
            pytest.fail(f"run ended (exit {proc.returncode}) before {what}: {err.decode()[-2000:]}")
        time.sleep(0.02)   # polling the folder for the event, not a timed wait
    proc.kill()
    pytest.fail(f"no {what} within the bound")


def _dwell_started(e):
    return e.get("kind") == "step" and e.get("index") == 1


def _finish(proc):
    try:
        out, err = proc.communicate(timeout=BOUND_S)
    except subprocess.TimeoutExpired:
        proc.kill()
        pytest.fail("the run did not end after the signal")
    return proc.returncode, out.decode(), err.decode()


def _end(folder: Path):
    return json.loads((folder / "end.json").read_text())


def _samples_kinds(folder: Path):
    lines = (folder / "samples.csv").read_text().splitlines()[1:]
    return [ln.split(",")[15] for ln in lines if ln.count(",") >= 19]


def test_first_sigint_ramps_down_under_control_then_confirms_off(tmp_path):
    proc, runs = _start(tmp_path)
    _wait_for(proc, runs, _dwell_started, "the dwell")
    proc.send_signal(signal.SIGINT)
    code, out, err = _finish(proc)
    folder, evs = _events(runs)
    assert code == 4, err
    end = _end(folder)
    assert end["confirmed_off"] is True and end["exit_code"] == 4
    kinds = _samples_kinds(folder)
    assert "ramp-down" in kinds                      # came down under control ...
    offs = [e for e in evs if e["kind"] == "safe-off"]
    assert offs and offs[-1]["confirmed"] is True
    stop = next(i for i, e in enumerate(evs) if e["kind"] == "operator" and e.get("action") == "stop")
    assert stop < evs.index(offs[-1])                # ... and switched off after it
    assert str(folder) in out


def test_second_sigint_switches_off_at_once(tmp_path):
    from sequencer import control
    proc, runs = _start(tmp_path)
    folder, _ = _wait_for(proc, runs, _dwell_started, "the dwell")
    # tighten the slew limit through the live control channel (what ``fieldrun ctl`` does):
    # 0.1 V/s makes the controlled ramp-down from 300 V last 3000 s of simulated time
    cid = control.send(folder, {"command": "tighten", "rule": "slew", "param": "slew_max",
                                "value": 0.1})
    assert control.wait_reply(folder, cid, BOUND_S)["ok"] is True
    proc.send_signal(signal.SIGINT)
    _wait_for(proc, runs, lambda e: e.get("kind") == "operator" and e.get("action") == "stop",
              "the first stop")
    proc.send_signal(signal.SIGINT)
    code, out, err = _finish(proc)
    folder, evs = _events(runs)
    assert code == 4, err
    assert _end(folder)["confirmed_off"] is True
    assert any("second Ctrl-C" in (e.get("message") or "") for e in evs)
    # off at once: the ramp-down had not reached 0 V when the output went off
    rows = (folder / "samples.csv").read_text().splitlines()[1:]
    last_setpoint = float(rows[-1].split(",")[6])
    assert last_setpoint > 0.0
    tight = [e for e in evs if e["kind"] == "operator" and e.get("action") == "tighten"]
    assert tight and tight[0]["accepted"] is True


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGHUP])
def test_sigterm_and_sighup_switch_off_at_once(tmp_path, sig):
    proc, runs = _start(tmp_path)
    _wait_for(proc, runs, _dwell_started, "the dwell")
    proc.send_signal(sig)
    code, out, err = _finish(proc)
    folder, evs = _events(runs)
    assert code == 4, err
    end = _end(folder)
    assert end["confirmed_off"] is True
    assert signal.Signals(sig).name in end["reason"]
    assert "ramp-down" not in _samples_kinds(folder)


def test_a_dead_terminal_never_stops_the_run(tmp_path):
    # Both output pipes are closed by the reader before the run writes anything: every
    # write meets EPIPE. Expected: the run goes to its end (exit 0) and confirms off.
    proto = tmp_path / "short.yaml"
    proto.write_text('name: epipe\nsample_period: "1 s"\nsteps:\n'
                     '  - ramp: {to: "100 V", rate: "20 V/s"}\n  - return: {rate: "20 V/s"}\n')
    runs = tmp_path / "runs"
    proc = subprocess.Popen([sys.executable, "-m", "sequencer.cli", "run", str(proto), "--rig",
                             str(_rig(tmp_path)), "--no-report", "--runs-dir", str(runs)],
                            cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()
    proc.stderr.close()
    assert proc.wait(timeout=BOUND_S) == 0
    folder = next(runs.iterdir())
    end = _end(folder)
    assert end["outcome"] == "completed" and end["confirmed_off"] is True
