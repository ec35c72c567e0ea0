"""Replay: a recorded simulated run, replayed from its folder with its recorded seed,
reproduces it sample for sample.

What is set: a short ramp-dwell-return protocol on the simulated stand-B (2000 emitters,
seed 11), recorded once with ``fieldrun run``. Expected: ``fieldrun replay RUN_FOLDER``
(which takes the folder's protocol.yaml, limits, rig.yaml and seed) writes a new run folder
whose samples.csv equals the recorded one in every column, and whose events come in the same
order at the same simulated times. Where the expectation comes from: the simulated rig is
deterministic given its seed (numpy's seeded generators) and the virtual clock, and the
engine's loop has no wall-clock input on the simulated rig; so equality must be exact,
bit for bit (floats are written with repr() and read back exactly). The only wall-clock
column of the format is ``utc``; on the virtual clock it is virtual too, and it is
compared as well.
"""
import argparse
import json
import math

import pytest

from sequencer.commands import run as run_cmd

from sequencer.cli import main
from sequencer.runfolder import RunFolder
from tests.replay_support import only_folder, sim_rig, write

SEED = 11
PROTOCOL = """\
name: replay-check
sample_period: "0.5 s"
limits:
  current_max: "20 uA"
  slew_max: "50 V/s"
steps:
  - ramp: {to: "520 V", rate: "20 V/s"}
  - dwell: {duration: "15 s"}
  - return: {rate: "50 V/s"}
"""


def _same(a, b):
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return a == b


@pytest.fixture(scope="module")
def recorded(tmp_path_factory):
    """One recording: an ordinary `fieldrun run` (its own parser), without the report."""
    tmp = tmp_path_factory.mktemp("recorded")
    rig = sim_rig(tmp, "{emitters: 2000, gap_m: 5.0e-4, series_resistance_ohm: 1.0e+6}")
    proto = write(tmp, "replay-check.yaml", PROTOCOL)
    rec_dir = tmp / "runs"
    parser = argparse.ArgumentParser()
    run_cmd.add_arguments(parser)
    args = parser.parse_args([str(proto), "--rig", str(rig), "--quiet", "--seed", str(SEED),
                              "--runs-dir", str(rec_dir)])
    args.report = False
    code = run_cmd.run(args)
    return code, RunFolder(only_folder(rec_dir))


def test_replay_of_a_recorded_run_reproduces_it_sample_for_sample(recorded, tmp_path, capsys):
    print(f"seed {SEED}")
    code, recorded = recorded
    rep_dir = tmp_path / "replayed"
    assert json.loads((recorded.path / "manifest.json").read_text())["seed"] == SEED
    capsys.readouterr()

    code2 = main(["replay", str(recorded.path), "--quiet", "--no-report", "--runs-dir", str(rep_dir)])
    out = capsys.readouterr().out
    replayed = RunFolder(only_folder(rep_dir))
    assert code2 == code
    assert f"seed {SEED}" in out and "fieldrun replay:" in out

    a, b = recorded.samples(), replayed.samples()
    assert len(a["seq"]) > 100            # 26 s ramp + 15 s dwell + return at 0.5 s
    assert list(a) == list(b)             # same columns in the same order
    for name in a:
        col_a, col_b = list(a[name]), list(b[name])
        assert len(col_a) == len(col_b), name
        bad = [k for k, (x, y) in enumerate(zip(col_a, col_b)) if not _same(x, y)]
        assert not bad, f"column {name} differs first at row {bad[0]}: {col_a[bad[0]]!r} vs {col_b[bad[0]]!r}"
    # the emitter really emitted (this is not a comparison of two empty runs)
    assert max(a["current"]) > 1e-7

    ev_a = [(e["kind"], e.get("seq"), e.get("t"), e.get("rule")) for e in recorded.events()]
    ev_b = [(e["kind"], e.get("seq"), e.get("t"), e.get("rule")) for e in replayed.events()]
    assert ev_a == ev_b
    assert recorded.end["outcome"] == replayed.end["outcome"]


def test_replay_of_a_folder_imposes_its_recorded_limits(recorded, tmp_path, capsys):
    # A copy of the recording whose manifest says the ceiling was half the peak current
    # seen: the replay must use the recorded limits (not the protocol's 20 uA), so the
    # current-ceiling rule trips where the current first passes that level.
    import shutil
    _, rec = recorded
    copy = tmp_path / rec.path.name
    shutil.copytree(rec.path, copy)
    manifest = json.loads((copy / "manifest.json").read_text())
    cols = rec.samples()
    peak = float(max(cols["current"]))
    ceiling = peak / 2
    manifest["limits"]["current_max"] = ceiling
    (copy / "manifest.json").write_text(json.dumps(manifest))
    code = main(["replay", str(copy), "--quiet", "--no-report", "--runs-dir", str(tmp_path / "runs")])
    out = capsys.readouterr().out
    folder = RunFolder(only_folder(tmp_path / "runs"))
    first_over = min(t for t, i in zip(cols["t"], cols["current"]) if i > ceiling)
    trip = [e for e in folder.events() if e.get("rule") == "current_ceiling"]
    assert code == 3 and folder.end["outcome"] == "tripped"
    # identical up to the first sample above the new ceiling, and tripped on that very
    # sample (its seq and its current); the event's time is later by the safe-off
    first_seq = int(cols["seq"][list(cols["t"]).index(first_over)])
    print(f"ceiling {ceiling:.3g} A first passed at t = {first_over} s (seq {first_seq})")
    assert folder.end["tripped_on_seq"] == first_seq
    assert trip and trip[0]["value"] == float(cols["current"][first_seq])
    assert f"tripped by current_ceiling at t = {first_over:.1f} s (simulated)" in out


def test_replay_of_a_protocol_skips_its_pauses_and_says_so(tmp_path, capsys):
    seed = 5
    print(f"seed {seed}")
    rig = sim_rig(tmp_path, "{emitters: 1000, gap_m: 5.0e-4, series_resistance_ohm: 1.0e+6}", seed=seed)
    proto = write(tmp_path, "pause.yaml", """\
name: pause-check
sample_period: "0.5 s"
limits: {current_max: "20 uA"}
steps:
  - ramp: {to: "200 V", rate: "50 V/s"}
  - pause: {message: "look at the fibre"}
  - return: {rate: "50 V/s"}
""")
    code = main(["replay", str(proto), "--rig", str(rig), "--quiet", "--runs-dir", str(tmp_path / "runs")])
    out = capsys.readouterr().out
    folder = RunFolder(only_folder(tmp_path / "runs"))
    # a pause with no timeout would wait for the operator for ever; the replay skips it,
    # logs the skip, and completes
    assert code == 0 and folder.end["outcome"] == "completed"
    notes = [e.get("message", "") for e in folder.events("note")]
    assert any(n.startswith("pause skipped (replay): look at the fibre") for n in notes)
    assert "completed; fibre intact" in out
    # an ordinary run folder with its report
    assert (folder.path / "analysis" / "report.html").is_file()


def test_replay_refuses_a_real_rig_and_a_missing_source_in_one_line(tmp_path, capsys):
    from tests.replay_support import ROOT
    proto = ROOT / "protocols" / "first-light.yaml"
    code = main(["replay", str(proto), "--rig", str(ROOT / "protocols" / "rig-stand-b.yaml"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "simulated rig only" in err and "Traceback" not in err
    code = main(["replay", str(tmp_path / "nothing-here"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "no such protocol file or run folder" in err
