"""bench/run_all.py reports and never fails: a benchmark's ratio line is passed on, a
crashing one or one without a ratio line is named, and the runner's exit code stays 0
(BRIEF: "Benchmarks report; they never fail a build")."""
import importlib.util
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
spec = importlib.util.spec_from_file_location("run_all", ROOT / "bench" / "run_all.py")
run_all = importlib.util.module_from_spec(spec)
spec.loader.exec_module(run_all)


def test_ratio_line_is_passed_on(tmp_path):
    b = tmp_path / "bench_ok.py"
    b.write_text('print("12 ms")\nprint("demo: ratio 1.50 (ours / reference)")\n')
    status, ratios, _ = run_all.run_one(b, timeout=30, verbose=False)
    assert status == "ok" and ratios == ["demo: ratio 1.50 (ours / reference)"]


def test_crash_and_missing_ratio_are_named(tmp_path):
    crash = tmp_path / "bench_crash.py"
    crash.write_text("raise SystemExit(3)\n")
    silent = tmp_path / "bench_silent.py"
    silent.write_text('print("no figure")\n')
    assert run_all.run_one(crash, timeout=30, verbose=False)[0] == "exit 3"
    assert run_all.run_one(silent, timeout=30, verbose=False)[0] == "no ratio line"


def test_runner_exits_0_even_with_no_match():
    assert run_all.main(["no-such-benchmark-name"]) == 0
