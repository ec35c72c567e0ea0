"""Lab notebook: each watchdog rule in isolation, on hand-made Sample streams.

Every test sets a stream, names the rule it runs (``Watchdog(..., rules=[name])``, nothing
else judges), and asserts on the verdict, the sample (index and sample time) on which it
comes, and its release. Thresholds are the defaults of ``sequencer.limits.PARAMS``, which are
common practice, no source; the tests check the rules do what the table says at its edges
(just below / just above), not that the numbers are right for a given fibre.

Unless a test says otherwise: 1 s sample period, constant setpoint 1000 V read back exactly,
chamber at 1e-5 Pa, all readings fresh.
"""
import math

import pytest

from sequencer.fnfit_online import SIGMA_FLOOR
from sequencer.limits import Limits
from sequencer.rules import Context
from sequencer.sample import (FLAG_CC, FLAG_GAUGE_UNDER, FLAG_GAUGE_UNKNOWN, FLAG_INVALID,
                              FLAG_OVERFLOW, FLAG_SUPPLY_TRIP, Action, Sample)
from sequencer.watchdog import Watchdog

LIM = Limits.defaults()
C, H, B, R, T = Action.CONTINUE, Action.HOLD, Action.BACK_OFF, Action.RAMP_DOWN, Action.TRIP


def smp(k, i, v=1000.0, dt=1.0, **kw):
    """Sample number k at t = k*dt with current i (A) at setpoint v (V)."""
    t = kw.pop("t", k * dt)
    base = dict(seq=k, t=t, utc=1.8e9 + t, setpoint_v=v, voltage_v=v, gap_voltage_v=v,
                current_a=i, pressure_pa=1e-5, pressure_age_s=0.0, t_v=t, t_i=t, t_p=t,
                step_kind="hold")
    base.update(kw)
    return Sample(**base)


def run(rule, samples, limits=LIM, ctx=None, survived=None):
    wd = Watchdog(limits, survived, rules=[rule])
    return [wd.judge(s, ctx) for s in samples], wd


def first(verdicts, action):
    """Index of the first verdict with ``action`` (None if none)."""
    return next((k for k, v in enumerate(verdicts) if v.action is action), None)


def actions(verdicts):
    return [v.action for v in verdicts]


# ------------------------------------------------------------------ ceilings (trip)
def test_current_ceiling_edges_and_zero_extra_samples():
    # 10 samples at 50 uA, then 99.9 uA (just below 100 uA) stays, 100.1 uA trips on that sample.
    below = [smp(k, 50e-6) for k in range(10)] + [smp(10, 99.9e-6)]
    v, _ = run("current_ceiling", below)
    assert actions(v) == [C] * 11
    above = [smp(k, 50e-6) for k in range(10)] + [smp(10, 100.1e-6), smp(11, 50e-6)]
    v, _ = run("current_ceiling", above)
    assert first(v, T) == 10 and v[10].rule == "current_ceiling"
    assert v[10].value == pytest.approx(100.1e-6) and v[10].threshold == 100e-6
    assert v[10].unit == "A" and v[10].message and v[10].release


def test_current_ceiling_also_reads_the_supply_monitor():
    # the ammeter reads 10 uA, but the supply's monitor sees 120 uA (current going elsewhere)
    v, _ = run("current_ceiling", [smp(0, 10e-6, supply_current_a=120e-6)])
    assert v[0].action is T and v[0].value == pytest.approx(120e-6)


def test_power_ceiling_edges():
    # 0.5 W default; at 5000 V that is 100 uA. Current ceiling raised so only power speaks.
    lim = LIM.replace(current_max=1e-3, voltage_max=6000.0)
    v, _ = run("power_ceiling", [smp(0, 99.9e-6, v=5000.0), smp(1, 100.1e-6, v=5000.0)], lim)
    assert actions(v) == [C, T]
    assert v[1].value == pytest.approx(5000.0 * 100.1e-6) and v[1].unit == "W"


def test_voltage_ceiling_edges():
    v, _ = run("voltage_ceiling", [smp(0, 1e-6, v=4999.0), smp(1, 1e-6, v=5001.0)])
    assert actions(v) == [C, T]


def test_interlock_open_trips():
    v, _ = run("interlock", [smp(0, 1e-6, interlock_ok=True), smp(1, 1e-6, interlock_ok=None),
                             smp(2, 1e-6, interlock_ok=False)])
    assert actions(v) == [C, C, T]


