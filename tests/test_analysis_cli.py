"""`fieldrun analyze` on outside CSV files and on run folders, through the CLI entry point.

The outside data are the exact-MG law of the support module (phi 4.50 eV, gap 500 um,
beta 2000, area 1e-13 m^2) written as older set-ups might have: semicolon-separated with
comment lines, voltage in kV and current in nA named in the header. Expected: beta within
2 % (as in test_analysis_extraction), the raw file untouched, user mistakes one line + exit 2.
"""
import json
import os

import numpy as np
import pytest

from sequencer import cli
from test_analysis_support import mg_current, sweep_points, write_run_folder

PHI, GAP = 4.50, 500e-6


def outside_csv(path, seed=71):
    rng = np.random.default_rng(seed)
    V = np.linspace(560, 1400, 30)
    I = mg_current(V, 2000, 1e-13, GAP, PHI) * (1 + 0.01 * rng.standard_normal(V.size))
    lines = ["# Kestrel Lane cold-cathode lab, stand-B, sample KL-Y07, older logger",
             "Time (s);Voltage (kV);Emission current (nA)"]
    lines += [f"{k * 2.0};{v / 1e3:.6f};{i * 1e9:.6e}" for k, (v, i) in enumerate(zip(V, I))]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_analyze_outside_csv_with_units_in_the_header(tmp_path, capsys):
    p = outside_csv(tmp_path / "kl-y07.csv")
    before = p.read_bytes()
    rc = cli.main(["analyze", str(p), "--work-function", "4.5eV", "--gap", "500um", "--json", "--no-figures"])
    assert rc == 0
    res = json.loads(capsys.readouterr().out)
    assert res["source"]["columns"]["voltage"] == "Voltage (kV)"
    assert res["source"]["columns"]["current"] == "Emission current (nA)"
    beta = res["branches"]["up"]["segments"][0]["forms"]["FN"]["beta"]
    assert beta == pytest.approx(2000, rel=0.02)
    assert p.read_bytes() == before
    assert os.path.exists(tmp_path / "kl-y07.analysis" / "results.json")


def test_analyze_columns_given_by_options(tmp_path, capsys):
    # No header at all: the user names the columns by index and unit.
    rng = np.random.default_rng(72)
    V = np.linspace(560, 1400, 30)
    I = mg_current(V, 2000, 1e-13, GAP, PHI) * (1 + 0.01 * rng.standard_normal(V.size))
    p = tmp_path / "bare.txt"
    p.write_text("".join(f"{k}\t{i * 1e6:.8g}\t{v:.3f}\n" for k, (v, i) in enumerate(zip(V, I))))
    rc = cli.main(["analyze", str(p), "--voltage-column", "3:V", "--current-column", "2:uA",
                   "--work-function", "4.5 eV", "--gap", "0.5 mm", "--json", "--no-figures"])
    assert rc == 0
    res = json.loads(capsys.readouterr().out)
    assert res["branches"]["up"]["segments"][0]["forms"]["MG"]["beta"] == pytest.approx(2000, rel=0.02)


@pytest.mark.parametrize("argv,words", [
    (["analyze", "/no/such/file.csv"], "no such file"),
    (["analyze", "{csv}", "--gap", "5 kg"], "not a quantity"),
    (["analyze", "{csv}", "--voltage-column", "Bias", "--current-column", "3"], "no such column"),
    (["analyze", "{bare}"], "no header row"),
    (["analyze", "{bare}", "--voltage-column", "7", "--current-column", "2"], "the file has 3 columns"),
    (["analyze", "{csv}", "--series-resistance", "1 Mohm", "--fit-resistance"], "not both"),
])
def test_user_mistakes_give_one_line_and_exit_2(tmp_path, capsys, argv, words):
    csvp = outside_csv(tmp_path / "a.csv")
    bare = tmp_path / "b.csv"
    bare.write_text("1,2,3\n4,5,6\n")
    argv = [a.format(csv=csvp, bare=bare) for a in argv]
    rc = cli.main(argv)
    err = capsys.readouterr().err
    assert rc == 2
    assert words in err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1


