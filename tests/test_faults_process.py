"""Process-level faults (issue 9, item 3) of the whole ``fieldrun run`` process on the
simulated rig: signals, kill -9 at seeded instants, an exception inside a driver, a full
or failing disk (the recorder's injectable FileOps), power loss (files truncated to their
last fsync), the wall clock jumping, and host loss with the instruments in another
process (the supply keeps its output unless its comm timeout was armed).

Expected outcomes are the rows of tests/faults/catalogue.py (DESIGN.md exit codes; issue 5
item 5 for signals; issue 6 items 1 and 3 for the disk and power loss). Seeds: SEED in
tests/faults/process.py with the row id, printed. Waiting is on run-folder events; the
only sleeps are the seeded kill instants themselves.
"""
import pytest

pytest.importorskip("simulators.stand")
pytest.importorskip("sequencer.recorder")

from tests.faults import catalogue, outcome, pool, process   # noqa: E402

RUNNERS = {"cli": outcome.run_cli_case, "kill9": process.run_kill9,
           "powerloss": process.run_powerloss, "clockjump": process.run_clockjump,
           "hostloss": process.run_hostloss}
ROWS = [f for f in catalogue.FAULTS if f.item == "9.3" or f.runner == "hostloss"]


def _run(fault, case_dir):
    return RUNNERS[fault.runner](fault, case_dir)


runs = pool.module_runs(ROWS, _run, "faults-9-3")


@pytest.mark.parametrize("fault", pool.params(ROWS))
def test_process_fault_ends_as_expected(fault, runs):
    pool.check_row(fault, runs)
