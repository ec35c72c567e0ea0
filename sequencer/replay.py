"""Replay: a protocol (or a recorded run) once more on the simulated rig, on the virtual clock.

A replay *is* an ordinary run: ``sequencer.commands.run.run`` does everything (compile,
build the simulated stand, engine, recorder, console, end record, report), so a replay's
run folder reads like any other. What this module adds is the choice of inputs and the
one-line verdict afterwards:

* a **protocol file** is replayed on ``--rig`` (default: the example simulated rig
  ``protocols/sim-rig.yaml``), with ``--seed`` or the rig file's seed;
* a **run folder** is replayed from its own copies: the recorded ``protocol.yaml``, the
  recorded limits from ``manifest.json`` (so later edits of the protocol or the rig's hard
  limits do not change what is re-run), the recorded ``rig.yaml`` when it is a simulated
  rig (else ``--rig`` must name one), the recorded seed unless ``--seed`` is given, and the
  recorded guard state (a run made ``--unguarded`` replays unguarded).

Replays never touch real instruments: every instrument of the rig must have a ``sim:``
address. Pauses are skipped (the engine logs each one it skips).

With the same protocol, limits, rig and seed the simulated stand, the drivers and the
engine make the same calls in the same order on the virtual clock, so a replay reproduces a
recorded simulated run sample for sample; ``tests/test_replay_reproduces.py`` checks this
column by column.
"""
from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Dict, Optional

from .errors import RefusedError

#: the example simulated rig, used when a protocol file is replayed without --rig
DEFAULT_SIM_RIG = Path(__file__).resolve().parents[1] / "protocols" / "sim-rig.yaml"


@dataclass
class ReplayInputs:
    """What one replay runs: files, the loaded rig, limits to impose, seed, guard state."""

    protocol_path: Path
    rig_path: Path
    rig: Any
    limits: Optional[Dict[str, float]]
    seed: Optional[int]
    unguarded: bool
    source_folder: Optional[Path] = None
    note: str = ""


def is_run_folder(path: Path) -> bool:
    return path.is_dir() and (path / "manifest.json").is_file()


def _read_manifest(folder: Path) -> Dict[str, Any]:
    try:
        return json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise RefusedError(f"{folder}: cannot read manifest.json ({exc})") from None


def recorded_limits(manifest: Dict[str, Any]) -> Dict[str, float]:
    """The merged limits a run recorded (name -> SI value). Non-finite values are written
    as null in JSON; they are left to the compiled plan (they were 'no limit' there too)."""
    from .limits import PARAMS
    out = {}
    for name, value in (manifest.get("limits") or {}).items():
        if name in PARAMS and isinstance(value, (int, float)) and math.isfinite(value):
            out[name] = float(value)
    return out


def _is_simulated(rig) -> bool:
    insts = list(rig.instruments)
    return bool(insts) and all(str(i.address).startswith("sim:") for i in insts)


def resolve(source: str, rig_path: Optional[str] = None, seed: Optional[int] = None,
            unguarded: bool = False, runs_dir: str = "runs") -> ReplayInputs:
    """Choose the inputs of a replay of ``source`` (protocol file or run folder)."""
    from .rig import load_rig

    src = Path(source)
    if not src.exists():
        raise RefusedError(f"{source}: no such protocol file or run folder")
    folder = None
    limits = None
    note = ""
    if src.is_dir():
        if not is_run_folder(src):
            raise RefusedError(f"{source}: a folder without manifest.json is not a run folder")
        folder = src
        manifest = _read_manifest(src)
        protocol_path = src / "protocol.yaml"
        if not protocol_path.is_file():
            raise RefusedError(f"{source}: the run folder has no protocol.yaml to replay")
        limits = recorded_limits(manifest)
        if seed is None and manifest.get("seed") is not None:
            seed = int(manifest["seed"])
        if manifest.get("unguarded") and not unguarded:
            unguarded = True
            note = "the recorded run was unguarded, so is the replay"
        if rig_path is None:
            recorded = src / "rig.yaml"
            if not recorded.is_file():
                raise RefusedError(f"{source}: no rig.yaml recorded; name a simulated rig "
                                   f"with --rig")
            rig = load_rig(recorded)
            if not _is_simulated(rig):
                raise RefusedError(f"{source}: the run was made on a real rig ({rig.name}); "
                                   f"name a simulated rig to replay it on with --rig")
            rig_file = recorded
            if not Path(rig.state_dir).is_absolute():
                # the rig's state folder is relative to the rig file: keep it out of the
                # recorded folder (raw files are never altered)
                rig = dataclasses.replace(
                    rig, state_dir=str((Path(runs_dir) / ".fieldrun-state").resolve()))
        else:
            rig_file = Path(rig_path)
            rig = load_rig(rig_file)
    else:
        protocol_path = src
        rig_file = Path(rig_path) if rig_path is not None else DEFAULT_SIM_RIG
        if not rig_file.is_file():
            raise RefusedError(f"{rig_file}: no such rig file (name a simulated rig with --rig)")
        rig = load_rig(rig_file)
    if not _is_simulated(rig):
        raise RefusedError(f"{rig_file}: replay runs on a simulated rig only (every "
                           f"instrument a sim: address); use 'fieldrun run' for real instruments")
    return ReplayInputs(protocol_path, rig_file, rig, limits, seed, unguarded, folder, note)