# ------------------------------------------------------------------ supply state
def test_supply_cc_mode_trips_by_default_on_that_sample():
    s = [smp(0, 1e-6), smp(1, 1e-6, flags=(FLAG_CC,))]
    v, _ = run("supply_state", s)
    assert actions(v) == [C, T] and v[1].rule == "supply_state"


def test_supply_own_trip_flag_is_its_own_event():
    v, _ = run("supply_state", [smp(0, 1e-6, flags=(FLAG_SUPPLY_TRIP,))])
    assert v[0].action is T and "own" in v[0].message


def test_supply_cc_backs_off_when_configured_then_holds_and_releases():
    # supply_cc_trips = 0: CC at t=1..2 backs off once, holds, releases backoff_hold (30 s)
    # after the last CC sample (t=2), i.e. at t=32.
    lim = LIM.replace(supply_cc_trips=0.0)
    s = [smp(k, 1e-6, flags=(FLAG_CC,) if k in (1, 2) else ()) for k in range(40)]
    v, _ = run("supply_state", s, lim)
    assert actions(v)[:4] == [C, B, H, H]
    assert first(v[3:], C) + 3 == 32
    assert v[2].release.startswith("supply back in constant-voltage mode")


# ------------------------------------------------------------------ bursts
def spike_stream(spike_times, z, n=200, i0=1e-6, flags_at=None):
    """Constant 1 uA; at each t in spike_times one sample z robust sigmas up. With a
    noiseless baseline the robust sigma is its floor SIGMA_FLOOR (fnfit_online)."""
    out = []
    for k in range(n):
        if k in spike_times:
            if flags_at == "overflow":
                out.append(smp(k, math.nan, flags=(FLAG_OVERFLOW,)))
            else:
                out.append(smp(k, i0 * math.exp(z * SIGMA_FLOOR)))
        else:
            out.append(smp(k, i0))
    return out


def test_spike_threshold_edges():
    # three spikes within 60 s: at 5.1 sigma they back off (on the third), at 4.9 nothing.
    v, _ = run("bursts", spike_stream({20, 30, 40}, 4.9))
    assert set(actions(v)) == {C}
    v, _ = run("bursts", spike_stream({20, 30, 40}, 5.1))
    assert first(v, B) == 40 and v[40].value == 3 and v[40].threshold == 3
    assert actions(v).count(B) == 1


def test_backoff_window_edges_in_seconds():
    # spikes at t = 20, 50, 79: the third is 59 s after the first -> back off.
    v, _ = run("bursts", spike_stream({20, 50, 79}, 8.0))
    assert first(v, B) == 79
    # at t = 20, 50, 80: the first has left the 60 s window (t > 80 - 60 excludes 20).
    v, _ = run("bursts", spike_stream({20, 50, 80}, 8.0))
    assert first(v, B) is None


def test_backoff_then_hold_until_backoff_hold_without_spike():
    v, _ = run("bursts", spike_stream({20, 30, 40}, 8.0))
    assert actions(v)[40:42] == [B, H]
    # backoff_hold = 30 s after the last spike at t=40: held through t=69, free at t=70.
    assert v[69].action is H and v[70].action is C
    assert v[41].release == "no spike for backoff_hold s"


def test_a_two_sample_spike_is_one_spike():
    v, _ = run("bursts", spike_stream({20, 21, 30, 31}, 8.0))
    assert first(v, B) is None      # only two onsets


def test_burst_train_trips_on_the_tenth_spike():
    times = set(range(20, 20 + 10 * 40, 40))       # every 40 s: 10 spikes in 360 s
    v, _ = run("bursts", spike_stream(times, 8.0, n=500))
    tenth = sorted(times)[9]
    assert first(v, T) == tenth and v[tenth].value == 10
    assert all(x.action is not T for x in v[:tenth])


def test_single_overflow_counts_as_an_arc():
    # ammeter overflow (reading NaN + overflow flag) three times in 60 s: a burst train,
    # judged exactly like three spikes.
    v, _ = run("bursts", spike_stream({20, 30, 40}, 0, flags_at="overflow"))
    assert first(v, B) == 40


