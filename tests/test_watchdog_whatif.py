"""Lab notebook: ``fieldrun whatif`` on a synthetic run folder.

The folder is written here, in the run-folder format of BRIEF.md (sequencer.runfolder's
writers): a 5 V/s ramp from 800 V, 1 s samples, on a synthetic FN cathode
I = A V^2 exp(-B/V) (A = 1e-6 A/V^2, B = 1.5e4 V, invented constants), with three ammeter
overflows (arcs) at t = 40, 50, 60 s; the current crosses the 100 uA ceiling near 1.5 kV. Its
events.jsonl holds this watchdog's own verdict changes on those samples, written the way the
engine writes them (each change as "verdict", a trip again as "trip", beside step and note
events). Expectations: with the recorded limits the verdicts are reproduced exactly; a
tighter current ceiling moves the trip earlier (to where the ramp first passes it); a tighter
back-off count moves the back-off to the second arc.
"""
import json
import math

import pytest

from sequencer import runfolder
from sequencer.cli import main
from sequencer.limits import Limits
from sequencer.sample import FLAG_OVERFLOW, Sample
from sequencer.watchdog import Watchdog

A, B = 1e-6, 1.5e4
ARCS = (40, 50, 60)


def fn(v):
    return A * v * v * math.exp(-B / v)


def synthetic_samples():
    out = []
    for k in range(400):
        v = 800.0 + 5.0 * k
        arc = k in ARCS
        rng = next(r for r in (2e-6, 2e-5, 2e-4, 2e-3, 2e-2, 2.0) if fn(v) < r)   # autorange
        out.append(Sample(seq=k, t=float(k), utc=1.8e9 + k, setpoint_v=v, voltage_v=v,
                          gap_voltage_v=v, current_a=math.nan if arc else fn(v),
                          supply_current_a=math.nan, range_a=rng, pressure_pa=2e-6,
                          pressure_age_s=0.0, t_v=float(k), t_i=float(k), t_p=float(k),
                          step_index=0, step_kind="ramp", interlock_ok=True,
                          flags=(FLAG_OVERFLOW,) if arc else ()))
    return out


@pytest.fixture()
def run_dir(tmp_path):
    limits = Limits.defaults()
    folder = tmp_path / "20260101T000000Z-whatif-synthetic-abc123"
    folder.mkdir()
    runfolder.write_manifest(folder, {"protocol": {"name": "whatif-synthetic"},
                                      "sample": {"id": "KL-Y07"}, "limits": limits.to_dict(),
                                      "instruments": {"supply": {}, "ammeter": {}, "gauge": {}},
                                      "watchdog": {"survived_max_current": 1e-3}})
    wd = Watchdog(limits, survived_max_current=1e-3)
    rows, events = [runfolder.HEADER + "\n"], [{"kind": "step", "seq": 0, "t": 0.0, "index": 0}]
    for s in synthetic_samples():
        v = wd.judge(s)
        rows.append(runfolder.format_row(s))
        for e in wd.events():
            events.append(dict(e, kind="verdict"))
            if e["action"] == "trip":
                events.append(dict(e, kind="trip"))
        if v.action.name == "BACK_OFF":
            events.append({"kind": "note", "seq": s.seq, "t": s.t, "message": "backing off"})
        if v.action.name == "TRIP":
            break
    (folder / "samples.csv").write_text("".join(rows))
    (folder / "events.jsonl").write_text("".join(json.dumps(e) + "\n" for e in events))
    runfolder.write_end(folder, "tripped", 3, "trip by current_ceiling", True)
    return folder


def result(folder, name):
    return json.loads((folder / "analysis" / f"whatif-{name}.json").read_text())


