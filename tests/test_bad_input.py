"""Bad input: every broken protocol or rig file gives exit 2 and names the line.

Each case below is a small file; the line that must be named carries the marker ``# <-``
(or is line 1 for whole-file problems). The checker is run through the CLI
(``fieldrun check FILE --rig protocols/sim-rig.yaml``) exactly as a user would run it, and
the test asserts: exit code 2 (DESIGN.md, "Exit codes": 2 = refused before the output went
on), a line ``FILE:LINE:COL: ...`` naming the marked line, the expected words in the
message, and no traceback.

Where the expectation comes from: the YAML 1.1 type rules (yaml.org/type/bool.html: y, n,
yes, no, on, off are booleans; yaml.org/type/int.html: base-60 "1:30" and octal "010"), the
SI prefixes (BIPM SI Brochure, 9th ed. 2019, table 7: M = 1e6, m = 1e-3), and the rig's hard
limits in protocols/sim-rig.yaml (voltage_max 1.5 kV, current_max 100 uA, gap 500 um).
"""
from pathlib import Path

import pytest

from sequencer.cli import main

ROOT = Path(__file__).resolve().parents[1]
SIM_RIG = ROOT / "protocols" / "sim-rig.yaml"


def _sim_rig_text(drop=(), replace=None):
    lines = SIM_RIG.read_text().splitlines()
    out = [ln for ln in lines if not any(ln.startswith(d) for d in drop)]
    text = "\n".join(out) + "\n"
    for a, b in (replace or {}).items():
        assert a in text, a
        text = text.replace(a, b)
    return text


P = 'name: bad\nsteps:\n'   # protocol head: steps start on line 3

