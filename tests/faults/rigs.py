"""The simulated rig and protocols the faults are tried on.

The rig is protocols/sim-rig.yaml (stand-B-sim of the invented Kestrel Lane lab) with:
its state folder under the test's temporary folder; sub-second transport timeouts
(0.25 s, so a reply that never comes costs a quarter second of real time); a notification
command that appends one line to a file (an argument list run without a shell:
``[python, -c, CODE, FILE, "{outcome}: {message}"]``), so a test sees the alarm ran;
no interlock line unless asked; and the fault block the row injects under
``simulation.quirks`` (simulators/quirks.py documents the kinds and schedules).
"""
from __future__ import annotations

import copy
import sys
from pathlib import Path
from typing import Any, Dict, Optional

import yaml

ROOT = Path(__file__).resolve().parents[2]
TIMEOUT_S = 0.25

#: the alarm command: appends "<outcome>: <message>" to the file named by argv[1]
ALARM_CODE = ("import sys\n"
              "with open(sys.argv[1], 'a', encoding='utf-8') as f:\n"
              "    f.write(sys.argv[2] + '\\n')\n")

#: ramp to 300 V, dwell, come back: faults strike during the dwell (all at 1 sample/s)
DWELL = """\
name: fault-dwell
sample_period: "0.5 s"
limits:
  current_max: "80 uA"
  slew_max: "50 V/s"
  stale_time: "2 s"
steps:
  - ramp: {to: "300 V", rate: "50 V/s"}
  - dwell: {duration: "%(dwell)s"}
  - return: {rate: "50 V/s"}
"""


def base_rig() -> Dict[str, Any]:
    return yaml.safe_load((ROOT / "protocols" / "sim-rig.yaml").read_text(encoding="utf-8"))


def rig_dict(tmp: Path, quirks: Optional[Dict[str, Any]] = None, *, interlock: bool = False,
             host_loss: Optional[str] = None, host_loss_timeout: Optional[str] = None,
             supply_host_loss: Optional[str] = None, timeout_s: float = TIMEOUT_S,
             alarm_file: Optional[Path] = None, extra_sim: Optional[Dict[str, Any]] = None
             ) -> Dict[str, Any]:
    rig = copy.deepcopy(base_rig())
    rig["state_dir"] = str(Path(tmp) / "state")
    if not interlock:
        rig["instruments"].pop("chain", None)
    for inst in rig["instruments"].values():
        inst.setdefault("options", {})["timeout"] = timeout_s
    if host_loss is not None:
        rig["host_loss"] = host_loss
        if host_loss != "supply-timeout":
            rig.pop("host_loss_timeout", None)
    if host_loss_timeout is not None:
        rig["host_loss_timeout"] = host_loss_timeout
    alarm_file = Path(alarm_file or Path(tmp) / "alarms.txt")
    argv = [sys.executable, "-c", ALARM_CODE, str(alarm_file), "{outcome}: {message}"]
    rig["notify"] = {"on_trip": argv, "on_unsafe": argv, "on_end": argv}
    sim = rig.setdefault("simulation", {})
    if quirks:
        sim["quirks"] = copy.deepcopy(quirks)
    if supply_host_loss is not None:
        sim.setdefault("supply", {})["host_loss"] = supply_host_loss
    if extra_sim:
        sim.update(copy.deepcopy(extra_sim))
    return rig


def write_rig(tmp: Path, **kw) -> Path:
    p = Path(tmp) / "rig.yaml"
    p.write_text(yaml.safe_dump(rig_dict(tmp, **kw), sort_keys=False), encoding="utf-8")
    return p


def write_protocol(tmp: Path, text: Optional[str] = None, dwell: str = "60 s") -> Path:
    p = Path(tmp) / "fault-dwell.yaml"
    p.write_text(text if text is not None else DWELL % {"dwell": dwell}, encoding="utf-8")
    return p
