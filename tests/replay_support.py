"""Shared by the replay, calibrate and campaign tests: a simulated rig and short protocols
written into a test's tmp folder (invented Kestrel Lane scenario, stand-B-sim)."""
from __future__ import annotations

from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def sim_rig(tmp, cathode: str, seed: int = 7, name: str = "sim-rig.yaml") -> Path:
    """protocols/sim-rig.yaml with its cathode line replaced by ``cathode`` (a YAML flow
    mapping), its seed set and its state folder under ``tmp``; written to ``tmp/name``."""
    text = (ROOT / "protocols" / "sim-rig.yaml").read_text()
    out = []
    for ln in text.splitlines():
        if ln.startswith("  cathode:"):
            ln = "  cathode: " + cathode
        elif ln.startswith("  seed:"):
            ln = f"  seed: {seed}"
        elif ln.startswith("state_dir:"):
            ln = f"state_dir: {Path(tmp) / 'state'}"
        out.append(ln)
    path = Path(tmp) / name
    path.write_text("\n".join(out) + "\n")
    return path


def write(tmp, name: str, text: str) -> Path:
    path = Path(tmp) / name
    path.write_text(text)
    return path


def only_folder(runs_dir) -> Path:
    folders = [p for p in Path(runs_dir).iterdir() if p.is_dir() and not p.name.startswith(".")]
    assert len(folders) == 1, folders
    return folders[0]


#: a deliberately harsh protocol for campaigns: straight up to ``to`` at 50 V/s under a
#: 10 uA ceiling, a dwell there, and back (used by the campaign tests and the bench)
HARSH = """\
name: harsh
sample_period: "0.5 s"
limits:
  current_max: "10 uA"
  slew_max: "50 V/s"
steps:
  - ramp: {{to: "{to}", rate: "50 V/s"}}
  - dwell: {{duration: "{dwell}"}}
  - return: {{rate: "50 V/s"}}
"""


def harsh_cathode(emitters: int) -> str:
    """A fibre whose contact is weakly cooled (0.5e-9 W/K), so that a sustained 18 uA
    melts it (see tests/test_campaign_outcomes.py for the numbers)."""
    return (f"{{emitters: {emitters}, gap_m: 5.0e-4, series_resistance_ohm: 1.0e+6, "
            f"contact_conductance_w_k: 0.5e-9}}")
