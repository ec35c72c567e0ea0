"""Security and hygiene (issue 9, item 7), as checks that can fail.

Source scans (Python ``ast``, so comments and strings do not count): no unsafe YAML
loader anywhere; no ``eval``/``exec``/``compile`` of strings; no ``shell=True``,
``os.system`` or ``os.popen``; no ``pickle``/``marshal`` loads. Behaviour: YAML limits
(size, depth, aliases) refuse with one clear problem; dialect templates substitute named
numbers only; VISA backends by name only; alarm commands run as an argument list with the
message never reaching a shell; ``sim-serve`` binds loopback by default, caps lines and
clients; protocol names cannot climb out of the runs folder; the HTML report escapes what
it shows; and a protocol can never raise a rig's hard limits (hypothesis over values).
"""
import ast
import functools
import math
import socket
import sys
import tempfile
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings, strategies as st

ROOT = Path(__file__).resolve().parents[1]
SOURCE_DIRS = ("drivers", "sequencer", "simulators", "tools", "bench")


@functools.lru_cache(maxsize=1)
def _parsed():
    return tuple((p, ast.parse(p.read_text(encoding="utf-8"), str(p)))
                 for d in SOURCE_DIRS for p in sorted((ROOT / d).rglob("*.py")))


def _sources():
    return _parsed()


def _dotted(node) -> str:
    parts = []
    while isinstance(node, ast.Attribute):
        parts.append(node.attr)
        node = node.value
    if isinstance(node, ast.Name):
        parts.append(node.id)
    return ".".join(reversed(parts))


@functools.lru_cache(maxsize=1)
def _call_list():
    return tuple((p.relative_to(ROOT).as_posix(), node.lineno, _dotted(node.func), node)
                 for p, tree in _sources() for node in ast.walk(tree) if isinstance(node, ast.Call))


def _calls():
    return _call_list()


# ---------------------------------------------------------------------- source scans
def test_the_scan_sees_the_source_tree():
    # a scan that finds no files would pass anything
    names = {name for _, _, name, _ in _calls()}
    assert "subprocess.run" in names and len(names) > 200


def test_no_unsafe_yaml_loader_anywhere():
    unsafe = {"yaml.load", "yaml.load_all", "yaml.unsafe_load", "yaml.unsafe_load_all",
              "yaml.full_load", "yaml.full_load_all"}
    bad = [f"{f}:{ln}: {name}" for f, ln, name, _ in _calls() if name in unsafe]
    for p, tree in _sources():
        for node in ast.walk(tree):
            if isinstance(node, ast.Attribute) and _dotted(node) in (
                    "yaml.Loader", "yaml.UnsafeLoader", "yaml.FullLoader", "yaml.CLoader"):
                bad.append(f"{p.relative_to(ROOT)}:{node.lineno}: {_dotted(node)}")
    assert not bad, bad


#: plain yaml.safe_load (no size/depth/alias limits) outside the bounded loaders
#: (sequencer/yamlsafe.py for protocols and rigs, drivers/yamllimits.py for everything
#: else), and why
PLAIN_SAFE_LOAD = {
    "sequencer/commands/sim_serve.py": "fallback only when sequencer.rig is missing; size-capped",
    "bench/bench_protocol_check.py": "the reference the benchmark compares against",
}


def test_every_yaml_read_has_limits():
    # issue 9 item 7: YAML only through safe loading with size, depth and alias limits
    seen = {f for f, _, name, _ in _calls() if name == "yaml.safe_load"}
    assert seen <= set(PLAIN_SAFE_LOAD), sorted(seen - set(PLAIN_SAFE_LOAD))


def test_the_bounded_loader_refuses_an_alias_bomb_and_deep_nesting():
    from drivers.yamllimits import YamlLimit, load_limited
    bomb = "a: &x [1]\n" + "".join(f"b{i}: *x\n" for i in range(150))
    with pytest.raises(YamlLimit, match="alias"):
        load_limited(bomb)
    with pytest.raises(YamlLimit, match="nesting"):
        load_limited("a: " + "[" * 40 + "]" * 40 + "\n")
    with pytest.raises(yaml.YAMLError):
        load_limited("a: !!python/object/apply:os.system ['true']\n")
    assert load_limited("a: [1, 2]\n") == {"a": [1, 2]}


def test_no_eval_or_exec_of_strings():
    bad = [f"{f}:{ln}: {name}" for f, ln, name, _ in _calls()
           if name in ("eval", "exec", "compile", "builtins.eval", "builtins.exec")]
    assert not bad, bad


def test_no_shell_anywhere():
    bad = []
    for f, ln, name, node in _calls():
        if name in ("os.system", "os.popen", "subprocess.getoutput", "subprocess.getstatusoutput"):
            bad.append(f"{f}:{ln}: {name}")
        for kw in node.keywords:
            if kw.arg == "shell" and not (isinstance(kw.value, ast.Constant) and kw.value.value is False):
                bad.append(f"{f}:{ln}: {name}(shell=...)")
    assert not bad, bad


