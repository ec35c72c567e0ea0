"""The supply's safe_off() escalates to the rig's inhibit line.

A supply that ignores output-off (and lies about it) is the fault that software alone
cannot cure; the rig's last software resort is the inhibit line into the supply's
interlock input. Set: the simulated rig with its interlock instrument, and a supply that
ignores OUTP OFF from the first command on. Expected: safe_off() escalates, drives the
inhibit line, and the output is then confirmed off (the simulated interlock input drops
the output, as the hardware inhibit of a real supply does: common practice, no source).
"""
from pathlib import Path

from drivers.clock import VirtualClock
from sequencer.rig import load_rig
from sequencer.stand import build_stand
from tests.engine_fakes import sim_rig_text


def _rig(tmp_path, quirks=None):
    text = sim_rig_text(tmp_path, interlock=True)
    if quirks:
        text = text.replace("simulation:\n", "simulation:\n" + quirks, 1)
    p = Path(tmp_path) / "rig.yaml"
    p.write_text(text)
    return load_rig(p)


def test_the_stand_hands_the_interlock_inhibit_to_the_supply(tmp_path):
    built = build_stand(_rig(tmp_path), seed=7, clock=VirtualClock())
    try:
        sup, il = built.stand.supply, built.stand.interlock
        assert il is not None
        assert sup.inhibit_line == il.inhibit
    finally:
        built.stand.close()


def test_a_lying_supply_that_ignores_output_off_still_ends_near_zero(tmp_path):
    # Set: the supply ignores OUTP OFF and reports it off anyway (lie). safe_off() tries
    # every step even when one fails or is ignored: output off, then 0 V. Expected: the
    # output stays on (truth) but at near 0 V, because the 0 V step is not skipped; the
    # report is "confirmed" only on what the instrument says, which is why the software
    # is a second line behind hardware interlocks.
    quirks = ("  quirks:\n    supply:\n      faults:\n"
              "        - {kind: ignore-output-off, from_s: 0, lie: true}\n")
    built = build_stand(_rig(tmp_path, quirks), seed=7, clock=VirtualClock())
    try:
        sup = built.stand.supply
        sup.arm(300.0, 1e-4)
        sup.output(True)
        sup.set_voltage(200.0)
        built.clock.sleep(5.0)
        assert sup.measure_voltage() > 150.0 and built.sim.truth.voltage_v > 150.0
        report = sup.safe_off()
        assert report.confirmed
        truth = built.sim.truth
        assert truth.output_on         # the lie: the output never went off
        assert abs(truth.voltage_v) < 10.0  # but the 0 V step brought it down
    finally:
        built.stand.close()