def test_spikes_are_judged_against_the_running_fn_fit_on_a_ramp():
    # A synthetic FN cathode I = A V^2 exp(-B/V) (A = 1e-8 A/V^2, B = 1.5e4 V: invented
    # constants, the Fowler–Nordheim form) on a 5 V/s ramp from 900 V: ln I rises by ~6
    # over the ramp, yet no spike is called; three 10-sigma spikes on top back off.
    A, Bv = 1e-8, 1.5e4

    def ramp(spikes):
        out = []
        for k in range(150):
            vk = 900.0 + 5.0 * k
            i = A * vk * vk * math.exp(-Bv / vk)
            if k in spikes:
                i *= math.exp(10 * SIGMA_FLOOR)
            out.append(smp(k, i, v=vk, step_kind="ramp"))
        return out

    ctx = Context.for_step("ramp")
    v, _ = run("bursts", ramp(set()), ctx=ctx)
    assert set(actions(v)) == {C}
    v, _ = run("bursts", ramp({100, 110, 120}), ctx=ctx)
    assert first(v, B) == 120


# ------------------------------------------------------------------ runaway
def growth(rate, n=40, i0=1e-6, dt=1.0):
    return [smp(k, i0 * math.exp(rate * k * dt), dt=dt) for k in range(n)]


def test_runaway_rate_edges_ramp_down_after_runaway_time():
    # runaway_rate 1 %/s sustained runaway_time 5 s, judged on the 3-sample median of ln I
    # attributed to the middle sample (rules.Median3): medians exist from t = 1 (samples
    # 0..2) and lag one sample, so 5 s of them first span at t = 7. At 1.01 %/s the slope is
    # exact and ramps down there; at 0.99 %/s never.
    v, _ = run("runaway", growth(0.0099))
    assert set(actions(v)) == {C}
    v, _ = run("runaway", growth(0.0101))
    assert first(v, R) == 7 and v[7].value == pytest.approx(0.0101)


def test_runaway_trip_rate_edges():
    # runaway_trip_rate 10 %/s over runaway_trip_time 1 s, on at least two intervals of
    # medians: medians at t = 1, 2, 3 are there at sample 4, where 10.1 %/s trips; 9.9 %/s
    # does not trip (it ramps down at t = 7, as it is far above 1 %/s).
    v, _ = run("runaway", growth(0.101))
    assert first(v, T) == 4 and v[4].value == pytest.approx(0.101)
    v, _ = run("runaway", growth(0.099))
    assert first(v, T) is None and first(v, R) == 7


def test_a_single_arc_does_not_read_as_runaway():
    s = [smp(k, 1e-6 * (30.0 if k == 10 else 1.0)) for k in range(30)]
    v, _ = run("runaway", s)
    assert set(actions(v)) == {C}


def test_runaway_is_judged_only_at_constant_voltage():
    # the setpoint steps by 10 V every sample and the current grows 20 %/s: a ramp, not a runaway
    s = [smp(k, 1e-6 * math.exp(0.2 * k), v=1000.0 + 10 * k, step_kind="ramp") for k in range(30)]
    v, _ = run("runaway", s, ctx=Context.for_step("ramp"))
    assert set(actions(v)) == {C}


# ------------------------------------------------------------------ collapse
def test_collapse_edges_and_flag():
    # collapse_fraction 0.8 within 3 samples: a fall to 0.21 uA from 1 uA (79 %) goes on,
    # to 0.19 uA (81 %) ramps down on that sample and marks the watchdog collapsed.
    s = [smp(k, 1e-6) for k in range(10)] + [smp(10, 0.21e-6), smp(11, 0.21e-6)]
    v, wd = run("collapse", s)
    assert set(actions(v)) == {C} and not wd.collapsed
    s = [smp(k, 1e-6) for k in range(10)] + [smp(10, 0.19e-6)]
    v, wd = run("collapse", s)
    assert first(v, R) == 10 and v[10].value == pytest.approx(0.81) and wd.collapsed
    assert wd.state.collapsed


def test_collapse_within_collapse_samples_only():
    # 81 % over exactly 3 samples fires; the same fall spread over 4 samples (each 0.66x,
    # 71 % over any 3) does not.
    f3 = 0.19 ** (1 / 3)
    s = [smp(k, 1e-6) for k in range(10)] + [smp(10 + j, 1e-6 * f3 ** (j + 1)) for j in range(3)]
    v, _ = run("collapse", s)
    assert first(v, R) == 12
    f4 = 0.19 ** (1 / 4)
    s = [smp(k, 1e-6) for k in range(10)] + [smp(10 + j, 1e-6 * f4 ** (j + 1)) for j in range(4)]
    v, _ = run("collapse", s)
    assert first(v, R) is None


def test_no_collapse_while_the_voltage_is_lowered_or_below_the_floor():
    s = [smp(k, 1e-6, v=1000.0) for k in range(5)] + [smp(5, 0.1e-6, v=900.0)]
    v, _ = run("collapse", s)
    assert first(v, R) is None
    s = [smp(k, 0.9e-9) for k in range(5)] + [smp(5, 0.01e-9)]     # below collapse_min_current
    v, _ = run("collapse", s)
    assert first(v, R) is None


