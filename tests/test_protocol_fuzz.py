"""Property test: whatever text is fed to the protocol loader, the only outcomes are a
Protocol or a ProtocolError (never another exception, never a hang). Inputs: arbitrary
YAML-ish text, arbitrary YAML trees dumped by PyYAML, and the example protocols mutated
character by character. Seeded (derandomize=True: hypothesis derives its examples from the
test itself, so every run sees the same ones) and kept small so it runs in seconds.
"""
from pathlib import Path

import yaml
from hypothesis import HealthCheck, given, settings, strategies as st

from sequencer.compiler import compile_plan
from sequencer.errors import ProtocolError
from sequencer.protocol import Protocol, protocol_from_text
from sequencer.rig import load_rig

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = [p.read_text() for p in sorted((ROOT / "protocols").glob("*.yaml"))
            if "rig" not in p.name]
RIG = load_rig(ROOT / "protocols" / "sim-rig.yaml")
SETTINGS = settings(max_examples=150, deadline=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow])

YAML_ALPHABET = st.sampled_from(list("abcdefghijklmnopqrstuvwxyz0123456789 :-[]{},&*!#|>'\"\n\t.%/µ"))


def _outcome(text):
    try:
        proto = protocol_from_text(text, "fuzz.yaml")
    except ProtocolError as exc:
        assert exc.problems, "a ProtocolError always names at least one problem"
        for p in exc.problems:
            assert p.line >= 1 and p.col >= 1 and p.message
        return None
    assert isinstance(proto, Protocol)
    try:   # and what parses must compile or be refused cleanly
        compile_plan(proto, RIG)
    except ProtocolError as exc:
        assert exc.problems
    return proto


@SETTINGS
@given(st.text(YAML_ALPHABET, max_size=200))
def test_arbitrary_text(text):
    _outcome(text)      # asserts: a Protocol or a ProtocolError naming its problems


scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                    st.floats(allow_nan=True, allow_infinity=True),
                    st.sampled_from(["1 kV", "5 V/s", "on", "NO", "1:30", "0755", "2 V/um",
                                     "nan V", "ramp", "dwell", "-3 s", "2*3 V", "~"]),
                    st.text(max_size=12))
trees = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4),
    st.dictionaries(st.sampled_from(["name", "steps", "limits", "ramp", "to", "rate",
                                     "dwell", "duration", "sweep", "start", "stop", "step",
                                     "repeat", "times", "current_max", "x"]),
                    inner, max_size=4)), max_leaves=20)


@SETTINGS
@given(trees)
def test_arbitrary_yaml_trees(tree):
    _outcome(yaml.safe_dump(tree, allow_unicode=True))


@SETTINGS
@given(st.sampled_from(range(len(EXAMPLES))), st.lists(
    st.tuples(st.integers(0, 10_000), st.sampled_from(["delete", "insert", "replace"]),
              YAML_ALPHABET), min_size=1, max_size=4))
def test_mutated_examples(index, edits):
    # _outcome asserts: a Protocol (which compiles or is refused cleanly) or a ProtocolError
    _outcome(_mutate(EXAMPLES[index], edits))


def _mutate(text, edits):
    """``text`` with each (position, delete|insert|replace, character) edit applied."""
    for pos, op, ch in edits:
        i = pos % (len(text) + 1)
        if op == "delete":
            text = text[:i] + text[i + 1:]
        elif op == "insert":
            text = text[:i] + ch + text[i:]
        else:
            text = text[:i] + ch + text[i + 1:]
    return text


def test_unmutated_examples_parse():
    for text in EXAMPLES:
        assert isinstance(_outcome(text), Protocol)


RIG_TEXTS = [p.read_text() for p in sorted((ROOT / "protocols").glob("*rig*.yaml"))]


@SETTINGS
@given(st.sampled_from(range(len(RIG_TEXTS))), st.lists(
    st.tuples(st.integers(0, 10_000), st.sampled_from(["delete", "insert", "replace"]),
              YAML_ALPHABET), min_size=1, max_size=4))
def test_mutated_rig_files(index, edits):
    # the rig loader too: only a Rig or a ProtocolError comes out
    from sequencer.rig import Rig, rig_from_text
    text = _mutate(RIG_TEXTS[index], edits)
    try:
        assert isinstance(rig_from_text(text, "fuzz-rig.yaml"), Rig)
    except ProtocolError as exc:
        assert exc.problems
