"""Dialect files: safe template filling, validation, and the shipped generic dialects."""
import pytest
import yaml

from drivers.dialect import (DEFAULT_DIALECTS, DialectError, fill, format_number,
                             load_dialect, quantize, validate)


def test_shipped_dialects_load():
    for role, name in DEFAULT_DIALECTS.items():
        d = load_dialect(name, role)
        assert d.role == role and d.name == name


def test_numbers_are_formatted_as_scpi_decimal_data():
    # IEEE 488.2 §7.7.2 decimal numeric program data (NRf, from memory): NR1 integers,
    # NR2/NR3 with an "E" exponent
    assert format_number(0.0) == "0" and format_number(1500) == "1500"
    assert format_number(1234.5) == "1234.5" and format_number(2e-9) == "2E-09"
    assert float(format_number(0.1 + 0.2)) == 0.1 + 0.2          # round-trips exactly
    for bad in ("1000", True, float("nan"), float("inf"), None):
        with pytest.raises((TypeError, ValueError)):
            format_number(bad)


def test_fill_substitutes_named_numbers_only():
    assert fill("SOUR:VOLT {volts}", volts=250.0) == "SOUR:VOLT 250"
    with pytest.raises(TypeError):
        fill("SOUR:VOLT {volts}", volts="250;*RST")              # text never goes in
    with pytest.raises(KeyError):
        fill("SOUR:VOLT {volts}", amps=1.0)
    # attribute or index syntax is just text to us, never evaluated
    assert fill("X {volts.__class__}", volts=1.0) == "X {volts.__class__}"


def test_quantize_to_resolution():
    assert quantize(100.04, 0.1) == 100.0 and quantize(100.06, 0.1) == 100.1
    assert quantize(1.23e-7, 1e-8) == pytest.approx(1.2e-7)


def base_supply():
    return yaml.safe_load(open(load_dialect("generic-scpi-supply").source).read())


def test_validation_lists_every_problem():
    data = base_supply()
    data["commands"]["set_voltage"] = "SOUR:VOLT {volts.real}"
    data["commands"]["bogus"] = "X"
    data["output_off"]["bleed_down_s"] = -1
    del data["commands"]["get_output"]
    with pytest.raises(DialectError) as info:
        validate(data, "kl-hv.yaml")
    msg = str(info.value)
    for part in ("commands.set_voltage", "commands.bogus", "bleed_down_s", "commands.get_output"):
        assert part in msg


def test_template_placeholders_must_match_the_command():
    data = base_supply()
    data["commands"]["output_on"] = "OUTP {volts}"
    with pytest.raises(DialectError, match="commands.output_on: placeholders"):
        validate(data, "x.yaml")
    data = base_supply()
    data["commands"]["set_voltage"] = "SOUR:VOLT {volts}\nOUTP ON"
    with pytest.raises(DialectError, match="printable"):
        validate(data, "x.yaml")


def test_comm_timeout_flag_must_match_the_template():
    data = base_supply()
    assert validate(data, "x.yaml").has("set_comm_timeout")
    data["comm_timeout"]["supported"] = False
    with pytest.raises(DialectError, match="comm_timeout.supported"):
        validate(data, "x.yaml")
    data["commands"]["set_comm_timeout"] = None
    assert not validate(data, "x.yaml").has("set_comm_timeout")


def test_bad_files_are_one_clear_error(tmp_path):
    p = tmp_path / "broken.yaml"
    p.write_text("name: x\nrole: [supply\n")
    with pytest.raises(DialectError, match="broken.yaml:.*not valid YAML"):
        load_dialect(str(p))
    with pytest.raises(DialectError, match="no built-in dialect"):
        load_dialect("no-such-dialect")
    with pytest.raises(DialectError, match="not a gauge"):
        load_dialect("generic-scpi-supply", "gauge")
    with pytest.raises(DialectError, match="built-in name or an existing"):
        load_dialect("/etc/passwd")


from hypothesis import given, settings, strategies as st  # noqa: E402


@settings(derandomize=True, max_examples=300)   # derandomized: the same examples every run
@given(st.floats(allow_nan=False, allow_infinity=False))
def test_every_finite_number_round_trips_through_a_template(x):
    cmd = fill("SOUR:VOLT {volts}", volts=x)
    head, _, arg = cmd.partition(" ")
    assert head == "SOUR:VOLT" and float(arg) == x
    assert all(c in "0123456789+-.E" for c in arg)   # NRf characters only (IEEE 488.2 §7.7.2)