# ------------------------------------------------------------------ fluctuation
def test_fluctuation_edges_over_the_window_and_release():
    # currents alternating 1 uA * (1 +/- a): population std/mean is exactly a.
    def alt(a, n):
        return [smp(k, 1e-6 * (1 + a * (-1) ** k)) for k in range(n)]
    v, _ = run("fluctuation", alt(0.49, 200))
    assert set(actions(v)) == {C}
    v, _ = run("fluctuation", alt(0.51, 200))
    assert first(v, H) == 120          # fluctuation_window 120 s: judged once full
    assert v[120].value == pytest.approx(0.51, rel=1e-2)
    # release: after a steady stretch the spread falls back below 0.5
    s = alt(0.51, 130) + [smp(k, 1e-6) for k in range(130, 300)]
    v, _ = run("fluctuation", s)
    k_rel = first(v[130:], C) + 130
    assert v[129].action is H and 130 < k_rel < 300


# ------------------------------------------------------------------ step up
def test_step_up_edges_and_release():
    # step_up_factor 3 at constant voltage, judged on the 3-sample median: a step to 3.1 uA
    # at t = 10 is seen at t = 11 (median delay of one sample) and holds step_up_hold 10 s.
    s = [smp(k, 1e-6) for k in range(10)] + [smp(k, 2.9e-6) for k in range(10, 40)]
    v, _ = run("step_up", s)
    assert set(actions(v)) == {C}
    s = [smp(k, 1e-6) for k in range(10)] + [smp(k, 3.1e-6) for k in range(10, 40)]
    v, _ = run("step_up", s)
    assert first(v, H) == 11 and v[11].value == pytest.approx(3.1)
    assert v[20].action is H and v[21].action is C


def test_a_single_spike_is_not_a_step():
    s = [smp(k, 1e-6 * (10.0 if k == 10 else 1.0)) for k in range(30)]
    v, _ = run("step_up", s)
    assert set(actions(v)) == {C}


# ------------------------------------------------------------------ new maximum
def test_new_maximum_edges_confirmation_and_release():
    # survived 1 uA before, new_max_factor 2: 1.99 uA goes on; 2.01 uA holds from the first
    # 3-sample median (sample 2) and is accepted after new_max_confirm (10 s) steady, t = 12.
    v, wd = run("new_maximum", [smp(k, 1.99e-6) for k in range(20)], survived=1e-6)
    assert set(actions(v)) == {C}
    v, wd = run("new_maximum", [smp(k, 2.01e-6) for k in range(20)], survived=1e-6)
    assert actions(v)[:13] == [C, C] + [H] * 10 + [C]
    assert wd.state.survived_max_current == pytest.approx(2.01e-6)
    assert v[2].threshold == pytest.approx(2e-6)


def test_new_maximum_rising_again_restarts_confirmation():
    s = [smp(k, 2.5e-6) for k in range(5)] + [smp(k, 6e-6) for k in range(5, 30)]
    v, _ = run("new_maximum", s, survived=1e-6)
    # the median sees 6 uA at t = 6; confirmation restarts there and ends at t = 16
    assert v[15].action is H and v[16].action is C


def test_new_maximum_without_history_starts_from_the_first_current():
    v, wd = run("new_maximum", [smp(k, 1e-6) for k in range(5)])
    assert set(actions(v)) == {C} and wd.state.survived_max_current == 1e-6


# ------------------------------------------------------------------ pressure
def test_pressure_ceiling_edges():
    v, _ = run("pressure_ceiling", [smp(0, 1e-6, pressure_pa=0.99e-3),
                                    smp(1, 1e-6, pressure_pa=1.01e-3)])
    assert actions(v) == [C, T] and v[1].unit == "Pa"


def test_unknown_pressure_trips_flag_or_nan():
    v, _ = run("gauge_unknown", [smp(0, 1e-6), smp(1, 1e-6, pressure_pa=math.nan,
                                                     flags=(FLAG_GAUGE_UNKNOWN,))])
    assert actions(v) == [C, T]
    v, _ = run("gauge_unknown", [smp(0, 1e-6, pressure_pa=math.nan)])
    assert actions(v) == [T]
    # under-range is a (very low) pressure, not an unknown one
    v, _ = run("gauge_unknown", [smp(0, 1e-6, pressure_pa=math.nan, flags=(FLAG_GAUGE_UNDER,))])
    assert actions(v) == [C]
    # a rig without a gauge: the pressure rules stay quiet
    v, _ = run("gauge_unknown", [smp(0, 1e-6, pressure_pa=math.nan)], ctx=Context(has_gauge=False))
    assert actions(v) == [C]


