"""SCPI and IEEE 488.2 behaviour of the simulated instruments, checked against the
standards' rules (sections named beside each check; all from memory of the texts)."""
import pytest

from drivers.clock import VirtualClock
from simulators.instruments import SimAmmeter, SimSupply
from simulators.quirks import Quirks

SEED = 11  # shown so a failing run can be repeated


def supply(**cfg):
    return SimSupply(VirtualClock(), config=cfg, seed=SEED)


def errors(inst):
    """Drain the error queue (bounded), as a host would."""
    out = []
    for _ in range(50):
        code = int(inst.handle("SYST:ERR?").split(",")[0])
        if code == 0:
            return out
        out.append(code)
    raise AssertionError("error queue did not empty")


def test_idn_has_four_fields_and_says_simulated():
    # IEEE 488.2 10.14: *IDN? answers maker, model, serial, firmware
    s = supply(serial="KL-HV-0042")
    fields = s.handle("*IDN?").split(",")
    assert len(fields) == 4
    assert fields[0] == "FIELDRUN" and fields[1] == "SIM-SUPPLY" and fields[2] == "KL-HV-0042"
    assert fields[3].startswith("SIMULATED")


@pytest.mark.parametrize("form", [
    "SOURce:VOLTage:LEVel:IMMediate:AMPLitude 250",   # every node long
    "SOUR:VOLT 250",                                  # short forms
    "sour:volt:lev 250",                              # case does not matter
    "VOLT 250",                                       # optional [SOURce] left out
    ":SOUR:VOLT 250",                                 # leading colon: from the root
    "source:voltage 250",
    "SOUR1:VOLT 250",                                 # numeric suffix 1
    "SOUR:VOLT 0.25 kV",                              # suffix with multiplier
])
def test_long_short_and_optional_forms_are_one_command(form):
    # SCPI-99 vol. 1, 6.2.1 (long/short keywords, case), 6.2.5 (optional nodes),
    # 7.7.3 (units and multipliers)
    s = supply()
    s.handle(form)
    assert float(s.handle("SOUR:VOLT?")) == pytest.approx(250.0)
    assert errors(s) == []


@pytest.mark.parametrize("bad", ["SOURC:VOLT 10", "SO:VOLT 10", "VOLTA 10"])
def test_abbreviations_other_than_the_short_form_are_undefined(bad):
    # SCPI-99 vol. 1, 6.2.1: only the short form or the long form is accepted
    s = supply()
    s.handle(bad)
    assert errors(s) == [-113]


def test_error_codes_by_cause():
    # SCPI-99 vol. 2, 21.8: -113 undefined header, -222 data out of range, -104 data
    # type error, -131 invalid suffix, -109 missing parameter; FIFO order (21.8.1)
    s = supply(v_max=3000)
    s.handle("FOO:BAR 1")
    s.handle("SOUR:VOLT 4000")
    s.handle("SOUR:VOLT abc")
    s.handle("SOUR:VOLT 10 A")
    s.handle("SOUR:VOLT")
    assert errors(s) == [-113, -222, -104, -131, -109]
    assert s.handle("SYST:ERR?") == '0,"No error"'   # empty queue answers 0


def test_error_queue_overflow_replaces_newest_with_minus_350():
    # SCPI-99 vol. 2, 21.8.1: when full, the most recent error is replaced by -350
    s = SimSupply(VirtualClock(), seed=SEED, quirks=Quirks("supply", {"error_queue_length": 4}, SEED))
    for _ in range(7):
        s.handle("NOPE")
    assert s.handle("SYST:ERR:COUN?") == "4"
    assert errors(s) == [-113, -113, -113, -350]


def test_esr_bits_by_error_class_and_read_clears():
    # IEEE 488.2 11.5.1.1: CME bit 5 (-1xx), EXE bit 4 (-2xx), PON bit 7 at power-on;
    # reading *ESR? clears it (11.5.1.2)
    s = supply()
    assert int(s.handle("*ESR?")) == 128      # power-on bit only
    assert int(s.handle("*ESR?")) == 0
    s.handle("FOO")
    assert int(s.handle("*ESR?")) == 32
    s.handle("SOUR:VOLT 1e9")
    assert int(s.handle("*ESR?")) == 16


def test_cls_clears_queue_and_stb_reports_error_available():
    # SCPI-99 vol. 1, 9.1 / IEEE 488.2 11.2: STB bit 2 set while the error queue holds
    # an entry; *CLS empties the queue (IEEE 488.2 10.3)
    s = supply()
    s.handle("FOO")
    assert int(s.handle("*STB?")) & 4
    s.handle("*CLS")
    assert not int(s.handle("*STB?")) & 4
    assert errors(s) == []


def test_compound_line_joins_query_replies_with_semicolon():
    # IEEE 488.2 7.4.1 (message unit separator) and 8.4.1 (response separator ';')
    s = supply()
    reply = s.handle("SOUR:VOLT 120;SOUR:CURR 2e-5;SOUR:VOLT?;SOUR:CURR?;*OPC?")
    v, i, opc = reply.split(";")
    assert float(v) == pytest.approx(120.0) and float(i) == pytest.approx(2e-5) and opc == "1"


def test_query_with_undefined_header_gives_no_reply():
    # IEEE 488.2 6.5.4 / SCPI-99 21.8: a command error produces no response (the host
    # times out) and queues -113
    s = supply()
    assert s.handle("MEAS:NONSENSE?") is None
    assert errors(s) == [-113]


def test_rst_turns_the_output_off_and_restores_defaults():
    # IEEE 488.2 10.32: *RST puts the device in its reset state; common practice for a
    # supply: output off, 0 V
    s = supply()
    s.handle("SOUR:VOLT 100;OUTP ON")
    assert s.handle("OUTP?") == "1"
    s.handle("*RST")
    assert s.handle("OUTP?") == "0" and float(s.handle("SOUR:VOLT?")) == 0.0


def test_ammeter_accepts_the_drivers_generic_dialect_commands():
    # the commands of drivers/dialects/generic-scpi-picoammeter.yaml, read back
    a = SimAmmeter(VirtualClock(), seed=SEED)
    for cmd in ['SENS:FUNC "CURR"', "SENS:CURR:RANG 2e-6", "SENS:CURR:NPLC 2",
                "SYST:LFR 60", "INP:SHOR OFF", "SENS:CORR:STAT OFF"]:
        a.handle(cmd)
    assert errors(a) == []
    assert a.handle("SENS:FUNC?") == '"CURR:DC"'
    assert float(a.handle("SENS:CURR:RANG?")) == pytest.approx(2e-6)
    assert a.handle("SENS:CURR:RANG:AUTO?") == "0"      # a fixed range turns auto off
    assert float(a.handle("SENS:CURR:NPLC?")) == 2.0
    assert a.handle("SYST:LFR?") == "60"
    assert a.handle("INP:SHOR?") == "0" and a.handle("SENS:CORR:STAT?") == "0"