def test_recorded_limits_reproduce_the_recorded_verdicts(run_dir, capsys):
    assert main(["whatif", str(run_dir)]) == 0
    r = result(run_dir, "recorded-limits")
    key = lambda c: (c["seq"], c["action"], c["rule"])
    assert [key(c) for c in r["whatif"]] == [key(c) for c in r["recorded"]]
    # what was recorded: back-off on the third arc, the hold, its release, the trip
    assert [key(c) for c in r["recorded"]][:3] == [(60, "back_off", "bursts"),
                                                   (61, "hold", "bursts"),
                                                   (90, "continue", "bursts")]
    assert r["recorded"][-1]["action"] == "trip" and r["recorded"][-1]["rule"] == "current_ceiling"
    assert r["comparison"]["identical"] is True
    out = capsys.readouterr().out
    assert "the what-if verdicts are the recorded ones" in out
    assert (run_dir / "analysis" / "whatif-recorded-limits.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # the raw files are untouched
    assert sorted(p.name for p in run_dir.iterdir()) == [
        "analysis", "end.json", "events.jsonl", "manifest.json", "samples.csv"]


def test_a_tighter_ceiling_moves_the_trip_earlier(run_dir, tmp_path, capsys):
    f = tmp_path / "tight.yaml"
    f.write_text("current_max: 50 uA\nburst_backoff_count: 2\n")
    assert main(["whatif", str(run_dir), "--limits", str(f)]) == 0
    r = result(run_dir, "tight")
    rec_end, new_end = r["comparison"]["recorded_end"], r["comparison"]["whatif_end"]
    assert new_end["rule"] == "current_ceiling" and new_end["t"] < rec_end["t"]
    # the expected crossing, computed from the cathode: the first sample above 50 uA
    k50 = next(k for k in range(400) if fn(800.0 + 5.0 * k) > 50e-6)
    assert new_end["seq"] == k50 and r["comparison"]["end_moved_s"] == new_end["t"] - rec_end["t"]
    # two arcs in 60 s are now enough: the back-off comes at the second arc
    assert r["first_by_rule"]["bursts"]["seq"] == ARCS[1]
    out = capsys.readouterr().out
    assert "current_max: 100 uA -> 50 uA (tighter)" in out and "earlier" in out
    assert "caveat" in out


def test_a_whole_protocol_file_gives_its_limits_block(run_dir, tmp_path):
    f = tmp_path / "proto.yaml"
    f.write_text("name: x\nlimits:\n  current_max: 60 uA\nsteps:\n  - ramp: {to: 1 kV, rate: 5 V/s}\n")
    assert main(["whatif", str(run_dir), "--limits", str(f), "--no-plot"]) == 0
    assert result(run_dir, "proto")["changed"] == {"current_max": pytest.approx(60e-6)}


def test_user_mistakes_are_one_line_and_exit_2(run_dir, tmp_path, capsys):
    bad = tmp_path / "bad.yaml"
    bad.write_text("current_max: 50 uA\ncurent_max: 1 uA\n")
    assert main(["whatif", str(run_dir), "--limits", str(bad)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "bad.yaml:2" in err[0]
    assert main(["whatif", str(tmp_path / "nowhere")]) == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_recorded_events_are_tied_to_the_sample_they_judged():
    # The engine writes an event after reading, so its time is at or after the sample's
    # start (here 0.4 s later, a wall-clock run) and its seq may be the next one; a trip is
    # written as a verdict and again as a trip (once counted), an engine trip without an
    # action is a trip.
    from sequencer.commands.whatif import _recorded_changes
    samples = synthetic_samples()[:10]
    ev = [{"kind": "verdict", "seq": 4, "t": 3.4, "action": "hold", "rule": "step_up"},
          {"kind": "note", "seq": 5, "t": 4.4, "message": "x"},
          {"kind": "verdict", "seq": 6, "t": 5.4, "action": "trip", "rule": "current_ceiling"},
          {"kind": "trip", "seq": 6, "t": 5.4, "action": "trip", "rule": "current_ceiling"},
          {"kind": "trip", "seq": 9, "t": 8.4, "rule": "engine-comm"}]
    got = [(c["seq"], c["action"], c["rule"]) for c in _recorded_changes(ev, samples)]
    assert got == [(3, "hold", "step_up"), (5, "trip", "current_ceiling"),
                   (8, "trip", "engine-comm")]


def test_a_recorded_simulated_run_is_reproduced(tmp_path, capsys):
    # End to end: the example first-light protocol on the simulated rig (its rig file's
    # seed), recorded by the engine and recorder, then re-judged with its own limits: the
    # verdict changes are the recorded ones, sample for sample.
    from pathlib import Path
    root = Path(__file__).resolve().parent.parent
    rc = main(["run", str(root / "protocols" / "first-light.yaml"), "--rig",
               str(root / "protocols" / "sim-rig.yaml"), "--runs-dir", str(tmp_path / "runs"),
               "--quiet", "--no-report"])
    assert rc in (0, 3)
    (folder,) = list((tmp_path / "runs").iterdir())
    assert main(["whatif", str(folder), "--no-plot"]) == 0
    r = result(folder, "recorded-limits")
    assert r["recorded"] and r["comparison"]["identical"] is True