CASES = [
    # (id, kind, text, words expected in the message)
    ("wrong-unit", "protocol",
     P + '  - ramp: {to: "600 V", rate: "5 V"}  # <-\n', ["wrong dimension", "V/s"]),
    ("MV-for-mV", "protocol",
     P + '  - ramp: {to: "0.7 MV", rate: "5 V/s"}  # <-\n', ["mega", "mV"]),
    ("negative-rate", "protocol",
     P + '  - ramp: {to: "600 V", rate: "-5 V/s"}  # <-\n', ["above zero"]),
    ("zero-rate", "protocol",
     P + '  - return: {rate: "0 V/s"}  # <-\n', ["above zero"]),
    ("unknown-step-kind", "protocol",
     P + '  - ramps: {to: "600 V", rate: "5 V/s"}  # <-\n', ["unknown step kind", "'ramp'"]),
    ("misspelt-key", "protocol",
     P + '  - dwell: {durration: "10 min"}  # <-\n', ["unknown key", "'duration'"]),
    ("missing-target", "protocol",
     P + '  - ramp: {rate: "5 V/s"}  # <-\n', ["needs 'to'"]),
    ("target-above-rig-max", "protocol",
     P + '  - ramp: {to: "2 kV", rate: "20 V/s"}  # <-\n', ["above the rig's maximum"]),
    ("field-above-rig-max", "protocol",
     # 4 V/um x 500 um = 2000 V > 1.5 kV
     P + '  - ramp: {to: "4 V/um", rate: "20 V/s"}  # <-\n', ["above the rig's maximum"]),
    ("field-without-gap", "protocol-nogap",
     P + '  - ramp: {to: "1.4 V/um", rate: "5 V/s"}  # <-\n', ["no gap"]),
    ("dwell-without-duration", "protocol",
     P + '  - ramp: {to: "100 V", rate: "5 V/s"}\n  - dwell  # <-\n', ["needs 'duration'"]),
    ("non-numeric-quantity", "protocol",
     P + '  - dwell: {duration: "a while"}  # <-\n', ["not a number followed by a unit"]),
    ("arithmetic-in-quantity", "protocol",
     P + '  - ramp: {to: "2*300 V", rate: "5 V/s"}  # <-\n', ["arithmetic"]),
    ("power-in-quantity", "protocol",
     P + '  - ramp: {to: "10**3 V", rate: "5 V/s"}  # <-\n', ["arithmetic"]),
    ("yaml-syntax-error", "protocol",
     P + '  - ramp: {to: "600 V", rate: "5 V/s"\n  - dwell: {duration: "1 h"}  # <-\n',
     ["YAML syntax error"]),
    ("empty-file", "protocol", "", ["empty"]),
    ("only-comments", "protocol", "# nothing here\n\n", ["empty"]),
    ("duplicate-key", "protocol",
     P + '  - ramp:\n      to: "600 V"\n      rate: "5 V/s"\n      rate: "50 V/s"  # <-\n',
     ["duplicate key 'rate'"]),
    ("self-referencing-alias", "protocol",
     'name: bad\nsteps: &loop [*loop]  # <-\n', ["cycle"]),
    ("on-as-a-value", "protocol",
     P + '  - sweep: {start: "100 V", stop: "500 V", step: "50 V", direction: on}  # <-\n',
     ["'on'", "boolean"]),
    ("NO-as-a-name", "protocol",
     'name: NO  # <-\nsteps:\n  - rest: {duration: "1 s"}\n', ["'NO'", "boolean"]),
    ("sexagesimal-duration", "protocol",
     P + '  - rest: {duration: 1:30}  # <-\n', ["base-60"]),
    ("octal-looking-int", "protocol",
     P + '  - ramp: {to: "100 V", rate: "5 V/s"}\n'
         '  - sweep: {start: "100 V", stop: "500 V", points: 010}  # <-\n', ["octal"]),
    ("absurd-magnitude-duration", "protocol",
     P + '  - rest: {duration: "1000 d"}  # <-\n', ["absurd"]),
    ("absurd-magnitude-current", "protocol",
     'name: bad\nlimits:\n  current_max: "50 A"  # <-\nsteps:\n  - rest: {duration: "1 s"}\n',
     ["absurd"]),
    ("nan", "protocol",
     P + '  - ramp: {to: "600 V", rate: .nan}  # <-\n', ["not a finite number"]),
    ("infinity", "protocol",
     P + '  - ramp: {to: "inf V", rate: "5 V/s"}  # <-\n', ["not a finite number"]),
    ("wrong-type-steps", "protocol",
     'name: bad\nsteps:\n  ramp: {to: "600 V", rate: "5 V/s"}  # <-\n', ["must be a list"]),
    ("wrong-type-times", "protocol",
     P + '  - repeat:\n      times: three  # <-\n      steps:\n        - rest: {duration: "1 s"}\n',
     ["whole number"]),
    ("sweep-step-does-not-fit", "protocol",
     P + '  - sweep: {start: "100 V", stop: "650 V", step: "100 V"}  # <-\n', ["does not fit"]),
    ("bare-number-where-unit-needed", "protocol",
     P + '  - dwell: {duration: 600}  # <-\n', ["no unit"]),
    ("unknown-limit", "protocol",
     'name: bad\nlimits:\n  current_maxx: "50 uA"  # <-\nsteps:\n  - rest: {duration: "1 s"}\n',
     ["unknown key", "'current_max'"]),
    ("limit-wrong-unit", "protocol",
     'name: bad\nlimits:\n  current_max: "50 uV"  # <-\nsteps:\n  - rest: {duration: "1 s"}\n',
     ["wrong dimension"]),
    ("rate-above-slew-limit", "protocol",
     'name: bad\nlimits:\n  slew_max: "10 V/s"\nsteps:\n'
     '  - ramp: {to: "600 V", rate: "20 V/s"}  # <-\n', ["slew limit"]),
    ("rest-at-high-voltage", "protocol",
     P + '  - ramp: {to: "600 V", rate: "5 V/s"}\n  - rest: {duration: "1 min"}  # <-\n',
     ["put a return step before it"]),
    ("regulate-above-current-ceiling", "protocol",
     P + '  - regulate: {current: "200 uA", duration: "1 h", ceiling: "900 V"}  # <-\n',
     ["current ceiling"]),
    ("neither-protocol-nor-rig", "protocol", 'name: what\nsettings: {}\n', ["neither"]),
    ("several-kinds-in-one-step", "protocol",
     P + '  - ramp: {to: "600 V", rate: "5 V/s"}  # <-\n    dwell: {duration: "1 h"}\n',
     ["several keys"]),
    ("tab-indentation", "protocol", 'name: bad\nsteps:\n\t- rest: {duration: "1 s"}  # <-\n',
     ["YAML syntax error"]),
    # --- rig files ---
    ("rig-unknown-address", "rig",
     _sim_rig_text(replace={'address: "sim:gauge"': 'address: "tcp:10.0.0.1"  # <-'}),
     ["not an address"]),
    ("rig-unknown-sim-name", "rig",
     _sim_rig_text(replace={'address: "sim:gauge"': 'address: "sim:gage"  # <-'}),
     ["unknown simulated instrument"]),
    ("rig-missing-identity", "rig",
     (ROOT / "protocols" / "rig-stand-b.yaml").read_text().replace(
         '    identity: {model: "IG-3", serial: "G-17"}\n', ''
     ).replace('  gauge:\n    role: gauge', '  gauge:  # <-\n    role: gauge'),
     ["needs 'identity'"]),
    ("rig-heartbeat-without-interlock", "rig",
     _sim_rig_text(drop=("  chain:", "    role: interlock", "    driver: serial-lines",
                         '    address: "sim:interlock"'),
                   replace={"host_loss: supply-timeout": "host_loss: heartbeat  # <-"}),
     ["interlock"]),
    ("rig-ballast-eats-supply", "rig",
     # 1 Mohm x 10 mA = 10 kV >= 1.5 kV
     _sim_rig_text(replace={'series_resistance: "1 Mohm"': 'series_resistance: "1 Mohm"  # <-',
                            'current_max: "100 uA"': 'current_max: "10 mA"'}),
     ["ballast"]),
    ("rig-polarity-yes", "rig",
     _sim_rig_text(replace={"polarity: positive": "polarity: yes  # <-"}), ["boolean"]),
    ("rig-seed-not-int", "rig",
     _sim_rig_text(replace={"  seed: 7": "  seed: seven  # <-"}), ["whole number"]),
    ("rig-shell-string-notify", "rig",
     _sim_rig_text(replace={'  on_trip: ["echo", "fieldrun: stand-B-sim tripped"]':
                            '  on_trip: "echo tripped | mail"  # <-'}), ["list of arguments"]),
    ("rig-duplicate-instrument", "rig",
     _sim_rig_text(replace={"  pico:\n": "  hv:  # <-\n"}), ["duplicate key 'hv'"]),
]