def test_pressure_burst_edges_backoff_and_release():
    # pressure_burst_factor 3 within 10 s: 1e-5 -> 2.9e-5 goes on; -> 3.1e-5 backs off once,
    # then holds until backoff_hold (30 s) after the last high reading (t = 12).
    s = [smp(k, 1e-6, pressure_pa=1e-5 if k < 10 else 2.9e-5) for k in range(30)]
    v, _ = run("pressure_burst", s)
    assert set(actions(v)) == {C}
    s = [smp(k, 1e-6, pressure_pa=3.1e-5 if k in (10, 11, 12) else 1e-5) for k in range(60)]
    v, _ = run("pressure_burst", s)
    assert actions(v)[9:13] == [C, B, H, H]
    assert v[41].action is H and v[42].action is C


def test_pressure_rising_with_current_holds():
    # over 60 s the current doubles and the pressure rises 40 % (goes on) or 60 % (holds)
    def s(rise, i_end=2e-6):
        return [smp(k, 1e-6 + (i_end - 1e-6) * k / 30, pressure_pa=1e-5 * (1 + rise * k / 30))
                for k in range(31)]
    v, _ = run("pressure_rise", s(0.4))
    assert set(actions(v)) == {C}
    v, _ = run("pressure_rise", s(0.6))
    # 1 + 0.6 k/30 > 1.5 first at k = 26
    assert first(v, H) == 26
    v, _ = run("pressure_rise", s(0.6, i_end=0.5e-6))    # current falling: not this rule
    assert set(actions(v)) == {C}


# ------------------------------------------------------------------ staleness
def test_invalid_current_beyond_stale_time_trips():
    # 0.5 s samples; valid until t = 1.0, then invalid: age reaches stale_time (2 s) at t = 3.0
    s = [smp(k, 1e-6 if k <= 2 else math.nan, dt=0.5, flags=() if k <= 2 else (FLAG_INVALID,))
         for k in range(12)]
    v, _ = run("staleness", s)
    assert first(v, T) == 6 and v[6].value == pytest.approx(2.0) and v[5].action is C


def test_a_single_overflow_is_a_reading_a_lasting_one_is_not():
    # 1 s samples, stale_time 2 s. Overflows at t = 3 and t = 5 between valid readings:
    # each is an arc, not a stale reading.
    s = [smp(k, math.nan if k in (3, 5) else 1e-6, flags=(FLAG_OVERFLOW,) if k in (3, 5) else ())
         for k in range(10)]
    v, _ = run("staleness", s)
    assert set(actions(v)) == {C}
    # over range from t = 3 on: the first overflow counts (t = 3), so the age reaches 2 s
    # at t = 5 and it trips there
    s = [smp(k, math.nan if k >= 3 else 1e-6, flags=(FLAG_OVERFLOW,) if k >= 3 else ())
         for k in range(10)]
    v, _ = run("staleness", s)
    assert first(v, T) == 5 and v[5].message == "ammeter over range for too long"


def test_an_overflow_after_auto_ranging_up_does_not_trip_the_ceiling():
    # An auto-ranging ammeter answers the overload value on the reading that makes it range
    # up and reports the new, higher range (here 200 uA, above the 100 uA ceiling): that
    # is no proof of a current above 200 uA, so the ceiling does not trip on it.
    v, _ = run("current_ceiling", [smp(0, 19e-6, range_a=20e-6),
                                   smp(1, math.nan, range_a=200e-6, flags=(FLAG_OVERFLOW,))])
    assert actions(v) == [C, C]


def test_a_reused_old_reading_is_stale():
    # the current value looks valid but its reading time t_i stopped at 1.0
    s = [smp(k, 1e-6, t_i=min(k, 1.0)) for k in range(6)]
    v, _ = run("staleness", s)
    assert first(v, T) == 3


def test_old_pressure_reading_trips_after_pressure_stale_time():
    s = [smp(k, 1e-6, pressure_age_s=float(k), t_p=math.nan) for k in range(15)]
    v, _ = run("staleness", s)
    assert first(v, T) == 10 and "pressure" in v[10].message


