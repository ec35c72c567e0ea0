"""The simulated chamber (simulators.chamber): gas balance V dp/dt = Q - S p with beam-driven
outgassing, and the gauge's first-order lag. Expectations are the exact solutions of those
first-order equations (common practice, no source) and the trade's rule that the beam
raises the pressure."""
import math

import pytest

from simulators.chamber import Chamber, ChamberParamError, ChamberParams, GaugeLag


def _hold(ch, t, seconds, current, volts, dt=0.1):
    p = ch.pressure_pa
    for _ in range(int(round(seconds / dt))):
        t += dt
        p = ch.advance(t, current, volts)
    return t, p


def test_base_pressure_without_beam():
    ch = Chamber({"base_pressure_pa": 2e-6})
    _, p = _hold(ch, 0.0, 60.0, 0.0, 0.0)
    assert p == pytest.approx(2e-6, rel=1e-12)


def test_pressure_follows_volume_over_pumping_speed():
    # Set: 10 L, 50 L/s (tau = V/S = 0.2 s), ESD only, with a coverage that does not
    # deplete. A 1 mA step: the excess reaches 1 - 1/e of its final value after tau and
    # settles at y I / S (throughput balance).
    cfg = {"heating_pa_m3_per_j": 0.0, "esd_depletion_c": 1e12, "esd_yield_pa_m3_per_c": 1e-3}
    ch = Chamber(cfg)
    ch.advance(0.0, 0.0, 0.0)
    p0 = ch.pressure_pa
    p_tau = ch.advance(0.2, 1e-3, 1000.0)
    _, p_end = _hold(ch, 0.2, 5.0, 1e-3, 1000.0)
    final = 1e-3 * 1e-3 / 0.05
    assert p_end - p0 == pytest.approx(final, rel=1e-6)
    assert (p_tau - p0) / final == pytest.approx(1 - math.exp(-1), rel=1e-6)


def test_pressure_rises_with_current_and_with_beam_power():
    # Anode heating outgasses in proportion to I x V (after the anode's lag): at the same
    # current, twice the voltage gives twice the heating part of the pressure rise.
    base = {"esd_yield_pa_m3_per_c": 0.0, "anode_time_constant_s": 1.0}
    rises = []
    for volts in (500.0, 1000.0):
        ch = Chamber(base)
        ch.advance(0.0, 0.0, 0.0)
        _, p = _hold(ch, 0.0, 30.0, 1e-3, volts)
        rises.append(p - 1e-5)
    assert rises[0] > 0
    assert rises[1] / rises[0] == pytest.approx(2.0, rel=1e-6)
    # and more current, more gas (ESD on)
    ps = []
    for current in (1e-5, 1e-4):
        ch = Chamber({})
        ch.advance(0.0, 0.0, 0.0)
        ps.append(_hold(ch, 0.0, 10.0, current, 800.0)[1])
    assert ps[1] > ps[0] > 1e-5


def test_anode_coverage_depletes_with_dose():
    # ESD empties the anode surface: after a dose of D_c coulombs the coverage has fallen
    # to about 1/e (recovery is slow, 1 h).
    ch = Chamber({"esd_depletion_c": 0.01})
    ch.advance(0.0, 0.0, 0.0)
    _hold(ch, 0.0, 10.0, 1e-3, 500.0)        # 10 mC
    assert ch.anode_coverage == pytest.approx(math.exp(-1), rel=0.01)


def test_gauge_lag_first_order():
    # tau dp_shown/dt = p - p_shown: 1 - 1/e of a step after tau
    g = Chamber({"gauge_time_constant_s": 0.5}).gauge_lag()
    assert isinstance(g, GaugeLag) and g.tau == 0.5
    g.apply(0.0, 1e-5)
    shown = g.apply(0.5, 2e-5)
    assert (shown - 1e-5) / 1e-5 == pytest.approx(1 - math.exp(-1), rel=1e-9)


def test_bad_chamber_keys_give_one_line():
    with pytest.raises(ChamberParamError, match="unknown key 'volume_l'"):
        ChamberParams.from_dict({"volume_l": 10})
    with pytest.raises(ChamberParamError, match="pumping_speed_m3_s: must be > 0"):
        ChamberParams.from_dict({"pumping_speed_m3_s": 0})
