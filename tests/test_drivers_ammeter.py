"""Picoammeter driver: configuration and its readback, special values matched by value,
range recorded with each reading, error flags.

SCPI-99 Vol. 1 §7.2.1.5 (from memory): INFinity is 9.9E37, NINFinity -9.9E37, NAN 9.91E37.
"""
import math
import os
import sys

import pytest

sys.path.insert(0, os.path.dirname(__file__))
from drivers_fakes import FakeAmmeter  # noqa: E402

from drivers.ammeter import ScpiAmmeter
from drivers.errors import ArmRefused, DriverError
from drivers.scpi import special_flag
from drivers.transport_inproc import InprocTransport


def make(fake=None):
    fake = fake or FakeAmmeter()
    return fake, ScpiAmmeter(InprocTransport(fake, resource="sim:test/ammeter", timeout=0.2),
                             clock=fake.clock)


def test_configure_fixed_range_and_read_back():
    fake, am = make()
    am.configure(range_a=1e-8, nplc=2.0, line_hz=50.0)
    # the smallest range holding 10 nA is 20 nA
    assert fake.range == 2e-8 and not fake.auto and fake.nplc == 2.0
    assert not fake.short and not fake.zcor                  # input shorting, zero correction off
    got = am.verify_config()
    assert got["range_a"] == 2e-8 and got["nplc"] == 2.0 and got["function"] == '"CURR"'
    r = am.read()
    assert r.value == 1.5e-9 and r.range_a == 2e-8 and r.flag is None


def test_auto_range_records_the_range_of_each_reading():
    fake, am = make()
    am.configure(range_a=None, nplc=1.0)
    assert fake.auto
    am.verify_config()
    fake.range = 2e-6
    r = am.read()
    assert r.range_a == 2e-6


@pytest.mark.parametrize("text, flag", [("+9.9E37", "overflow"), ("9.90000E+37", "overflow"),
                                        ("-9.9E37", "overflow-negative"),
                                        ("9.91E37", "invalid"), ("+9.910000E+37", "invalid")])
def test_special_values_become_flagged_readings(text, flag):
    fake, am = make()
    am.configure(range_a=2e-9)
    fake.values.append(text)
    r = am.read()
    assert r.flag == flag and math.isnan(r.value) and r.range_a == 2e-9


def test_ordinary_values_near_the_special_ones_are_not_flagged():
    assert special_flag(9.8e37) is None and special_flag(1e-12) is None
    assert special_flag(-9.91e37) is None


def test_readback_mismatch_refuses_the_arm():
    fake, am = make()
    fake.ignore.add("SENS:CURR:NPLC")                       # instrument keeps NPLC 5
    am.configure(range_a=2e-9, nplc=1.0)
    with pytest.raises(ArmRefused, match="NPLC is 5"):
        am.verify_config()
    fake2, am2 = make()
    fake2.ignore.add("INP:SHOR")
    am2.configure(range_a=2e-9)
    with pytest.raises(ArmRefused, match="input shorting is on"):
        am2.verify_config()


def test_rejected_configuration_names_the_error_queue():
    fake, am = make()
    fake.ignore.add("SENS:FUNC")
    orig = fake.command

    def command(up):
        if up.startswith("SENS:CURR:NPLC "):
            fake.error((-222, "Data out of range"))
            return None
        return orig(up)
    fake.command = command
    with pytest.raises(DriverError, match="Data out of range"):
        am.configure(range_a=2e-9, nplc=1.0)


def test_bad_requests_and_garbage():
    fake, am = make()
    with pytest.raises(DriverError, match="NPLC"):
        am.configure(nplc=100.0)
    with pytest.raises(DriverError, match="no range"):
        am.configure(range_a=1.0)
    with pytest.raises(DriverError, match="line frequency"):
        am.configure(line_hz=55.0)
    am.configure(range_a=2e-9)
    fake.values.append("OVERLOAD")
    with pytest.raises(DriverError, match="not a number"):
        am.read()


def test_burst():
    fake, am = make()
    am.configure(range_a=2e-9)
    fake.values.extend([1e-10, 2e-10, "9.9E37"])
    rs = am.read_burst(3)
    assert [r.flag for r in rs] == [None, None, "overflow"] and rs[1].value == 2e-10


def test_an_auto_range_overload_stays_on_the_range_it_was_read_on():
    # In auto-range the range is asked after READ?. A reading that overloads the 2 uA
    # range makes the instrument range up to 20 uA before the driver asks; the overload
    # (+9.9E37, SCPI-99 vol. 1 7.2.1.5, from memory) only says "above 2 uA", so it must be
    # reported on the 2 uA range, not as "above 20 uA" (which could read as a current
    # above a 5 uA ceiling and trip a healthy run).
    fake, am = make()
    am.configure(range_a=None, nplc=1.0)
    am.verify_config()
    fake.range = 2e-6
    assert am.read().range_a == 2e-6
    # the overload persists through the driver's re-reads (an arc, not a range change)
    fake.values.extend(["+9.9E37"] * (1 + am.AUTO_RANGE_REREADS))
    fake.range = 2e-5                 # the instrument ranged up on the overload
    r = am.read()
    assert r.flag == "overflow" and r.range_a == 2e-6
    fake.value = 3.1e-6               # next reading on the new range is a number again
    r = am.read()
    assert r.flag is None and r.range_a == 2e-5 and r.value == 3.1e-6


def test_an_auto_range_step_is_re_read_not_reported_as_an_arc():
    # A current rising through the 2 uA boundary overloads that range once; the
    # instrument ranges up and the driver's re-read gives the value on the new range.
    fake, am = make()
    am.configure(range_a=None, nplc=1.0)
    am.verify_config()
    fake.range = 2e-6
    am.read()
    fake.values.extend(["+9.9E37", "2.4E-6"])
    fake.range = 2e-5
    r = am.read()
    assert r.flag is None and r.value == 2.4e-6 and r.range_a == 2e-5


def test_a_fixed_range_overload_is_never_re_read():
    fake, am = make()
    am.configure(range_a=2e-6, nplc=1.0)
    fake.values.extend(["+9.9E37", "1.0E-6"])
    assert am.read().flag == "overflow"
    assert list(fake.values) == ["1.0E-6"]


def test_a_truncated_reply_is_not_read_as_a_huge_current():
    # Set: on the 2 uA range the reply "5.17E-09" arrives cut to "5.17". An instrument
    # reports over-range as +9.9E37 (SCPI-99 vol. 1 7.2.1.5, from memory), never as a
    # number far above its range, so 5.17 A on the 2 uA range is flagged invalid, not a
    # current; an honest reading a few % over range stays a number (common practice).
    fake, am = make()
    am.configure(range_a=2e-6, nplc=1.0)
    fake.values.extend(["5.17", "2.06E-06"])
    r = am.read()
    assert r.flag == "invalid" and math.isnan(r.value)
    r = am.read()
    assert r.flag is None and r.value == 2.06e-6
