"""``fieldrun watch`` and ``fieldrun runs`` on run folders written by the Recorder.

The recorded stream is an exponential I(V) = I0 exp(V / V0) on an integer voltage grid,
so the expected figures are known in closed form: turn-on voltage at threshold I_t is
the first grid voltage >= V0 ln(I_t / I0), and interpolating linearly in ln I between
grid points is exact for an exponential (ln I is linear in V), so the current at any
reference voltage is I0 exp(V_ref / V0) to rounding.
"""
import json
import math
import threading

import pytest

from sequencer import runfolder
from sequencer.cli import main
from sequencer.recorder import Recorder
from sequencer.sample import Sample
from drivers.clock import VirtualClock

I0 = 1e-13
GUARD = 10.0


def _write_run(runs, sample_id, v0, n=1500, end=True, trip=False, protocol="conditioning"):
    folder = runfolder.create_run_folder(runs, f"{sample_id} {protocol}")
    runfolder.write_manifest(folder, {
        "protocol": {"name": protocol}, "sample": {"id": sample_id},
        "plan": {"duration_s": n * 0.01, "steps": [
            {"index": 0, "kind": "ramp", "label": "ramp", "duration_s": n * 0.005},
            {"index": 1, "kind": "ramp", "label": "ramp on", "duration_s": n * 0.005}]}})
    clock = VirtualClock()
    rec = Recorder(folder, clock)
    rec.put_event({"kind": "step", "index": 0, "label": "ramp"})
    for k in range(n):
        v = float(k)
        rec.put_sample(Sample(seq=k, t=clock.now(), utc=clock.utc(), setpoint_v=v, voltage_v=v,
                              gap_voltage_v=v, current_a=I0 * math.exp(v / v0),
                              pressure_pa=2e-6, step_index=0 if k < n // 2 else 1,
                              step_kind="ramp"))
        clock.sleep(0.01)
    if trip:
        rec.put_event({"kind": "trip", "action": "trip", "rule": "arc", "value": 2e-3,
                       "threshold": 1e-4, "unit": "A", "message": "arc on KL-F12"})
    if end:
        rec.end("tripped" if trip else "completed", 3 if trip else 0,
                "arc" if trip else "plan finished", True)
    else:
        rec.close()
    return folder


def test_runs_json_lists_peaks_trips_and_completeness(tmp_path, capsys):
    runs = tmp_path / "runs"
    a = _write_run(runs, "KL-F12", 150.0)
    b = _write_run(runs, "KL-F12", 140.0, trip=True)
    c = _write_run(runs, "KL-Y07", 160.0, n=800, end=False)     # killed: no end record
    assert main(["runs", str(runs), "--json"]) == 0
    rows = {r["folder"]: r for r in json.loads(capsys.readouterr().out)}
    assert set(rows) == {a.name, b.name, c.name}
    ra, rb, rc = rows[a.name], rows[b.name], rows[c.name]
    assert ra["peak_voltage_v"] == 1499.0 and ra["peak_current_a"] == I0 * math.exp(1499.0 / 150.0)
    assert (ra["trips"], rb["trips"], rc["trips"]) == (0, 1, 0)
    assert (ra["outcome"], rb["outcome"], rc["outcome"]) == ("completed", "tripped", "incomplete")
    assert rc["complete"] is False and rc["peak_voltage_v"] == 799.0   # from the samples
    assert ra["duration_s"] == pytest.approx(14.99)
    assert main(["runs", str(runs)]) == 0
    table = capsys.readouterr().out
    assert "INCOMPLETE" in table and "KL-Y07" in table and "tripped" in table


