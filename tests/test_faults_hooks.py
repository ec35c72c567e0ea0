"""Deterministic fault hooks at named points (issue 9, item 2): the registry itself, and
whole runs with a fault struck at a named point (inside ``safe_off()`` between its steps,
at arm, between output-on and the first sample, during a back-off).

What is expected of every run: the row's exit code in tests/faults/catalogue.py, the
output confirmed off or exit 5 with the rig marked and the alarm run, the folder readable,
the fault named in the event log (issue 5 item 5; DESIGN.md exit codes).
"""
import pytest

from drivers import hooks

from tests.faults import catalogue, outcome, pool

ROWS = [f for f in catalogue.FAULTS if f.item == "9.2"]


# ------------------------------------------------------------------ the registry
def test_nothing_installed_means_fire_does_nothing():
    hooks.clear()
    assert hooks.active() is False
    hooks.fire("engine.arm", engine=None)   # no hook: nothing happens, nothing raised


def test_hooks_run_in_installation_order_and_are_removed():
    seen = []
    try:
        with hooks.installed("engine.back-off", lambda point, **ctx: seen.append(("a", point))):
            with hooks.installed("engine.back-off", lambda point, **ctx: seen.append(("b", ctx["n"]))):
                hooks.fire("engine.back-off", n=1)
            hooks.fire("engine.back-off", n=2)
        hooks.fire("engine.back-off", n=3)
    finally:
        hooks.clear()
    assert seen == [("a", "engine.back-off"), ("b", 1), ("a", "engine.back-off")]
    assert hooks.active() is False


def test_an_unknown_point_is_refused():
    with pytest.raises(ValueError, match="no fault hook point"):
        hooks.install("supply.safe_off.somewhere", lambda **ctx: None)


def test_every_point_is_fired_somewhere_in_the_code():
    # a point nobody fires would be a hook that silently never strikes
    from pathlib import Path
    root = Path(__file__).resolve().parents[1]
    text = "".join(p.read_text(encoding="utf-8") for p in
                   [root / "drivers" / "supply.py", root / "sequencer" / "engine.py"])
    for point in hooks.POINTS:
        if point.startswith("engine."):
            name = point[len("engine."):]
            assert f'self._hook("{name}")' in text, point
        else:
            assert f'_hooks.fire("{point}"' in text, point


def test_safe_off_hooks_strike_between_its_steps_in_order():
    # The project's supply driver on the simulated supply (in-process), armed at 0 V.
    # Expected order (issue 3, item 6: output off first, then 0 V, then read back).
    from drivers.clock import VirtualClock
    from drivers import open_instrument
    from simulators.stand import SimulatedStand
    clock = VirtualClock()
    sim = SimulatedStand({}, clock, seed=3)
    sup = open_instrument("supply", "scpi", "sim:supply", clock=clock,
                          options={"lock": False, "name": "hv"},
                          interpreter=sim.interpreter("supply"))
    order = []

    def note(point, **ctx):
        order.append((point, bool(sim.truth.output_on), ctx["attempt"]))
    try:
        sup.arm(315.0, 1e-4)
        sup.output(True)
        sup.set_voltage(200.0)
        clock.sleep(1.0)
        for p in ("supply.safe_off.after-output-off", "supply.safe_off.after-zero-volts",
                  "supply.safe_off.before-confirm"):
            hooks.install(p, note)
        report = sup.safe_off()
    finally:
        hooks.clear()
        sup.close()
    assert report.confirmed
    assert [o[0] for o in order] == ["supply.safe_off.after-output-off",
                                     "supply.safe_off.after-zero-volts",
                                     "supply.safe_off.before-confirm"]
    assert order[0][1] is False          # the output was already off when OUTP OFF returned
    assert all(o[2] == 1 for o in order)  # confirmed on the first attempt: no escalation


# ------------------------------------------------------------------ whole runs
runs = pool.module_runs(ROWS, outcome.run_cli_case, "faults-9-2")


@pytest.mark.parametrize("fault", pool.params(ROWS))
def test_fault_at_a_named_point_ends_as_expected(fault, runs):
    pool.check_row(fault, runs)
