"""Quirks and scheduled faults: each one strikes when its schedule says and replays
exactly under the same seed (seeds shown in each test)."""
import math

import pytest

from drivers.clock import VirtualClock
from simulators.instruments import SimSupply
from simulators.quirks import QuirkConfigError, Quirks, quirks_for
from simulators.stand import SimulatedStand


def supply(spec, seed):
    return SimSupply(VirtualClock(), seed=seed, quirks=Quirks("supply", spec, seed))


def replies(inst, lines):
    out = []
    for line in lines:
        r = inst.handle(line)
        out.append((r, inst.reply_delay(line)))
    return out


LINES = ["SOUR:VOLT?", "MEAS:VOLT?", "*IDN?", "SOUR:VOLT 10", "SOUR:VOLT?"] * 8


@pytest.mark.parametrize("dist", [
    {"dist": "lognormal", "median_s": 0.004, "sigma": 0.6},
    {"dist": "uniform", "low_s": 0.001, "high_s": 0.02},
    {"dist": "normal", "mean_s": 0.01, "sd_s": 0.003},
    {"dist": "exponential", "mean_s": 0.005},
])
def test_latency_distribution_is_seeded(dist):
    # seed 101 twice gives the same delays; seed 102 others; writes have no latency
    a = [d for _, d in replies(supply({"latency": dist}, 101), LINES)]
    b = [d for _, d in replies(supply({"latency": dist}, 101), LINES)]
    c = [d for _, d in replies(supply({"latency": dist}, 102), LINES)]
    assert a == b and a != c
    assert all(d >= 0 for d in a)
    assert all(d == 0 for line, d in zip(LINES, a) if "?" not in line)


def test_lognormal_latency_has_its_median():
    # 2000 draws of a lognormal with median 4 ms: the sample median within 5 %
    # (the median of a lognormal is exp(mu), any statistics text); seed 7
    q = Quirks("supply", {"latency": {"dist": "lognormal", "median_s": 0.004, "sigma": 0.5}}, 7)
    draws = sorted(q.draw_latency(n) for n in range(1, 2001))
    assert draws[1000] == pytest.approx(0.004, rel=0.05)


def test_late_reply_on_one_command_only():
    s = supply({"faults": [{"kind": "late-reply", "at_command": 3, "delay_s": 3.0}]}, 1)
    got = replies(s, ["*IDN?"] * 5)
    assert [d for _, d in got] == [0.0, 0.0, 3.0, 0.0, 0.0]
    assert all(r.startswith("FIELDRUN") for r, _ in got)     # the late reply still comes


def test_never_answer_carries_out_the_command_hang_does_not():
    s = supply({"faults": [{"kind": "never-answer", "from_command": 2}]}, 1)
    assert s.handle("SOUR:VOLT 50") is None
    assert s.handle("SOUR:VOLT 60;SOUR:VOLT?") is None
    assert s.reply_delay("SOUR:VOLT 60;SOUR:VOLT?") == math.inf
    assert s.v_set == 60.0
    h = supply({"faults": [{"kind": "hang", "from_s": 0}]}, 1)
    assert h.handle("SOUR:VOLT 60;SOUR:VOLT?") is None
    assert h.v_set == 0.0 and h.reply_delay("*IDN?") == math.inf


def test_slow_instrument_in_a_time_window():
    s = supply({"faults": [{"kind": "slow", "from_s": 5, "until_s": 10, "delay_s": 0.4}]}, 1)
    clock = s.clock
    delays = []
    for t in (1, 5, 9.9, 10):
        clock.sleep_until(t)
        s.handle("MEAS:VOLT?")
        delays.append(s.reply_delay("MEAS:VOLT?"))
    assert delays == [0.0, 0.4, 0.4, 0.0]


def test_garbage_and_truncated_replies_replay_under_a_seed():
    spec = {"faults": [{"kind": "garbage", "probability": 0.3},
                       {"kind": "truncated", "probability": 0.6, "match": "*IDN"}]}
    a = [r for r, _ in replies(supply(spec, 42), LINES)]
    b = [r for r, _ in replies(supply(spec, 42), LINES)]
    c = [r for r, _ in replies(supply(spec, 43), LINES)]
    assert a == b and a != c
    idn = "FIELDRUN,SIM-SUPPLY"
    assert any(r is not None and not r.startswith(idn) and "E+" not in r for r in a)  # junk
    s = supply(spec, 42)
    replies(s, LINES)
    kinds = {k for _, _, k in s.quirks.log}
    assert kinds == {"garbage", "truncated"}


