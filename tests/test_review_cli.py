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


def test_analyze_says_how_a_bare_csv_was_read(tmp_path, capsys):
    # An outside CSV without a header, one value mistyped ("abc" on line 6): the console
    # says the columns were taken as V and A and that one row was set aside, so the user
    # need not open results.json to learn what was assumed.
    from sequencer import cli
    from test_analysis_support import mg_current
    V = [400.0 + 25 * k for k in range(25)]
    lines = [f"{v!r},{float(mg_current(v, 2000, 1e-13, 500e-6, 4.5))!r}" for v in V]
    lines[5] = f"{V[5]!r},abc"
    p = tmp_path / "kl-f12.csv"
    p.write_text("\n".join(lines) + "\n")
    assert cli.main(["analyze", str(p), "--no-figures"]) == 0
    out = capsys.readouterr().out
    assert "note: no header: first column taken as voltage in V, second as current in A" in out
    assert "note: 1 row(s) without a voltage and a current number set aside (the first is data row 6)" in out


def test_pressure_axis_is_linear_for_a_narrow_range_and_log_for_a_wide_one(tmp_path, monkeypatch):
    # A good vacuum with small bursts (1.00-1.07e-5 Pa, the README's main run) reads plainly
    # on a linear axis; a pump-down over two decades needs a log one (common practice, no
    # source).
    import numpy as np
    from sequencer.analysis import plots
    seen = []
    monkeypatch.setattr(plots, "_save", lambda fig, out_dir, name: seen.append(fig.axes[0].get_yscale()))

    class R:
        t = np.arange(100.0)
    for lo, hi in ((1.00e-5, 1.07e-5), (1e-3, 1e-5)):
        R.pressure = np.linspace(lo, hi, 100)
        plots.pressure_plot(R, [], str(tmp_path))
    assert seen == ["linear", "log"]


def test_dwell_table_numbers_steps_from_1_as_the_console_does():
    # results store step indices from 0; the console says "step 4/6 dwell", so must the report
    from sequencer.report import content
    head, rows = content.stability_table({"stability": [{
        "step": 3, "voltage_v": 590.0, "n": 10, "duration_s": 9.0, "mean_a": 1e-6,
        "relative_fluctuation": 0.1, "drift_per_h": 0.0, "bursts": 0, "largest_burst_relative": 0.0}]})
    assert head[0] == "step" and rows[0][0] == "4"


def test_report_keeps_an_assumed_gap_uncertainty_labelled_as_assumed(tmp_path):
    # The run files give the gap (500 um) but no uncertainty: analysis assumes 10 um and
    # says "default, assumed". `fieldrun report` re-runs the analysis with the settings last
    # used; the assumed value must not come back labelled "option" (what the user typed).
    from sequencer import report
    from sequencer.analysis import run as arun
    from test_analysis_support import mg_current, sweep_points, write_run_folder
    f = write_run_folder(str(tmp_path), "run", lambda V: mg_current(V, 2000, 1e-13, 500e-6, 4.5),
                         sweep_points(400, 1000, 50, down=False), seed=6)
    first = arun.analyze(f, arun.Options(), figures=False)
    assert first["settings"]["gap_u_source"] == "default, assumed"
    again = arun.analyze(f, report.options_from_results(f), figures=False)
    assert again["settings"]["gap_u_source"] == "default, assumed"


def test_analyze_refuses_a_run_folders_other_files_in_one_line(tmp_path, capsys):
    # `fieldrun analyze runs/X/events.jsonl` (or the protocol): not data. One line, exit 2,
    # not a "header" made of the first JSON or YAML line.
    from sequencer import cli
    p = tmp_path / "events.jsonl"
    p.write_text('{"kind": "clock", "t": 0.0, "utc": 1800000000.0, "simulated": true}\n')
    assert cli.main(["analyze", str(p)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.endswith("not a data file; give a run folder or a CSV file of voltage and current")
    assert len(err.splitlines()) == 1


def test_a_failed_visa_open_reads_as_one_line_with_the_status_named():
    # pyvisa-py reports a connect timeout as "could not connect: -1073807339"; the status
    # code is VI_ERROR_TMO (0xBFFF0015) in the VISA library specification (IVI VPP-4.3,
    # from memory; pyvisa's own table is what is used). Its GPIB message has a line break.
    from drivers.transport_visa import open_error_text
    assert open_error_text(Exception("could not connect: -1073807339")) == (
        "could not connect: VI_ERROR_TMO (Timeout expired before operation completed)")
    assert open_error_text(Exception("Please install linux-gpib.\nNo module named 'gpib'")) == (
        "Please install linux-gpib. No module named 'gpib'")
    assert -1073807339 == 0xBFFF0015 - (1 << 32)              # the code as a signed 32-bit int


def test_every_verbs_help_is_plain_text(capsys):
    # `fieldrun VERB --help` for every verb: exit 0, no reStructuredText marks (``x``)
    # copied from a docstring, and every positional argument explained.
    import pytest
    from sequencer import cli
    parser = cli.build_parser()
    verbs = [a for a in parser._subparsers._group_actions[0].choices]
    assert "run" in verbs and "report" in verbs
    for verb in verbs:
        with pytest.raises(SystemExit) as ex:
            cli.main([verb, "--help"])
        out = capsys.readouterr().out
        assert ex.value.code == 0, verb
        assert "``" not in out, verb
        sub = parser._subparsers._group_actions[0].choices[verb]
        for act in sub._actions:
            if not act.option_strings:
                assert act.help, f"{verb} {act.metavar or act.dest}: positional argument without help"


def test_swapped_protocol_and_rig_give_one_line_each(capsys):
    # `fieldrun plan RIG --rig PROTOCOL` (the files swapped): one problem line saying which
    # file is which, exit 2, not a dozen "unknown key" lines.
    from sequencer import cli
    assert cli.main(["plan", "protocols/sim-rig.yaml", "--rig", "protocols/condition-1h.yaml"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "this is a protocol (it lists 'steps'), not a rig file" in err[0]
    from sequencer.errors import ProtocolError
    from sequencer.protocol import load_protocol
    import pytest
    with pytest.raises(ProtocolError) as ex:
        load_protocol("protocols/sim-rig.yaml")
    assert len(ex.value.problems) == 1
    assert "this is a rig file (it lists 'instruments'), not a protocol" in ex.value.problems[0].message


def test_runs_names_a_file_given_as_its_folder(tmp_path, capsys):
    # `fieldrun runs samples.csv`: the path exists, so "no such folder" would mislead
    from sequencer import cli
    f = tmp_path / "samples.csv"
    f.write_text("x\n")
    assert cli.main(["runs", str(f)]) == 2
    assert capsys.readouterr().err.strip().endswith("a file, not a folder of runs")