def _marked_line(text: str) -> int:
    for n, line in enumerate(text.splitlines(), 1):
        if "# <-" in line:
            return n
    return 1


@pytest.mark.parametrize("case_id,kind,text,words", CASES, ids=[c[0] for c in CASES])
def test_broken_file_exits_2_and_names_the_line(tmp_path, capsys, case_id, kind, text, words):
    path = tmp_path / f"{case_id}.yaml"
    path.write_text(text)
    rig = SIM_RIG
    if kind == "protocol-nogap":
        rig = tmp_path / "rig-nogap.yaml"
        rig.write_text(_sim_rig_text(drop=("gap:",)))
    code = main(["check", str(path), "--rig", str(rig)])
    out = capsys.readouterr()
    text_out = out.out + out.err
    assert code == 2, text_out
    assert "Traceback" not in text_out
    line = _marked_line(text)
    located = [ln for ln in out.err.splitlines() if ln.startswith(f"{path}:{line}:")]
    assert located, f"no problem at line {line}:\n{out.err}"
    joined = "\n".join(located)
    for w in words:
        assert w in joined, f"{w!r} not in:\n{joined}"


def test_there_are_at_least_twenty_cases():
    # issue 2, "Bad input": a table of at least 20 broken protocols and rig files
    assert len(CASES) >= 20


def test_every_problem_is_reported_in_one_pass(tmp_path, capsys):
    # three independent mistakes on lines 3, 4 and 5: all three are printed at once
    path = tmp_path / "three.yaml"
    path.write_text(P + '  - ramp: {to: "600 V", rate: "5 V"}\n'
                        '  - dwell: {durration: "1 h"}\n'
                        '  - rest: {duration: "nan s"}\n'
                        '  - return: {rate: "10 V/s"}\n')
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    for line in (3, 4, 5):
        assert f"{path}:{line}:" in err, err