def test_runs_sample_history_turn_on_current_at_ref_and_enhancement(tmp_path, capsys):
    runs = tmp_path / "runs"
    v0s = [150.0, 140.0, 130.0]            # conditioning: the current rises run by run
    folders = [_write_run(runs, "KL-F12", v0) for v0 in v0s]
    _write_run(runs, "KL-T03", 100.0)      # another sample: not in the history
    # the analysis helper's results.json: a per-form beta deep inside, and its headline
    # value for this run in "history" (which wins); a run with only the deep one
    (folders[2] / "analysis").mkdir()
    (folders[2] / "analysis" / "results.json").write_text(json.dumps({
        "branches": {"up": {"segments": [{"forms": {"FN": {"beta": 999.0}}}]}},
        "history": [{"run": "some-other-run", "beta": 1.0},
                    {"run": folders[2].name, "beta": 1234.5}]}))
    (folders[1] / "analysis").mkdir()
    (folders[1] / "analysis" / "results.json").write_text(json.dumps(
        {"fits": [{"segment": 0, "enhancement_factor": 876.5}]}))
    assert main(["runs", str(runs), "--sample", "KL-F12", "--json", "--turn-on-current", "1e-9",
                 "--at-voltage", "1234.5"]) == 0
    hist = json.loads(capsys.readouterr().out)
    assert [r["folder"] for r in hist["runs"]] == [f.name for f in folders]
    for r, v0 in zip(hist["runs"], v0s):
        assert r["turn_on_voltage_v"] == math.ceil(v0 * math.log(1e-9 / I0))
        assert r["current_at_ref_a"] == pytest.approx(I0 * math.exp(1234.5 / v0), rel=1e-12)
    assert [r["enhancement_factor"] for r in hist["runs"]] == [None, 876.5, 1234.5]
    assert main(["runs", str(runs), "--sample", "KL-X99"]) == 2     # one line, exit 2
    assert "no runs of sample" in capsys.readouterr().err


def test_watch_once_on_a_finished_and_an_incomplete_run(tmp_path, capsys):
    runs = tmp_path / "runs"
    done = _write_run(runs, "KL-F12", 150.0, trip=True)
    assert main(["watch", str(done), "--once"]) == 0
    out = capsys.readouterr().out
    assert "conditioning · KL-F12" in out
    assert "V=1499 V" in out and "step 2/2 ramp on" in out
    assert "trip: trip by arc: arc on KL-F12" in out and "watchdog=tripped" in out
    assert "ended: tripped (exit 3): arc" in out
    live = _write_run(runs, "KL-Y07", 160.0, n=300, end=False)
    assert main(["watch", str(live), "--once"]) == 0
    out = capsys.readouterr().out
    assert "V=299 V" in out and "in progress (no end record yet)" in out
    assert main(["watch", str(tmp_path), "--once"]) == 2
    assert "not a run folder" in capsys.readouterr().err


def test_watch_follows_a_live_run_and_ends_with_its_end_record(tmp_path, capsys):
    # set: a run being written in another thread; watch started on it; expected: watch
    # sees the events as they come and returns once end.json appears
    runs = tmp_path / "runs"
    folder = runfolder.create_run_folder(runs, "KL-F12 live")
    runfolder.write_manifest(folder, {"protocol": {"name": "live"}, "sample": {"id": "KL-F12"}})
    clock = VirtualClock()
    rec = Recorder(folder, clock)
    first = threading.Event()
    result = {}

    def watcher():
        result["rc"] = main(["watch", str(folder), "--plain", "--interval", "0.05"])

    for k in range(50):
        rec.put_sample(Sample(seq=k, t=clock.now(), utc=clock.utc(), setpoint_v=10.0 * k,
                              voltage_v=10.0 * k, gap_voltage_v=10.0 * k, current_a=1e-9))
        clock.sleep(0.1)
    rec.put_event({"kind": "note", "message": "first half recorded"})
    t = threading.Thread(target=watcher)
    t.start()
    rec.put_event({"kind": "operator", "message": "ctl stop from the lab bench"})
    rec.end("stopped", 4, "operator stop", True)
    t.join(GUARD)
    assert not t.is_alive() and result["rc"] == 0
    out = capsys.readouterr().out
    assert out.index("first half recorded") < out.index("ctl stop from the lab bench")
    assert out.rstrip().endswith(f"{folder}: stopped (exit 4)")
