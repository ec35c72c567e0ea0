"""The safe YAML loader: positions, limits, duplicate keys and the YAML 1.1 traps.

Sources: YAML 1.1 type repository (yaml.org/type/bool.html: y|Y|yes|Yes|YES|n|N|no|No|NO|
true|...|on|On|ON|off|Off|OFF are booleans; yaml.org/type/int.html: base 60 "1:30" = 90,
octal "0755"; yaml.org/type/timestamp.html: "2024-05-01" is a date). PyYAML implements
YAML 1.1 (its documentation, from memory), which is why these are traps.
"""
import pytest
import yaml

from sequencer.errors import ProtocolError
from sequencer.protocol import protocol_from_text
from sequencer.yamlsafe import MAX_ALIASES, MAX_DEPTH, load_text


def test_pyyaml_itself_has_the_traps_we_guard_against():
    # the reason the loader exists: the default safe loader converts silently
    assert yaml.safe_load("a: on\nb: NO\nc: 1:30\nd: 0755") == {"a": True, "b": False,
                                                                "c": 90, "d": 493}
    assert yaml.safe_load("a: 1\na: 2") == {"a": 2}     # duplicate kept silently


def test_positions_are_one_based_line_and_column():
    root = load_text("name: x\nsteps:\n  - rest: {duration: \"1 s\"}\n", "f")
    steps = root.get("steps")
    assert (steps.line, steps.col) == (3, 3)
    rest = steps.value[0].get("rest").get("duration")
    # columns: 2 spaces, "- " (3-4), "rest: " (5-10), "{" 11, "duration: " (12-21), quote 22
    assert (rest.line, rest.col) == (3, 22) and rest.value == "1 s" and rest.quoted


@pytest.mark.parametrize("word", ["y", "Y", "yes", "Yes", "YES", "n", "N", "no", "No", "NO",
                                  "on", "On", "ON", "off", "Off", "OFF"])
def test_yaml11_booleans_are_refused_where_text_is_expected(word):
    with pytest.raises(ProtocolError) as exc:
        protocol_from_text(f"name: {word}\nsteps:\n  - rest: {{duration: \"1 s\"}}\n", "f")
    (p,) = exc.value.problems
    assert p.line == 1 and repr(word) in p.message and "boolean" in p.message


def test_quoted_words_are_text():
    p = protocol_from_text('name: "no"\nsteps:\n  - rest: {duration: "1 s"}\n', "f")
    assert p.name == "no"


@pytest.mark.parametrize("value,words", [("1:30", "base-60"), ("0755", "octal"),
                                         ("2024-05-01", "date"), ("1.5", "number")])
def test_yaml11_numbers_and_dates_are_refused_where_text_is_expected(value, words):
    with pytest.raises(ProtocolError) as exc:
        protocol_from_text(f"name: {value}\nsteps:\n  - rest: {{duration: \"1 s\"}}\n", "f")
    assert words in str(exc.value)


def test_self_referencing_alias_is_an_error_not_a_hang():
    for text in ("a: &a [*a]", "a: &a {b: *a}", "&r [1, *r]"):
        with pytest.raises(ProtocolError) as exc:
            load_text(text, "f")
        assert "cycle" in str(exc.value)


def test_alias_bomb_is_refused():
    # "billion laughs": each level doubles; the alias count limit stops it early
    lines = ["a0: &a0 [x, x]"]
    for i in range(1, 40):
        lines.append(f"a{i}: &a{i} [*a{i - 1}, *a{i - 1}]")
    with pytest.raises(ProtocolError) as exc:
        load_text("\n".join(lines), "f")
    assert "alias" in str(exc.value) or "expands" in str(exc.value)


def test_too_many_aliases_is_refused():
    text = "a: &a x\nb: [" + ", ".join(["*a"] * (MAX_ALIASES + 1)) + "]\n"
    with pytest.raises(ProtocolError) as exc:
        load_text(text, "f")
    assert f"more than {MAX_ALIASES} alias" in str(exc.value)


def test_depth_limit():
    text = "a: " + "[" * (MAX_DEPTH + 5) + "]" * (MAX_DEPTH + 5)
    with pytest.raises(ProtocolError) as exc:
        load_text(text, "f")
    assert "deeper" in str(exc.value)


def test_very_deep_nesting_does_not_hit_the_recursion_limit():
    text = "[" * 50_000
    with pytest.raises(ProtocolError):
        load_text(text, "f")


def test_size_limit(tmp_path):
    from sequencer.yamlsafe import MAX_BYTES, load
    big = tmp_path / "big.yaml"
    big.write_text("# " + "x" * MAX_BYTES + "\n")
    with pytest.raises(ProtocolError) as exc:
        load(big)
    assert "larger" in str(exc.value)


def test_explicit_tags_and_merge_keys_are_refused():
    with pytest.raises(ProtocolError) as exc:
        load_text("a: !!python/object/apply:os.system [ls]", "f")
    assert "not allowed" in str(exc.value)
    with pytest.raises(ProtocolError) as exc:
        load_text("base: &b {x: 1}\nc:\n  <<: *b\n", "f")
    assert "merge" in str(exc.value)


def test_duplicate_keys_name_both_lines():
    with pytest.raises(ProtocolError) as exc:
        load_text("a: 1\nb: 2\na: 3\n", "f")
    (p,) = exc.value.problems
    assert (p.line, p.col) == (3, 1) and "first at line 1" in p.message


def test_non_utf8_and_control_characters(tmp_path):
    from sequencer.yamlsafe import load
    f = tmp_path / "latin1.yaml"
    f.write_bytes(b"name: caf\xe9\n")
    with pytest.raises(ProtocolError) as exc:
        load(f)
    assert "UTF-8" in str(exc.value)
    with pytest.raises(ProtocolError) as exc:
        load_text("name: a\x00b\n", "f")
    assert exc.value.problems[0].line == 1


def test_pass_through_values_read_1e6_as_a_number():
    # PyYAML follows YAML 1.1, whose float needs a dot and a signed exponent: "1e6" stays
    # text there (yaml.org/type/float.html); in pass-through settings it is a number
    from sequencer.yamlsafe import Fields
    assert yaml.safe_load("a: 1e6") == {"a": "1e6"}
    f = Fields("f")
    got = f.plain(load_text("a: 1e6\nb: '1e6'\nc: 1.5e+3\nd: true\ne: [1, x]\n", "f"), "s")
    assert got == {"a": 1e6, "b": "1e6", "c": 1500.0, "d": True, "e": [1, "x"]}
    assert not f.problems