def test_no_pickle_or_marshal_loads():
    bad = [f"{f}:{ln}: {name}" for f, ln, name, _ in _calls()
           if name.split(".")[0] in ("pickle", "marshal", "shelve") and "load" in name]
    assert not bad, bad


# ---------------------------------------------------------------------- YAML limits
@pytest.mark.parametrize("text,words", [
    ("a: &x [1]\n" + "".join(f"b{i}: *x\n" for i in range(150)), "alias"),
    ("a: " + "[" * 40 + "]" * 40 + "\n", "nesting"),
    ("a: " + "x" * 1_000_100 + "\n", "larger"),
    ("a: !!python/object/apply:os.system ['true']\n", "tag"),
])
def test_yaml_limits_refuse_in_one_line(text, words):
    from sequencer.errors import ProtocolError
    from sequencer.yamlsafe import load_text
    with pytest.raises(ProtocolError) as exc:
        load_text(text, "evil.yaml")
    assert words in str(exc.value).lower()


# ---------------------------------------------------------------------- templates, VISA
def test_dialect_templates_take_named_numbers_only():
    from drivers.dialect import fill
    assert fill("VOLT {volts}", volts=12.5).startswith("VOLT 12.5")
    # Python format-string syntax is not a placeholder: it stays literal text
    assert fill("X {volts.__class__} {0}", volts=1.0) == "X {volts.__class__} {0}"
    with pytest.raises(KeyError):
        fill("VOLT {volts}")
    with pytest.raises((TypeError, ValueError)):
        fill("VOLT {volts}", volts="1; OUTP ON")   # numbers only, never text


@given(st.text(min_size=1, max_size=40))
@settings(max_examples=200, deadline=None)
def test_visa_backend_is_a_name_never_a_path(name):
    from drivers.errors import DriverError
    from drivers.transport_visa import check_backend
    try:
        ok = check_backend(name)
    except DriverError:
        return
    assert ok.startswith("@") and "/" not in ok and "\\" not in ok and "." not in ok


def test_visa_backend_paths_refused():
    from drivers.errors import DriverError
    from drivers.transport_visa import check_backend
    assert check_backend("@py") == "@py"
    for bad in ("/usr/lib/libvisa.so", "C:\\visa32.dll", "@py;rm", "../lib.so"):
        with pytest.raises(DriverError):
            check_backend(bad)


# ---------------------------------------------------------------------- alarms
def test_alarm_message_never_reaches_a_shell(tmp_path):
    from sequencer.alarms import raise_alarm
    out = tmp_path / "alarm.txt"
    marker = tmp_path / "pwned"
    code = "import sys; open(sys.argv[1], 'w').write(sys.argv[2])"
    message = f"trip; touch {marker} && echo $(id) `id`"
    evs = raise_alarm([[sys.executable, "-c", code, str(out), "{message}"]], message)
    assert evs[0]["returncode"] == 0
    assert out.read_text() == message          # passed as one argument, verbatim
    assert not marker.exists()                 # nothing interpreted it


def test_alarm_command_as_a_string_never_reaches_a_shell(tmp_path):
    from sequencer.alarms import raise_alarm
    evs = raise_alarm([f"touch {tmp_path / 'x'}"], "m")   # a string, not a list of strings
    assert "error" in evs[0] or evs[0].get("returncode") not in (0,)
    assert not (tmp_path / "x").exists()


# ---------------------------------------------------------------------- sim-serve
def test_sim_serve_loopback_by_default_with_line_and_client_caps():
    from sequencer.commands import sim_serve
    import argparse
    p = argparse.ArgumentParser()
    sim_serve.add_arguments(p)
    assert p.parse_args([]).bind == "127.0.0.1"
    serving = sim_serve.start({}, max_line=64)
    try:
        port = serving.servers["supply"].port
        assert serving.resources()["supply"] == f"TCPIP::127.0.0.1::{port}::SOCKET"
        a = socket.create_connection(("127.0.0.1", port), timeout=2.0)
        a.sendall(b"*IDN?\n")
        assert b"SIMULATED" in a.recv(200)
        b = socket.create_connection(("127.0.0.1", port), timeout=2.0)
        try:   # one client per instrument: the second is closed without an answer
            b.sendall(b"*IDN?\n")
            assert b.recv(200) == b""
        except (ConnectionResetError, BrokenPipeError):
            pass
        b.close()
        a.sendall(b"X" * 200 + b"\n")      # over the 64-byte cap: dropped
        try:
            assert a.recv(200) == b""
        except ConnectionResetError:
            pass
        a.close()
    finally:
        serving.stop()