# ------------------------------------------------------------------ setpoint following
def test_supply_off_its_setpoint_trips_after_setpoint_time():
    # a supply that steps at once: 20.5 V low (tolerance 20 V) from t = 0 trips at t = 3 s
    v, _ = run("setpoint", [smp(k, 1e-6, voltage_v=1000.0 - 20.5) for k in range(6)])
    assert first(v, T) == 3 and v[3].value == pytest.approx(20.5)
    v, _ = run("setpoint", [smp(k, 1e-6, voltage_v=1000.0 - 19.5) for k in range(20)])
    assert set(actions(v)) == {C}


def test_setpoint_following_allows_for_the_programmed_slew():
    # setpoint jumps 1000 -> 1500 V at t = 1; the supply is programmed to slew 10 V/s and
    # does exactly that: 50 s behind its setpoint, never off the allowed band.
    s = [smp(k, 1e-6, v=1000.0 if k < 1 else 1500.0,
             voltage_v=min(1500.0, 1000.0 + 10.0 * max(0, k - 1))) for k in range(70)]
    v, _ = run("setpoint", s, ctx=Context(slew_v_per_s=10.0))
    assert set(actions(v)) == {C}
    # the same readings with a supply assumed to step at once: the band is the old and new
    # setpoint on the sample of the jump (t = 1), then 1500 V alone; off by 490 V from t = 2,
    # so it trips setpoint_time (3 s) later, at t = 5.
    v, _ = run("setpoint", s, ctx=Context(slew_v_per_s=math.inf))
    assert first(v, T) == 5
    # a stuck supply under the 10 V/s allowance (slewing from the write at t = 1): off by
    # 10 (t - 2) V, more than 20 V from t = 4, trips at t = 7
    s = [smp(k, 1e-6, v=1000.0 if k < 1 else 1500.0, voltage_v=1000.0) for k in range(20)]
    v, _ = run("setpoint", s, ctx=Context(slew_v_per_s=10.0))
    assert first(v, T) == 7


# ------------------------------------------------------------------ plausibility
def test_no_response_edges_on_a_ramp():
    # ramp 10 V/s from 500 V; the current turns on at 800 V and rises to 900 V, then stays
    # flat (a cable off): anchored at 900 V, hold once raised by more than 500 V (1410 V).
    def ramp(k):
        vk = 500.0 + 10.0 * k
        i = 0.0 if vk < 800 else 2e-9 * 1.2 ** ((min(vk, 900.0) - 800.0) / 10.0)
        return smp(k, i, v=vk, step_kind="ramp")
    s = [ramp(k) for k in range(120)]
    v, _ = run("no_response", s, ctx=Context.for_step("ramp"))
    k = first(v, H)
    assert s[k].setpoint_v == 1410.0 and v[k].value == pytest.approx(510.0)
    assert v[k].release == "the current responds (rises) or the voltage is lowered"
    # during regulate the voltage moves with a constant current by design: not judged
    v, _ = run("no_response", s, ctx=Context.for_step("regulate"))
    assert set(actions(v)) == {C}


def test_monitor_disagreement_edges():
    # ammeter 10 uA; disagreement |I - Is| / max: 19.8 uA -> 0.495 goes on, 20.2 uA -> 0.505 holds
    v, _ = run("monitor_disagree", [smp(0, 10e-6, supply_current_a=19.8e-6),
                                    smp(1, 10e-6, supply_current_a=20.2e-6),
                                    smp(2, 10e-6, supply_current_a=10.5e-6)])
    assert actions(v) == [C, H, C]
    # below the monitor's resolution (1 uA) nothing is compared
    v, _ = run("monitor_disagree", [smp(0, 0.1e-6, supply_current_a=0.9e-6)])
    assert actions(v) == [C]


# ------------------------------------------------------------------ regulate voltage
REG = Context.for_step("regulate", {"v_ceiling": 2000.0, "v_floor": 500.0,
                                    "target_current": 1e-6})


def test_regulate_sudden_drop_ramps_down():
    # regulate_drop_fraction 0.1 within 3 samples: 1500 -> 1351 V (9.9 %) goes on, -> 1349 ramps down
    s = [smp(k, 1e-6, v=1500.0) for k in range(5)] + [smp(5, 1e-6, v=1351.0)]
    v, _ = run("regulate_drop", s, ctx=REG)
    assert set(actions(v)) == {C}
    s = [smp(k, 1e-6, v=1500.0) for k in range(5)] + [smp(5, 1e-6, v=1349.0)]
    v, _ = run("regulate_drop", s, ctx=REG)
    assert first(v, R) == 5
    v, _ = run("regulate_drop", s, ctx=Context.for_step("hold"))    # not regulating
    assert set(actions(v)) == {C}


