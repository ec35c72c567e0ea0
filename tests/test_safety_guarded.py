"""Guarded versus unguarded on the simulated rig: what the watchdog prevents.

Each case fixes a simulated fibre (cathode parameters and seed chosen, and written here,
*before* any watchdog limit was looked at) and one protocol, then runs it twice through the
real engine, drivers and simulated instruments on the virtual clock: once unguarded (no
software watchdog, the supply's current limit at the rig maximum), once guarded (the
watchdog with the protocol's limits). The fibre's fate is the simulator's own record
(``SimulatedStand.fibre_lost``, the cathode's ``fibre-lost`` event): its contact melts when
I^2 (R_fibre + R_contact) heats it past ``contact_melting_k``.

This shows self-consistency of fieldrun with its own simulator, NOT protection of real
fibres: the simulated fibre fails the way its model says, and the watchdog was tuned on
the same kind of model. Real cathodes need the rig's hardware limits and a person.
"""
import math
from pathlib import Path

import pytest

pytest.importorskip("simulators.cathode")
pytest.importorskip("sequencer.watchdog")

from drivers import latch
from drivers.roles import hardware_limits
from sequencer.compiler import compile_plan
from sequencer.engine import Engine, EngineOptions, ListRecorder
from sequencer.protocol import protocol_from_text
from sequencer.rig import rig_from_text
from sequencer.stand import build_stand
from sequencer.watchdog import Watchdog
from sequencer.sample import Action
from tests.engine_fakes import sim_rig_text

ROOT = Path(__file__).resolve().parents[1]
DEADMAN = True


PROTOCOL = """\
name: {name}
sample_period: "0.5 s"
limits:
  current_max: "{ceiling}"
  slew_max: "50 V/s"
  runaway_time: "10 s"
steps:
  - ramp: {{to: "{v}", rate: "{rate}"}}
  - dwell: {{duration: "{dwell}"}}
  - return: {{rate: "50 V/s"}}
"""


def run_case(tmp, protocol, cathode, seed, guarded):
    latch.forget_all()
    rig = rig_from_text(sim_rig_text(tmp, cathode), "sim-rig.yaml")
    plan = compile_plan(protocol_from_text(protocol, "case.yaml"), rig)
    built = build_stand(rig, seed=seed)
    v_ovp, i_limit = hardware_limits(plan.peak_voltage, plan.limits.current_max,
                                     rig.voltage_max, rig.current_max)
    if not guarded:
        i_limit = rig.current_max
    rec = ListRecorder()
    eng = Engine(plan, built.stand, built.clock, recorder=rec,
                 watchdog=Watchdog(plan.limits) if guarded else None,
                 options=EngineOptions(unguarded=not guarded, v_ovp=v_ovp, i_limit=i_limit, deadman=DEADMAN))
    try:
        res = eng.run()
    finally:
        built.stand.close()
    lost = [t for t, kind, _ in built.sim.cathode_events if kind == "fibre-lost"]
    return res, rec, (lost[0] if lost else None)


def first_act(rec, at_least=Action.HOLD):
    """Simulated time of the watchdog's first verdict at or above ``at_least``."""
    order = {a.name.lower(): a for a in Action}
    ts = [e["t"] for e in rec.events if e["kind"] in ("verdict", "trip")
          and order.get(e.get("action"), Action.CONTINUE) >= at_least]
    return ts[0] if ts else math.inf


CASES = {
    # name: (protocol fields, cathode, seed)
    "push-too-hard": (dict(ceiling="10 uA", v="1500 V", rate="10 V/s", dwell="60 s"),
                      "{emitters: 1000, contact_conductance_w_k: 1.4e-9}", 8),
    "runaway": (dict(ceiling="40 uA", v="1100 V", rate="20 V/s", dwell="300 s"),
                "{emitters: 5000, contact_conductance_w_k: 1.4e-9, burst_rate_hz: 1.0, "
                "activation_probability: 1.0}", 7),
    "burst-train": (dict(ceiling="40 uA", v="1200 V", rate="20 V/s", dwell="300 s"),
                    "{emitters: 5000, contact_conductance_w_k: 0.8e-9, burst_rate_hz: 2.0, "
                    "activation_probability: 0.7}", 9),
}


@pytest.mark.parametrize("name", sorted(CASES))
def test_unguarded_the_fibre_is_lost_guarded_the_watchdog_acts_first(tmp_path, name):
    fields, cathode, seed = CASES[name]
    protocol = PROTOCOL.format(name=name, **fields)
    print(f"case {name}: seed {seed}, cathode {cathode}")
    res_u, rec_u, lost_u = run_case(tmp_path, protocol, cathode, seed, guarded=False)
    res_g, rec_g, lost_g = run_case(tmp_path, protocol, cathode, seed, guarded=True)
    # unguarded: nothing watches, the plan "completes" and the simulated fibre is gone
    assert lost_u is not None, "the unguarded run should lose the simulated fibre"
    assert res_u.confirmed_off
    # guarded: the watchdog acted (a hold or worse) before the time the fibre was lost
    # unguarded, ended the run (exit 3) with the output confirmed off, and the fibre lives
    assert first_act(rec_g) < lost_u
    assert res_g.exit_code == 3 and res_g.confirmed_off
    assert lost_g is None, f"guarded run lost the fibre at {lost_g} s"
    # which rule acts first is the watchdog's business and may change as the rules and
    # the simulated fibre evolve; it is printed (pytest -s), not pinned
    acted = [(round(e["t"], 2), e["rule"], e["action"]) for e in rec_g.events
             if e["kind"] in ("verdict", "trip") and e.get("action") != "continue"]
    print(f"  unguarded: fibre lost at {lost_u:.2f} s; guarded verdicts: {acted[:6]}")


def test_a_failing_contact_gives_no_warning_but_the_run_stops_at_once(tmp_path):
    # The contact heats as I^2 R with a 100 s time constant: nothing in the current
    # announces it, so the guarded run cannot see it coming either. What the watchdog
    # must do is stop pushing the moment the current collapses (collapse rule: ramp
    # down, end the run), where the unguarded run keeps 1000 V on a lost fibre to the
    # end of its plan.
    fields = dict(ceiling="40 uA", v="1000 V", rate="20 V/s", dwell="600 s")
    cathode = ("{emitters: 5000, contact_conductance_w_k: 1e-8, contact_time_constant_s: 100.0, "
               "contact_resistance_ohm: 200000.0}")
    seed = 9
    print(f"case contact: seed {seed}, cathode {cathode}")
    protocol = PROTOCOL.format(name="contact", **fields)
    res_u, rec_u, lost_u = run_case(tmp_path, protocol, cathode, seed, guarded=False)
    res_g, rec_g, lost_g = run_case(tmp_path, protocol, cathode, seed, guarded=True)
    assert lost_u is not None and res_u.outcome == "completed"
    after = [s for s in rec_u.samples if s.t > lost_u + 5 and s.step_kind == "hold"]
    assert after and min(s.setpoint_v for s in after) == pytest.approx(1000.0)
    assert lost_g is not None
    collapse = [e for e in rec_g.events if e.get("rule") == "collapse"]
    assert collapse and res_g.exit_code == 3 and res_g.confirmed_off
    period = 0.5
    assert lost_g <= collapse[0]["t"] <= lost_g + 4 * period   # within collapse_samples + 1
