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


def test_report_refuses_a_folder_that_is_not_a_run(tmp_path, capsys):
    # `fieldrun report runs` (the parent, a typo) or an empty folder: `analyze` already says
    # "not a run folder"; report must say so too (exit 2) instead of writing an empty report
    # into it and exiting 0.
    from sequencer import cli
    rc = cli.main(["report", str(tmp_path)])
    err = capsys.readouterr().err
    assert rc == 2
    assert "not a run folder" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "analysis").exists()


def test_analyze_option_without_a_unit_asks_for_the_unit(tmp_path, capsys):
    # `--work-function 100` or `--gap -1`: the number is there, the unit is not; the line
    # says so with an example, rather than "not a quantity in eV-compatible units".
    from sequencer import cli
    from test_analysis_support import mg_current, sweep_points, write_run_folder
    f = write_run_folder(str(tmp_path), "run", lambda V: mg_current(V, 2000, 1e-13, 500e-6, 4.5),
                         sweep_points(400, 1000, 50, down=False), seed=5)
    for opt, value, example in (("--work-function", "100", "4.5 eV"), ("--gap", "-1", "500 um")):
        rc = cli.main(["analyze", f, f"{opt}={value}", "--no-figures"])
        err = capsys.readouterr().err
        assert rc == 2
        assert f"{opt} '{value}': give the unit too (for example '{example}')" in err
