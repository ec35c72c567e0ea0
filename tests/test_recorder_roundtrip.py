"""What the recorder writes reads back exactly.

Expectation: a double printed with Python's ``repr()`` is the shortest string that
parses back to the same double (Python docs, "Floating point arithmetic: issues and
limitations"; the round-trip guarantee of David Gay's dtoa, Python >= 3.1). So every
float column of samples.csv must come back bit for bit (-0.0 keeps its sign, subnormals
survive, inf stays inf; NaN comes back as a NaN).
"""
import math
import tempfile

from hypothesis import given, settings, strategies as st

from sequencer import runfolder
from sequencer.recorder import Recorder
from sequencer.sample import Sample
from drivers.clock import VirtualClock

from recorder_stream import same_float, same_sample, stream_sample

any_double = st.floats(allow_nan=True, allow_infinity=True)
FLOAT_FIELDS = ("t", "utc", "setpoint_v", "voltage_v", "gap_voltage_v", "current_a",
                "supply_current_a", "range_a", "pressure_pa", "pressure_age_s", "t_v", "t_i", "t_p")


@st.composite
def samples(draw, seq=0):
    vals = {f: draw(any_double) for f in FLOAT_FIELDS}
    return Sample(seq=seq, step_index=draw(st.integers(0, 10 ** 6)),
                  step_kind=draw(st.text(max_size=12)),
                  interlock_ok=draw(st.sampled_from([None, True, False])),
                  flags=tuple(draw(st.lists(st.sampled_from(
                      ["cc", "overflow", "invalid", "stale", "interlock-open"]), max_size=3, unique=True))),
                  **vals)


@settings(max_examples=300, deadline=None)
@given(samples())
def test_one_row_round_trips_bit_for_bit(s):
    # set: any doubles in every float column, any step text; expected: the same Sample back
    cols = runfolder.parse_samples((runfolder.HEADER + "\n" + runfolder.format_row(s)).encode())
    assert len(cols["seq"]) == 1
    back = runfolder.sample_from_row(cols, 0)
    for f in FLOAT_FIELDS:
        assert same_float(getattr(back, f), getattr(s, f)), (f, getattr(s, f), getattr(back, f))
    assert back.interlock_ok == s.interlock_ok
    assert back.flags == s.flags
    # control characters (NUL, CR, LF, ...) are written as spaces: one row is one line
    assert back.step_kind == runfolder.text_field(s.step_kind)


@settings(max_examples=15, deadline=None)
@given(st.lists(samples(), min_size=1, max_size=40))
def test_recorder_round_trips_a_stream_of_arbitrary_doubles(batch):
    # set: a stream of arbitrary samples through the writer thread and the files
    batch = [Sample(**{**s.__dict__, "seq": k, "step_kind": "ramp"}) for k, s in enumerate(batch)]
    with tempfile.TemporaryDirectory() as d:
        folder = runfolder.create_run_folder(d, "roundtrip")
        rec = Recorder(folder, VirtualClock())
        assert all(rec.put_sample(s) for s in batch)
        assert rec.end("completed", 0, "done", True)
        back = list(runfolder.RunFolder(folder).iter_samples())
    assert len(back) == len(batch)
    assert all(same_sample(a, b) for a, b in zip(batch, back))


def test_awkward_stream_and_events_round_trip(tmp_path):
    # set: 3000 samples of the synthetic stream (thirds, -0.0, 5e-324, NaN with flags)
    # and events carrying exact floats, a NaN and an infinity
    folder = runfolder.create_run_folder(tmp_path, "KL-F12 conditioning")
    rec = Recorder(folder, VirtualClock())
    expected = [stream_sample(k) for k in range(3000)]
    for s in expected:
        assert rec.put_sample(s)
    ev = {"kind": "verdict", "action": "hold", "rule": "slope", "value": 1 / 3,
          "threshold": math.inf, "unit": "A/s", "message": "current rising", "extra": math.nan}
    assert rec.put_event(ev)
    assert rec.end("completed", 0, "plan finished", True)
    rf = runfolder.RunFolder(folder)
    back = list(rf.iter_samples())
    assert [s.seq for s in back] == list(range(3000))
    assert all(same_sample(a, b) for a, b in zip(expected, back))
    (verdict,) = rf.events("verdict")
    assert verdict["value"] == 1 / 3               # exact: json writes repr()
    assert verdict["threshold"] is None and verdict["extra"] is None   # strict JSON: null
    assert verdict["seq"] == 2999                  # filled in: the last sample queued
    cols = rf.samples()
    assert cols["cc"].dtype == bool and cols["cc"].sum() == sum(1 for s in expected if s.cc)
    assert math.isnan(cols["interlock"][0]) and cols["interlock"][1] == 1.0 and cols["interlock"][2] == 0.0
    assert rf.complete and rf.outcome == "completed"
    assert rf.end["summary"]["samples"] == 3000
    peak_v = max(s.voltage_v for s in expected)
    assert rf.end["summary"]["peak_voltage_v"] == peak_v