def test_drop_connection_on_schedule():
    s = supply({"faults": [{"kind": "drop-connection", "at_command": 2}]}, 1)
    s.handle("*IDN?")
    with pytest.raises(ConnectionResetError):
        s.handle("*IDN?")
    assert s.handle("*IDN?").startswith("FIELDRUN")


def test_error_flood_overflows_and_never_empty_queue():
    # SCPI-99 vol. 2, 21.8.1: a full queue ends in -350
    s = supply({"error_queue_length": 5, "faults": [{"kind": "error-flood", "until_s": 1}]}, 1)
    for _ in range(10):
        s.handle("SOUR:VOLT 1")
    s.clock.sleep_until(2.0)
    codes = [int(s.handle("SYST:ERR?").split(",")[0]) for _ in range(6)]
    assert codes == [-300, -300, -300, -300, -350, 0]
    n = supply({"faults": [{"kind": "never-empty-errors"}]}, 1)
    assert all(not n.handle("SYST:ERR?").startswith("0,") for _ in range(40))


def test_probability_schedule_is_independent_of_other_instruments():
    # seed 9: which supply commands are hit does not depend on what the ammeter is asked
    q = {"supply": {"faults": [{"kind": "late-reply", "probability": 0.5}]}}

    def hits(extra_ammeter_queries):
        st = SimulatedStand({"quirks": q}, VirtualClock(), seed=9)
        out = []
        for k in range(20):
            for _ in range(extra_ammeter_queries):
                st.ammeter.handle("SYST:ERR?")
            st.supply.handle("*IDN?")
            out.append(st.supply.reply_delay("*IDN?"))
        return out

    assert hits(0) == hits(3)
    assert 0 < sum(1 for d in hits(0) if d > 0) < 20


@pytest.mark.parametrize("bad, words", [
    ({"supply": {"faults": [{"kind": "filament-off"}]}}, "not known for the supply"),
    ({"supply": {"faults": [{"at_command": 3}]}}, "needs a 'kind'"),
    ({"supply": {"faults": [{"kind": "hang", "probability": 2}]}}, "probability"),
    ({"supply": {"latency": {"dist": "cauchy"}}}, "dist must be"),
    ({"toaster": {}}, "unknown instrument"),
    ({"supply": {"faults": [{"kind": "hang", "at_command": 1, "from_command": 2}]}}, "not both"),
])
def test_bad_quirk_blocks_are_named(bad, words):
    with pytest.raises(QuirkConfigError, match=words):
        quirks_for("supply", {"quirks": bad}, 0)


def test_schedule_times_count_from_the_stand_start():
    # a clock already at 5000 s (a wall clock's monotonic time, say): from_s 10 means 10 s
    # after the stand was built, not clock time 10
    clock = VirtualClock(start=5000.0)
    st = SimulatedStand({"quirks": {"gauge": {"faults": [{"kind": "filament-off", "from_s": 10}]}}},
                        clock, seed=4)
    clock.sleep_until(5009.0)
    assert st.gauge.handle("PR?").split(",")[0] in {"0", "1"}
    clock.sleep_until(5010.0)
    assert st.gauge.handle("PR?").startswith("3,")


@pytest.mark.parametrize("cfg, words", [
    ({"supply": {"slew_v_per_sec": 100}}, "simulation.supply: unknown setting 'slew_v_per_sec' \\(did you mean 'slew_v_per_s'\\?\\)"),
    ({"gauge": {"unit": "PSI"}}, "simulation.gauge.unit"),
    ({"supply": {"host_loss": "maybe"}}, "host_loss"),
    ({"seeds": 3}, "simulation: unknown setting 'seeds'"),
])
def test_bad_instrument_settings_are_named(cfg, words):
    with pytest.raises(ValueError, match=words):
        SimulatedStand(cfg, VirtualClock(), seed=0)


def test_whole_stand_replays_exactly_under_a_seed():
    # same seed (17), same commands on the virtual clock -> the same replies, noise
    # included; another seed (18) -> other noise. Nothing depends on wall time.
    def session(seed):
        clock = VirtualClock()
        st = SimulatedStand({"cathode": {"emitters": 1000}}, clock, seed=seed)
        st.supply.handle("SOUR:CURR 5e-5;SOUR:VOLT 600;OUTP ON")
        st.ammeter.handle("CONF:CURR")
        out = []
        for k in range(15):
            clock.sleep(0.1)
            out += [st.supply.handle("MEAS:VOLT?"), st.ammeter.handle("READ?"),
                    st.gauge.handle("PR?")]
        return out

    assert session(17) == session(17)
    assert session(17) != session(18)
