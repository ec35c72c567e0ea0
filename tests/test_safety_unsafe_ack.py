"""Exit 5: a supply that ignores output-off leaves the rig marked until ``fieldrun ack``.

Set: the simulated supply with the ``ignore-output-off`` fault (simulators/quirks.py: it
accepts OUTP OFF and keeps its output on). Expected (DESIGN.md exit codes; issue 5,
deliverable 5): the run ends with exit 5, ``end.json`` says ``confirmed_off: false``, the
rig's notification command for an unsafe end was run (an ``alarm`` event with its
output), the rig is marked; the next run on it is refused with exit 2 before anything is
energised; ``fieldrun ack RIG`` clears the mark and the next run is allowed again.
"""
import json
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("simulators.stand")
pytest.importorskip("sequencer.recorder")

from tests.engine_fakes import sim_rig_text

ROOT = Path(__file__).resolve().parents[1]

PROTOCOL = """\
name: unsafe-test
sample_period: "0.5 s"
steps:
  - ramp: {to: "100 V", rate: "50 V/s"}
  - dwell: {duration: "5 s"}
  - return: {rate: "50 V/s"}
"""


def cli(*args):
    cp = subprocess.run([sys.executable, "-m", "sequencer.cli", *args, *(["--no-report"] if args[0] == "run" else [])], cwd=ROOT,
                        capture_output=True, text=True, timeout=120)
    return cp.returncode, cp.stdout, cp.stderr


def test_exit_5_marks_the_rig_and_ack_clears_it(tmp_path):
    proto = tmp_path / "unsafe-test.yaml"
    proto.write_text(PROTOCOL)
    faulty = sim_rig_text(tmp_path).replace(
        "  seed: 7\n", "  seed: 7\n  quirks: {supply: {faults: [{kind: ignore-output-off}]}}\n")
    assert "ignore-output-off" in faulty
    rig = tmp_path / "rig.yaml"
    rig.write_text(faulty)
    runs = tmp_path / "runs"

    code, out, err = cli("run", str(proto), "--rig", str(rig), "--quiet", "--runs-dir", str(runs))
    assert code == 5, err
    folder = next(runs.iterdir())
    end = json.loads((folder / "end.json").read_text())
    assert end["exit_code"] == 5 and end["confirmed_off"] is False
    events = [json.loads(ln) for ln in (folder / "events.jsonl").read_text().splitlines()]
    alarms = [e for e in events if e["kind"] == "alarm" and e.get("command")]
    assert alarms and "UNSAFE" in alarms[-1]["stdout"]      # the rig's on_unsafe echo ran
    assert "fieldrun ack" in out + err

    # the next run is refused before the output goes on; no new run folder is made
    code, out, err = cli("run", str(proto), "--rig", str(rig), "--quiet", "--runs-dir", str(runs))
    assert code == 2 and "UNCONFIRMED" in err
    assert len(list(runs.iterdir())) == 1

    code, out, err = cli("ack", str(rig), "--note", "output measured 0 V with a HV probe")
    assert code == 0 and "acknowledged" in out

    # the fault is mended (the rig file without it) and the next run goes ahead
    rig.write_text(sim_rig_text(tmp_path))
    code, out, err = cli("run", str(proto), "--rig", str(rig), "--quiet", "--runs-dir", str(runs))
    assert code != 2, err
    assert len(list(runs.iterdir())) == 2
