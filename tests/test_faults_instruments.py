"""Instrument faults (issue 9, item 1) on the simulated rig, each checked against the
outcome written beside it in tests/faults/catalogue.py.

What is set: ``fieldrun run`` of a ramp to 300 V, a dwell and a return
(tests/faults/rigs.py) on stand-B-sim with 0.25 s instrument timeouts; the simulated
instruments commit the row's fault on their schedule (simulators/quirks.py); seeds are the
rig file's (``simulation.seed: 7``, printed in each run's manifest). What is expected: the
row's exit code, and either the output confirmed off (``end.json`` and a confirmed
``safe-off`` event) or exit 5 with the rig marked unconfirmed and the alarm command run;
the run folder reads with ``sequencer.runfolder.RunFolder``; the event log names the fault.
The expected outcomes follow issue 5 (watchdog rules, exit codes) and DESIGN.md; where a
threshold is a judgement it is marked in the catalogue as common practice, no source.
Each row's actual outcome goes to build/fault-results.json for tools/fault_table.py.
"""
import pytest

pytest.importorskip("simulators.stand")
pytest.importorskip("sequencer.recorder")

from tests.faults import catalogue, outcome, pool   # noqa: E402

ROWS = [f for f in catalogue.FAULTS if f.item == "9.1" and f.runner == "cli"]


runs = pool.module_runs(ROWS, outcome.run_cli_case, "faults-9-1")


@pytest.mark.parametrize("fault", pool.params(ROWS))
def test_instrument_fault_ends_as_expected(fault, runs):
    pool.check_row(fault, runs)
