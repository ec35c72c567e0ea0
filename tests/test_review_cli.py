"""What a new user trips over at the command line (found by using the program as one).

Each check runs the CLI the way a user does and states what the user should see. The
exit codes are the README's (0 completed, 1 internal error, 2 refused / bad input).
"""
import os
import subprocess
import sys

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def _cli_into_closed_pipe(*argv):
    """Run ``fieldrun ARGV`` with stdout a pipe whose reading end is already closed (what
    ``fieldrun ... | head`` becomes once head has exited): every write fails with EPIPE."""
    r, w = os.pipe()
    os.close(r)
    try:
        p = subprocess.run([sys.executable, "-m", "sequencer.cli", *argv], cwd=ROOT, stdout=w,
                           stderr=subprocess.PIPE, timeout=120)
    finally:
        os.close(w)
    return p.returncode, p.stderr.decode("utf-8", "replace")


def test_plan_into_a_closed_pipe_exits_0_without_a_traceback():
    # `fieldrun plan P --rig R | head`: the reader has gone; that is the user's choice, not
    # an internal error (exit 1) and not a traceback (common practice, no source: Unix
    # tools end quietly on a broken pipe).
    rc, err = _cli_into_closed_pipe("plan", "protocols/condition-1h.yaml", "--rig", "protocols/sim-rig.yaml")
    assert rc == 0, err
    assert "Traceback" not in err