# ---------------------------------------------------------------------- names and paths
@given(st.text(max_size=200))
@settings(max_examples=300, deadline=None)
def test_protocol_names_cannot_escape_the_runs_folder(name):
    import re
    from sequencer.runfolder import sanitise_name
    s = sanitise_name(name)
    assert re.fullmatch(r"[A-Za-z0-9_-]+", s) and s not in (".", "..") and len(s) <= 200


@pytest.mark.parametrize("name", ["../../etc/passwd", "/abs/path", "a/../../b", "..", "C:\\x", "\x00nul"])
def test_run_folder_stays_inside_the_runs_dir(tmp_path, name):
    from sequencer.runfolder import create_run_folder
    folder = Path(create_run_folder(tmp_path / "runs", name))
    assert folder.resolve().parent == (tmp_path / "runs").resolve()


# ---------------------------------------------------------------------- HTML report
def test_html_report_escapes_what_it_shows(tmp_path):
    # A short simulated run (no report), then its folder made hostile the way a copied or
    # edited folder could be: markup in the manifest's protocol name and sample id and in
    # an event message. The report reads all of it from the files; its HTML must show it
    # as text (html.escape), never as markup.
    import json
    import subprocess
    from tests.faults import rigs
    proto = rigs.write_protocol(tmp_path, 'name: short\nsample_period: "1 s"\nsteps:\n'
                                '  - ramp: {to: "50 V", rate: "25 V/s"}\n  - return: {rate: "25 V/s"}\n')
    cp = subprocess.run([sys.executable, "-m", "sequencer.cli", "run", str(proto), "--rig",
                         str(rigs.write_rig(tmp_path)), "--quiet", "--no-report",
                         "--runs-dir", str(tmp_path / "runs")],
                        cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert cp.returncode == 0, cp.stderr
    folder = next((tmp_path / "runs").iterdir())
    evil = "<script>alert('KL')</script>"
    man = json.loads((folder / "manifest.json").read_text())
    man["protocol"]["name"] = evil
    man["sample"] = {"id": "<img src=x onerror=alert(1)>"}
    (folder / "manifest.json").write_text(json.dumps(man))
    with open(folder / "events.jsonl", "a", encoding="utf-8") as fh:
        fh.write(json.dumps({"kind": "note", "seq": 1, "t": 1.0, "utc": 1.8e9, "n": 999,
                             "message": evil + "<b onmouseover=x>"}) + "\n")
    # the report's own reading of the folder (meta, events), without the fits and figures
    # (they add nothing here and cost seconds): what the page shows comes from the files
    from sequencer.analysis import run as arun
    from sequencer.report import html as rhtml
    meta = arun.run_meta(str(folder))
    page = rhtml.render(arun.no_data_results(str(folder), meta, evil), meta,
                        arun.read_events(str(folder)))
    assert "<script>alert" not in page and "<img src=x" not in page and "<b onmouseover" not in page
    assert "&lt;script&gt;" in page and "&lt;b onmouseover" in page


# ---------------------------------------------------------------------- hard limits
LIMIT_UNITS = {"voltage_max": "V", "current_max": "A", "power_max": "W",
               "pressure_max": "Pa", "pressure_arm_max": "Pa"}


@given(st.dictionaries(st.sampled_from(sorted(LIMIT_UNITS)),
                       st.floats(min_value=1e-12, max_value=1e12, allow_nan=False,
                                 allow_infinity=False), min_size=1))
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
def test_a_protocol_never_raises_a_rigs_hard_limits(values):
    from sequencer.compiler import compile_plan
    from sequencer.errors import ProtocolError
    from sequencer.protocol import load_protocol
    from sequencer.rig import load_rig
    from tests.faults import rigs
    with tempfile.TemporaryDirectory() as d:
        d = Path(d)
        rig = load_rig(rigs.write_rig(d))
        lines = "".join(f'  {k}: "{v!r} {LIMIT_UNITS[k]}"\n' for k, v in values.items())
        p = d / "p.yaml"
        p.write_text('name: limits\nsample_period: "1 s"\nlimits:\n' + lines +
                     'steps:\n  - ramp: {to: "100 V", rate: "10 V/s"}\n  - return: {rate: "10 V/s"}\n',
                     encoding="utf-8")
        try:
            plan = compile_plan(load_protocol(p), rig)
        except ProtocolError:
            return          # refused with its line: the limit was not raised either
        for name, bound in rig.hard_limits().items():
            got = plan.limits.values[name]
            assert got <= bound * (1 + 1e-12), (name, got, bound, values)
        from drivers.roles import hardware_limits
        v_ovp, i_limit = hardware_limits(plan.peak_voltage, plan.limits.current_max,
                                         rig.voltage_max, rig.current_max)
        assert v_ovp <= rig.voltage_max and i_limit <= rig.current_max
