"""Instrument transcripts as test fixtures (issue 9, item 6): record with
``drivers.transcript.TranscriptTransport``, play back with
``simulators.replay.TranscriptReplay``.

What is set: the project's supply driver on the simulated supply (in-process, virtual
clock), recorded while it arms, sets 250 V, measures and switches off; then the same
driver, doing the same, against the replay of that file. What is expected: the replayed
session reads back exactly the recorded values (the replay answers from the file), the
safe-off is confirmed, and the replay saw exactly the lines the instrument heard
(``mismatches == []``). Then a recorded timeout is replayed as a timeout, and a driver
that says something else is caught as a mismatch.
"""
import json

import pytest

from drivers.clock import VirtualClock
from drivers.transcript import TranscriptTransport, read_transcript
from drivers.transport_inproc import InprocTransport
from drivers.supply import ScpiSupply
from drivers.errors import DriverError
from simulators.replay import TranscriptReplay


def _session(transport, clock):
    sup = ScpiSupply(transport, "generic-scpi-supply", name="hv", clock=clock)
    sup.identify()
    sup.arm(315.0, 1e-4)
    sup.output(True)
    sup.set_voltage(250.0)
    clock.sleep(2.0)
    v = sup.measure_voltage()
    report = sup.safe_off()
    return v, report


def _record(tmp_path):
    from simulators.stand import SimulatedStand
    clock = VirtualClock()
    sim = SimulatedStand({}, clock, seed=11)
    path = tmp_path / "hv.jsonl"
    t = TranscriptTransport(InprocTransport(sim.interpreter("supply"), "sim:hv", 0.2, clock), path)
    v, report = _session(t, clock)
    t.close()
    return path, v, report


def test_record_then_replay_gives_the_same_session(tmp_path):
    path, v_rec, rep_rec = _record(tmp_path)
    recs = read_transcript(path)
    ops = [r["op"] for r in recs]
    assert ops[-1] == "close" and ("exchange" in ops or "query" in ops)
    assert all("t" in r and "utc" in r and "elapsed_s" in r for r in recs)
    assert [r["n"] for r in recs] == list(range(1, len(recs) + 1))
    assert rep_rec.confirmed and 249.0 < v_rec < 251.0

    replay = TranscriptReplay(path)
    clock = VirtualClock()
    v_rep, rep_rep = _session(InprocTransport(replay, "replay:hv", 0.2, clock), clock)
    assert v_rep == v_rec                     # the recorded reply, read back exactly
    assert rep_rep.confirmed
    assert replay.mismatches == [] and replay.finished


def test_a_recorded_timeout_replays_as_a_timeout(tmp_path):
    recs = [{"op": "query", "query": "*IDN?", "reply": "FIELDRUN,SIM-SUPPLY,S1,X"},
            {"op": "query", "query": "MEAS:VOLT?", "error": "TransportTimeout: no reply"}]
    replay = TranscriptReplay(recs)
    t = InprocTransport(replay, "replay:hv", 0.05, VirtualClock(), sentinel=None)
    assert t.query("*IDN?").startswith("FIELDRUN")
    with pytest.raises(DriverError):
        t.query("MEAS:VOLT?")
    assert replay.mismatches == []


def test_a_driver_saying_something_else_is_a_mismatch():
    replay = TranscriptReplay([{"op": "write", "cmd": "OUTP OFF"},
                               {"op": "write", "cmd": "VOLT 0"}])
    assert replay.handle("VOLT 0") is None           # OUTP OFF was skipped: caught
    assert replay.mismatches == ["skipped 'OUTP OFF' (host sent 'VOLT 0')"]
    replay.handle("OUTP ON")
    assert "unexpected 'OUTP ON'" in replay.mismatches[-1]


def test_rig_option_records_a_transcript(tmp_path):
    from drivers import open_instrument
    from simulators.stand import SimulatedStand
    clock = VirtualClock()
    sim = SimulatedStand({}, clock, seed=2)
    path = tmp_path / "t" / "am.jsonl"
    am = open_instrument("ammeter", "scpi", "sim:ammeter", clock=clock,
                         options={"lock": False, "transcript": str(path)},
                         interpreter=sim.interpreter("ammeter"))
    am.identify()
    am.close()
    recs = read_transcript(path)
    assert any(r.get("query") == "*IDN?" and "SIMULATED" in r.get("reply", "") for r in recs)
    json.dumps(recs)   # plain JSON, nothing to evaluate