# --------------------------------------------------------------------------- the verdict
def _read_json(path: Path) -> Optional[Dict[str, Any]]:
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def summarise(folder) -> Dict[str, Any]:
    """What happened in a (simulated) run folder, from its own files: outcome, and for a
    watchdog stop the rule, the simulated time and the voltage; for a lost fibre the time
    and voltage it was lost at."""
    from .runfolder import RunFolder

    rf = RunFolder(folder)
    end = rf.end or {}
    sim = end.get("simulation") or {}
    out: Dict[str, Any] = {"folder": str(folder), "outcome": end.get("outcome", "incomplete"),
                           "exit_code": end.get("exit_code"), "reason": end.get("reason", ""),
                           "confirmed_off": end.get("confirmed_off"),
                           "fibre_lost": bool(sim.get("fibre_lost")),
                           "lost_at_s": sim.get("lost_at_s"), "seed": sim.get("seed")}
    cols = rf.samples() or {}
    t = [float(x) for x in cols.get("t", ())]
    v = [float(x) for x in cols.get("voltage", ())]
    seqs = [int(x) for x in cols.get("seq", ())]

    def voltage_at(when):
        if when is None or not t:
            return None
        best = None
        for tk, vk in zip(t, v):
            if tk <= when + 1e-9:
                best = vk
            else:
                break
        return best if best is not None else v[0]

    stop = None
    for ev in rf.events():
        if ev.get("kind") == "trip" or (ev.get("kind") == "verdict"
                                        and ev.get("action") in ("trip", "ramp_down")):
            stop = ev
            break
    if stop is not None and out["outcome"] in ("tripped", "ramped-down"):
        # the sample the verdict acted on: the tripped one, else the last before the
        # event (an event carries the number of the next sample)
        seq = end.get("tripped_on_seq")
        if seq is None and stop.get("seq") is not None:
            seq = int(stop["seq"]) - 1
        k = seqs.index(seq) if seq in seqs else None
        out.update(rule=stop.get("rule"), action=stop.get("action", "trip"),
                   t=t[k] if k is not None else stop.get("t"),
                   voltage=v[k] if k is not None else voltage_at(stop.get("t")),
                   message=stop.get("message", ""))
    if out["fibre_lost"]:
        out["lost_voltage"] = voltage_at(out["lost_at_s"])
    return out


def verdict_line(s: Dict[str, Any]) -> str:
    """One line: completed / tripped (rule, when, at what voltage) / fibre lost."""
    def num(x, fmt):
        return format(x, fmt) if isinstance(x, (int, float)) and math.isfinite(x) else "?"
    parts = []
    oc = s["outcome"]
    if oc in ("tripped", "ramped-down") and s.get("rule"):
        what = "tripped" if oc == "tripped" else "ramped down"
        parts.append(f"{what} by {s['rule']} at t = {num(s.get('t'), '.1f')} s (simulated), "
                     f"{num(s.get('voltage'), '.0f')} V")
    else:
        parts.append(oc.replace("-", " ") + (f" ({s['reason']})" if oc not in ("completed",) and s.get("reason") else ""))
    if s.get("fibre_lost"):
        parts.append(f"FIBRE LOST at t = {num(s.get('lost_at_s'), '.1f')} s (simulated), "
                     f"{num(s.get('lost_voltage'), '.0f')} V")
    else:
        parts.append("fibre intact")
    if s.get("seed") is not None:
        parts.append(f"seed {s['seed']}")
    return "; ".join(parts)
