"""Calibrate: runs simulated from known cathode parameters give those parameters back.

What is set. The simulated stand-B with a 2000-emitter fibre of known fittable parameters
(TRUTH below: enhancement scale height_median_m 2.5 um, area_scale 2.0, noise_level 0.05,
burst_rate_hz 1.0; seed 21), recorded twice with `fieldrun replay --unguarded`: an I–V
sweep (340 to 520 V, 12 points even in 1/V, 3 samples each) and a 90 s dwell at 600 V.
Calibration starts from the model's defaults (2 um, 1.0, 0.03, 0.05) and must not see the
truth: the prior rig is a separate file.

Expected, and the tolerances (why each):
* height_median_m within 15 %: the FN slope fixes the strongest emitters' enhancement; the
  recording's seed is in its manifest, so calibration draws the same ensemble and the
  residual comes from what the quiet fit does not replay (ion hits and flicker during the
  recorded sweeps). On a real fibre its own ensemble draw adds scatter: between draws of
  2000 emitters the FN zeta of this sweep scatters by about +-20 % (measured while writing
  this test), which calibration cannot remove.
* area_scale within a factor 2: the FN intercept (formal area) moves exponentially with
  any slope error (ln A_f shifts by about b phi^(3/2) zeta / V times the relative error of
  zeta, Forbes 2013 form; here some tens per unit), so a few % on zeta is tens of % on
  the area.
* noise_level within 20 %: the robust sigma of ~180 sample-to-sample changes has a
  standard error of about 1.65 sigma / sqrt(2 n) = 9 % (the MAD's asymptotic efficiency of
  37 % for normal data; Rousseeuw and Croux 1993), plus the dwell's drift.
* burst_rate_hz within a factor 2: a handful of jump events are seen (Poisson relative
  uncertainty 1 / sqrt(n), 40 % at 6).
Outside reference: the noise estimate's unit variance rests on the exact OU
discretisation (Gillespie, Phys. Rev. E 54 (1996) 2084), checked here as
flicker_unit -> sqrt(2) for dt much longer than every correlation time.
"""
import json
import math

import numpy as np
import pytest

from sequencer import calibrate as K
from sequencer.cli import main
from sequencer.rig import load_rig
from tests.replay_support import sim_rig, write

SEED = 21
TRUTH = {"height_median_m": 2.5e-6, "area_scale": 2.0, "noise_level": 0.05, "burst_rate_hz": 1.0}
BASE = "emitters: 2000, gap_m: 5.0e-4, series_resistance_ohm: 1.0e+6"
SWEEP = """\
name: kl-f12-iv
sample_period: "0.5 s"
limits: {current_max: "50 uA"}
steps:
  - ramp: {to: "340 V", rate: "50 V/s"}
  - sweep: {start: "340 V", stop: "520 V", points: 12, spacing: inverse, settle: "0.5 s", samples: 3, rate: "50 V/s"}
  - return: {rate: "50 V/s"}
"""
DWELL = """\
name: kl-f12-dwell
sample_period: "0.5 s"
limits: {current_max: "50 uA"}
steps:
  - ramp: {to: "600 V", rate: "50 V/s"}
  - dwell: {duration: "90 s"}
  - return: {rate: "50 V/s"}
"""


def test_flicker_unit_reaches_sqrt2_for_long_steps():
    # x(t+dt) - x(t) of a unit-variance OU process: variance 2 (1 - exp(-dt/tau)) -> 2
    assert K.flicker_unit(1e6, {}) == pytest.approx(math.sqrt(2.0), rel=1e-6)
    assert K.flicker_unit(1e-9, {}) < 1e-3


def test_jump_events_count_steps_spikes_and_overflows_once_each():
    rng = np.random.default_rng(4)
    print("seed 4")
    I = 1e-6 * np.exp(0.01 * rng.standard_normal(100))
    I[30:] *= 1.5          # a step
    I[60] *= 20            # a one-sample spike (up, then down: one event)
    I[80] = np.nan         # an overflowed reading
    assert K.count_jumps(I, K.robust_sigma(np.diff(np.log(I[np.isfinite(I)])))) == 3


def test_calibrate_recovers_known_parameters(tmp_path, capsys):
    print(f"seed {SEED}, truth {TRUTH}")
    truth = ", ".join(f"{k}: {v}" for k, v in TRUTH.items())
    rig = sim_rig(tmp_path, "{" + BASE + ", " + truth + "}", seed=SEED)
    prior = sim_rig(tmp_path, "{" + BASE + "}", seed=1, name="prior.yaml")
    runs = tmp_path / "runs"
    for name, text in (("sweep.yaml", SWEEP), ("dwell.yaml", DWELL)):
        proto = write(tmp_path, name, text)
        assert main(["replay", str(proto), "--rig", str(rig), "--seed", str(SEED), "--unguarded",
                     "--quiet", "--no-report", "--runs-dir", str(runs)]) == 0
    folders = sorted(str(p) for p in runs.iterdir() if p.is_dir() and not p.name.startswith("."))
    assert len(folders) == 2
    capsys.readouterr()

    out = tmp_path / "calibrated.yaml"
    assert main(["calibrate", *folders, "--rig", str(prior), "--out", str(out), "--quiet"]) == 0
    printed = capsys.readouterr().out
    fitted = json.loads(out.with_suffix(".json").read_text())["fitted"]
    print(fitted)
    assert fitted["height_median_m"] == pytest.approx(TRUTH["height_median_m"], rel=0.15)
    assert 0.5 < fitted["area_scale"] / TRUTH["area_scale"] < 2.0
    assert fitted["noise_level"] == pytest.approx(TRUTH["noise_level"], rel=0.20)
    assert 0.5 < fitted["burst_rate_hz"] / TRUTH["burst_rate_hz"] < 2.0
    # the prior was really elsewhere (the fit moved every parameter towards the truth)
    for k in TRUTH:
        assert abs(math.log(fitted[k] / TRUTH[k])) < abs(math.log(
            {"height_median_m": 2e-6, "area_scale": 1.0, "noise_level": 0.03, "burst_rate_hz": 0.05}[k] / TRUTH[k]))

    # the rig file is a valid simulated rig, commented, with the fitted values in it
    text = out.read_text()
    assert text.startswith("# A simulated rig calibrated by `fieldrun calibrate`")
    assert "# fitted: enhancement-factor scale" in text
    calibrated = load_rig(out)
    cath = calibrated.simulation["cathode"]
    assert cath["emitters"] == 2000 and cath["area_scale"] == pytest.approx(fitted["area_scale"], rel=1e-3)
    assert out.with_suffix(".png").stat().st_size > 1000
    assert "fieldrun replay PROTOCOL --rig" in printed


def test_calibrate_refuses_a_missing_folder_in_one_line(tmp_path, capsys):
    code = main(["calibrate", str(tmp_path / "nope"), "--out", str(tmp_path / "x.yaml"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "no such run folder" in err and "Traceback" not in err


def test_a_bad_out_path_is_refused_before_the_fit(tmp_path, capsys):
    # --out naming a folder, or a file in a folder that does not exist, is refused at once
    # (exit 2, one line), not after minutes of fitting.
    from sequencer.cli import main
    run = tmp_path / "run"
    run.mkdir()
    (run / "manifest.json").write_text("{}")
    assert main(["calibrate", str(run), "--out", str(tmp_path)]) == 2
    assert "is a folder" in capsys.readouterr().err
    assert main(["calibrate", str(run), "--out", str(tmp_path / "no" / "x.yaml")]) == 2
    assert "does not exist" in capsys.readouterr().err