def test_analyze_run_folder_writes_beside_the_raw_files(tmp_path, capsys):
    law = lambda V: mg_current(V, 2000, 1e-13, GAP, PHI)  # noqa: E731
    f = write_run_folder(str(tmp_path), "20261201T120000Z-kl-f12-a-0a1b2c", law, sweep_points(500, 1400, 25),
                         seed=73, i_limit=20e-6)
    raw = {n: open(os.path.join(f, n), "rb").read() for n in os.listdir(f)}
    rc = cli.main(["analyze", f, "--work-function", "4.5eV", "--no-figures"])
    out = capsys.readouterr().out
    assert rc == 0
    assert "regime 1" in out and "trust: apparently reasonable" in out
    assert {n: open(os.path.join(f, n), "rb").read() for n in raw} == raw
    assert os.path.exists(os.path.join(f, "analysis", "results.json"))


def test_negative_polarity_csv_is_read_as_magnitudes(tmp_path, capsys):
    # A cathode at negative high voltage with the ammeter in the cathode lead: both columns
    # negative. Same law and tolerance as above (seed 74).
    rng = np.random.default_rng(74)
    V = np.linspace(560, 1400, 30)
    I = mg_current(V, 2000, 1e-13, GAP, PHI) * (1 + 0.01 * rng.standard_normal(V.size))
    p = tmp_path / "neg.csv"
    p.write_text("U [V],I [A]\n" + "".join(f"{-float(v)!r},{-float(i)!r}\n" for v, i in zip(V, I)))
    assert cli.main(["analyze", str(p), "--work-function", "4.5eV", "--gap", "500um", "--json",
                     "--no-figures"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert res["branches"]["up"]["segments"][0]["forms"]["FN"]["beta"] == pytest.approx(2000, rel=0.02)
    assert any("polarity" in n for n in res["hygiene"]["notes"])


def test_report_verb_writes_the_page_and_refuses_a_missing_folder(tmp_path, capsys):
    law = lambda V: mg_current(V, 2000, 1e-13, GAP, PHI)  # noqa: E731
    f = write_run_folder(str(tmp_path), "20261201T160000Z-kl-f12-r-00aa11", law, sweep_points(560, 1300, 40),
                         seed=75, samples_per_point=2)
    assert cli.main(["report", f]) == 0
    out = capsys.readouterr().out.strip()
    assert out.endswith("report.html") and os.path.exists(out)
    assert os.path.exists(os.path.join(f, "analysis", "report.md"))
    assert cli.main(["report", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err
    assert "not a run folder" in err and len(err.strip().splitlines()) == 1


def test_analyze_several_gaps_gives_threshold_against_gap(tmp_path, capsys):
    # KL-F12 at 400 and 600 um with a gap-independent beta 2000: the threshold voltage is
    # proportional to the gap (F = beta V / d), so the fitted offset is near 0 V.
    folders = []
    for gap_um in (400, 600):
        g = gap_um * 1e-6
        law = (lambda gg: (lambda V: mg_current(V, 2000, 1e-13, gg, PHI)))(g)
        folders.append(write_run_folder(str(tmp_path), f"20261201T17{gap_um // 100:02d}00Z-kl-f12-g-{gap_um:06d}", law,
                                        sweep_points(1.2 * gap_um, 2.6 * gap_um, 0.02 * gap_um, down=False),
                                        seed=76, gap=f"{gap_um} um", samples_per_point=1, floor_sigma=0.0,
                                        zero_samples=0))
    assert cli.main(["analyze", *folders, "--work-function", "4.5eV", "--no-figures"]) == 0
    out = capsys.readouterr().out
    line = [ln for ln in out.splitlines() if ln.startswith("threshold voltage against gap")][0]
    offset = float(line.split("offset ")[1].split(" V")[0])
    assert abs(offset) < 20.0, line