def test_regulate_sitting_at_the_ceiling():
    # at the 2000 V ceiling from t = 0; regulate_ceiling_time 30 s -> ramp down at t = 30
    v, _ = run("regulate_ceiling", [smp(k, 0.5e-6, v=2000.0) for k in range(40)], ctx=REG)
    assert first(v, R) == 30
    v, _ = run("regulate_ceiling", [smp(k, 0.5e-6, v=1999.0) for k in range(40)], ctx=REG)
    assert set(actions(v)) == {C}


def test_regulate_drift_edges_and_release():
    # settled at the target current, the voltage creeping up: relative drift d ln V/dt of
    # 0.0019 /s goes on, 0.0021 /s holds once the 60 s window is full (t = 60).
    def creep(rate, n=80):
        return [smp(k, 1e-6, v=1500.0 * math.exp(rate * k)) for k in range(n)]
    v, _ = run("regulate_drift", creep(0.0019), ctx=REG)
    assert set(actions(v)) == {C}
    v, _ = run("regulate_drift", creep(0.0021), ctx=REG)
    assert first(v, H) == 60
    s = creep(0.0021, 61) + [smp(k, 1e-6, v=1500.0 * math.exp(0.0021 * 60))
                             for k in range(61, 200)]
    v, _ = run("regulate_drift", s, ctx=REG)
    assert v[60].action is H and first(v[61:], C) is not None


# ------------------------------------------------------------------ polarity
def test_negative_polarity_readings_arrive_as_magnitudes():
    # A negative-polarity rig reads V = -1000 V, I = -1 uA; the engine applies polarity
    # (sample.py: magnitudes in the emission sense). The same collapse then shows exactly as
    # on a positive rig.
    raw = [(-1000.0, -1e-6)] * 10 + [(-1000.0, -0.19e-6)]
    pol = -1
    s = [smp(k, pol * i, v=pol * vv) for k, (vv, i) in enumerate(raw)]
    v_neg, _ = run("collapse", s)
    v_pos, _ = run("collapse", [smp(k, abs(i), v=abs(vv)) for k, (vv, i) in enumerate(raw)])
    assert v_neg == v_pos and first(v_neg, R) == 10


def test_new_territory_is_entered_in_confirmed_steps():
    # no history; a current rising smoothly 1 %/sample from 10 nA (a slow ramp): it holds
    # each time it passes twice the last confirmed level, for 10 s, and the confirmed level
    # (the highest current of the confirmation) is the next reference.
    wd = Watchdog(LIM, rules=["new_maximum"])
    i, held, starts = 10e-9, False, []
    for k in range(400):
        v = wd.judge(smp(k, i))
        if v.action is H and not held:
            starts.append((k, i))
        held = v.action is H
        if not held:
            i *= 1.01           # the plan advances only when not held
    ratios = [b[1] / a[1] for a, b in zip(starts, starts[1:])]
    assert len(starts) >= 3 and all(2.0 < r < 2.1 for r in ratios)


def test_runaway_is_judged_against_the_currents_own_noise():
    # seed 31: an hour of dwell with 3 % gaussian noise on ln I (a flickering fibre; the
    # simulated fibre's default flicker is of this size) never reads as runaway, while a
    # real 5 %/s rise on the same noise ramps down within 10 s of its start.
    import numpy as np
    rng = np.random.default_rng(31)
    noise = 0.03 * rng.standard_normal(3700)
    flat = [smp(k, 1e-6 * math.exp(noise[k])) for k in range(3600)]
    v, _ = run("runaway", flat)
    assert set(actions(v)) == {C}
    rising = flat[:100] + [smp(k, 1e-6 * math.exp(noise[k] + 0.05 * (k - 100)))
                           for k in range(100, 200)]
    v, _ = run("runaway", rising)
    k = first(v, R)
    assert k is not None and 100 < k <= 110 and first(v[:100], R) is None
    assert v[k].threshold > LIM.runaway_rate      # the noise allowance is stated


def test_a_lasting_upward_step_is_not_a_runaway():
    # seed 32: 3 % noise, the current steps up 2.3x at t = 100 and stays (an emitter
    # sharpened): neither the 1 s trip nor the 5 s ramp-down reads it as a runaway.
    import numpy as np
    rng = np.random.default_rng(32)
    noise = 0.03 * rng.standard_normal(300)
    s = [smp(k, 1e-6 * (2.3 if k >= 100 else 1.0) * math.exp(noise[k])) for k in range(300)]
    v, _ = run("runaway", s)
    assert set(actions(v)) == {C}


def test_a_lasting_level_shift_is_one_spike_then_the_new_level_is_accepted():
    # Set: 60 s at 1 uA with 2 % scatter (seed 3), then the current steps up by 30 % and
    # stays (an emitter activated). Expected: the step is counted as one spike onset, the
    # detrender accepts the new level after LEVEL_SHIFT_SAMPLES readings, and 100 s at the
    # new level add no spikes (before, a detrender that never learned a spike kept calling
    # every reading at the new level a spike, and its gaps counted as new onsets).
    import numpy as np
    from sequencer.fnfit_online import LEVEL_SHIFT_SAMPLES
    rng = np.random.default_rng(3)
    stream = []
    for k in range(160):
        level = 1e-6 if k < 60 else 1.3e-6
        stream.append(smp(k, level * math.exp(0.02 * rng.standard_normal())))
    wd = Watchdog(LIM, None, rules=["bursts"])
    for s in stream:
        wd.judge(s, None)
    bursts = wd.rules[0]
    assert len(bursts.onsets) == 1 and bursts.onsets[0] == pytest.approx(60.0)
    assert LEVEL_SHIFT_SAMPLES <= 5


def test_a_burn_burst_then_a_slightly_lower_current_is_not_a_collapse():
    # Set: a steady 2.05 uA, one sample of a 10x burst (an emitter burning with a current
    # burst, as the simulated cathode does), then 1.7 uA (that emitter is gone). The fall
    # from the burst's peak is 92 %, from the level before it only 17 %: not a collapse.
    # Then a real collapse from 1.7 uA still ends the run: at 0.2 uA it has fallen by 88 %
    # within 2 samples.
    s = [smp(k, 2.05e-6) for k in range(10)] + [smp(10, 2.03e-5)]
    s += [smp(11 + j, 1.7e-6) for j in range(6)]
    v, _ = run("collapse", s)
    assert first(v, R) is None
    s += [smp(17, 0.6e-6), smp(18, 0.2e-6), smp(19, 0.1e-6)]
    v, _ = run("collapse", s)
    assert first(v, R) == 18


def test_runaway_ramp_down_waits_runaway_settle_after_a_voltage_change_but_trip_does_not():
    # Set: 20 s steady at 1000 V, then a back-off to 950 V after which the current relaxes
    # upward at 2 %/s for 8 s and then stays flat (adsorbates and temperatures following
    # the change). Expected: no ramp-down, since runaway_settle (10 s, common practice, no
    # source) has not passed while it rises. The same 2 %/s rise going on past the settle
    # time is judged on readings after it and ramps down; a 15 %/s rise right after the
    # change trips at once (the trip level does not wait).
    def stream(rate, rise_s):
        out = [smp(k, 1e-6) for k in range(20)]
        i = 0.5e-6
        for k in range(20, 60):
            if k - 20 < rise_s:
                i *= math.exp(rate)
            out.append(smp(k, i, v=950.0))
        return out
    v, _ = run("runaway", stream(0.02, 8))
    assert first(v, R) is None and first(v, T) is None
    v, _ = run("runaway", stream(0.02, 40))
    r = first(v, R)
    assert r is not None and r >= 20 + 10
    v, _ = run("runaway", stream(0.15, 40))
    assert first(v, T) is not None and first(v, T) < 20 + 10


def test_a_fit_offset_is_not_a_train_of_spikes_but_a_jump_still_is():
    # Set: 60 s steady at 1 uA, 1000 V, 1 % scatter (seed 21), then a slow upward drift of
    # 0.2 %/s for 120 s (a cathode conditioning at constant voltage). The fit forgets over
    # 60 s, so it lags the drift and the readings sit ~5 sigma above it for a long time,
    # though each is close to the one before. Expected: no spike is called on them (a spike
    # is a transient: it must also jump from the reading before); a 30 % jump from one
    # reading to the next after that is still a spike.
    import numpy as np
    rng = np.random.default_rng(21)
    stream, level = [], 1e-6
    for k in range(180):
        if k >= 60:
            level *= math.exp(0.002)
        stream.append(smp(k, level * math.exp(0.01 * rng.standard_normal())))
    wd = Watchdog(LIM, None, rules=["bursts"])
    for s in stream:
        wd.judge(s, None)
    assert len(wd.rules[0].onsets) == 0
    wd.judge(smp(180, level * 1.3), None)
    assert wd.rules[0].onsets and wd.rules[0].onsets[-1] == pytest.approx(180.0)
